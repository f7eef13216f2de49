//! The `solve` stage: impurity solvers behind one dispatch point, and the Hubbard-I solver.
//!
//! Hubbard-I (J. Hubbard, Proc. R. Soc. A 276, 238 (1963); used as a DMFT impurity solver by
//! A. I. Lichtenstein and M. I. Katsnelson, Phys. Rev. B 57, 6884 (1998)): the impurity
//! Green's function is that of the isolated atom with level e = ε_loc − μ plus the static
//! part of Δ, and Σ(iω) = iω − e − G_at(iω)⁻¹. For one spin-degenerate orbital the atomic
//! states are |0⟩ (energy 0), |↑⟩,|↓⟩ (e) and |↑↓⟩ (2e+U), and
//! G_at(iω) = (1−n_σ)/(iω−e) + n_σ/(iω−e−U) with n_σ = P(1)/2 + P(2).
//!
//! The static part Δ_0 = lim Re Δ(iω) is taken from the fit of the high-frequency tail
//! shared with the Monte Carlo solver ([`delta_static`], `rondo_numerics::matsubara::fit_tail`),
//! so both solvers use the same level for the same input and it does not depend on the number
//! of frequencies; both report it as the metrics `level` and `delta_static`.

use anyhow::{bail, Result};
use num_complex::Complex64;
use rondo_numerics::matsubara::{fermionic_grid, fit_tail};
use std::collections::BTreeMap;

/// The impurity solvers this build knows.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum SolverKind {
    /// The deterministic atomic-limit solver.
    HubbardI,
    /// Hybridization-expansion CT-QMC in the segment picture (`crate::ctqmc`).
    Ctqmc,
}

impl std::str::FromStr for SolverKind {
    type Err = String;
    fn from_str(s: &str) -> Result<Self, Self::Err> {
        match s {
            "hubbard-i" => Ok(SolverKind::HubbardI),
            "ctqmc" => Ok(SolverKind::Ctqmc),
            other => Err(format!(
                "unknown solver '{other}' (available: hubbard-i, ctqmc)"
            )),
        }
    }
}

/// Everything a solver gets.
#[derive(Debug, Clone)]
pub struct SolverInput<'a> {
    /// Hybridization function Δ(iω_n) on the positive grid.
    pub delta: &'a [Complex64],
    /// Local level ε_loc − μ (eV).
    pub level: f64,
    /// Hubbard U (eV).
    pub u: f64,
    /// Inverse temperature (1/eV).
    pub beta: f64,
    /// Seed for stochastic solvers.
    pub seed: u64,
    /// Monte Carlo sweeps for stochastic solvers (`None`: the solver's default; ignored by
    /// deterministic solvers).
    pub sweeps: Option<u64>,
}

/// A metric: its value and, for statistical estimates, its standard error.
pub type Metric = (f64, Option<f64>);

/// Imaginary-time data of a stochastic solver, for reports and diagnostics.
#[derive(Debug, Clone)]
pub struct ImaginaryTime {
    /// Legendre coefficients G_l (spin averaged).
    pub gl: Vec<f64>,
    /// Standard errors of `gl`.
    pub gl_err: Vec<f64>,
    /// τ of the histogram bins (bin centres).
    pub tau: Vec<f64>,
    /// G(τ) bin averages.
    pub g_tau: Vec<f64>,
    /// Standard errors of `g_tau`.
    pub g_tau_err: Vec<f64>,
}

/// What every solver returns.
#[derive(Debug, Clone)]
pub struct SolverOutput {
    /// Impurity Green's function G(iω_n).
    pub g: Vec<Complex64>,
    /// Self-energy Σ(iω_n).
    pub sigma: Vec<Complex64>,
    /// Metrics (n_f, docc, p0, p1, p2, ...): value and standard error (`None` for exact or
    /// deterministic quantities).
    pub metrics: BTreeMap<&'static str, Metric>,
    /// G_l and G(τ) with errors (stochastic solvers only).
    pub imaginary_time: Option<ImaginaryTime>,
}

