//! The command-line contract of the `model-solid` binary: version line, metrics files, and
//! bad input (missing or malformed files, wrong shapes, NaN, negative temperature) ending in
//! a message that names the file and the problem, a non-zero exit and no output left behind.

use num_complex::Complex64;
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

/// Assert failure, that stderr mentions every `needle`, and that `absent` was not created.
fn fails(dir: &Path, args: &[&str], needles: &[&str], absent: &[&str]) {
    let out = run(dir, args);
    let err = String::from_utf8_lossy(&out.stderr);
    assert!(!out.status.success(), "model-solid {args:?} should fail");
    for n in needles {
        assert!(err.contains(n), "stderr of {args:?} lacks '{n}': {err}");
    }
    for a in absent {
        assert!(!dir.join(a).exists(), "{a} left behind by {args:?}");
    }
    // no temporary files left behind either
    for entry in std::fs::read_dir(dir).unwrap() {
        let name = entry.unwrap().file_name().to_string_lossy().into_owned();
        assert!(!name.contains(".tmp."), "temporary file {name} left behind");
    }
}

/// A folder holding start files, H(k), Δ and levels from one pass.
fn prepared() -> tempfile::TempDir {
    let dir = tempfile::tempdir().unwrap();
    let d = dir.path();
    ok(
        d,
        &[
            "init",
            "--nw",
            "32",
            "--electrons",
            "1.8",
            "--out-density",
            "density.json",
            "--out-sigma",
            "sigma.npy",
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
            "sigma.npy",
            "--density",
            "density.json",
            "--temperature",
            "600",
            "--emin",
            "-10",
            "--emax",
            "10.0",
            "--out-delta",
            "delta.npy",
            "--out-levels",
            "levels.json",
            "--out-gloc",
            "gloc.npy",
        ],
    );
    std::fs::remove_file(d.join("metrics.json")).unwrap();
    dir
}

#[test]
fn version_line_names_the_parameter_set() {
    let dir = tempfile::tempdir().unwrap();
    let out = run(dir.path(), &["--version"]);
    assert!(out.status.success());
    let text = String::from_utf8(out.stdout).unwrap();
    assert_eq!(
        text,
        format!(
            "model-solid {} (model {})\n",
            env!("CARGO_PKG_VERSION"),
            model_solid::model::DEMO_NAME
        )
    );
}

#[test]
fn init_writes_consistent_start_files() {
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
            "sigma.npy",
        ],
    );
    let dens = model_solid::io::read_density(&d.join("density.json")).unwrap();
    assert!((dens.n_f + dens.n_c - 1.8).abs() < 1e-15);
    assert_eq!(dens.n_f, 1.0);
    let sigma = model_solid::io::read_matsubara(&d.join("sigma.npy"), "sigma").unwrap();
    assert_eq!(sigma.len(), 64);
    assert!(sigma.iter().all(|z| *z == Complex64::new(0.0, 0.0)));
    assert!(d.join("metrics.json").exists());
}

#[test]
fn metrics_path_can_be_overridden_and_holds_numbers() {
    let dir = prepared();
    let d = dir.path();
    ok(
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
            "--out-g",
            "g.npy",
            "--metrics",
            "solve-metrics.json",
        ],
    );
    assert!(!d.join("metrics.json").exists());
    let m: serde_json::Map<String, serde_json::Value> =
        serde_json::from_str(&std::fs::read_to_string(d.join("solve-metrics.json")).unwrap())
            .unwrap();
    for key in ["n_f", "docc", "p0", "p1", "p2"] {
        assert!(m[key].is_f64(), "{key} is not a number");
    }
    assert!(m.values().all(|v| v.is_number()));
    assert_eq!(npy::read_any(d.join("g.npy")).unwrap().shape, vec![32]);
}

#[test]
fn missing_and_malformed_files_are_named() {
    let dir = prepared();
    let d = dir.path();
    fails(
        d,
        &[
            "band",
            "--volume",
            "28",
            "--kmesh",
            "4",
            "--density",
            "nowhere.json",
            "--out",
            "out.npy",
        ],
        &["nowhere.json", "cannot read"],
        &["out.npy", "metrics.json"],
    );
    std::fs::write(d.join("broken.json"), "{\"n_f\": 1.0, \"n_c\": ").unwrap();
    fails(
        d,
        &[
            "band",
            "--volume",
            "28",
            "--kmesh",
            "4",
            "--density",
            "broken.json",
            "--out",
            "out.npy",
        ],
        &["broken.json", "malformed"],
        &["out.npy", "metrics.json"],
    );
    // a JSON file where an array is expected
    fails(
        d,
        &[
            "update",
            "--hk",
            "density.json",
            "--sigma",
            "sigma.npy",
            "--density",
            "density.json",
            "--temperature",
            "600",
            "--electrons",
            "1.8",
            "--volume",
            "28",
            "--out",
            "new.json",
        ],
        &["density.json", "not a valid .npy"],
        &["new.json", "metrics.json"],
    );
}

