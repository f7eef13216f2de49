//! The in-place campaign examples/inplace-sweep.yaml (casebook's case folder kept by rondo,
//! metrics from its text log and HDF5 archive, the archive's Σ mixed by the built-in mix):
//! it converges to the energies of examples/model-sweep.yaml at every point, and rondo
//! SIGKILLed at seeded instants while it runs ends with every artifact (each file inside
//! the case folder artifacts too) and every metric of an uninterrupted run.

mod common;

use std::collections::BTreeMap;
use std::path::Path;

use common::*;
use sqlx::Row;

/// Tolerance of the cross-check, eV. Error analysis: both campaigns run the same doubles
/// through the same mixing (Σ as the archive's dataset mixes bit for bit as the .npy; the
/// case's density.json is model-solid's), so each iterate is identical; the one inexact
/// step is the energy's way through the log: casebook divides by the Rydberg energy (one
/// rounding), prints the shortest round-trip form (exact), and rondo's reader multiplies
/// back (one rounding). So |E_log − E| ≤ 2 u |E| (u = 2⁻⁵³), about 4e-16 eV at |E| ≈ 1.7 eV,
/// which the test checks with room (`ulp_bound`, 2ε|E| = 4u|E|); 1e-8 eV is the bound required.
const TOLERANCE_EV: f64 = 1e-8;

fn tempdir() -> tempfile::TempDir {
    tempfile::tempdir().unwrap_or_else(|e| panic!("{e}"))
}

/// Run `campaign` (copied from examples/ with its start files) in `dir` to the end.
fn run_to_end(dir: &Path, campaign: &str) {
    demo_in(dir, campaign);
    let o = run_rondo(dir, &["run", campaign, "--max-running", "2", "-q"]);
    assert_eq!(o.status.code(), Some(0), "{}", shown(&o));
}

/// Metric `name` of `stage` per point, in iteration order (iterations without it skipped).
fn series(rec: &Record, stage: &str, name: &str) -> BTreeMap<String, Vec<f64>> {
    let mut out: BTreeMap<String, Vec<f64>> = BTreeMap::new();
    for ((point, _, st), (_, metrics)) in rec {
        if st == stage {
            if let Some(bits) = metrics.get(&format!("{stage}.{name}")) {
                out.entry(point.clone())
                    .or_default()
                    .push(f64::from_bits(*bits));
            }
        }
    }
    out
}

#[test]
fn inplace_sweep_converges_to_the_energies_of_model_sweep() {
    let _ = (model_solid(), casebook());
    let (a, b) = (tempdir(), tempdir());
    std::thread::scope(|s| {
        s.spawn(|| run_to_end(a.path(), "model-sweep.yaml"));
        s.spawn(|| run_to_end(b.path(), "inplace-sweep.yaml"));
    });
    let model = record(&a.path().join("model-sweep.rondo"));
    let inplace_ws = b.path().join("inplace-sweep.rondo");
    let inplace = record(&inplace_ws);

    let want = series(&model, "update", "energy");
    let got = series(&inplace, "scf", "energy");
    assert_eq!(want.len(), 10, "5 volumes x 2 temperatures");
    assert_eq!(
        want.keys().collect::<Vec<_>>(),
        got.keys().collect::<Vec<_>>()
    );
    let mut worst = 0.0_f64;
    for (point, w) in &want {
        let g = &got[point];
        assert_eq!(g.len(), w.len(), "{point}: the same number of iterations");
        let (ew, eg) = (w[w.len() - 1], g[g.len() - 1]);
        assert!(
            (ew - eg).abs() <= TOLERANCE_EV,
            "{point}: final energy {eg} eV in place, {ew} eV in model-sweep"
        );
        for (i, (x, y)) in w.iter().zip(g).enumerate() {
            let ulp_bound = 2.0 * f64::EPSILON * x.abs();
            assert!(
                (x - y).abs() <= ulp_bound,
                "{point} iteration {}: {y} against {x}: more than the two roundings of the \
                 rydberg conversion",
                i + 1
            );
            worst = worst.max((x - y).abs());
        }
    }
    eprintln!("largest energy difference over every iteration of every point: {worst:e} eV");
    // Numbers without a unit conversion are the same doubles.
    for (m, c) in [("n_f", "n_f"), ("n_c", "n_c"), ("n_total", "n_total")] {
        assert_eq!(
            series(&model, "update", m),
            series(&inplace, "scf", c),
            "update.{m}"
        );
    }
    assert_eq!(
        series(&model, "mix", "residual_norm"),
        series(&inplace, "mix", "residual_norm"),
        "the mixer saw the same vectors"
    );
    for p in status_json(b.path(), &inplace_ws)["points"]
        .as_array()
        .cloned()
        .unwrap_or_default()
    {
        assert_eq!(p["state"], "converged", "{p}");
    }
    case_folder_is_kept(&inplace_ws);
}

