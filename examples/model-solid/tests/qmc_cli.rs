//! The command-line contract of `model-solid solve --solver ctqmc`: statistical metrics in
//! `metrics.json` as `{"value", "error"}` objects, G_l and G(τ) tables with errors, and
//! bit-identical output for the same seed (what makes a resumed Monte Carlo campaign
//! reproduce its records).

use rondo_numerics::npy;
use std::path::Path;
use std::process::{Command, Output};

const BIN: &str = env!("CARGO_BIN_EXE_model-solid");

fn run(dir: &Path, args: &[&str]) -> Output {
    Command::new(BIN)
        .args(args)
        .current_dir(dir)
        .output()
        .expect("start model-solid")
}

fn ok(dir: &Path, args: &[&str]) {
    let out = run(dir, args);
    assert!(
        out.status.success(),
        "model-solid {args:?}: {}",
        String::from_utf8_lossy(&out.stderr)
    );
}

/// Δ and levels of the demo model at 28 Å³ and 1200 K from a zero self-energy.
fn prepared() -> tempfile::TempDir {
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
            "--emin",
            "-10",
            "--emax",
            "10",
            "--out-delta",
            "delta.npy",
            "--out-levels",
            "levels.json",
        ],
    );
    dir
}

fn solve_qmc(d: &Path, seed: &str, sigma: &str, extra: &[&str]) {
    let mut args = vec![
        "solve",
        "--delta",
        "delta.npy",
        "--levels",
        "levels.json",
        "--u",
        "6",
        "--solver",
        "ctqmc",
        "--sweeps",
        "1500",
        "--seed",
        seed,
        "--out-sigma",
        sigma,
    ];
    args.extend_from_slice(extra);
    ok(d, &args);
}

#[test]
fn ctqmc_metrics_carry_error_bars() {
    let dir = prepared();
    let d = dir.path();
    solve_qmc(
        d,
        "11",
        "sigma.npy",
        &["--out-gl", "gl.npy", "--out-gtau", "gtau.npy"],
    );
    let m: serde_json::Map<String, serde_json::Value> =
        serde_json::from_str(&std::fs::read_to_string(d.join("metrics.json")).unwrap()).unwrap();
    for key in ["n_f", "docc", "p0", "p1", "p2"] {
        let o = m[key]
            .as_object()
            .unwrap_or_else(|| panic!("{key} is not a {{value, error}} object: {}", m[key]));
        assert_eq!(o.len(), 2, "{key}: {o:?}");
        let v = o["value"].as_f64().expect("value is a number");
        let e = o["error"].as_f64().expect("error is a number");
        assert!(e > 0.0 && e < 0.1, "{key}: implausible error bar {e}");
        assert!((0.0..=2.0).contains(&v), "{key} = {v}");
    }
    // The probabilities of the atomic configurations add up to one in every measurement,
    // so their means do as well (up to rounding).
    let val = |k: &str| m[k]["value"].as_f64().unwrap();
    assert!((val("p0") + val("p1") + val("p2") - 1.0).abs() < 1e-12);
    // n_f = P(1) + 2 P(2) and docc = P(2) configuration by configuration.
    assert!((val("n_f") - val("p1") - 2.0 * val("p2")).abs() < 1e-12);
    assert!((val("docc") - val("p2")).abs() < 1e-12);
    // Deterministic diagnostics stay plain numbers.
    for key in ["sweeps", "legendre_kept", "level"] {
        assert!(
            m[key].is_number(),
            "{key} should be a plain number: {}",
            m[key]
        );
    }
    assert_eq!(m["sweeps"].as_f64(), Some(1500.0));

    let gl = npy::read_any(d.join("gl.npy")).unwrap();
    assert_eq!(gl.shape, vec![40, 2]);
    let gl = gl.as_real().unwrap().to_vec();
    // G_0 = ∫_0^β G(τ) dτ (Boehnke et al., PRB 84, 075145 (2011), P_0 = 1) is negative,
    // because G(τ) < 0 on (0, β); every error is positive.
    assert!(gl[0] < 0.0, "G_0 = {}", gl[0]);
    assert!(gl.chunks(2).all(|r| r[1] > 0.0));
    let gt = npy::read_any(d.join("gtau.npy")).unwrap();
    assert_eq!(gt.shape, vec![200, 3]);
    let gt = gt.as_real().unwrap().to_vec();
    // G(τ) ≤ 0 on (0, β); its ends sum to −1 (G(0⁺) + G(β⁻) = −1), checked loosely on the
    // outermost bins.
    assert!(gt.chunks(3).all(|r| r[1] < 0.05));
    let (first, last) = (gt[1], gt[gt.len() - 2]);
    assert!(
        (first + last + 1.0).abs() < 0.15,
        "G(0⁺) + G(β⁻) = {}",
        first + last
    );
}

#[test]
fn same_seed_gives_bit_identical_self_energy() {
    let dir = prepared();
    let d = dir.path();
    solve_qmc(d, "20261202", "a.npy", &[]);
    solve_qmc(d, "20261202", "b.npy", &[]);
    solve_qmc(d, "20261203", "c.npy", &[]);
    let a = std::fs::read(d.join("a.npy")).unwrap();
    let b = std::fs::read(d.join("b.npy")).unwrap();
    let c = std::fs::read(d.join("c.npy")).unwrap();
    assert_eq!(a, b, "same seed, different sigma.npy");
    assert_ne!(a, c, "different seeds gave the same Monte Carlo sample");
}

#[test]
fn imaginary_time_output_needs_the_monte_carlo_solver() {
    let dir = prepared();
    let d = dir.path();
    let out = run(
        d,
        &[
            "solve",
            "--delta",
            "delta.npy",
            "--levels",
            "levels.json",
            "--u",
            "6",
            "--out-sigma",
            "s.npy",
            "--out-gl",
            "gl.npy",
        ],
    );
    assert!(!out.status.success());
    let err = String::from_utf8_lossy(&out.stderr);
    assert!(err.contains("--solver ctqmc"), "{err}");
    assert!(!d.join("s.npy").exists() && !d.join("gl.npy").exists());
}
