//! Tests of the segment-picture CT-QMC solver against closed forms and exact diagonalisation.

use model_solid::ctqmc::{solve, CtqmcParams, GreenEstimator};
use model_solid::solve::SolverInput;
use num_complex::Complex64;
use rondo_numerics::legendre::free_level_gl;
use rondo_numerics::matsubara::fermionic_frequency;

/// Δ(iω_n) = Σ_b V_b²/(iω_n − ε_b) on the first `n` positive frequencies.
fn bath_delta(beta: f64, bath: &[(f64, f64)], n: usize) -> Vec<Complex64> {
    (0..n as i64)
        .map(|k| {
            let iw = Complex64::new(0.0, fermionic_frequency(beta, k));
            bath.iter().map(|(e, v)| v * v / (iw - e)).sum()
        })
        .collect()
}

fn input<'a>(delta: &'a [Complex64], level: f64, u: f64, beta: f64, seed: u64) -> SolverInput<'a> {
    SolverInput {
        delta,
        level,
        u,
        beta,
        seed,
        sweeps: None,
    }
}

/// Parameters small enough for a debug build (about a second per run).
fn short_params(sweeps: u64) -> CtqmcParams {
    CtqmcParams {
        sweeps,
        warmup_sweeps: 200,
        moves_per_sweep: 20,
        n_legendre: 30,
        n_tau_bins: 20,
        n_tau_grid: 1000,
        n_blocks: 128,
        check_every: 100,
    }
}

#[test]
fn kernel_on_exact_free_level_reproduces_closed_form_gl() {
    // Boehnke et al., PRB 84, 075145 (2011): G_l = (−1)^{l+1} β √(2l+1) i_l(βε/2)/(2cosh(βε/2))
    // for G(τ) = −e^{−ετ}/(1+e^{−βε}); β = 10, ε = 0.3 gives G_0..G_2 =
    // −3.0171608454828881275, 2.2895854392403689906, −0.83489256561918203197 (mpmath).
    let (beta, eps) = (10.0, 0.3);
    let n = 100_000;
    let h = beta / n as f64;
    let mut est = GreenEstimator::new(beta, 12, 100);
    for i in 0..n {
        let tau = (i as f64 + 0.5) * h;
        let g = -(-eps * tau).exp() / (1.0 + (-beta * eps).exp());
        est.add(tau, g * h);
    }
    let want = free_level_gl(beta, eps, 12);
    assert!((want[0] + 3.017_160_845_482_888).abs() < 1e-13);
    assert!((want[1] - 2.289_585_439_240_369).abs() < 1e-13);
    assert!((want[2] + 0.834_892_565_619_182).abs() < 1e-13);
    assert_eq!(est.legendre().len(), want.len(), "12 coefficients each");
    for (l, (got, w)) in est.legendre().iter().zip(&want).enumerate() {
        // Midpoint rule, h = 1e-4: error O(h²) well below 1e-7.
        assert!((got - w).abs() < 1e-7, "l={l}");
    }
    // The histogram holds bin averages of G(τ): compare with the exact bin average.
    for (i, (t, g)) in est.bin_centres().iter().zip(est.binned()).enumerate() {
        let (a, b) = (t - 0.05, t + 0.05);
        let z = 1.0 + (-beta * eps).exp();
        let avg = -((-eps * a).exp() - (-eps * b).exp()) / (eps * z) / 0.1;
        assert!((g - avg).abs() < 1e-9, "bin {i}: {g} vs {avg}");
    }
}

/// One exact-diagonalisation case of reference/ed_bath.py (output/ed_bath.json).
struct EdCase {
    name: String,
    beta: f64,
    u: f64,
    eps: f64,
    bath: Vec<(f64, f64)>,
    n_sigma: f64,
    docc: f64,
    p: [f64; 3],
    gl: Vec<f64>,
    gtau_bins: Vec<f64>,
    giw: Vec<Complex64>,
}

