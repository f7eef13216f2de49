//! Physics equivalence of the two reference engines: one full self-consistency iteration
//! (band → project → solve → update) from the shipped start files through model-solid's
//! stages and through casebook's sub-steps, each a real child process, gives the same
//! doubles: H(k), Δ, G_loc, the levels, Σ, G, n_f, μ, the charges and the energy.
//!
//! Every comparison is bit for bit. The one place a reader of casebook's files loses
//! exactness is the unit conversion of its text log (energies in Ry): there the test checks
//! that the logged number is exactly model-solid's eV value divided by the Rydberg energy,
//! and that converting it back lands within 2 units in the last place of the eV value
//! (one rounding in the division, one in the multiplication).

mod common;

use common::*;
use std::path::Path;

/// model-solid's four stages in `dir` (start files from examples/start), as the demo
/// campaign runs them.
fn model_solid_iteration(dir: &Path, s: &Setup) {
    let ms = model_solid();
    let st = start();
    let density = st.join("density.json");
    let sigma = st.join("sigma.npy");
    let (density, sigma) = (
        density.to_str().unwrap_or_default(),
        sigma.to_str().unwrap_or_default(),
    );
    #[rustfmt::skip]
    ok(&ms, dir, &["band", "--volume", s.volume, "--kmesh", s.kmesh, "--density", density,
        "--out", "hk.npy", "--metrics", "band.json"]);
    #[rustfmt::skip]
    ok(&ms, dir, &["project", "--hk", "hk.npy", "--sigma", sigma, "--density", density,
        "--temperature", s.temperature, "--emin", "-10", "--emax", "10",
        "--out-delta", "delta.npy", "--out-levels", "levels.json", "--out-gloc", "gloc.npy",
        "--metrics", "project.json"]);
    let mut solve = vec![
        "solve",
        "--delta",
        "delta.npy",
        "--levels",
        "levels.json",
        "--u",
        s.u,
        "--solver",
        s.solver,
        "--seed",
        s.seed,
        "--out-sigma",
        "sigma.npy",
        "--out-g",
        "g.npy",
        "--metrics",
        "solve.json",
    ];
    if let Some(sw) = s.sweeps {
        solve.extend(["--sweeps", sw]);
    }
    ok(&ms, dir, &solve);
    #[rustfmt::skip]
    ok(&ms, dir, &["update", "--hk", "hk.npy", "--sigma", "sigma.npy", "--density", density,
        "--temperature", s.temperature, "--electrons", s.electrons, "--volume", s.volume,
        "--out", "density.json", "--metrics", "update.json"]);
}

/// casebook's init and four sub-steps; returns the case folder.
fn casebook_iteration(dir: &Path, s: &Setup) -> std::path::PathBuf {
    let case = init_case(dir, "eq", s, &[]);
    for step in ["band", "project", "solve", "update"] {
        ok(&casebook(), dir, &[step, "eq"]);
    }
    case
}

/// A logged energy (Ry) against model-solid's eV value.
fn assert_logged_energy(case: &Path, label: &str, ev: f64) {
    let (ry, unit) = log_last(case, label);
    assert_eq!(unit, "Ry", "log line `{label}` unit");
    assert_same(&format!("log `{label}` (Ry)"), ry, ev / RYDBERG_EV);
    let back = ry * RYDBERG_EV;
    let ulps = (back.to_bits() as i64 - ev.to_bits() as i64).abs();
    assert!(
        ulps <= 2,
        "log `{label}`: {back:e} eV back from Ry is {ulps} ulp from {ev:e}"
    );
}

fn compare(s: &Setup) {
    let tmp = tempfile::tempdir().unwrap_or_else(|e| panic!("{e}"));
    let (ms_dir, cb_dir) = (tmp.path().join("ms"), tmp.path().join("cb"));
    for d in [&ms_dir, &cb_dir] {
        std::fs::create_dir_all(d).unwrap_or_else(|e| panic!("{e}"));
    }
    model_solid_iteration(&ms_dir, s);
    let case = casebook_iteration(&cb_dir, s);

    // band: H(k) byte for byte, the levels exactly
    let read = |p: &Path| std::fs::read(p).unwrap_or_else(|e| panic!("{}: {e}", p.display()));
    assert_eq!(
        read(&file(&case, "hamiltonian.npy")),
        read(&ms_dir.join("hk.npy")),
        "H(k) differs"
    );
    for k in [
        "hopping",
        "hybridization",
        "eps_f",
        "bandwidth",
        "band_energy",
    ] {
        assert_same(
            k,
            kv(&file(&case, "levels"), k),
            json(&ms_dir.join("band.json"), k),
        );
    }
    // project: Δ, G_loc, ε_f, μ, β
    assert_bits_eq(
        "delta",
        &h5_complex(&case, "delta"),
        &npy_complex(&ms_dir.join("delta.npy")),
    );
    assert_bits_eq(
        "gloc",
        &h5_complex(&case, "gloc"),
        &npy_complex(&ms_dir.join("gloc.npy")),
    );
    let levels = h5_real(&case, "levels");
    let lj = ms_dir.join("levels.json");
    assert_same("eps_f", levels[0], json(&lj, "eps_f"));
    assert_same("mu (levels)", levels[1], json(&lj, "mu"));
    assert_same("beta", h5_attr(&case, "beta"), json(&lj, "beta"));
    // solve: Σ, G, n_f
    assert_bits_eq(
        "sigma",
        &h5_complex(&case, "sigma"),
        &npy_complex(&ms_dir.join("sigma.npy")),
    );
    assert_bits_eq(
        "g",
        &h5_complex(&case, "g"),
        &npy_complex(&ms_dir.join("g.npy")),
    );
    let n_f_imp = json(&ms_dir.join("solve.json"), "n_f");
    assert_same("n_f attribute", h5_attr(&case, "n_f"), n_f_imp);
    assert_same(
        "log impurity n_f",
        log_last(&case, "impurity n_f").0,
        n_f_imp,
    );
    // update: the density file and the log
    let dj = ms_dir.join("density.json");
    for k in ["n_f", "n_c", "mu", "energy"] {
        assert_same(
            &format!("density {k}"),
            kv(&file(&case, "density"), k),
            json(&dj, k),
        );
    }
    assert_same(
        "log f charge",
        log_last(&case, "f charge").0,
        json(&dj, "n_f"),
    );
    assert_same(
        "log c charge",
        log_last(&case, "c charge").0,
        json(&dj, "n_c"),
    );
    assert_logged_energy(&case, "total energy", json(&dj, "energy"));
    assert_logged_energy(&case, "chemical potential", json(&dj, "mu"));
    let uj = ms_dir.join("update.json");
    for (label, k) in [
        ("one-body energy", "e_one_body"),
        ("interaction energy", "e_interaction"),
        ("core energy", "e_core"),
    ] {
        assert_logged_energy(&case, label, json(&uj, k));
    }
}

#[test]
fn one_hubbard_i_iteration_is_bit_identical_to_model_solid() {
    compare(&DEMO);
}

#[test]
fn one_monte_carlo_iteration_with_the_same_seed_is_bit_identical_to_model_solid() {
    compare(&Setup {
        kmesh: "6",
        temperature: "1200",
        solver: "ctqmc",
        seed: "20261204",
        sweeps: Some("4000"),
        ..DEMO
    });
}
