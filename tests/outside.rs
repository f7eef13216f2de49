//! Stages outside the loop through the real `rondo` binary, real child processes and the
//! real SQLite store: a `before:` stage that makes each point's start value, an
//! `after-point:` stage on each point's last good iteration, and `after-campaign:` stages
//! over every point's final values and outputs (once, and once per group of `group-by`).
//! Each runs exactly once per its scope, its outputs trace back to the points' attempts,
//! a rerun of the finished workspace runs nothing, and a SIGKILL of rondo while each kind
//! runs, followed by `rondo run`, records the artifacts and metric bits of an uninterrupted
//! run.

mod common;

use std::collections::BTreeMap;
use std::os::unix::fs::PermissionsExt;
use std::path::Path;
use std::process::{Command, Stdio};
use std::time::{Duration, Instant};

use common::*;
use sqlx::Row;

/// The stage programs: `prog.sh KIND DIR ARGS...`. Every run appends a line to
/// `DIR/marks/KIND`; while `DIR/pause-KIND` exists it writes `DIR/paused-KIND` first and
/// sleeps three seconds (a window for the kill); while `DIR/fail-KIND` exists it fails.
const PROG: &str = r#"#!/bin/sh
set -eu
kind=$1 dir=$2
shift 2
echo "${RONDO_POINT:-campaign} ${RONDO_ITERATION:-0}" >> "$dir/marks/$kind"
if [ -e "$dir/pause-$kind" ]; then touch "$dir/paused-$kind"; sleep 3; fi
if [ -e "$dir/fail-$kind" ]; then echo "asked to fail" >&2; exit 9; fi
num() { sed 's/[^0-9.eE+-]//g' "$1"; }
case "$kind" in
  dft) awk -v a="$1" 'BEGIN { printf "{\"x\": %.17g}\n", 3 * a }' > "$2" ;;
  step)
    y=$(awk -v x="$(num "$1")" -v a="$3" 'BEGIN { printf "%.17g", 0.5 * (x + a) }')
    printf '{"x": %s}\n' "$y" > "$2"; printf '{"x": %s}\n' "$y" > metrics.json ;;
  spectral)
    w=$(awk -v x="$(num "$1")" 'BEGIN { printf "%.17g", 2 * x }')
    printf 'w %s\n' "$w" > "$2"; printf '{"w": %s}\n' "$w" > metrics.json ;;
  summary) { cat "$1"; for f in "$2"/*; do echo "$f"; cat "$f"; done; } > "$3" ;;
  per-b) { echo "b=$1"; ls "$2"; cat "$2"/*; echo "all: $(grep -c '"point"' "$4")"; } > "$3" ;;
esac
"#;

/// Four points (a × b), each starting from its `before:` stage's output.
const CAMPAIGN: &str = r#"campaign: outside
about: test campaign (not physics)
programs:
  prog: { path: ./prog.sh }
parameters:
  dir: DIR
sweep:
  product:
    a: [1.0, 2.0]
    b: [1, 2]
before:
  dft:
    run: [prog, dft, "{{param:dir}}", "{{param:a}}", "{{output:x}}"]
    outputs: { x: x.json }
cycle:
  s:
    run: [prog, step, "{{param:dir}}", "{{input:x}}", "{{output:x}}", "{{param:a}}"]
    inputs: { x: { previous: s.x, initially: dft.x } }
    outputs: { x: x.json }
    metrics: [x]
after-point:
  spectral:
    run: [prog, spectral, "{{param:dir}}", "{{input:x}}", "{{output:a}}"]
    inputs: { x: s.x }
    outputs: { a: a.txt }
    metrics: [w]
after-campaign:
  summary:
    run: [prog, summary, "{{param:dir}}", "{{input:finals}}", "{{input:spectra}}", "{{output:table}}"]
    inputs:
      finals: { finals: [s.x, spectral.w], points: all }
      spectra: { outputs: spectral.a, points: converged }
    outputs: { table: table.txt }
  per-b:
    run: [prog, per-b, "{{param:dir}}", "{{group:b}}", "{{input:spectra}}", "{{output:t}}", "{{input:everyone}}"]
    group-by: [b]
    inputs:
      spectra: { outputs: spectral.a, points: group }
      everyone: { finals: [s.x], points: all }
    outputs: { t: t.txt }
stop:
  when:
    - { metric: s.x, change-below: 1.0e-2, for: 2 }
  max-iterations: 30
"#;

fn tmp() -> tempfile::TempDir {
    tempfile::tempdir().unwrap_or_else(|e| panic!("tempdir: {e}"))
}

fn setup(dir: &Path) {
    let prog = dir.join("prog.sh");
    std::fs::write(&prog, PROG).unwrap_or_else(|e| panic!("{e}"));
    std::fs::set_permissions(&prog, std::fs::Permissions::from_mode(0o755))
        .unwrap_or_else(|e| panic!("{e}"));
    std::fs::create_dir_all(dir.join("marks")).unwrap_or_else(|e| panic!("{e}"));
    let text = CAMPAIGN.replace("DIR", &dir.display().to_string());
    std::fs::write(dir.join("c.yaml"), text).unwrap_or_else(|e| panic!("{e}"));
}

/// How many times each program kind ran: kind → lines of its marks file.
fn runs(dir: &Path) -> BTreeMap<String, usize> {
    let mut out = BTreeMap::new();
    for kind in ["dft", "step", "spectral", "summary", "per-b"] {
        let n = std::fs::read_to_string(dir.join("marks").join(kind))
            .map(|t| t.lines().count())
            .unwrap_or(0);
        out.insert(kind.to_string(), n);
    }
    out
}

/// Recorded after-campaign runs: (options, role → artifact) in id order.
type Generations = Vec<(String, BTreeMap<String, String>)>;

/// The recorded after-campaign runs of `ws`.
fn generations(ws: &Path) -> Generations {
    query(ws, |pool| {
        Box::pin(async move {
            let rows = sqlx::query(
                "SELECT r.options_json, o.role, o.artifact FROM reports r \
                 JOIN report_outputs o ON o.report_id = r.id \
                 WHERE r.options_json LIKE '{\"group\"%' ORDER BY r.id, o.role",
            )
            .fetch_all(pool)
            .await
            .unwrap_or_else(|e| panic!("{e}"));
            let mut out: Generations = Vec::new();
            for r in rows {
                let (opts, role, art): (String, String, String) = (r.get(0), r.get(1), r.get(2));
                match out.last_mut() {
                    Some((o, m)) if *o == opts => {
                        m.insert(role, art);
                    }
                    _ => out.push((opts, BTreeMap::from([(role, art)]))),
                }
            }
            out
        })
    })
}

/// Succeeded attempts as "stage point iteration", sorted.
fn successes(ws: &Path) -> Vec<String> {
    let mut v = strings(
        ws,
        "SELECT stage || ' ' || point || ' ' || iteration FROM attempts WHERE state = 'succeeded' \
         AND stage <> 's'",
    );
    v.sort();
    v
}

#[test]
fn each_stage_outside_the_loop_runs_once_per_its_scope_and_traces_back() {
    let d = tmp();
    setup(d.path());
    let o = run_rondo(d.path(), &["run", "c.yaml", "-q"]);
    assert_eq!(o.status.code(), Some(0), "{}", shown(&o));
    let ws = d.path().join("c.rondo");
    let ran = runs(d.path());
    assert_eq!(ran["dft"], 4, "once per point: {ran:?}");
    assert_eq!(ran["spectral"], 4, "once per point: {ran:?}");
    assert_eq!(ran["summary"], 1, "once per campaign: {ran:?}");
    assert_eq!(ran["per-b"], 2, "once per value of b: {ran:?}");
    // dft at iteration 1; spectral at the iteration each point converged at.
    let last: BTreeMap<String, String> = strings(
        &ws,
        "SELECT point || ' ' || max(iteration) FROM iterations GROUP BY point",
    )
    .into_iter()
    .filter_map(|s| {
        s.split_once(' ')
            .map(|(p, i)| (p.to_string(), i.to_string()))
    })
    .collect();
    let mut want: Vec<String> = last
        .iter()
        .flat_map(|(p, i)| [format!("dft {p} 1"), format!("spectral {p} {i}")])
        .collect();
    want.sort();
    assert_eq!(successes(&ws), want);
    // Iteration 1 of the cycle reads the before-stage's output.
    let unread = strings(
        &ws,
        "SELECT d.point FROM attempts d JOIN attempt_outputs o ON o.attempt_id = d.id \
         WHERE d.stage = 'dft' AND d.state = 'succeeded' AND NOT EXISTS (SELECT 1 FROM attempts s \
         JOIN attempt_inputs i ON i.attempt_id = s.id WHERE s.point = d.point AND s.stage = 's' \
         AND s.iteration = 1 AND i.artifact = o.artifact)",
    );
    assert!(
        unread.is_empty(),
        "iteration 1 did not read dft.x: {unread:?}"
    );
    // The campaign-level runs: one summary and one per b, each with its outputs stored.
    let g = generations(&ws);
    let opts: Vec<&str> = g.iter().map(|(o, _)| o.as_str()).collect();
    assert_eq!(
        opts,
        [
            r#"{"group":{},"stage":"summary"}"#,
            r#"{"group":{"b":1},"stage":"per-b"}"#,
            r#"{"group":{"b":2},"stage":"per-b"}"#,
        ]
    );
    let table = std::fs::read_to_string(ws.join("analysis/summary/table.txt"))
        .unwrap_or_else(|e| panic!("{e}"));
    assert_eq!(
        blake3::hash(table.as_bytes()).to_hex().to_string(),
        g[0].1["summary.table"]
    );
    let finals: serde_json::Value = serde_json::from_str(
        &std::fs::read_to_string(ws.join("analysis/summary/inputs/finals.json"))
            .unwrap_or_else(|e| panic!("{e}")),
    )
    .unwrap_or_else(|e| panic!("{e}"));
    let pts = finals["points"].as_array().map(Vec::len);
    assert_eq!(pts, Some(4), "{finals}");
    for p in finals["points"].as_array().into_iter().flatten() {
        let a = p["values"]["a"].as_f64().unwrap_or(f64::NAN);
        let w = p["finals"]["spectral.w"]["value"]
            .as_f64()
            .unwrap_or(f64::NAN);
        assert!((w - 2.0 * a).abs() < 0.05, "w = 2 x ≈ 2 a: {p}");
    }
    for b in [1, 2] {
        let t = std::fs::read_to_string(ws.join(format!("analysis/per-b.b={b}/t.txt")))
            .unwrap_or_else(|e| panic!("{e}"));
        assert!(t.starts_with(&format!("b={b}\n")), "{t}");
        assert_eq!(t.matches(".txt").count(), 2, "two points per b: {t}");
        assert!(
            t.ends_with("all: 4\n"),
            "`points: all` reads every point: {t}"
        );
    }
    // `rondo trace` of the summary reaches every point's spectral attempt; the spectral
    // value's trace reaches the before-stage.
    let o = run_rondo(d.path(), &["trace", "c.rondo/analysis/summary/table.txt"]);
    assert_eq!(o.status.code(), Some(0), "{}", shown(&o));
    let text = String::from_utf8_lossy(&o.stdout);
    assert!(text.contains("after-campaign stage summary"), "{text}");
    for p in last.keys() {
        assert!(
            text.contains(&format!("{p} iteration {} spectral", last[p])),
            "{p}: {text}"
        );
    }
    let o = run_rondo(
        d.path(),
        &["trace", "p001/last/spectral.w", "--depth", "all"],
    );
    let text = String::from_utf8_lossy(&o.stdout);
    assert!(text.contains("p001 iteration 1 dft"), "{}", shown(&o));
    // PROV names the campaign-level activity.
    let o = run_rondo(
        d.path(),
        &[
            "export",
            "--prov",
            "p.json",
            "c.rondo/analysis/per-b.b=1/t.txt",
        ],
    );
    assert_eq!(o.status.code(), Some(0), "{}", shown(&o));
    let prov = std::fs::read_to_string(d.path().join("p.json")).unwrap_or_else(|e| panic!("{e}"));
    assert!(prov.contains("after-campaign stage per-b"), "{prov}");
    // The report shows the campaign-level outputs (copied in, the same bytes).
    let o = run_rondo(d.path(), &["report"]);
    assert_eq!(o.status.code(), Some(0), "{}", shown(&o));
    let index =
        std::fs::read_to_string(ws.join("report/index.html")).unwrap_or_else(|e| panic!("{e}"));
    assert!(index.contains("After every point stopped"), "{index}");
    for (file, role, k) in [
        ("summary/table.txt", "summary.table", 0),
        ("per-b.b=1/t.txt", "per-b.t", 1),
        ("per-b.b=2/t.txt", "per-b.t", 2),
    ] {
        let rel = format!("after-campaign/{file}");
        assert!(index.contains(&rel), "{rel}: {index}");
        let bytes =
            std::fs::read(ws.join("report").join(&rel)).unwrap_or_else(|e| panic!("{rel}: {e}"));
        assert_eq!(
            blake3::hash(&bytes).to_hex().to_string(),
            g[k].1[role],
            "{rel}"
        );
    }
    // A rerun of the finished workspace runs nothing again.
    let before = (succeeded_attempts(&ws), g.len());
    let o = run_rondo(d.path(), &["run", "c.yaml", "-q"]);
    assert_eq!(o.status.code(), Some(0), "{}", shown(&o));
    assert_eq!(runs(d.path()), ran, "nothing ran again");
    assert_eq!((succeeded_attempts(&ws), generations(&ws).len()), before);
}

/// Run the campaign in `dir` with a kill while `kind` runs (its program paused), then to
/// the end; returns the record, the campaign-level outputs and how often `kind` ran.
fn killed_during(dir: &Path, kind: &str) -> (Record, Generations) {
    setup(dir);
    let pause = dir.join(format!("pause-{kind}"));
    std::fs::write(&pause, "").unwrap_or_else(|e| panic!("{e}"));
    let mut child = Command::new(rondo())
        .args(["run", "c.yaml", "-q"])
        .current_dir(dir)
        .env("PATH", path_with_binaries())
        .stdout(Stdio::null())
        .stderr(Stdio::null())
        .spawn()
        .unwrap_or_else(|e| panic!("spawn rondo: {e}"));
    let deadline = Instant::now() + Duration::from_secs(300);
    while !dir.join(format!("paused-{kind}")).exists() {
        assert!(
            child.try_wait().ok().flatten().is_none(),
            "rondo ended before {kind} ran"
        );
        assert!(Instant::now() < deadline, "{kind} never ran");
        std::thread::sleep(Duration::from_millis(10));
    }
    let _ = child.kill(); // SIGKILL
    let _ = child.wait();
    std::fs::remove_file(&pause).unwrap_or_else(|e| panic!("{e}"));
    let o = run_rondo(dir, &["run", "c.yaml", "-q"]);
    assert_eq!(
        o.status.code(),
        Some(0),
        "after the kill during {kind}: {}",
        shown(&o)
    );
    let ws = dir.join("c.rondo");
    assert_no_double_success_nor_children(&ws, 0);
    (record(&ws), generations(&ws))
}

#[test]
fn a_kill_during_each_stage_outside_the_loop_then_resume_records_the_same_results() {
    let reference = tmp();
    setup(reference.path());
    let o = run_rondo(reference.path(), &["run", "c.yaml", "-q"]);
    assert_eq!(o.status.code(), Some(0), "{}", shown(&o));
    let ws = reference.path().join("c.rondo");
    let (want, want_g) = (record(&ws), generations(&ws));
    assert_eq!(want_g.len(), 3);
    for kind in ["dft", "spectral", "summary", "per-b"] {
        let d = tmp();
        let (got, got_g) = killed_during(d.path(), kind);
        assert_same_record(&want, &got, 0);
        assert_eq!(
            got_g, want_g,
            "campaign-level outputs after a kill during {kind}"
        );
        let ran = runs(d.path());
        eprintln!("kill during {kind}: programs ran {ran:?}");
        // A campaign-level run killed midway is recorded nowhere and runs again whole; the
        // other campaign-level runs ran once.
        let expect = |k: &str, n: usize| if k == kind { n + 1 } else { n };
        assert_eq!(ran["summary"], expect("summary", 1), "{kind}: {ran:?}");
        assert_eq!(ran["per-b"], expect("per-b", 2), "{kind}: {ran:?}");
    }
    // A crash right after the first campaign-level run is recorded (failpoint
    // `campaign-stage-recorded`): that run is not repeated, the others follow.
    let d = tmp();
    setup(d.path());
    let armed = "campaign-stage-recorded:1";
    assert_crashed_at(
        &rondo_at(d.path(), &["run", "c.yaml", "-q"], Some(armed)),
        armed,
    );
    let o = run_rondo(d.path(), &["run", "c.yaml", "-q"]);
    assert_eq!(o.status.code(), Some(0), "{}", shown(&o));
    let ws = d.path().join("c.rondo");
    assert_no_double_success_nor_children(&ws, 0);
    assert_same_record(&want, &record(&ws), 0);
    assert_eq!(
        generations(&ws),
        want_g,
        "after the crash at campaign-stage-recorded"
    );
    let ran = runs(d.path());
    assert_eq!(
        ran["summary"] + ran["per-b"],
        3,
        "each campaign-level run ran once: {ran:?}"
    );
}

#[test]
fn sigterm_during_an_after_campaign_stage_ends_it_records_nothing_and_a_rerun_runs_it() {
    let d = tmp();
    setup(d.path());
    let pause = d.path().join("pause-summary");
    std::fs::write(&pause, "").unwrap_or_else(|e| panic!("{e}"));
    let mut child = Command::new(rondo())
        .args(["run", "c.yaml", "-q"])
        .current_dir(d.path())
        .env("PATH", path_with_binaries())
        .stdout(Stdio::null())
        .stderr(Stdio::piped())
        .spawn()
        .unwrap_or_else(|e| panic!("spawn rondo: {e}"));
    let deadline = Instant::now() + Duration::from_secs(300);
    while !d.path().join("paused-summary").exists() {
        assert!(
            child.try_wait().ok().flatten().is_none(),
            "rondo ended first"
        );
        assert!(Instant::now() < deadline, "summary never ran");
        std::thread::sleep(Duration::from_millis(10));
    }
    let st = Command::new("kill")
        .args(["-TERM", &child.id().to_string()])
        .status()
        .unwrap_or_else(|e| panic!("kill: {e}"));
    assert!(st.success());
    let o = child.wait_with_output().unwrap_or_else(|e| panic!("{e}"));
    assert_eq!(o.status.code(), Some(4), "interrupted: {}", shown(&o));
    let ws = d.path().join("c.rondo");
    assert_no_double_success_nor_children(&ws, 0);
    assert!(generations(&ws).is_empty(), "nothing recorded");
    std::fs::remove_file(&pause).unwrap_or_else(|e| panic!("{e}"));
    let o = run_rondo(d.path(), &["run", "c.yaml", "-q"]);
    assert_eq!(o.status.code(), Some(0), "{}", shown(&o));
    assert_eq!(generations(&ws).len(), 3);
    assert_eq!(
        runs(d.path())["summary"],
        2,
        "the interrupted run and the rerun"
    );
}

#[test]
fn a_failed_after_point_stage_leaves_the_point_converged_and_the_next_run_runs_only_it() {
    let d = tmp();
    setup(d.path());
    let fail = d.path().join("fail-spectral");
    std::fs::write(&fail, "").unwrap_or_else(|e| panic!("{e}"));
    let o = run_rondo(d.path(), &["run", "c.yaml", "-q"]);
    assert_eq!(o.status.code(), Some(3), "{}", shown(&o));
    let err = String::from_utf8_lossy(&o.stderr);
    assert!(err.contains("outside the loop failed"), "{err}");
    let ws = d.path().join("c.rondo");
    let states = strings(&ws, "SELECT DISTINCT state FROM points");
    assert_eq!(states, ["converged"], "the verdict stands");
    let failed = strings(
        &ws,
        "SELECT point FROM events WHERE kind = 'after-point-failed' ORDER BY point",
    );
    assert_eq!(failed, ["p001", "p002", "p003", "p004"]);
    assert!(
        generations(&ws).is_empty(),
        "the campaign-level stages wait"
    );
    let steps = runs(d.path())["step"];
    std::fs::remove_file(&fail).unwrap_or_else(|e| panic!("{e}"));
    let o = run_rondo(d.path(), &["run", "c.yaml", "-q"]);
    assert_eq!(o.status.code(), Some(0), "{}", shown(&o));
    let ran = runs(d.path());
    assert_eq!(ran["step"], steps, "no cycle stage ran again: {ran:?}");
    assert_eq!(
        ran["spectral"], 8,
        "four failed, then four succeeded: {ran:?}"
    );
    assert_eq!((ran["summary"], ran["per-b"]), (1, 2), "{ran:?}");
    assert_eq!(
        strings(
            &ws,
            "SELECT CAST(count(*) AS TEXT) FROM attempts WHERE stage = 'spectral' AND state = 'succeeded'"
        ),
        ["4"]
    );
}
