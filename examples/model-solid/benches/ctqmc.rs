//! Throughput of the segment-picture CT-QMC: proposed moves per second (measurements
//! included) against the mean expansion order, at β = 10, U = 2, half filling, one bath level
//! at the Fermi level whose coupling V sets the order.
//!
//! `cargo bench -p model-solid --bench ctqmc` (a plain timing loop, no harness); the same
//! table is printed by `cargo test --release -p model-solid --test ctqmc_perf -- --ignored
//! --nocapture`.

use model_solid::ctqmc::{solve, CtqmcParams};
use model_solid::solve::SolverInput;
use num_complex::Complex64;
use rondo_numerics::matsubara::fermionic_frequency;

/// Print one line per coupling: V, mean order per flavour, moves/s, µs per move.
pub fn report() {
    let beta = 10.0;
    println!("   V   order/flavour   moves/s      µs/move   (β = 10, U = 2, half filling)");
    for v in [0.25, 0.5, 1.0, 2.0, 3.0, 4.0] {
        let delta: Vec<Complex64> = (0..512)
            .map(|n| {
                let iw = Complex64::new(0.0, fermionic_frequency(beta, n));
                v * v / iw
            })
            .collect();
        let input = SolverInput {
            delta: &delta,
            level: -1.0,
            u: 2.0,
            beta,
            seed: 1,
            sweeps: None,
        };
        let params = CtqmcParams {
            sweeps: 20_000,
            warmup_sweeps: 1_000,
            ..CtqmcParams::default()
        };
        match solve(&input, &params) {
            Ok(r) => {
                let order = 0.5 * (r.metrics["order_up"].0 + r.metrics["order_dn"].0);
                let rate = r.moves as f64 / r.elapsed_seconds;
                println!("{v:5.2}   {order:10.2}   {rate:11.3e}   {:8.3}", 1e6 / rate);
            }
            Err(e) => println!("{v:5.2}   failed: {e:#}"),
        }
    }
}

#[allow(dead_code)]
fn main() {
    report();
}