/// The case folder recorded at every iteration holds casebook's files, its log grows by
/// one pass of the sub-steps per iteration, and the archive output is the folder's member.
fn case_folder_is_kept(ws: &Path) {
    let rows = strings(
        ws,
        "SELECT m.path || ' ' || m.artifact || ' ' || a.iteration || ' ' || \
         (SELECT o2.artifact FROM attempt_outputs o2 WHERE o2.attempt_id = a.id \
          AND o2.role = 'archive') \
         FROM attempts a JOIN attempt_outputs o ON o.attempt_id = a.id AND o.role = 'folder' \
         JOIN folder_members m ON m.folder = o.artifact \
         WHERE a.state = 'succeeded' AND a.point = 'p001' ORDER BY a.iteration, m.path",
    );
    let mut per_iteration: BTreeMap<i64, Vec<(String, String, String)>> = BTreeMap::new();
    for r in rows {
        let f: Vec<&str> = r.split(' ').collect();
        let it = f[2].parse().unwrap_or_else(|e| panic!("{r}: {e}"));
        per_iteration
            .entry(it)
            .or_default()
            .push((f[0].into(), f[1].into(), f[3].into()));
    }
    assert!(per_iteration.len() > 3, "{per_iteration:?}");
    let mut logs = Vec::new();
    for (it, members) in &per_iteration {
        assert!(members.len() >= 20, "iteration {it}: {members:?}");
        let archive = members
            .iter()
            .find(|m| m.0 == "case.impurity.h5")
            .unwrap_or_else(|| panic!("iteration {it}: no archive in {members:?}"));
        assert_eq!(
            archive.1, archive.2,
            "iteration {it}: the archive output is the member"
        );
        logs.push(members.iter().find(|m| m.0 == "case.log").cloned());
    }
    logs.dedup();
    assert_eq!(
        logs.len(),
        per_iteration.len(),
        "the log changes every iteration"
    );
}

/// A reduced copy of the in-place campaign: two points, the same stages and rules.
fn reduced_in(dir: &Path) {
    demo_in(dir, "inplace-sweep.yaml");
    let path = dir.join("inplace-sweep.yaml");
    let text = std::fs::read_to_string(&path).unwrap_or_else(|e| panic!("{e}"));
    let reduced = text
        .replace(
            "volume: [26.0, 27.0, 28.0, 29.0, 30.0]",
            "volume: [27.0, 29.0]",
        )
        .replace("temperature: [300, 1200]", "temperature: [1200]");
    assert_ne!(
        reduced, text,
        "the sweep of examples/inplace-sweep.yaml changed"
    );
    std::fs::write(&path, reduced).unwrap_or_else(|e| panic!("{e}"));
}

/// The reduced copy run to its end in `dir` with the local executor.
fn run_reduced_locally(dir: &Path) {
    reduced_in(dir);
    let o = run_rondo(
        dir,
        &["run", "inplace-sweep.yaml", "--max-running", "2", "-q"],
    );
    assert_eq!(o.status.code(), Some(0), "{}", shown(&o));
}

/// Every file of every folder artifact a succeeded attempt recorded:
/// (point, iteration, stage, role, path) → content hash.
fn folder_files(ws: &Path) -> BTreeMap<String, String> {
    query(ws, |pool| {
        Box::pin(async move {
            sqlx::query(
                "SELECT a.point, a.iteration, a.stage, o.role, m.path, m.artifact, m.mode \
                 FROM attempts a JOIN attempt_outputs o ON o.attempt_id = a.id \
                 JOIN folder_members m ON m.folder = o.artifact WHERE a.state = 'succeeded'",
            )
            .fetch_all(pool)
            .await
            .unwrap_or_else(|e| panic!("{e}"))
            .into_iter()
            .map(|r| {
                let key = format!(
                    "{}/{}/{}.{}/{}",
                    r.get::<String, _>(0),
                    r.get::<i64, _>(1),
                    r.get::<String, _>(2),
                    r.get::<String, _>(3),
                    r.get::<String, _>(4)
                );
                let value = format!("{} {}", r.get::<String, _>(5), r.get::<String, _>(6));
                (key, value)
            })
            .collect()
        })
    })
}

