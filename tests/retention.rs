//! Retention through the real binary: a stage writes a 64 KiB restart file every
//! iteration, and `keep: { restart: { last: 2 } }` keeps only the last two iterations'
//! content. Checked: the files of older iterations are gone from the store while their
//! records, hashes and metrics stay (a removal row each, with size and policy); `rondo trace`
//! says the content was removed; `rondo du` shows kept and removed bytes; the numbers equal
//! those of the same campaign without a policy; seeded SIGKILLs give the same records and
//! the same kept set; and `rondo prune --keep` applies a policy to a finished workspace.

mod common;

use std::path::Path;

use common::*;

fn campaign(dir: &Path, keep: bool) {
    let keep = if keep {
        "    keep: { restart: { last: 2 } }\n"
    } else {
        ""
    };
    // The stage: a 64 KiB restart file whose bytes name the point and the iteration (so no
    // two are the same content), and a metric that halves every iteration (converged at
    // iteration 7 or 8); a tenth of a second each, so that seeded kills land mid-run.
    let script = dir.join("stage.sh");
    std::fs::write(
        &script,
        "sleep 0.1\n\
         yes \"$1-$2\" | head -c 65536 > restart.bin\n\
         awk -v x=\"$1\" -v i=\"$2\" 'BEGIN { printf \"{\\\"e\\\": %.17g}\\n\", x / 2 ^ i }' > metrics.json\n",
    )
    .unwrap_or_else(|e| panic!("{e}"));
    let text = format!(
        r#"campaign: keep-some
about: test campaign (not physics)
programs:
  sh: {{ path: /bin/sh }}
sweep:
  product:
    x: [1, 2]
cycle:
  w:
    run: [sh, "{script}", "{{{{param:x}}}}", "{{{{iteration}}}}"]
    outputs: {{ restart: restart.bin }}
    metrics: [e]
{keep}stop:
  when:
    - {{ metric: w.e, change-below: 0.01, for: 1 }}
  max-iterations: 20
"#,
        script = script.display()
    );
    std::fs::write(dir.join("c.yaml"), text).unwrap_or_else(|e| panic!("{e}"));
}

/// (point, iteration) → whether the restart content is still in the store.
fn present(ws: &Path) -> Vec<(String, i64, bool)> {
    let rows = strings(
        ws,
        "SELECT a.point || ' ' || a.iteration || ' ' || o.artifact FROM attempts a \
         JOIN attempt_outputs o ON o.attempt_id = a.id \
         WHERE a.state = 'succeeded' AND o.role = 'restart' ORDER BY a.point, a.iteration",
    );
    rows.iter()
        .map(|r| {
            let v: Vec<&str> = r.split(' ').collect();
            let h = v[2];
            let there = ws.join("store").join(&h[..2]).join(&h[2..]).is_file();
            (v[0].to_string(), v[1].parse().unwrap_or(0), there)
        })
        .collect()
}

fn check_kept(ws: &Path) {
    let rows = present(ws);
    assert!(!rows.is_empty());
    for p in ["p001", "p002"] {
        let its: Vec<&(String, i64, bool)> = rows.iter().filter(|r| r.0 == p).collect();
        let last = its.iter().map(|r| r.1).max().unwrap_or(0);
        assert!(
            last >= 4,
            "{p} ran {last} iterations: too few to test retention"
        );
        for (_, it, there) in its {
            assert_eq!(
                *there,
                *it >= last - 1,
                "{p} iteration {it} of {last}: {rows:?}"
            );
        }
    }
}

