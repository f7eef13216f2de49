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

/// Print one line per coupling: V, mean order per flavour, moves/s with a measurement every
/// 50 moves (the default) and with one every 2000 moves (nearly pure update cost).
pub fn report() {
    let beta = 10.0;
    println!("(β = 10, U = 2, half filling; moves/s including measurements)");
    println!("   V   order/flavour   every 50 moves   every 2000 moves");
    for v in [0.25, 0.5, 1.0, 2.0, 3.0, 4.0, 6.0] {
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
        let run = |sweeps: u64, moves_per_sweep: u32| {
            let params = CtqmcParams {
                sweeps,
                warmup_sweeps: 1_000_000 / u64::from(moves_per_sweep),
                moves_per_sweep,
                ..CtqmcParams::default()
            };
            solve(&input, &params).map(|r| {
                let order = 0.5 * (r.metrics["order_up"].0 + r.metrics["order_dn"].0);
                (order, r.moves as f64 / r.elapsed_seconds)
            })
        };
        match (run(40_000, 50), run(2_048, 2_000)) {
            (Ok((order, a)), Ok((_, b))) => {
                println!("{v:5.2}   {order:10.2}      {a:11.3e}      {b:11.3e}")
            }
            (Err(e), _) | (_, Err(e)) => println!("{v:5.2}   failed: {e:#}"),
        }
    }
}

#[allow(dead_code)]
fn main() {
    report();
}
