//! End-to-end tests of `read-metrics` and of HDF5 outputs through the real `rondo` binary
//! and real stage processes (`/bin/sh` scripts written by each test): a text log in Ry whose
//! energy arrives in eV in `rondo status --json`, the first and the last match, the stdout,
//! a JSON pointer, an HDF5 dataset and attribute; a pattern that matches nothing failing the
//! point with the file, the pattern and the log's tail; an output that is not HDF5 and one
//! that lacks a declared dataset, refused before anything is stored; the built-in `mix` of an
//! HDF5 dataset giving the numbers of the same array as `.npy`, the rest of the file copied.
//!
//! Every number here is invented for the test.

mod common;

use std::path::{Path, PathBuf};

use common::*;
use hdf5_metno as h5;
use sqlx::Row;

/// The Rydberg energy in eV, CODATA 2018 (as in `rondo::spec::EnergyUnit::RYDBERG_EV`).
const RY_EV: f64 = 13.605_693_122_994;
/// The Hartree energy in eV, CODATA 2018.
const HA_EV: f64 = 27.211_386_245_988;

fn tmp() -> tempfile::TempDir {
    tempfile::tempdir().unwrap_or_else(|e| panic!("tempdir: {e}"))
}

fn write(path: &Path, text: &str) {
    std::fs::write(path, text).unwrap_or_else(|e| panic!("write {}: {e}", path.display()));
}

/// An archive of the kind an impurity step keeps: /impurity/n_f (scalar), /impurity/sigma
/// (4 × 2), and the attribute mu of /impurity.
fn archive(p: &Path, sigma: &[f64]) -> h5::Result<()> {
    let f = h5::File::create(p)?;
    let g = f.create_group("impurity")?;
    g.new_dataset::<f64>()
        .shape(())
        .create("n_f")?
        .write_scalar(&0.8125)?;
    g.new_dataset::<f64>()
        .shape([4, 2])
        .create("sigma")?
        .write_raw(sigma)?;
    g.new_attr::<f64>()
        .shape(())
        .create("mu")?
        .write_scalar(&-0.375)?;
    Ok(())
}