#[test]
fn a_policy_keeps_the_last_iterations_and_the_records_of_all() {
    let d = tempfile::tempdir().unwrap_or_else(|e| panic!("{e}"));
    campaign(d.path(), true);
    let o = run_rondo(d.path(), &["run", "c.yaml", "-q"]);
    assert!(o.status.success(), "{}", shown(&o));
    let ws = d.path().join("c.rondo");
    check_kept(&ws);
    let removals = strings(
        &ws,
        "SELECT policy || ' ' || size || ' ' || point || ' ' || iteration FROM removals ORDER BY 1",
    );
    let gone = present(&ws).iter().filter(|r| !r.2).count();
    assert_eq!(
        removals.len(),
        gone,
        "one removal row per removed content: {removals:?}"
    );
    assert!(
        removals.iter().all(|r| r.starts_with("last:2 65536 ")),
        "{removals:?}"
    );

    // The same numbers as without a policy.
    let n = tempfile::tempdir().unwrap_or_else(|e| panic!("{e}"));
    campaign(n.path(), false);
    let o = run_rondo(n.path(), &["run", "c.yaml", "-q"]);
    assert!(o.status.success(), "{}", shown(&o));
    let (with, without) = (record(&ws), record(&n.path().join("c.rondo")));
    assert_eq!(with.len(), without.len());
    for (k, (outs, mets)) in &with {
        assert_eq!(&without[k].1, mets, "{k:?}");
        assert_eq!(&without[k].0, outs, "same hashes: {k:?}");
    }

    // trace names the removal; du counts it.
    let o = run_rondo(
        d.path(),
        &["trace", "p001/1/w.restart", "--workspace", "c.rondo"],
    );
    assert!(o.status.success(), "{}", shown(&o));
    let text = String::from_utf8_lossy(&o.stdout);
    assert!(
        text.contains("removed by retention (policy last:2"),
        "{text}"
    );
    let o = run_rondo(d.path(), &["du", "--workspace", "c.rondo", "--json"]);
    assert!(o.status.success(), "{}", shown(&o));
    let du: serde_json::Value = serde_json::from_slice(&o.stdout).unwrap_or_else(|e| panic!("{e}"));
    let w = du
        .as_array()
        .and_then(|a| {
            a.iter()
                .find(|r| r["stage"] == "w" && r["role"] == "restart")
        })
        .cloned()
        .unwrap_or_else(|| panic!("{du}"));
    assert_eq!(w["kept_files"].as_i64(), Some(4), "{w}");
    assert_eq!(w["removed_files"].as_i64(), Some(gone as i64), "{w}");
    assert_eq!(
        w["removed_bytes"].as_i64(),
        Some(65536 * gone as i64),
        "{w}"
    );

    // A finished workspace without a policy, pruned afterwards.
    let o = run_rondo(
        n.path(),
        &[
            "prune",
            "--workspace",
            "c.rondo",
            "--keep",
            "w.restart=last:2",
        ],
    );
    assert!(o.status.success(), "{}", shown(&o));
    check_kept(&n.path().join("c.rondo"));
    let o = run_rondo(
        n.path(),
        &["prune", "--workspace", "c.rondo", "--keep", "w.restart"],
    );
    assert_eq!(
        o.status.code(),
        Some(2),
        "bad --keep is bad input: {}",
        shown(&o)
    );
}

#[test]
fn killed_runs_with_a_policy_keep_the_same_content_and_records() {
    let seed = crash_seed(0x5eed_4ee9);
    let reference = tempfile::tempdir().unwrap_or_else(|e| panic!("{e}"));
    campaign(reference.path(), true);
    let o = run_rondo(reference.path(), &["run", "c.yaml", "-q"]);
    assert!(o.status.success(), "{}", shown(&o));
    let ref_ws = reference.path().join("c.rondo");
    let want = record(&ref_ws);
    let d = tempfile::tempdir().unwrap_or_else(|e| panic!("{e}"));
    campaign(d.path(), true);
    kill_and_finish(d.path(), "c.yaml", seed, 2, want.len(), (0.2, 0.6), 0);
    let ws = d.path().join("c.rondo");
    assert_same_record(&want, &record(&ws), seed);
    assert_no_double_success_nor_children(&ws, seed);
    check_kept(&ws);
    assert_eq!(
        present(&ws),
        present(&ref_ws),
        "seed {seed}: the same content kept"
    );
}

/// A crash right after an iteration's verdict is committed and before its retention pass.
/// The stage is short, so the verdict waits in the group commit that the pass's flush
/// writes (failpoint `group-commit`). At a middle iteration the next pass of the point lets
/// the skipped iteration's content go; at the last one, where the point stops and no pass
/// of it follows, the next run's pass at its start does. Either way the store ends holding
/// what an uninterrupted run holds.
#[test]
fn a_crash_before_a_retention_pass_leaves_nothing_behind() {
    let args = ["run", "c.yaml", "-q", "--max-running", "1"];
    let reference = tempfile::tempdir().unwrap_or_else(|e| panic!("{e}"));
    campaign(reference.path(), true);
    let log = reference.path().join("hits.log");
    let o = std::process::Command::new(rondo())
        .args(args)
        .current_dir(reference.path())
        .env_remove(rondo::failpoint::VARIABLE)
        .env(rondo::failpoint::LOG_VARIABLE, &log)
        .output()
        .unwrap_or_else(|e| panic!("{e}"));
    assert!(o.status.success(), "{}", shown(&o));
    let want = present(&reference.path().join("c.rondo"));
    let hits = std::fs::read_to_string(&log).unwrap_or_default();
    let commits = hits
        .lines()
        .filter(|l| l.ends_with(" group-commit"))
        .count() as u64;
    assert!(commits >= 4, "{commits} group commits: {hits}");
    for hit in [commits / 2, commits] {
        let d = tempfile::tempdir().unwrap_or_else(|e| panic!("{e}"));
        campaign(d.path(), true);
        let armed = format!("group-commit:{hit}");
        let o = rondo_at(d.path(), &args, Some(&armed));
        if o.status.success() {
            // Group commits follow the timing of the attempts' ends: this run made fewer.
            eprintln!("armed {armed}: the run ended before that hit; not crashed");
            continue;
        }
        assert_crashed_at(&o, &armed);
        let o = run_rondo(d.path(), &["run", "c.yaml", "-q"]);
        assert!(o.status.success(), "armed {armed}: {}", shown(&o));
        let ws = d.path().join("c.rondo");
        check_kept(&ws);
        assert_eq!(present(&ws), want, "armed {armed}");
    }
}