#[test]
fn wrong_shapes_and_types_are_rejected() {
    let dir = prepared();
    let d = dir.path();
    // Σ given as the H(k) array: wrong shape
    fails(
        d,
        &[
            "project",
            "--hk",
            "hk.npy",
            "--sigma",
            "hk.npy",
            "--density",
            "density.json",
            "--temperature",
            "600",
            "--out-delta",
            "x.npy",
            "--out-levels",
            "x.json",
        ],
        &["hk.npy", "shape"],
        &["x.npy", "x.json", "metrics.json"],
    );
    // a real array where complex128 is required
    npy::write_real(d.join("real.npy"), &[32], &[0.0; 32]).unwrap();
    fails(
        d,
        &[
            "solve",
            "--delta",
            "real.npy",
            "--levels",
            "levels.json",
            "--u",
            "6",
            "--out-sigma",
            "x.npy",
        ],
        &["real.npy", "complex128"],
        &["x.npy", "metrics.json"],
    );
    // H(k) with an unnormalized weight column
    npy::write_real(d.join("hk_bad.npy"), &[1, 5], &[0.5, 0.0, 0.1, 0.1, -1.0]).unwrap();
    fails(
        d,
        &[
            "update",
            "--hk",
            "hk_bad.npy",
            "--sigma",
            "sigma.npy",
            "--density",
            "density.json",
            "--temperature",
            "600",
            "--electrons",
            "1.8",
            "--volume",
            "28",
            "--out",
            "new.json",
        ],
        &["hk_bad.npy", "weights sum"],
        &["new.json", "metrics.json"],
    );
}

#[test]
fn nan_inputs_are_rejected() {
    let dir = prepared();
    let d = dir.path();
    let mut delta = vec![Complex64::new(0.0, -0.1); 32];
    delta[7] = Complex64::new(f64::NAN, 0.0);
    npy::write_complex(d.join("delta_nan.npy"), &[32], &delta).unwrap();
    fails(
        d,
        &[
            "solve",
            "--delta",
            "delta_nan.npy",
            "--levels",
            "levels.json",
            "--u",
            "6",
            "--out-sigma",
            "x.npy",
        ],
        &["delta_nan.npy", "NaN"],
        &["x.npy", "metrics.json"],
    );
    std::fs::write(
        d.join("levels_nan.json"),
        "{\"eps_f\": 1e999, \"mu\": 0.0, \"beta\": 10.0}",
    )
    .unwrap();
    fails(
        d,
        &[
            "solve",
            "--delta",
            "delta.npy",
            "--levels",
            "levels_nan.json",
            "--u",
            "6",
            "--out-sigma",
            "x.npy",
        ],
        &["levels_nan.json"],
        &["x.npy", "metrics.json"],
    );
}

#[test]
fn bad_numbers_on_the_command_line_are_rejected() {
    let dir = prepared();
    let d = dir.path();
    fails(
        d,
        &[
            "project",
            "--hk",
            "hk.npy",
            "--sigma",
            "sigma.npy",
            "--density",
            "density.json",
            "--temperature",
            "-5",
            "--out-delta",
            "x.npy",
            "--out-levels",
            "x.json",
        ],
        &["temperature", "-5"],
        &["x.npy", "x.json", "metrics.json"],
    );
    fails(
        d,
        &[
            "band",
            "--volume",
            "-28",
            "--kmesh",
            "4",
            "--density",
            "density.json",
            "--out",
            "x.npy",
        ],
        &["--volume", "positive"],
        &["x.npy", "metrics.json"],
    );
    fails(
        d,
        &[
            "solve",
            "--delta",
            "delta.npy",
            "--levels",
            "levels.json",
            "--u",
            "-1",
            "--out-sigma",
            "x.npy",
        ],
        &["--u"],
        &["x.npy", "metrics.json"],
    );
    fails(
        d,
        &[
            "solve",
            "--delta",
            "delta.npy",
            "--levels",
            "levels.json",
            "--u",
            "6",
            "--solver",
            "guesswork",
            "--out-sigma",
            "x.npy",
        ],
        &["guesswork"],
        &["x.npy", "metrics.json"],
    );
    fails(
        d,
        &[
            "update",
            "--hk",
            "hk.npy",
            "--sigma",
            "sigma.npy",
            "--density",
            "density.json",
            "--temperature",
            "600",
            "--electrons",
            "5",
            "--volume",
            "28",
            "--out",
            "new.json",
        ],
        &["electron count"],
        &["new.json", "metrics.json"],
    );
}