/// The one dispatch point: further solvers add a variant and an arm here.
pub fn run_solver(kind: SolverKind, input: &SolverInput<'_>) -> Result<SolverOutput> {
    if !(input.beta.is_finite() && input.beta > 0.0) {
        bail!("inverse temperature must be positive, got {}", input.beta);
    }
    if !input.u.is_finite() || input.u < 0.0 {
        bail!("U must be finite and non-negative, got {}", input.u);
    }
    match kind {
        SolverKind::HubbardI => Ok(hubbard_i(input)),
        SolverKind::Ctqmc => crate::ctqmc::run(input),
    }
}

/// Atomic quantities of the one-orbital Hubbard atom.
#[derive(Debug, Clone, Copy)]
pub struct Atom {
    /// P(0), P(1) (both spin states together), P(2).
    pub p: [f64; 3],
    /// Occupation per spin.
    pub n_sigma: f64,
    /// Double occupancy ⟨n↑n↓⟩ = P(2).
    pub docc: f64,
    /// ⟨H_at⟩ = e·2n_σ + U·P(2).
    pub energy: f64,
}

/// Probabilities of the atomic configurations, overflow-safe (energies shifted by the lowest).
pub fn atom(level: f64, u: f64, beta: f64) -> Atom {
    let en = [0.0, level, 2.0 * level + u];
    let emin = en.iter().cloned().fold(f64::INFINITY, f64::min);
    let bw = [
        (-beta * (en[0] - emin)).exp(),
        2.0 * (-beta * (en[1] - emin)).exp(),
        (-beta * (en[2] - emin)).exp(),
    ];
    let z: f64 = bw.iter().sum();
    let p = [bw[0] / z, bw[1] / z, bw[2] / z];
    let n_sigma = 0.5 * p[1] + p[2];
    Atom {
        p,
        n_sigma,
        docc: p[2],
        energy: level * 2.0 * n_sigma + u * p[2],
    }
}

/// The static part Δ_0 = lim_{ω→∞} Re Δ(iω) of the hybridization function, from the
/// least-squares fit of its high-frequency tail (`rondo_numerics::matsubara::fit_tail`);
/// 0 for an empty Δ. Every solver moves it into the impurity level: e = ε_loc − μ + Δ_0.
/// (With the exact projection of `project` Δ_0 vanishes analytically; the fit keeps the
/// level right for inputs that carry a constant.)
pub fn delta_static(beta: f64, delta: &[Complex64]) -> f64 {
    fit_tail(beta, delta).map(|f| f.c0).unwrap_or(0.0)
}