fn ed_cases() -> (usize, Vec<EdCase>) {
    let path = concat!(
        env!("CARGO_MANIFEST_DIR"),
        "/../../reference/output/ed_bath.json"
    );
    let text = std::fs::read_to_string(path).expect("reference/output/ed_bath.json readable");
    let v: serde_json::Value = serde_json::from_str(&text).expect("ed_bath.json is JSON");
    let f = |x: &serde_json::Value| x.as_f64().expect("number");
    let fv = |x: &serde_json::Value| -> Vec<f64> {
        x.as_array().expect("array").iter().map(f).collect()
    };
    let n_bins = v["n_bins"].as_u64().expect("n_bins") as usize;
    let cases = v["cases"]
        .as_array()
        .expect("cases")
        .iter()
        .map(|c| {
            let p = fv(&c["p"]);
            EdCase {
                name: c["name"].as_str().expect("name").to_string(),
                beta: f(&c["beta"]),
                u: f(&c["u"]),
                eps: f(&c["eps"]),
                bath: c["bath"]
                    .as_array()
                    .expect("bath")
                    .iter()
                    .map(|b| (f(&b[0]), f(&b[1])))
                    .collect(),
                n_sigma: f(&c["n_up"]),
                docc: f(&c["docc"]),
                p: [p[0], p[1], p[2]],
                gl: fv(&c["gl"]),
                gtau_bins: fv(&c["gtau_bins"]),
                giw: c["giw"]
                    .as_array()
                    .expect("giw")
                    .iter()
                    .map(|z| Complex64::new(f(&z[0]), f(&z[1])))
                    .collect(),
            }
        })
        .collect::<Vec<EdCase>>();
    assert_eq!(cases.len(), 6, "the cases of reference/output/ed_bath.json");
    (n_bins, cases)
}

fn ed_case(name: &str) -> (usize, EdCase) {
    let (n_bins, cases) = ed_cases();
    let c = cases
        .into_iter()
        .find(|c| c.name == name)
        .expect("case present in ed_bath.json");
    (n_bins, c)
}

/// z-scores of every compared quantity: (label, z).
fn z_scores(c: &EdCase, n_bins: usize, params: &CtqmcParams, seed: u64) -> Vec<(String, f64)> {
    let delta = bath_delta(c.beta, &c.bath, 1024);
    let mut p = params.clone();
    p.n_tau_bins = n_bins;
    let r = solve(&input(&delta, c.eps, c.u, c.beta, seed), &p).expect("solver runs");
    // A causal Δ has positive weights only (checked at every full recomputation).
    assert_eq!(r.metrics["negative_sign_checks"].0, 0.0, "{}", c.name);
    assert!(r.metrics["det_checks"].0 > 0.0);
    let mut z = Vec::new();
    let mut push = |label: String, got: f64, err: f64, want: f64| {
        // An error of exactly zero means no fluctuation at all: the value must be exact.
        let zz = if err > 0.0 {
            (got - want) / err
        } else if (got - want).abs() < 1e-12 {
            0.0
        } else {
            f64::INFINITY
        };
        z.push((label, zz));
    };
    push(
        "n_up".into(),
        r.n_sigma[0].value,
        r.n_sigma[0].error,
        c.n_sigma,
    );
    push(
        "n_dn".into(),
        r.n_sigma[1].value,
        r.n_sigma[1].error,
        c.n_sigma,
    );
    push("docc".into(), r.docc.value, r.docc.error, c.docc);
    for k in 0..3 {
        push(format!("P({k})"), r.p[k].value, r.p[k].error, c.p[k]);
    }
    for l in 0..8 {
        push(format!("G_{l}"), r.gl[l], r.gl_err[l], c.gl[l]);
    }
    // G(iω_n) from the kept G_l through T_nl (below the tail crossover).
    let cross = r.metrics["tail_from_n"].0 as usize;
    assert!(
        cross >= 3,
        "{}: tail from n = {cross}, G and Σ below it unchecked",
        c.name
    );
    for n in 0..3 {
        let (g, e, w) = (r.g_iw[n], r.g_iw_err[n], c.giw[n]);
        push(format!("Re G(iω_{n})"), g.re, e.re, w.re);
        push(format!("Im G(iω_{n})"), g.im, e.im, w.im);
    }
    // Σ(iω_n) against Σ_ED = iω − ε − Δ − 1/G_ED (linearised errors).
    for (n, d) in delta.iter().enumerate().take(3) {
        let iw = Complex64::new(0.0, fermionic_frequency(c.beta, n as i64));
        let want = iw - c.eps - d - c.giw[n].inv();
        let (s, e) = (r.sigma[n], r.sigma_err[n]);
        push(format!("Re Σ(iω_{n})"), s.re, e.re, want.re);
        push(format!("Im Σ(iω_{n})"), s.im, e.im, want.im);
    }
    for i in (0..n_bins).step_by(3) {
        push(
            format!("G(τ bin {i})"),
            r.g_tau[i],
            r.g_tau_err[i],
            c.gtau_bins[i],
        );
    }
    z
}

