//! Prints the CT-QMC throughput table of `benches/ctqmc.rs` (no timed assertions).

#[path = "../benches/ctqmc.rs"]
#[allow(dead_code)]
mod perf;

#[test]
#[ignore = "timing report, run in release with --nocapture"]
fn moves_per_second_against_expansion_order() {
    perf::report();
}

/// One CT-QMC solve of the demo impurity (12³ k mesh, 512 frequencies, 300 K, U = 6 eV,
/// V = 28 Å³) with the hybridization of the Hubbard-I self-energy: prints order, timing and
/// the main metrics.
#[test]
#[ignore = "timing report of a demo-size solve, run in release with --nocapture"]
fn demo_size_solve_report() {
    use model_solid::band;
    use model_solid::ctqmc::{solve, CtqmcParams};
    use model_solid::io::Density;
    use model_solid::model::DEMO;
    use model_solid::project::{project, Window};
    use model_solid::solve::{run_solver, SolverInput, SolverKind};
    use num_complex::Complex64;
    use rondo_numerics::units::beta_from_kelvin;

    let beta = beta_from_kelvin(300.0).expect("positive temperature");
    let density = Density {
        n_f: 1.0,
        n_c: 0.8,
        mu: -0.25,
        energy: None,
    };
    let nw = 512;
    let b = band::band(&DEMO, 28.0, 12, &density, false);
    let zero = vec![Complex64::new(0.0, 0.0); nw];
    let p0 = project(&b.mesh, &zero, density.mu, beta, Window::default()).expect("project");
    let level = p0.eps_f - density.mu;
    fn inp(delta: &[Complex64], level: f64, beta: f64) -> SolverInput<'_> {
        SolverInput {
            delta,
            level,
            u: 6.0,
            beta,
            seed: 0,
            sweeps: None,
        }
    }
    let hub = run_solver(SolverKind::HubbardI, &inp(&p0.delta, level, beta)).expect("hubbard-i");
    let p1 = project(&b.mesh, &hub.sigma, density.mu, beta, Window::default()).expect("project");
    for sweeps in [2_000u64, 50_000] {
        let params = CtqmcParams {
            sweeps,
            ..CtqmcParams::default()
        };
        let r = solve(&inp(&p1.delta, level, beta), &params).expect("ctqmc");
        println!(
            "sweeps {sweeps}: {:.2} s, {:.3e} moves/s, β = {beta:.2}",
            r.elapsed_seconds,
            r.moves as f64 / r.elapsed_seconds
        );
        for (k, v) in &r.metrics {
            println!(
                "  {k:24} {:14.6} {}",
                v.0,
                v.1.map(|e| format!("± {e:.2e}")).unwrap_or_default()
            );
        }
        println!(
            "  Σ(iω_0) = {:.4}, Σ(iω_10) = {:.4}, Σ(iω_511) = {:.4}",
            r.sigma[0], r.sigma[10], r.sigma[511]
        );
        println!("  Hubbard-I Σ(iω_0) = {:.4}", hub.sigma[0]);
    }
}
