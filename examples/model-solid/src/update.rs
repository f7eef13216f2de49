//! The `update` stage: chemical potential at fixed electron count, new occupations from
//! tail-corrected Matsubara sums, the f-level feedback and the total energy per site.
//!
//! Equal-time sums use a reference propagator G_ref(k) = [iω + μ − H(k) − Σ_∞ P_f]⁻¹ with the
//! Hartree constant Σ_∞ of the self-energy: its sums are Fermi functions of its eigenvalues
//! (exact), and Re Tr[A (G − G_ref)] decays as ω⁻⁴; that ω⁻⁴ tail (and the one of the
//! interaction energy) is fitted (`rondo_numerics::matsubara::fit_tail`, the fit the solvers
//! use for Δ) and summed in closed form, so the sums converge as N⁻⁵ in the number of
//! frequencies.
//! The interaction energy comes from the Galitskii–Migdal formula (V. M. Galitskii and
//! A. B. Migdal, Sov. Phys. JETP 7, 96 (1958)): E_int = (1/β) Σ_n Σ(iω_n) G_ff(iω_n) e^{iω_n 0⁺}
//! per site for two spins with ½ each.

use anyhow::{bail, Result};
use num_complex::Complex64;
use rondo_numerics::matsubara::{fermi, fermionic_grid, fit_tail, sum_with_tail_beyond, Tail};
use std::collections::BTreeMap;

use crate::io::{Density, HkMesh};
use crate::model::{lattice_g, Model, Sym2};

/// Equal-time sums at one chemical potential (per site, both spins).
#[derive(Debug, Clone, Copy, Default)]
pub struct Occupations {
    /// f occupation.
    pub n_f: f64,
    /// c occupation.
    pub n_c: f64,
    /// ⟨H_1body⟩ = 2 Σ_k w Tr[H(k) G(k, τ=0⁻)].
    pub e_one_body: f64,
    /// Galitskii–Migdal interaction energy.
    pub e_int: f64,
}

/// The Hartree constant Σ_∞ and the 1/(iω) coefficient of the self-energy, from the shared
/// least-squares fit of its high-frequency tail (`rondo_numerics::matsubara::fit_tail`).
fn sigma_tail(beta: f64, sigma: &[Complex64]) -> (f64, f64) {
    fit_tail(beta, sigma)
        .map(|f| (f.c0, f.tail.c1))
        .unwrap_or((0.0, 0.0))
}

