//! Benchmark of each stage kernel at demo size (12³ k mesh, 512 Matsubara frequencies,
//! 300 K, U = 6 eV, V = 28 Å³): prints the median and the spread of repeated runs.
//!
//! `cargo bench -p model-solid --bench stages` (a plain timing loop, no harness).

use model_solid::io::Density;
use model_solid::model::DEMO;
use model_solid::project::{project, Window};
use model_solid::solve::{run_solver, SolverInput, SolverKind};
use model_solid::{band, update};
use num_complex::Complex64;
use rondo_numerics::units::beta_from_kelvin;
use std::hint::black_box;
use std::time::{Duration, Instant};

fn time<T>(name: &str, runs: usize, mut f: impl FnMut() -> T) {
    black_box(f()); // warm-up
    let mut t: Vec<Duration> = (0..runs)
        .map(|_| {
            let start = Instant::now();
            black_box(f());
            start.elapsed()
        })
        .collect();
    t.sort();
    println!(
        "{name:8} median {:9.3} ms   min {:9.3} ms   max {:9.3} ms   ({runs} runs)",
        t[runs / 2].as_secs_f64() * 1e3,
        t[0].as_secs_f64() * 1e3,
        t[runs - 1].as_secs_f64() * 1e3
    );
}

fn main() {
    let runs = 21;
    let beta = beta_from_kelvin(300.0).expect("positive temperature");
    let density = Density {
        n_f: 1.0,
        n_c: 0.8,
        mu: -0.25,
        energy: None,
    };
    let nw = 512;
    let b = band::band(&DEMO, 28.0, 12, &density, false);
    // a realistic self-energy: the Hubbard-I one of the start level
    let zero = vec![Complex64::new(0.0, 0.0); nw];
    let p0 = project(&b.mesh, &zero, density.mu, beta, Window::default()).expect("project");
    let input = |delta: &[Complex64]| -> Vec<Complex64> {
        run_solver(
            SolverKind::HubbardI,
            &SolverInput {
                delta,
                level: p0.eps_f - density.mu,
                u: 6.0,
                beta,
                seed: 0,
                sweeps: None,
            },
        )
        .expect("solve")
        .sigma
    };
    let sigma = input(&p0.delta);

    time("band", runs, || {
        band::band(&DEMO, 28.0, 12, &density, false)
    });
    time("project", runs, || {
        project(&b.mesh, &sigma, density.mu, beta, Window::default()).expect("project")
    });
    time("solve", runs, || input(&p0.delta));
    time("update", runs, || {
        update::update(&DEMO, &b.mesh, &sigma, beta, 1.8, 28.0, &density).expect("update")
    });
}
