//! Crash equivalence on the demo campaign: rondo is SIGKILLed at seeded random instants and
//! run again until done; every recorded output artifact and metric must be bit-identical to
//! an uninterrupted run, no stage may be recorded succeeded twice for one point and
//! iteration, and no child process may be left behind.

mod common;

use std::collections::BTreeMap;
use std::path::Path;
use std::process::{Command, Stdio};
use std::time::Duration;

use common::*;
use rondo_numerics::rng::SplitMix64;
use sqlx::Row;

/// Everything a run recorded that must not depend on interruptions: per succeeded attempt,
/// (point, iteration, stage) → outputs (role → hash) and metrics (name → value bits).
type Record = BTreeMap<(String, i64, String), (BTreeMap<String, String>, BTreeMap<String, u64>)>;

fn record(ws: &Path) -> Record {
    query(ws, |pool| {
        Box::pin(async move {
            let mut out = Record::new();
            let rows = sqlx::query(
                "SELECT a.id, a.point, a.iteration, a.stage FROM attempts a WHERE a.state = 'succeeded'",
            )
            .fetch_all(pool)
            .await
            .unwrap_or_default();
            for r in rows {
                let id: i64 = r.get(0);
                let outs =
                    sqlx::query("SELECT role, artifact FROM attempt_outputs WHERE attempt_id = ?")
                        .bind(id)
                        .fetch_all(pool)
                        .await
                        .unwrap_or_default()
                        .into_iter()
                        .map(|o| (o.get::<String, _>(0), o.get::<String, _>(1)))
                        .collect();
                let mets = sqlx::query("SELECT name, value FROM metrics WHERE attempt_id = ?")
                    .bind(id)
                    .fetch_all(pool)
                    .await
                    .unwrap_or_default()
                    .into_iter()
                    .map(|m| (m.get::<String, _>(0), m.get::<f64, _>(1).to_bits()))
                    .collect();
                let key = (r.get(1), r.get(2), r.get(3));
                assert!(out.insert(key, (outs, mets)).is_none());
            }
            out
        })
    })
}

fn demo_in(dir: &Path) {
    let ex = repo().join("examples");
    std::fs::copy(ex.join("model-sweep.yaml"), dir.join("model-sweep.yaml"))
        .unwrap_or_else(|e| panic!("copy demo: {e}"));
    std::fs::create_dir_all(dir.join("start")).unwrap_or_else(|e| panic!("{e}"));
    for f in ["density.json", "sigma.npy"] {
        std::fs::copy(ex.join("start").join(f), dir.join("start").join(f))
            .unwrap_or_else(|e| panic!("copy start file: {e}"));
    }
}

#[test]
fn killed_runs_end_with_the_numbers_of_an_uninterrupted_run() {
    let _ = model_solid();
    let a = tempfile::tempdir().unwrap_or_else(|e| panic!("{e}"));
    let b = tempfile::tempdir().unwrap_or_else(|e| panic!("{e}"));
    demo_in(a.path());
    demo_in(b.path());

    // Uninterrupted reference.
    let o = run_rondo(a.path(), &["run", "model-sweep.yaml", "--jobs", "2", "-q"]);
    assert_eq!(o.status.code(), Some(0), "{}", shown(&o));
    let reference = record(&a.path().join("model-sweep.rondo"));

    // Interrupted: SIGKILL at seeded random instants, then run to the end.
    let seed = std::env::var("RONDO_CRASH_SEED")
        .ok()
        .and_then(|s| s.parse().ok())
        .unwrap_or(20_261_202u64);
    let mut rng = SplitMix64::new(seed);
    let mut kills = Vec::new();
    let ws = b.path().join("model-sweep.rondo");
    for _ in 0..5 {
        let wait = Duration::from_millis(300 + rng.below(5_000));
        let mut child = Command::new(rondo())
            .args(["run", "model-sweep.yaml", "--jobs", "2", "-q"])
            .current_dir(b.path())
            .env("PATH", path_with_binaries())
            .stdout(Stdio::null())
            .stderr(Stdio::null())
            .spawn()
            .unwrap_or_else(|e| panic!("spawn rondo: {e}"));
        std::thread::sleep(wait);
        let finished = child.try_wait().ok().flatten().is_some();
        let _ = child.kill(); // SIGKILL
        let _ = child.wait();
        kills.push((wait.as_millis(), finished));
    }
    eprintln!("crash test seed {seed}: kills after (ms, had already finished) {kills:?}");
    let o = run_rondo(b.path(), &["run", "model-sweep.yaml", "--jobs", "2", "-q"]);
    assert_eq!(o.status.code(), Some(0), "{}", shown(&o));

    let resumed = record(&ws);
    assert_eq!(
        reference.len(),
        resumed.len(),
        "the same attempts succeeded (seed {seed})"
    );
    for (key, want) in &reference {
        let got = resumed
            .get(key)
            .unwrap_or_else(|| panic!("{key:?} missing after the crashes (seed {seed})"));
        assert_eq!(got.0, want.0, "output hashes of {key:?} (seed {seed})");
        assert_eq!(got.1, want.1, "metric bits of {key:?} (seed {seed})");
    }
    let s = status_json(b.path(), &ws);
    for p in s["points"].as_array().cloned().unwrap_or_default() {
        assert_eq!(p["state"], "converged", "{p}");
    }
    // At most one success per point/iteration/stage, and no children left.
    let (dups, ws_id, lost): (i64, String, i64) = query(&ws, |pool| {
        Box::pin(async move {
            let d = sqlx::query_scalar(
                "SELECT count(*) FROM (SELECT point, iteration, stage FROM attempts \
                 WHERE state = 'succeeded' GROUP BY 1, 2, 3 HAVING count(*) > 1)",
            )
            .fetch_one(pool)
            .await
            .unwrap_or(-1);
            let id = sqlx::query_scalar("SELECT workspace_id FROM campaign")
                .fetch_one(pool)
                .await
                .unwrap_or_default();
            let lost = sqlx::query_scalar("SELECT count(*) FROM attempts WHERE state = 'lost'")
                .fetch_one(pool)
                .await
                .unwrap_or(0);
            (d, id, lost)
        })
    });
    assert_eq!(dups, 0);
    eprintln!("attempts lost to the kills and re-run: {lost}");
    assert!(
        lost >= 1,
        "no kill hit an attempt in flight (seed {seed}): {kills:?}"
    );
    assert!(
        processes_of_workspace(&ws_id).is_empty(),
        "children left behind"
    );
}
