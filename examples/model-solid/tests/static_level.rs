//! Both impurity solvers take the static part of Δ(iω) from the same fit of its
//! high-frequency tail (`rondo_numerics::matsubara::fit_tail`), so for the same input files
//! `model-solid solve` reports the same `level` and `delta_static` with `--solver hubbard-i`
//! and with `--solver ctqmc`, through the binary.

use num_complex::Complex64;
use rondo_numerics::matsubara::fermionic_grid;
use rondo_numerics::npy;
use std::path::Path;
use std::process::Command;

const BIN: &str = env!("CARGO_BIN_EXE_model-solid");

fn ok(dir: &Path, args: &[&str]) {
    let out = Command::new(BIN)
        .args(args)
        .current_dir(dir)
        .output()
        .expect("start model-solid");
    assert!(
        out.status.success(),
        "model-solid {args:?}: {}",
        String::from_utf8_lossy(&out.stderr)
    );
}

/// Run `solve` with one solver on delta.npy and levels.json in `dir`; its metrics.
fn solve(dir: &Path, solver: &str) -> serde_json::Value {
    let metrics = format!("metrics-{solver}.json");
    ok(
        dir,
        &[
            "solve",
            "--delta",
            "delta.npy",
            "--levels",
            "levels.json",
            "--u",
            "2",
            "--solver",
            solver,
            "--seed",
            "5",
            "--sweeps",
            "2000",
            "--out-sigma",
            &format!("sigma-{solver}.npy"),
            "--metrics",
            &metrics,
        ],
    );
    let text = std::fs::read_to_string(dir.join(&metrics)).expect("metrics.json");
    serde_json::from_str(&text).expect("metrics.json is JSON")
}

/// `level` and `delta_static` of both solvers: identical (the same function of the same
/// data), and the level equal to ε_f − μ + `expected_static` within the fit's error.
fn same_level(dir: &Path, bare_level: f64, expected_static: f64) {
    let hi = solve(dir, "hubbard-i");
    let qmc = solve(dir, "ctqmc");
    for key in ["level", "delta_static"] {
        let (a, b) = (hi[key].as_f64(), qmc[key].as_f64());
        assert!(a.is_some(), "hubbard-i reports no plain `{key}`: {hi}");
        assert_eq!(a, b, "{key}: hubbard-i {a:?}, ctqmc {b:?}");
    }
    let level = hi["level"].as_f64().unwrap_or(f64::NAN);
    let d0 = hi["delta_static"].as_f64().unwrap_or(f64::NAN);
    // The fit's truncation error at 64 frequencies and β = 10 is ~1e-11 for these baths
    // (examples/model-solid/src/solve.rs tests); the value at the last frequency would be
    // off by −c2/ω²_63 ≈ −2.6e-4 (reference/output/hubbard_i_bath.txt).
    assert!(
        (d0 - expected_static).abs() < 1e-9,
        "delta_static {d0} vs {expected_static}"
    );
    assert!((level - bare_level - d0).abs() < 1e-14, "{level} {d0}");
}

#[test]
fn both_solvers_use_the_same_level_for_a_bath_with_a_static_part() {
    // Δ(iω) = c0 + Σ_b V_b²/(iω − ε_b), c0 = 0.25, on 64 frequencies of β = 10;
    // levels.json gives ε_f − μ = 0.1.
    let dir = tempfile::tempdir().unwrap();
    let d = dir.path();
    let beta = 10.0;
    let c0 = 0.25;
    let bath = [(-0.6, 0.2), (0.8, 0.5), (1.5, 0.4)];
    let delta: Vec<Complex64> = fermionic_grid(beta, 64)
        .iter()
        .map(|w| {
            let iw = Complex64::new(0.0, *w);
            Complex64::new(c0, 0.0)
                + bath
                    .iter()
                    .map(|(e, v): &(f64, f64)| v * v / (iw - e))
                    .sum::<Complex64>()
        })
        .collect();
    npy::write_complex(d.join("delta.npy"), &[delta.len()], &delta).unwrap();
    std::fs::write(
        d.join("levels.json"),
        r#"{"eps_f": 0.35, "mu": 0.25, "beta": 10.0}"#,
    )
    .unwrap();
    same_level(d, 0.1, c0);
}

#[test]
fn both_solvers_use_the_same_level_for_the_projected_demo_model() {
    // Δ of the demo model from `project` (28 Å³, 1200 K, 64 frequencies, zero Σ): the exact
    // projection leaves no static part (docs/model-solid.md), so the level is ε_f − μ.
    let dir = tempfile::tempdir().unwrap();
    let d = dir.path();
    ok(
        d,
        &[
            "init",
            "--nw",
            "64",
            "--electrons",
            "1.8",
            "--out-density",
            "density.json",
            "--out-sigma",
            "sigma0.npy",
        ],
    );
    ok(
        d,
        &[
            "band",
            "--volume",
            "28",
            "--kmesh",
            "4",
            "--density",
            "density.json",
            "--out",
            "hk.npy",
        ],
    );
    ok(
        d,
        &[
            "project",
            "--hk",
            "hk.npy",
            "--sigma",
            "sigma0.npy",
            "--density",
            "density.json",
            "--temperature",
            "1200",
            "--out-delta",
            "delta.npy",
            "--out-levels",
            "levels.json",
        ],
    );
    let levels: serde_json::Value =
        serde_json::from_str(&std::fs::read_to_string(d.join("levels.json")).unwrap()).unwrap();
    let bare = levels["eps_f"].as_f64().unwrap() - levels["mu"].as_f64().unwrap();
    same_level(d, bare, 0.0);
}