/// A one-stage campaign in `dir` running `sh step.sh` (the script is `script`), with the
/// stage's extra keys `stage` (indented four spaces), the sweep `sweep` and the stopping
/// rules `when` (one iteration: a point whose stage succeeds ends `capped`, exit status 3).
fn campaign(dir: &Path, script: &str, stage: &str, sweep: &str, when: &str) -> PathBuf {
    write(&dir.join("step.sh"), script);
    let text = format!(
        "campaign: sources
about: test campaign (not physics)
{sweep}cycle:
  s:
    run: [/bin/sh, {step}, \"{{{{param:mode}}}}\"]
{stage}stop:
  when: [{when}]
  max-iterations: 1
",
        step = dir.join("step.sh").display(),
    );
    let f = dir.join("c.yaml");
    write(&f, &text);
    f
}

/// The point rows of `status --json`.
fn points(dir: &Path) -> Vec<serde_json::Value> {
    let s = status_json(dir, &dir.join("c.rondo"));
    s["points"].as_array().cloned().unwrap_or_default()
}

#[test]
fn a_log_in_ry_arrives_in_ev_and_every_source_kind_is_read() {
    let d = tmp();
    // The converged total energy in eV (invented), printed in Ry as a code prints it: the
    // shortest text that reads back as the same double.
    let e_ev = -2_345.678_901_234_567_f64;
    let e_ry_text = format!("{:e}", e_ev / RY_EV);
    let first_ry = 1.25e-1;
    let fermi_ha = 0.5_f64 / 3.0;
    archive(&d.path().join("made.h5"), &[0.5; 8]).unwrap_or_else(|e| panic!("{e}"));
    let script = format!(
        "printf 'scf start\\n:: total energy = {first_ry:e} Ry\\nmixing\\n:: total energy = {e_ry_text} Ry\\nconverged\\n' > scf.log
printf 'fermi level %s Ha\\n' {fermi_ha:e}
printf '{{\"scf\": {{\"charge\": [7.5, 8.25]}}, \"x\": 2.0}}' > out.json
printf '{{\"x\": 1.5}}' > metrics.json
cp {made} imp.h5
",
        made = d.path().join("made.h5").display()
    );
    let stage = "    outputs:
      log: scf.log
      imp: { file: imp.h5, hdf5: [/impurity/sigma, /impurity/n_f] }
    metrics: [energy, x]
    read-metrics:
      energy: { file: log, pattern: 'total energy = (\\S+) Ry', unit: Ry }
      energy_first: { file: scf.log, pattern: 'total energy = (\\S+) Ry', match: first, unit: Ry }
      fermi: { stdout: true, pattern: '(?m)^fermi level (\\S+) Ha$', unit: Ha }
      charge: { json: out.json, pointer: /scf/charge/1 }
      n_f: { hdf5: imp, dataset: /impurity/n_f }
      sigma_10: { hdf5: imp.h5, dataset: /impurity/sigma, index: [1, 0] }
      mu: { hdf5: imp, attribute: '/impurity@mu', unit: eV }
";
    // the rule makes `energy` a required metric: read-metrics provides it, not metrics.json
    let rule = "{ metric: s.energy, change-below: 1.0e-9 }";
    campaign(d.path(), &script, stage, "parameters: { mode: ok }\n", rule);
    let o = run_rondo(d.path(), &["run", "c.yaml"]);
    assert_eq!(o.status.code(), Some(3), "{}", shown(&o));
    let p = points(d.path());
    assert_eq!(p[0]["state"], "capped", "{p:?}");
    let m = &p[0]["metrics"];
    let get = |k: &str| {
        m[k].as_f64()
            .unwrap_or_else(|| panic!("no metric {k} in {m}"))
    };
    // The stored value is the printed Ry number times the constant, one rounding: exactly.
    let ry: f64 = e_ry_text.parse().unwrap_or(f64::NAN);
    assert_eq!(get("s.energy").to_bits(), (ry * RY_EV).to_bits(), "{m}");
    // ... and the eV value the log was printed from within 2 ulp: a division (print in Ry)
    // and a multiplication (read back) each round once, by at most half an ulp of their
    // result, and the shortest round-trip print adds nothing.
    let ulp = f64::EPSILON * e_ev.abs();
    assert!((get("s.energy") - e_ev).abs() <= 2.0 * ulp, "{m}");
    assert_eq!(get("s.energy_first"), first_ry * RY_EV);
    let fermi_read: f64 = format!("{fermi_ha:e}").parse().unwrap_or(f64::NAN);
    assert_eq!(get("s.fermi"), fermi_read * HA_EV);
    assert_eq!(get("s.charge"), 8.25);
    assert_eq!(get("s.n_f"), 0.8125);
    assert_eq!(get("s.sigma_10"), 0.5);
    assert_eq!(get("s.mu"), -0.375);
    // metrics.json still counts, beside the sources
    assert_eq!(get("s.x"), 1.5);
}

#[test]
fn a_pattern_that_matches_nothing_fails_the_point_naming_file_pattern_and_tail() {
    let d = tmp();
    let script = "printf 'scf start\\niteration 1\\nnot converged after 40 steps\\n' > scf.log\n";
    let stage = "    read-metrics:
      energy: { file: scf.log, pattern: 'total energy = (\\S+) Ry', unit: Ry }
";
    campaign(d.path(), script, stage, "parameters: { mode: ok }\n", "");
    let o = run_rondo(d.path(), &["run", "c.yaml"]);
    assert_eq!(o.status.code(), Some(3), "{}", shown(&o));
    let p = points(d.path());
    assert_eq!(p[0]["state"], "failed", "{p:?}");
    let reason = p[0]["reason"].as_str().unwrap_or("");
    for part in [
        "missing-output",
        "scf.log",
        "total energy = (\\S+) Ry",
        "not converged after 40 steps",
    ] {
        assert!(reason.contains(part), "`{part}` not in: {reason}");
    }
}

#[test]
fn an_output_that_is_not_hdf5_or_lacks_a_dataset_is_refused_and_never_stored() {
    let d = tmp();
    let dp = d.path();
    archive(&dp.join("good.h5"), &[0.25; 8]).unwrap_or_else(|e| panic!("{e}"));
    let script = format!(
        "case $1 in
  good) cp {good} imp.h5 ;;
  text) printf 'sigma 0.25 0.25\\n' > imp.h5 ;;
  lacks) cp {good} imp.h5 ;;