fn assert_within(c: &EdCase, z: &[(String, f64)], limit: f64) {
    for (label, zz) in z {
        assert!(
            zz.abs() < limit,
            "{}: {label} is {zz:.2} standard errors off",
            c.name
        );
    }
}

#[test]
#[ignore = "long statistical run (release build recommended)"]
fn agrees_with_exact_diagonalisation_all_cases_long() {
    // reference/ed_bath.py: exact diagonalisation of the impurity with 1-3 bath levels.
    let (n_bins, cases) = ed_cases();
    let params = CtqmcParams {
        sweeps: 200_000,
        ..CtqmcParams::default()
    };
    for c in &cases {
        let z = z_scores(c, n_bins, &params, 11);
        for (label, zz) in &z {
            println!("{} {label}: z = {zz:.2}", c.name);
        }
        assert_within(c, &z, 4.0);
    }
}

#[test]
fn same_seed_gives_bit_identical_results() {
    let (_, c) = ed_case("away_three_levels");
    let delta = bath_delta(c.beta, &c.bath, 256);
    let p = short_params(800);
    let a = solve(&input(&delta, c.eps, c.u, c.beta, 42), &p).unwrap();
    let b = solve(&input(&delta, c.eps, c.u, c.beta, 42), &p).unwrap();
    let bits = |v: &[f64]| v.iter().map(|x| x.to_bits()).collect::<Vec<_>>();
    assert_eq!(bits(&a.gl), bits(&b.gl));
    assert_eq!(bits(&a.gl_err), bits(&b.gl_err));
    assert_eq!(bits(&a.g_tau), bits(&b.g_tau));
    assert!(a
        .sigma
        .iter()
        .zip(&b.sigma)
        .all(|(x, y)| x.re.to_bits() == y.re.to_bits() && x.im.to_bits() == y.im.to_bits()));
    assert_eq!(format!("{:?}", a.metrics), format!("{:?}", b.metrics));
    let other = solve(&input(&delta, c.eps, c.u, c.beta, 43), &p).unwrap();
    assert_ne!(bits(&a.gl), bits(&other.gl));
}

#[test]
fn fast_updates_agree_with_full_recomputation() {
    // The O(k²) updates of M = F⁻¹ against an LU inverse every 100 sweeps.
    let (_, c) = ed_case("half_two_levels_beta20");
    let delta = bath_delta(c.beta, &c.bath, 256);
    let r = solve(&input(&delta, c.eps, c.u, c.beta, 5), &short_params(4000)).unwrap();
    let (dev, _) = r.metrics["det_check_max_dev"];
    let (checks, _) = r.metrics["det_checks"];
    assert!(checks >= 10.0, "{checks} checks");
    assert!(dev < 1e-9, "largest relative deviation {dev}");
    assert!(
        r.metrics["order_up"].0 > 1.0,
        "the run must reach non-trivial orders"
    );
}