/// The Hubbard-I solver.
pub fn hubbard_i(input: &SolverInput<'_>) -> SolverOutput {
    let delta_static = delta_static(input.beta, input.delta);
    let e = input.level + delta_static;
    let at = atom(e, input.u, input.beta);
    let grid = fermionic_grid(input.beta, input.delta.len());
    let mut g = Vec::with_capacity(grid.len());
    let mut sigma = Vec::with_capacity(grid.len());
    for w in grid {
        let iw = Complex64::new(0.0, w);
        let ga = (1.0 - at.n_sigma) / (iw - e) + at.n_sigma / (iw - e - input.u);
        sigma.push(iw - e - ga.inv());
        g.push(ga);
    }
    // Σ(iω) = U n_σ + U² n_σ(1 − n_σ)/(iω − e − U(1 − n_σ)): its constant is U n_σ exactly.
    let sigma_inf = input.u * at.n_sigma;
    let metrics = [
        ("n_f", 2.0 * at.n_sigma),
        ("docc", at.docc),
        ("p0", at.p[0]),
        ("p1", at.p[1]),
        ("p2", at.p[2]),
        ("energy_atomic", at.energy),
        ("level", e),
        ("delta_static", delta_static),
        ("sigma_inf", sigma_inf),
    ]
    .into_iter()
    .map(|(k, v)| (k, (v, None)))
    .collect();
    SolverOutput {
        g,
        sigma,
        metrics,
        imaginary_time: None,
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    // Closed forms of the atomic Hubbard model (Hubbard 1963); reference values computed
    // with mpmath, see reference/atomic_limit.py and reference/output/atomic_limit.txt.
    fn run(level: f64, u: f64, beta: f64, n: usize) -> SolverOutput {
        let delta = vec![Complex64::new(0.0, 0.0); n];
        run_solver(
            SolverKind::HubbardI,
            &SolverInput {
                delta: &delta,
                level,
                u,
                beta,
                seed: 0,
                sweeps: None,
            },
        )
        .unwrap()
    }

    #[test]
    fn atomic_limit_half_filling() {
        // β = 20, U = 4, ε = −2
        let out = run(-2.0, 4.0, 20.0, 8);
        let m = &out.metrics;
        assert!((m["p0"].0 - 2.124_177_127_645_794_5e-18).abs() < 1e-28);
        assert!((m["p2"].0 - 2.124_177_127_645_794_5e-18).abs() < 1e-28);
        assert!((m["p1"].0 - 1.0).abs() < 1e-15);
        assert!((m["n_f"].0 - 1.0).abs() < 1e-15);
        assert!((m["energy_atomic"].0 + 2.0).abs() < 1e-10);
        assert!((out.g[0] - Complex64::new(0.0, -0.039_029_156_709_354_01)).norm() < 1e-15);
        assert!((out.g[1] - Complex64::new(0.0, -0.111_613_339_769_206_03)).norm() < 1e-15);
        assert!((out.g[5] - Complex64::new(0.0, -0.247_349_835_126_927_13)).norm() < 1e-15);
    }

    #[test]
    fn atomic_limit_away_from_half_filling() {
        // β = 10, U = 3, ε = −0.5
        let out = run(-0.5, 3.0, 10.0, 8);
        let m = &out.metrics;
        assert!((m["p0"].0 - 0.003_357_661_626_479_377_5).abs() < 1e-12);
        assert!((m["p1"].0 - 0.996_642_338_366_6).abs() < 1e-12);
        assert!((m["p2"].0 - 6.920_656_424_340_909e-12).abs() < 1e-20);
        assert!((m["docc"].0 - 6.920_656_424_340_909e-12).abs() < 1e-20);
        assert!((m["n_f"].0 - 0.996_642_338_380_441_3).abs() < 1e-12);
        assert!((m["energy_atomic"].0 + 0.498_321_169_169_458_7).abs() < 1e-10);
        assert!(
            (out.g[0] - Complex64::new(0.523_134_366_701_935_2, -0.476_648_748_891_871_6)).norm()
                < 1e-10
        );
        assert!(
            (out.g[1] - Complex64::new(0.045_845_453_597_510_88, -0.481_182_047_499_808_3)).norm()
                < 1e-10
        );
        assert!(
            (out.g[5] - Complex64::new(-0.047_906_252_825_288_51, -0.236_855_309_779_465_94))
                .norm()
                < 1e-10
        );
        // Σ → U n_σ (Hartree) at high frequency
        let big = run(-0.5, 3.0, 10.0, 20000);
        let s = big.sigma.last().copied().unwrap_or_default();
        assert!((s.re - 3.0 * 0.498_321_169_190_220_6).abs() < 1e-5);
    }

    #[test]
    fn uncorrelated_half_filling() {
        // U = 0, ε = 0: independent spins each half filled, so P(0) = P(2) = 1/4 and
        // P(1) = 1/2 (fact of the trade); Σ vanishes.
        for beta in [1.0, 10.0, 100.0] {
            let out = run(0.0, 0.0, beta, 16);
            assert!((out.metrics["p0"].0 - 0.25).abs() < 1e-15);
            assert!((out.metrics["p1"].0 - 0.5).abs() < 1e-15);
            assert!((out.metrics["p2"].0 - 0.25).abs() < 1e-15);
            assert!(out.sigma.iter().all(|s| s.norm() < 1e-12)); // roundoff of iω − 1/G
        }
    }

    #[test]
    fn extreme_levels_do_not_overflow() {
        let out = run(-50.0, 4.0, 1000.0, 4);
        assert!((out.metrics["p2"].0 - 1.0).abs() < 1e-15);
        assert!(out
            .sigma
            .iter()
            .all(|s| s.re.is_finite() && s.im.is_finite()));
    }

    #[test]
    fn bad_inputs_rejected() {
        let delta = vec![Complex64::new(0.0, 0.0); 4];
        let inp = SolverInput {
            delta: &delta,
            level: 0.0,
            u: -1.0,
            beta: 10.0,
            seed: 0,
            sweeps: None,
        };
        assert!(run_solver(SolverKind::HubbardI, &inp).is_err());
        assert!("ctqmc-x".parse::<SolverKind>().is_err());
    }

    // --- The static part of Δ and the number of Matsubara frequencies -------------------
    //
    // Two hybridization functions without a static part (reference/hubbard_i_bath.py and
    // reference/output/hubbard_i_bath.txt): (A) three discrete bath levels,
    // Δ(iω) = Σ_b V_b²/(iω − ε_b); (B) the semicircular (Bethe-lattice) hybridization of
    // half-width D = 1 centred at ε0 = 0.3, Δ(iω) = t² G_sc(iω − ε0), t = D/2,
    // G_sc(z) = (2/D²)(z − √(z−D)√(z+D)) (branch-safe on ℂ \ [−D, D]). Impurity: β = 10,
    // level e = 0.1, U = 2 (a mixed-valent orbital, n_f ≈ 0.42, whose occupation reacts to
    // the level: the last-frequency static part moved it by 1.5e-3 relative at 64
    // frequencies, see the reference output).
    const HI_BETA: f64 = 10.0;
    const HI_LEVEL: f64 = 0.1;
    const HI_U: f64 = 2.0;
    const BATH_A: [(f64, f64); 3] = [(-0.6, 0.2), (0.8, 0.5), (1.5, 0.4)];

    fn bath_a(n_w: usize, c0: f64) -> Vec<Complex64> {
        fermionic_grid(HI_BETA, n_w)
            .iter()
            .map(|w| {
                let iw = Complex64::new(0.0, *w);
                Complex64::new(c0, 0.0)
                    + BATH_A
                        .iter()
                        .map(|(e, v)| v * v / (iw - e))
                        .sum::<Complex64>()
            })
            .collect()
    }

    fn bath_b(n_w: usize) -> Vec<Complex64> {
        let (d, eps0) = (1.0, 0.3);
        let t2 = 0.25 * d * d;
        fermionic_grid(HI_BETA, n_w)
            .iter()
            .map(|w| {
                let z = Complex64::new(-eps0, *w);
                t2 * (2.0 / (d * d)) * (z - (z - d).sqrt() * (z + d).sqrt())
            })
            .collect()
    }

    fn hubbard_i_on(delta: &[Complex64], level: f64) -> SolverOutput {
        run_solver(
            SolverKind::HubbardI,
            &SolverInput {
                delta,
                level,
                u: HI_U,
                beta: HI_BETA,
                seed: 0,
                sweeps: None,
            },
        )
        .unwrap()
    }

    fn rel(a: f64, b: f64) -> f64 {
        (a - b).abs() / b.abs()
    }

    #[test]
    fn hubbard_i_does_not_depend_on_the_number_of_frequencies() {
        for (name, small, large) in [
            ("A", bath_a(64, 0.0), bath_a(1024, 0.0)),
            ("B", bath_b(64), bath_b(1024)),
        ] {
            let (a, b) = (
                hubbard_i_on(&small, HI_LEVEL),
                hubbard_i_on(&large, HI_LEVEL),
            );
            for k in ["n_f", "level", "docc", "sigma_inf"] {
                let (x, y) = (a.metrics[k].0, b.metrics[k].0);
                assert!(rel(x, y) < 1e-5, "bath {name}: {k} {x} (64) vs {y} (1024)");
            }
            // Σ on the 64 frequencies the two grids share.
            for (n, (x, y)) in a.sigma.iter().zip(&b.sigma).enumerate() {
                assert!(
                    (x - y).norm() < 1e-5 * y.norm(),
                    "bath {name}: Σ(iω_{n}) {x} (64) vs {y} (1024)"
                );
            }
        }
    }

    #[test]
    fn hubbard_i_is_the_exact_atomic_self_energy_of_the_bare_level() {
        // Both baths have no static part, so Hubbard-I must return the atomic self-energy of
        // the bare level e (Hubbard 1963; 1/G_at solved from the two-pole G_at above):
        //   Σ_at(iω) = U n + U² n(1 − n)/(iω − e − U(1 − n)),
        //   n = P(1)/2 + P(2),  P ∝ (1, 2e^{−βe}, e^{−β(2e+U)}).
        let z =
            1.0 + 2.0 * (-HI_BETA * HI_LEVEL).exp() + (-HI_BETA * (2.0 * HI_LEVEL + HI_U)).exp();
        let n = (-HI_BETA * HI_LEVEL).exp() / z + (-HI_BETA * (2.0 * HI_LEVEL + HI_U)).exp() / z;
        // mpmath values of n and Σ_at (reference/output/hubbard_i_bath.txt).
        assert!((n - 0.211_941_557_743_731_14).abs() < 1e-15);
        let reference = [
            (
                0,
                Complex64::new(0.038_817_356_481_870_85, -0.072_173_949_849_133_86),
            ),
            (
                1,
                Complex64::new(0.121_041_796_283_310_15, -0.170_287_180_877_346_95),
            ),
            (
                5,
                Complex64::new(0.347_972_933_534_939_8, -0.156_508_629_782_386_59),
            ),
            (
                63,
                Complex64::new(0.423_180_907_322_218_7, -0.016_715_338_188_388_5),
            ),
        ];
        for delta in [bath_a(64, 0.0), bath_b(64), bath_a(1024, 0.0), bath_b(1024)] {
            let out = hubbard_i_on(&delta, HI_LEVEL);
            // The fitted static part is zero to the fit's truncation error (≲ 1e-11 here).
            assert!(
                out.metrics["delta_static"].0.abs() < 1e-10,
                "{:?}",
                out.metrics
            );
            assert!(rel(out.metrics["n_f"].0, 2.0 * n) < 1e-9);
            for (k, w) in fermionic_grid(HI_BETA, delta.len()).iter().enumerate() {
                let iw = Complex64::new(0.0, *w);
                let exact =
                    HI_U * n + HI_U * HI_U * n * (1.0 - n) / (iw - HI_LEVEL - HI_U * (1.0 - n));
                assert!(
                    (out.sigma[k] - exact).norm() < 1e-9 * exact.norm(),
                    "Σ(iω_{k})"
                );
            }
            for (k, s) in reference {
                assert!(
                    (out.sigma[k] - s).norm() < 1e-9 * s.norm(),
                    "Σ(iω_{k}) vs mpmath"
                );
            }
        }
    }

    #[test]
    fn a_static_part_of_delta_moves_the_level_exactly() {
        // Δ + c0: the same atom with the level e + c0, from 64 frequencies as from 1024.
        for c0 in [0.25, -0.4] {
            let shifted = hubbard_i_on(&bath_a(64, c0), HI_LEVEL);
            let bare = hubbard_i_on(&bath_a(1024, 0.0), HI_LEVEL + c0);
            assert!((shifted.metrics["delta_static"].0 - c0).abs() < 1e-10);
            assert!((shifted.metrics["level"].0 - (HI_LEVEL + c0)).abs() < 1e-10);
            assert!(rel(shifted.metrics["n_f"].0, bare.metrics["n_f"].0) < 1e-9);
        }
    }
}