esac
",
        good = dp.join("good.h5").display()
    );
    // The archive has no /impurity/delta: `lacks` writes a good HDF5 file without it.
    let stage = "    outputs:
      imp: { file: imp.h5, hdf5: [/impurity/sigma, /impurity/delta] }
";
    campaign(
        dp,
        &script,
        stage,
        "sweep:\n  product:\n    mode: [text, lacks]\n",
        "",
    );
    let o = run_rondo(dp, &["run", "c.yaml"]);
    assert_eq!(o.status.code(), Some(3), "{}", shown(&o));
    let p = points(dp);
    let reasons: Vec<String> = p
        .iter()
        .map(|x| x["reason"].as_str().unwrap_or("").to_string())
        .collect();
    assert!(
        reasons[0].contains("is not an HDF5 file") && reasons[0].contains("imp.h5"),
        "{reasons:?}"
    );
    assert!(
        reasons[1].contains("no dataset `/impurity/delta`") && reasons[1].contains("imp.h5"),
        "{reasons:?}"
    );
    let ws = dp.join("c.rondo");
    let stored: i64 = query(&ws, |pool| {
        Box::pin(async move {
            sqlx::query("SELECT count(*) FROM attempt_outputs")
                .fetch_one(pool)
                .await
                .map(|r| r.get(0))
                .unwrap_or(-1)
        })
    });
    assert_eq!(stored, 0, "a refused output entered the store");
    // the same stage with the dataset it declares present succeeds and stores the file
    let d2 = tmp();
    archive(&d2.path().join("good.h5"), &[0.25; 8]).unwrap_or_else(|e| panic!("{e}"));
    let script = format!("cp {} imp.h5\n", d2.path().join("good.h5").display());
    let stage = "    outputs:
      imp: { file: imp.h5, hdf5: [/impurity/sigma, /impurity/n_f] }
";
    campaign(
        d2.path(),
        &script,
        stage,
        "parameters: { mode: good }\n",
        "",
    );
    let o = run_rondo(d2.path(), &["run", "c.yaml"]);
    assert_eq!(o.status.code(), Some(3), "{}", shown(&o));
    assert_eq!(points(d2.path())[0]["state"], "capped");
    let stored: i64 = query(&d2.path().join("c.rondo"), |pool| {
        Box::pin(async move {
            sqlx::query("SELECT count(*) FROM attempt_outputs")
                .fetch_one(pool)
                .await
                .map(|r| r.get(0))
                .unwrap_or(-1)
        })
    });
    assert_eq!(stored, 1);
}

/// An invented Σ of iteration `k`, different at every iteration.
fn sigma(k: usize) -> Vec<f64> {
    (0..8)
        .map(|i| ((i + 1) as f64 * 0.37 + k as f64 * 1.1).sin() / (k + 1) as f64)
        .collect()
}