#[test]
fn uncorrelated_half_filling_probabilities_and_dyson() {
    // U = 0, ε = 0, symmetric bath: the spins are independent and half filled, so
    // P(0) = P(2) = 1/4 and P(1) = 1/2 (Wick's theorem; a fact of the trade), and
    // G(iω_n) = 1/(iω_n − ε − Δ(iω_n)); reference/ed_bath.py agrees to 1e-15.
    let (_, c) = ed_case("u0_half_two_levels");
    assert!((c.p[0] - 0.25).abs() < 1e-12 && (c.p[1] - 0.5).abs() < 1e-12);
    let delta = bath_delta(c.beta, &c.bath, 256);
    let r = solve(&input(&delta, c.eps, c.u, c.beta, 7), &short_params(20_000)).unwrap();
    for (k, want) in [0.25, 0.5, 0.25].iter().enumerate() {
        let e = r.p[k];
        assert!(
            (e.value - want).abs() < 4.0 * e.error,
            "P({k}) = {} ± {}",
            e.value,
            e.error
        );
    }
    let (kept, _) = r.metrics["legendre_kept"];
    assert!(kept >= 2.0);
    let cross = r.metrics["tail_from_n"].0 as usize;
    assert!(
        cross >= 1 && cross < r.sigma.len(),
        "tail from n = {cross} of {}: one side below unchecked",
        r.sigma.len()
    );
    for (n, d) in delta.iter().enumerate().take(cross.min(20)) {
        let iw = Complex64::new(0.0, fermionic_frequency(c.beta, n as i64));
        let exact = (iw - c.eps - d).inv();
        let (g, e) = (r.g_iw[n], r.g_iw_err[n]);
        assert!(
            (g.re - exact.re).abs() < 4.0 * e.re + 1e-12,
            "Re G(iω_{n}): {g} vs {exact}"
        );
        assert!(
            (g.im - exact.im).abs() < 4.0 * e.im + 1e-12,
            "Im G(iω_{n}): {g} vs {exact}"
        );
    }
    // Above the crossover Σ is its tail, here U n̄ = 0.
    assert!(r.sigma[cross..].iter().all(|s| s.norm() < 1e-15));
}

#[test]
fn large_u_half_filling_suppresses_double_occupancy() {
    // U = 8, β = 20, ε = −U/2, one bath level: reference/ed_bath.py gives
    // P(1) = 0.98956485000568, ⟨n↑n↓⟩ = 0.00521757499716.
    let (n_bins, c) = ed_case("large_u_half");
    assert!((c.p[1] - 0.989_564_850_005_68).abs() < 1e-12);
    // Configurations where one spin fills the gaps of the other ("domain walls") carry much
    // of the weight here and are reached slowly, so this run is longer than the others.
    let z = z_scores(&c, n_bins, &short_params(200_000), 3);
    assert_within(&c, &z, 4.0);
    let delta = bath_delta(c.beta, &c.bath, 256);
    let r = solve(
        &input(&delta, c.eps, c.u, c.beta, 3),
        &short_params(200_000),
    )
    .unwrap();
    assert!(
        r.p[1].value > 0.97 && r.docc.value < 0.015,
        "{:?} {:?}",
        r.p,
        r.docc
    );
}

#[test]
fn agrees_with_exact_diagonalisation_away_from_half_filling() {
    // β = 10, U = 4, ε = −0.5, three bath levels (reference/ed_bath.py).
    let (n_bins, c) = ed_case("away_three_levels");
    let z = z_scores(&c, n_bins, &short_params(20_000), 9);
    assert_within(&c, &z, 4.0);
}

