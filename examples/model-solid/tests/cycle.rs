//! Full self-consistent cycle through the real `model-solid` binary, one child process per
//! stage, with the linear self-energy mixing the campaign's built-in mix stage applies
//! (iteration 1 takes Σ_new unchanged; afterwards Σ = Σ_prev + α (Σ_new − Σ_prev)).

use num_complex::Complex64;
use rondo_numerics::npy;
use std::collections::BTreeMap;
use std::path::Path;
use std::process::Command;

const BIN: &str = env!("CARGO_BIN_EXE_model-solid");
const ALPHA: f64 = 0.5;
const ELECTRONS: f64 = 1.8;
const TEMPERATURE: &str = "1200";
const MAX_ITERATIONS: usize = 40;

/// Run one stage in `dir`; panics with the program's stderr on failure; returns its metrics.
fn stage(dir: &Path, args: &[&str]) -> BTreeMap<String, f64> {
    let out = Command::new(BIN)
        .args(args)
        .current_dir(dir)
        .output()
        .expect("start model-solid");
    assert!(
        out.status.success(),
        "model-solid {args:?} failed: {}",
        String::from_utf8_lossy(&out.stderr)
    );
    let text = std::fs::read_to_string(dir.join("metrics.json")).expect("metrics.json written");
    serde_json::from_str(&text).expect("metrics.json is a flat object of numbers")
}

fn read_sigma(path: &Path) -> Vec<Complex64> {
    npy::read_any(path)
        .expect("readable .npy")
        .as_complex()
        .expect("complex128")
        .to_vec()
}

struct Converged {
    iterations: usize,
    energy: f64,
    n_f: f64,
}

/// Iterate band → project → solve → mix → update at one volume until n_f changes by less
/// than 1e-6 in two successive iterations (the demo campaign's stop rule).
fn converge(dir: &Path, volume: f64) -> Converged {
    let v = volume.to_string();
    stage(
        dir,
        &[
            "init",
            "--nw",
            "96",
            "--electrons",
            &ELECTRONS.to_string(),
            "--out-density",
            "density.json",
            "--out-sigma",
            "sigma.npy",
        ],
    );
    let mut quiet = 0;
    let mut last_nf = ELECTRONS.min(1.0); // what `init` writes
    for it in 1..=MAX_ITERATIONS {
        stage(
            dir,
            &[
                "band",
                "--volume",
                &v,
                "--kmesh",
                "6",
                "--density",
                "density.json",
                "--out",
                "hk.npy",
            ],
        );
        stage(
            dir,
            &[
                "project",
                "--hk",
                "hk.npy",
                "--sigma",
                "sigma.npy",
                "--density",
                "density.json",
                "--temperature",
                TEMPERATURE,
                "--out-delta",
                "delta.npy",
                "--out-levels",
                "levels.json",
            ],
        );
        let solved = stage(
            dir,
            &[
                "solve",
                "--delta",
                "delta.npy",
                "--levels",
                "levels.json",
                "--u",
                "6.0",
                "--out-sigma",
                "sigma_new.npy",
            ],
        );
        for key in ["n_f", "docc", "p0", "p1", "p2"] {
            assert!(solved.contains_key(key), "solve metrics lack {key}");
        }
        let p: f64 = solved["p0"] + solved["p1"] + solved["p2"];
        assert!((p - 1.0).abs() < 1e-12, "P(0)+P(1)+P(2) = {p}");
        // linear mixing, the rule of the built-in mix stage
        let new = read_sigma(&dir.join("sigma_new.npy"));
        let mixed: Vec<Complex64> = if it == 1 {
            new
        } else {
            let prev = read_sigma(&dir.join("sigma.npy"));
            prev.iter()
                .zip(&new)
                .map(|(p, n)| p + (n - p) * ALPHA)
                .collect()
        };
        npy::write_complex(dir.join("sigma.npy"), &[mixed.len()], &mixed).expect("write sigma");
        let up = stage(
            dir,
            &[
                "update",
                "--hk",
                "hk.npy",
                "--sigma",
                "sigma.npy",
                "--density",
                "density.json",
                "--temperature",
                TEMPERATURE,
                "--electrons",
                &ELECTRONS.to_string(),
                "--volume",
                &v,
                "--out",
                "density.json",
            ],
        );
        // the chemical potential holds the electron count at every iteration
        assert!(
            (up["n_total"] - ELECTRONS).abs() < 1e-8,
            "V = {volume}, iteration {it}: n_total = {}",
            up["n_total"]
        );
        assert!((up["n_f"] + up["n_c"] - up["n_total"]).abs() < 1e-12);
        let change = (up["n_f"] - last_nf).abs();
        assert!((up["delta_n_f"] - change).abs() < 1e-12);
        last_nf = up["n_f"];
        quiet = if change < 1e-6 { quiet + 1 } else { 0 };
        if quiet >= 2 {
            return Converged {
                iterations: it,
                energy: up["energy"],
                n_f: up["n_f"],
            };
        }
    }
    panic!("V = {volume}: n_f did not converge to 1e-6 in {MAX_ITERATIONS} iterations");
}

#[test]
fn cycle_converges_and_energy_has_interior_minimum() {
    let volumes = [26.0, 28.0, 30.0];
    // the points are independent, as in a campaign: run them side by side
    let results: Vec<Converged> = std::thread::scope(|scope| {
        let handles: Vec<_> = volumes
            .iter()
            .map(|&v| {
                scope.spawn(move || {
                    let dir = tempfile::tempdir().expect("temp dir");
                    converge(dir.path(), v)
                })
            })
            .collect();
        handles
            .into_iter()
            .map(|h| h.join().expect("point thread"))
            .collect()
    });
    for (v, c) in volumes.iter().zip(&results) {
        assert!(c.iterations <= 30, "V = {v}: {} iterations", c.iterations);
        // the Hubbard-I f orbital stays close to single occupancy at U = 6 eV
        assert!(c.n_f > 0.9 && c.n_f < 1.1, "V = {v}: n_f = {}", c.n_f);
    }
    let e: Vec<f64> = results.iter().map(|c| c.energy).collect();
    assert!(
        e[1] < e[0] && e[1] < e[2],
        "E(V) at V = {volumes:?}: {e:?} has no interior minimum"
    );
}