/// A campaign whose `solve` copies `in{{iteration}}.EXT` (made by the test) and whose
/// built-in `mix` mixes it, for three iterations.
fn mix_campaign(dir: &Path, ext: &str, out: &str, datasets: &str) {
    let text = format!(
        "campaign: mixing
about: test campaign (not physics)
cycle:
  solve:
    run: [/bin/cp, \"{dir}/in{{{{iteration}}}}.{ext}\", \"{{{{output:sigma}}}}\"]
    outputs: {{ sigma: {out} }}
  mix:
    builtin: mix
    inputs: {{ sigma: solve.sigma }}
    outputs: {{ sigma: mixed.{ext} }}
    settings: {{ method: anderson, alpha: 0.3, history: 4{datasets} }}
stop:
  max-iterations: 3
",
        dir = dir.display()
    );
    write(&dir.join("c.yaml"), &text);
}

/// The mixed Σ of the last iteration, extracted from the store.
fn extracted(dir: &Path, name: &str) -> PathBuf {
    let to = dir.join(name);
    let ws = dir.join("c.rondo").display().to_string();
    let o = run_rondo(
        dir,
        &[
            "extract",
            "--workspace",
            &ws,
            "p001/3/mix.sigma",
            "-o",
            &to.display().to_string(),
        ],
    );
    assert!(o.status.success(), "{}", shown(&o));
    to
}

#[test]
fn mixing_an_hdf5_dataset_gives_the_numbers_of_the_same_array_as_npy_and_copies_the_rest() {
    let (a, b) = (tmp(), tmp());
    for k in 1..=3 {
        let h = a.path().join(format!("in{k}.h5"));
        let f = h5::File::create(&h).unwrap_or_else(|e| panic!("{e}"));
        let run = || -> h5::Result<()> {
            let g = f.create_group("impurity")?;
            g.new_dataset::<f64>()
                .shape([4, 2])
                .create("sigma")?
                .write_raw(&sigma(k))?;
            g.new_dataset::<f64>()
                .shape([2])
                .create("delta")?
                .write_raw(&[0.5, k as f64])?;
            g.new_attr::<f64>()
                .shape(())
                .create("beta")?
                .write_scalar(&40.0)?;
            Ok(())
        };
        run().unwrap_or_else(|e| panic!("{e}"));
        drop(f);
        rondo_numerics::npy::write_real(b.path().join(format!("in{k}.npy")), &[4, 2], &sigma(k))
            .unwrap_or_else(|e| panic!("{e}"));
    }
    mix_campaign(
        a.path(),
        "h5",
        "{ file: sigma.h5, hdf5: [/impurity/sigma, /impurity/delta] }",
        ", datasets: { sigma: [/impurity/sigma] }",
    );
    mix_campaign(b.path(), "npy", "sigma.npy", "");
    for d in [a.path(), b.path()] {
        let o = run_rondo(d, &["run", "c.yaml"]);
        assert_eq!(o.status.code(), Some(3), "{}", shown(&o));
    }
    let (pa, pb) = (points(a.path()), points(b.path()));
    assert_eq!(pa[0]["state"], "capped", "{pa:?}");
    // the mixer saw the same vector: the same residual at the last step, bit for bit
    let r = |p: &serde_json::Value| p["metrics"]["mix.residual_norm"].as_f64().map(f64::to_bits);
    assert!(r(&pa[0]).is_some(), "{pa:?}");
    assert_eq!(r(&pa[0]), r(&pb[0]));
    let h = extracted(a.path(), "mixed.h5");
    let n = extracted(b.path(), "mixed.npy");
    let f = h5::File::open(&h).unwrap_or_else(|e| panic!("{e}"));
    let mixed: Vec<f64> = f
        .dataset("/impurity/sigma")
        .and_then(|d| d.read_raw())
        .unwrap_or_else(|e| panic!("{e}"));
    let want = rondo_numerics::npy::read_any(&n)
        .unwrap_or_else(|e| panic!("{e}"))
        .to_flat_f64();
    let bits = |v: &[f64]| v.iter().map(|x| x.to_bits()).collect::<Vec<_>>();
    assert_eq!(bits(&mixed), bits(&want));
    assert_ne!(mixed, sigma(3), "the third iteration mixed nothing");
    // the unmixed dataset and the attribute are the third input's, unchanged
    let delta: Vec<f64> = f
        .dataset("/impurity/delta")
        .and_then(|d| d.read_raw())
        .unwrap_or_else(|e| panic!("{e}"));
    assert_eq!(delta, [0.5, 3.0]);
    let beta: f64 = f
        .group("/impurity")
        .and_then(|g| g.attr("beta"))
        .and_then(|a| a.read_scalar())
        .unwrap_or_else(|e| panic!("{e}"));
    assert_eq!(beta, 40.0);
}