#[test]
fn bad_parameters_are_rejected() {
    let delta = bath_delta(10.0, &[(0.0, 0.5)], 64);
    let mut p = short_params(1);
    assert!(solve(&input(&delta, 0.0, 1.0, 10.0, 1), &p).is_err()); // no error bar from 1 sweep
    p.sweeps = 100;
    assert!(solve(&input(&delta, 0.0, 1.0, -1.0, 1), &p).is_err());
    assert!(solve(&input(&[], 0.0, 1.0, 10.0, 1), &p).is_err());
    let zero = vec![Complex64::new(0.0, 0.0); 64];
    let err = solve(&input(&zero, 0.0, 1.0, 10.0, 1), &p).unwrap_err();
    assert!(format!("{err:#}").contains("no configuration"), "{err:#}");
    let nan = vec![Complex64::new(f64::NAN, 0.0); 8];
    assert!(solve(&input(&nan, 0.0, 1.0, 10.0, 1), &p).is_err());
}

#[test]
#[ignore = "50 long runs (release build recommended)"]
fn z_scores_over_fifty_seeds_are_standard_normal() {
    // Honest error bars: over 50 seeds the z-scores against the exact reference should
    // have about 68% within 1σ (accepted: 0.55..0.80) and none beyond 5σ.
    let (n_bins, c) = ed_case("away_three_levels");
    let params = CtqmcParams {
        sweeps: 40_000,
        ..CtqmcParams::default()
    };
    let mut all = Vec::new();
    for seed in 0..50 {
        let z = z_scores(&c, n_bins, &params, 1000 + seed);
        for (label, zz) in &z {
            if zz.abs() > 3.5 {
                println!("seed {}: {label} z = {zz:.2}", 1000 + seed);
            }
        }
        all.extend(z.into_iter().map(|(_, z)| z));
    }
    let within = all.iter().filter(|z| z.abs() < 1.0).count() as f64 / all.len() as f64;
    let worst = all.iter().fold(0.0_f64, |m, z| m.max(z.abs()));
    println!(
        "{} z-scores: fraction within 1σ = {within:.3}, largest |z| = {worst:.2}",
        all.len()
    );
    assert!(
        (0.55..=0.80).contains(&within),
        "fraction within 1σ: {within}"
    );
    assert!(worst < 5.0, "largest |z| = {worst}");
}

#[test]
fn non_causal_hybridization_is_flagged_by_the_sign_check() {
    // Δ(iω) = −V²/(iω − ε_b) has negative spectral weight: F(τ) = −Δ(τ) < 0 and
    // configurations of odd order acquire negative weights, which the sampler reports.
    let beta = 10.0;
    let delta: Vec<Complex64> = bath_delta(beta, &[(0.3, 0.6)], 128)
        .into_iter()
        .map(|d| -d)
        .collect();
    let r = solve(&input(&delta, -0.5, 1.0, beta, 2), &short_params(4000)).unwrap();
    assert!(r.metrics["negative_sign_checks"].0 > 0.0, "{:?}", r.metrics);
}

#[test]
fn solve_stage_dispatch_runs_ctqmc() {
    use model_solid::solve::{run_solver, SolverKind};
    let kind: SolverKind = "ctqmc".parse().unwrap();
    let delta = bath_delta(10.0, &[(0.0, 0.5)], 128);
    let mut inp = input(&delta, -1.0, 2.0, 10.0, 4);
    inp.sweeps = Some(2_000);
    let out = run_solver(kind, &inp).unwrap();
    assert_eq!(out.sigma.len(), 128);
    assert_eq!(out.metrics["sweeps"], (2_000.0, None));
    let (n_f, n_f_err) = out.metrics["n_f"];
    let n_f_err = n_f_err.expect("n_f carries an error bar");
    assert!(out.metrics["docc"].1.is_some_and(|e| e > 0.0) && n_f_err > 0.0);
    // Half filling of a particle-hole symmetric problem (reference/ed_bath.py: n_σ = 1/2).
    assert!((n_f - 1.0).abs() < 4.0 * n_f_err);
    let it = out.imaginary_time.as_ref().expect("ctqmc passes G_l on");
    assert_eq!(it.gl.len(), it.gl_err.len());
    assert!(out
        .sigma
        .iter()
        .all(|s| s.re.is_finite() && s.im.is_finite()));
}