#[test]
fn killed_inplace_runs_end_with_the_files_and_numbers_of_an_uninterrupted_run() {
    let _ = casebook();
    let (a, b) = (tempdir(), tempdir());
    reduced_in(b.path());
    run_reduced_locally(a.path());
    let ref_ws = a.path().join("inplace-sweep.rondo");
    let reference = record(&ref_ws);
    let reference_files = folder_files(&ref_ws);
    assert!(
        reference_files.len() > 20 * reference.len() / 2,
        "every scf attempt recorded its case folder: {} files for {} attempts",
        reference_files.len(),
        reference.len()
    );
    assert_no_double_success_nor_children(&ref_ws, 0);

    let ws = b.path().join("inplace-sweep.rondo");
    let seed = crash_seed(20_261_215);
    kill_and_finish(
        b.path(),
        "inplace-sweep.yaml",
        seed,
        4,
        reference.len(),
        (0.05, 0.85),
        0,
    );
    assert_same_record(&reference, &record(&ws), seed);
    let files = folder_files(&ws);
    assert_eq!(
        reference_files.len(),
        files.len(),
        "the same folder members (seed {seed})"
    );
    for (k, v) in &reference_files {
        assert_eq!(files.get(k), Some(v), "{k} (seed {seed})");
    }
    for p in status_json(b.path(), &ws)["points"]
        .as_array()
        .cloned()
        .unwrap_or_default()
    {
        assert_eq!(p["state"], "converged", "{p}");
    }
    assert_resume_was_clean(&ws, seed);
}

/// Whether a Slurm that answers is here; skips loudly (fails under RONDO_REQUIRE_SLURM=1 or
/// CI) otherwise.
fn slurm_or_skip() -> bool {
    let ok = std::process::Command::new("sinfo")
        .args(["-h", "-o", "%T"])
        .output()
        .map(|o| o.status.success())
        .unwrap_or(false);
    if !ok {
        skip_or_fail(
            "no working Slurm here (`sinfo` failed)",
            "start the one-node Slurm with `bash scripts/dev-slurm start` (as root)",
            &["RONDO_REQUIRE_SLURM"],
        );
    }
    ok
}

/// The reduced in-place campaign through the one-node Slurm (`--on slurm`: the `scf` stage
/// of every iteration a batch job working in its kept case folder; the `mix` built-in where
/// rondo runs) records every output hash, every file of every case folder and every metric
/// bit of the same campaign run locally.
#[test]
fn the_inplace_campaign_through_slurm_gives_the_files_and_numbers_of_the_local_run() {
    let _ = casebook();
    if !slurm_or_skip() {
        return;
    }
    let (a, b) = (tempdir(), tempdir());
    reduced_in(b.path());
    run_reduced_locally(a.path());
    let local = a.path().join("inplace-sweep.rondo");
    let o = run_rondo(
        b.path(),
        &[
            "run",
            "inplace-sweep.yaml",
            "--on",
            "slurm",
            "--poll-interval",
            "1",
            "-q",
        ],
    );
    assert_eq!(o.status.code(), Some(0), "{}", shown(&o));
    let slurm = b.path().join("inplace-sweep.rondo");
    let jobs = strings(
        &slurm,
        "SELECT CAST(count(*) AS TEXT) FROM attempts WHERE executor = 'slurm' \
         AND state = 'succeeded'",
    );
    assert!(
        jobs.first()
            .and_then(|n| n.parse::<u32>().ok())
            .unwrap_or(0)
            > 0,
        "no batch job ran: {jobs:?}"
    );
    assert_same_record(&record(&local), &record(&slurm), 0);
    assert_eq!(
        folder_files(&local),
        folder_files(&slurm),
        "every file of every case folder"
    );
}