/// Occupations and energies at chemical potential μ.
pub fn occupations(
    mesh: &HkMesh,
    sigma: &[Complex64],
    beta: f64,
    mu: f64,
    energies: bool,
) -> Occupations {
    let grid = fermionic_grid(beta, sigma.len());
    let (s_inf, s1) = sigma_tail(beta, sigma);
    let mut occ = Occupations::default();
    let zeros = || vec![Complex64::new(0.0, 0.0); sigma.len()];
    let mut gff_loc = if energies { zeros() } else { Vec::new() };
    let (mut dc, mut df) = (zeros(), zeros());
    let mut dh = if energies { zeros() } else { Vec::new() };
    for (w, h) in mesh.weights.iter().zip(&mesh.h) {
        let href = Sym2 {
            a: h.a,
            b: h.b,
            d: h.d + s_inf,
        };
        let (e, u) = href.eigen();
        // exact sums of the reference: ⟨A⟩_ref = Σ_n (U†AU)_nn f(E_n − μ)
        let f = [fermi(beta, e[0] - mu), fermi(beta, e[1] - mu)];
        let mut ref_c = 0.0;
        let mut ref_f = 0.0;
        let mut ref_h = 0.0;
        for n in 0..2 {
            let (uc, uf) = (u[0][n], u[1][n]);
            ref_c += uc * uc * f[n];
            ref_f += uf * uf * f[n];
            ref_h += (h.a * uc * uc + 2.0 * h.b * uc * uf + h.d * uf * uf) * f[n];
        }
        for (i, (&wn, s)) in grid.iter().zip(sigma).enumerate() {
            let z = Complex64::new(mu, wn);
            let g = lattice_g(z, h, *s);
            let g0 = lattice_g(z, h, Complex64::new(s_inf, 0.0));
            let d: Vec<Complex64> = g.iter().zip(&g0).map(|(a, b)| a - b).collect();
            dc[i] += d[0] * w;
            df[i] += d[3] * w;
            if energies {
                dh[i] += (d[0] * h.a + (d[1] + d[2]) * h.b + d[3] * h.d) * w;
                gff_loc[i] += g[3] * w;
            }
        }
        occ.n_c += 2.0 * w * ref_c;
        occ.n_f += 2.0 * w * ref_f;
        occ.e_one_body += 2.0 * w * ref_h;
    }
    // The k-summed differences D = Σ_k w_k (G − G_ref): G and G_ref share their 1/(iω) and
    // 1/(iω)² moments, so D = c3/(iω)³ + c4/(iω)⁴ + …; c4 comes from the shared tail fit and
    // its sum beyond the grid is added in closed form, which leaves an O(N⁻⁵) truncation
    // error instead of the O(N⁻³) of the bare sum (c3 has no real part).
    let sum = |d: &[Complex64]| {
        let fit = fit_tail(beta, d).unwrap_or_default();
        let tail = Tail {
            c1: 0.0,
            c2: 0.0,
            c3: 0.0,
            c4: fit.tail.c4,
        };
        2.0 * sum_with_tail_beyond(beta, d, tail)
    };
    occ.n_c += sum(&dc);
    occ.n_f += sum(&df);
    if energies {
        occ.e_one_body += sum(&dh);
    }
    if energies {
        // E_int = (1/β)Σ_n Σ G_ff = Σ_∞ n_f/2 + (1/β)Σ_n (Σ−Σ_∞) G_ff. The product decays as
        // s1/(iω)² (s1 the 1/(iω) moment of Σ); its 1/(iω)³ and 1/(iω)⁴ moments come from the
        // shared tail fit, so the truncated sum errs by O(N⁻⁵) instead of O(N⁻³) (with the
        // 1/(iω)² term alone: about 5e-5 eV at 300 K and 512 frequencies in the demo).
        let prod: Vec<Complex64> = sigma
            .iter()
            .zip(&gff_loc)
            .map(|(s, g)| (s - s_inf) * g)
            .collect();
        let fit = fit_tail(beta, &prod).unwrap_or_default();
        let tail = Tail {
            c1: 0.0,
            c2: s1,
            c3: 0.0,
            c4: fit.tail.c4,
        };
        let rest = sum_with_tail_beyond(beta, &prod, tail);
        occ.e_int = s_inf * occ.n_f / 2.0 + rest;
    }
    occ
}

/// Result of the chemical-potential search.
#[derive(Debug, Clone, Copy)]
pub struct MuSearch {
    /// The chemical potential.
    pub mu: f64,
    /// Electron count reached.
    pub n: f64,
    /// Width of the interval of μ holding the count within tolerance (≈ 0 for a metal,
    /// ≈ the gap for an insulator).
    pub plateau: f64,
    /// Number of n(μ) evaluations.
    pub evaluations: usize,
}

/// Find μ with n(μ) = target by bracketing and bisection, robust for metals and gaps.
///
/// n(μ) is non-decreasing. Two bisections find μ_a = the lowest μ with n ≥ target − tol and
/// μ_b = the highest μ with n ≤ target + tol; the result is their midpoint. In a metal the
/// two coincide; in a gap any μ between them holds the count, and the mid-gap value is chosen.
pub fn find_mu(
    n_of_mu: &mut dyn FnMut(f64) -> f64,
    target: f64,
    guess: f64,
    tol: f64,
) -> Result<MuSearch> {
    let mut evals = 0usize;
    let mut n = |mu: f64| {
        evals += 1;
        n_of_mu(mu)
    };
    // bracket: expand geometrically around the guess
    let (mut lo, mut hi) = (guess - 1.0, guess + 1.0);
    let mut step = 1.0;
    let mut k = 0;
    while n(lo) > target - tol {
        step *= 2.0;
        lo -= step;
        k += 1;
        if k > 60 {
            bail!("cannot bracket the chemical potential from below (target {target} electrons)");
        }
    }
    step = 1.0;
    k = 0;
    while n(hi) < target + tol {
        step *= 2.0;
        hi += step;
        k += 1;
        if k > 60 {
            bail!("cannot bracket the chemical potential from above (target {target} electrons: more than the bands hold?)");
        }
    }
    let bisect =
        |n: &mut dyn FnMut(f64) -> f64, mut a: f64, mut b: f64, pred: &dyn Fn(f64) -> bool| {
            // invariant: !pred(a), pred(b)
            for _ in 0..200 {
                let m = 0.5 * (a + b);
                if m <= a || m >= b {
                    break;
                }
                if pred(n(m)) {
                    b = m;
                } else {
                    a = m;
                }
            }
            (a, b)
        };
    // μ_a: first μ with n ≥ target − tol
    let (_, mu_a) = bisect(&mut n, lo, hi, &|x| x >= target - tol);
    // μ_b: last μ with n ≤ target + tol  (pred: n > target + tol)
    let (mu_b, _) = bisect(&mut n, lo, hi, &|x| x > target + tol);
    let mu = 0.5 * (mu_a + mu_b);
    let n_mu = n(mu);
    if (n_mu - target).abs() > tol {
        bail!(
            "chemical potential search did not reach the target: n({mu}) = {n_mu}, target {target}"
        );
    }
    Ok(MuSearch {
        mu,
        n: n_mu,
        plateau: (mu_b - mu_a).max(0.0),
        evaluations: evals,
    })
}

/// Output of the update stage.
#[derive(Debug, Clone)]
pub struct UpdateOutput {
    /// The new density.
    pub density: Density,
    /// Metrics.
    pub metrics: BTreeMap<&'static str, f64>,
}

/// Run the density update.
pub fn update(
    model: &Model,
    mesh: &HkMesh,
    sigma: &[Complex64],
    beta: f64,
    electrons: f64,
    volume: f64,
    previous: &Density,
) -> Result<UpdateOutput> {
    if !(electrons.is_finite() && electrons > 0.0 && electrons < 4.0) {
        bail!(
            "electron count must lie in (0, 4) per site (two orbitals, two spins), got {electrons}"
        );
    }
    let mut nfun = |mu: f64| {
        let o = occupations(mesh, sigma, beta, mu, false);
        o.n_f + o.n_c
    };
    let search = find_mu(&mut nfun, electrons, previous.mu, 1e-11)?;
    let occ = occupations(mesh, sigma, beta, search.mu, true);
    // The band stage put ε_f(n_in) = ε_f0 + K(n_in − n_ref) into H(k); read it back from H_ff.
    let eps_f_in = mesh.h.first().map(|h| h.d).unwrap_or(model.eps_f0);
    let shift = eps_f_in - model.eps_f0;
    let feedback = -shift * occ.n_f + 0.5 * model.feedback * (occ.n_f - model.n_ref).powi(2);
    let core = model.core_energy(volume);
    let energy = occ.e_one_body + occ.e_int + feedback + core;
    let density = Density {
        n_f: occ.n_f,
        n_c: occ.n_c,
        mu: search.mu,
        energy: Some(energy),
    };
    let delta_n = (occ.n_f - previous.n_f).abs();
    let mut metrics = BTreeMap::new();
    metrics.insert("n_f", occ.n_f);
    metrics.insert("n_c", occ.n_c);
    metrics.insert("n_total", occ.n_f + occ.n_c);
    metrics.insert("mu", search.mu);
    metrics.insert("mu_plateau", search.plateau);
    metrics.insert("energy", energy);
    metrics.insert("e_one_body", occ.e_one_body);
    metrics.insert("e_interaction", occ.e_int);
    metrics.insert("e_feedback", feedback);
    metrics.insert("e_core", core);
    metrics.insert("delta_n_f", delta_n);
    if let Some(e) = previous.energy {
        metrics.insert("delta_energy", (energy - e).abs());
    }
    Ok(UpdateOutput { density, metrics })
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::band::band;
    use crate::model::DEMO;
    use crate::solve::{atom, hubbard_i, SolverInput};

    fn zero_sigma(n: usize) -> Vec<Complex64> {
        vec![Complex64::new(0.0, 0.0); n]
    }

    #[test]
    fn free_occupations_equal_fermi_sums() {
        // Σ = 0: n = 2 Σ_k w Σ_n f(E_nk − μ) exactly (the reference propagator is G itself).
        let d = Density {
            n_f: 1.0,
            n_c: 0.8,
            mu: 0.0,
            energy: None,
        };
        let mesh = band(&DEMO, 28.0, 8, &d, false).mesh;
        let beta = 30.0;
        let mu = -0.3;
        let o = occupations(&mesh, &zero_sigma(128), beta, mu, true);
        let mut n = 0.0;
        let mut e = 0.0;
        for (w, h) in mesh.weights.iter().zip(&mesh.h) {
            let (ev, _) = h.eigen();
            for x in ev {
                n += 2.0 * w * fermi(beta, x - mu);
                e += 2.0 * w * x * fermi(beta, x - mu);
            }
        }
        assert!((o.n_f + o.n_c - n).abs() < 1e-13);
        assert!((o.e_one_body - e).abs() < 1e-13);
        assert!(o.e_int.abs() < 1e-14);
    }

    #[test]
    fn mu_search_metal_reaches_count() {
        let d = Density {
            n_f: 1.0,
            n_c: 0.8,
            mu: 0.0,
            energy: None,
        };
        let mesh = band(&DEMO, 28.0, 12, &d, false).mesh;
        let sigma = zero_sigma(512);
        let beta = 1.0 / (rondo_numerics::units::BOLTZMANN_EV_PER_K * 600.0);
        let mut f = |mu: f64| {
            let o = occupations(&mesh, &sigma, beta, mu, false);
            o.n_f + o.n_c
        };
        let s = find_mu(&mut f, 1.8, 3.0, 1e-11).unwrap();
        assert!((s.n - 1.8).abs() < 1e-10);
        assert!(s.plateau < 1e-6);
    }

    #[test]
    fn mu_search_gapped_picks_mid_gap() {
        // Particle-hole symmetric hybridization-gap insulator: ε_f = 0, v = 1, ε_c symmetric,
        // two electrons per site. The gap is symmetric about 0, so the mid-gap μ is 0.
        let mut m = DEMO;
        m.eps_f0 = 0.0;
        m.feedback = 0.0;
        m.hyb0 = 1.0;
        m.p_v = 0.0;
        m.t0 = 0.2;
        m.p_t = 0.0;
        let d = Density {
            n_f: 1.0,
            n_c: 1.0,
            mu: 0.0,
            energy: None,
        };
        let mesh = band(&m, 28.0, 8, &d, false).mesh;
        let sigma = zero_sigma(256);
        let beta = 100.0;
        let mut f = |mu: f64| {
            let o = occupations(&mesh, &sigma, beta, mu, false);
            o.n_f + o.n_c
        };
        let s = find_mu(&mut f, 2.0, 0.37, 1e-11).unwrap();
        assert!((s.n - 2.0).abs() < 1e-10);
        assert!(s.mu.abs() < 1e-6, "mid-gap μ = {}", s.mu);
        assert!(s.plateau > 0.1, "plateau {}", s.plateau);
        // asymmetric gap: μ lies inside the gap between the band edges
        let mut m2 = m;
        m2.eps_f0 = 0.5;
        let mesh2 = band(&m2, 28.0, 8, &d, false).mesh;
        let (top_lower, bottom_upper) = mesh2.h.iter().fold((f64::MIN, f64::MAX), |(a, b), h| {
            let (e, _) = h.eigen();
            (a.max(e[0]), b.min(e[1]))
        });
        let mut f2 = |mu: f64| {
            let o = occupations(&mesh2, &sigma, beta, mu, false);
            o.n_f + o.n_c
        };
        let s2 = find_mu(&mut f2, 2.0, 0.0, 1e-11).unwrap();
        assert!((s2.n - 2.0).abs() < 1e-10);
        assert!(s2.mu > top_lower && s2.mu < bottom_upper);
        assert!((s2.mu - 0.5 * (top_lower + bottom_upper)).abs() < 0.05);
    }

    #[test]
    fn atomic_limit_energy_and_occupation() {
        // v = 0 and a flat conduction band far above μ: the lattice f orbital is the Hubbard
        // atom, so n_f and the Galitskii–Migdal energy equal the closed forms (Hubbard 1963;
        // reference/output/atomic_limit.txt: β = 10, U = 3, ε = −0.5 → E = −0.49832116916945867).
        let mesh = HkMesh {
            weights: vec![1.0],
            h: vec![Sym2 {
                a: 50.0,
                b: 0.0,
                d: -0.5,
            }],
        };
        let beta = 10.0;
        let delta = zero_sigma(4096);
        let hi = hubbard_i(&SolverInput {
            delta: &delta,
            level: -0.5,
            u: 3.0,
            beta,
            seed: 0,
            sweeps: None,
        });
        let o = occupations(&mesh, &hi.sigma, beta, 0.0, true);
        let at = atom(-0.5, 3.0, beta);
        assert!(
            (o.n_f - 2.0 * at.n_sigma).abs() < 1e-10,
            "{} vs {}",
            o.n_f,
            2.0 * at.n_sigma
        );
        assert!(o.n_c < 1e-100_f64.max(1e-15));
        assert!(
            (o.e_one_body + o.e_int + 0.498_321_169_169_458_7).abs() < 1e-8,
            "{}",
            o.e_one_body + o.e_int
        );
        assert!((o.e_int - 3.0 * at.docc).abs() < 1e-8);
    }

    #[test]
    fn sums_converge_in_the_number_of_frequencies() {
        // The demo model at 28 Å³ and 300 K with a Hubbard-I self-energy (U = 6, level
        // −0.96 eV, μ = −0.25 eV): occupations and energies from the demo's 512 frequencies
        // against 8192. With the fitted ω⁻⁴ tails summed beyond the grid the differences are
        // 4e-8 (n_f, E_1body) and 1.3e-7 eV (E_int); with the bare sums and the 1/(iω)²
        // tail alone they were 2.0e-5, 2.3e-5 and 4.6e-5 (O(N⁻³)).
        let d = Density {
            n_f: 1.0,
            n_c: 0.8,
            mu: 0.0,
            energy: None,
        };
        let mesh = band(&DEMO, 28.0, 8, &d, false).mesh;
        let beta = 1.0 / (rondo_numerics::units::BOLTZMANN_EV_PER_K * 300.0);
        let occ = |n_w: usize| {
            let delta = zero_sigma(n_w);
            let hi = hubbard_i(&SolverInput {
                delta: &delta,
                level: -0.96,
                u: 6.0,
                beta,
                seed: 0,
                sweeps: None,
            });
            occupations(&mesh, &hi.sigma, beta, -0.25, true)
        };
        let (a, b) = (occ(512), occ(8192));
        assert!((a.n_f - b.n_f).abs() < 2e-7, "n_f {} vs {}", a.n_f, b.n_f);
        assert!((a.n_c - b.n_c).abs() < 2e-7, "n_c {} vs {}", a.n_c, b.n_c);
        assert!((a.e_one_body - b.e_one_body).abs() < 2e-7);
        assert!(
            (a.e_int - b.e_int).abs() < 5e-7,
            "{} vs {}",
            a.e_int,
            b.e_int
        );
    }
}
