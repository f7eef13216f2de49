//! End-to-end tests of the core through the real `rondo` binary and real child processes:
//! convergence and `status --json`, retries after each kind of stage failure, a point that
//! fails for good while the others go on, bad input refused without writing anything, no
//! shell injection through parameter values, the workspace lock and `rondo cancel`, and the
//! JSON Schema drift check.

mod common;

use std::path::{Path, PathBuf};
use std::process::{Command, Stdio};
use std::time::{Duration, Instant};

use common::*;
use sqlx::Row;

/// A campaign driving tests/fixtures/halfstep.sh: x ← (x + a) / 2 from x = 0.
fn halfstep_campaign(dir: &Path, mode: &str, extra_stage: &str, axes: &str) -> PathBuf {
    std::fs::create_dir_all(dir.join("state")).unwrap_or_else(|e| panic!("{e}"));
    std::fs::write(dir.join("x0.json"), "{\"x\": 0.0}\n").unwrap_or_else(|e| panic!("{e}"));
    let text = format!(
        r#"campaign: halfstep
about: test campaign (not physics)
programs:
  step: {{ path: {prog} }}
parameters:
  mode: {mode}
  state: {state}
sweep:
  product:
    a: {axes}
start:
  x: x0.json
cycle:
  s:
    run: [step, "{{{{param:mode}}}}", "{{{{param:state}}}}", "{{{{input:x}}}}", "{{{{output:x}}}}", "{{{{param:a}}}}"]
    inputs: {{ x: {{ previous: s.x, initially: start.x }} }}
    outputs: {{ x: x.json }}
    metrics: [x]
{extra_stage}
stop:
  when:
    - {{ metric: s.x, change-below: 1.0e-3, for: 2 }}
  max-iterations: 30
"#,
        prog = fixture("halfstep.sh").display(),
        state = dir.join("state").display(),
    );
    let f = dir.join("c.yaml");
    std::fs::write(&f, text).unwrap_or_else(|e| panic!("{e}"));
    f
}

fn tmp() -> tempfile::TempDir {
    tempfile::tempdir().unwrap_or_else(|e| panic!("tempdir: {e}"))
}

#[test]
fn toy_campaign_converges_and_status_json_has_the_contract_fields() {
    let d = tmp();
    halfstep_campaign(d.path(), "ok", "", "[1.0, 2.0, 4.0]");
    let o = run_rondo(d.path(), &["run", "c.yaml", "--max-running", "2"]);
    assert_eq!(o.status.code(), Some(0), "{}", shown(&o));
    let s = status_json(d.path(), &d.path().join("c.rondo"));
    assert_eq!(s["campaign"], "halfstep");
    let points = s["points"].as_array().cloned().unwrap_or_default();
    assert_eq!(points.len(), 3);
    for (p, a) in points.iter().zip([1.0, 2.0, 4.0]) {
        assert_eq!(p["state"], "converged", "{p}");
        assert_eq!(p["values"]["a"], a);
        let x = p["metrics"]["s.x"].as_f64().unwrap_or(f64::NAN);
        // x_n = a (1 − 2^−n): converged within the rule's tolerance of the fixed point a.
        assert!((x - a).abs() < 2e-3 * a.max(1.0), "{p}");
        let it = p["iteration"].as_i64().unwrap_or(0);
        let exact = a * (1.0 - 0.5f64.powi(it as i32));
        assert!(
            (x - exact).abs() < 1e-12,
            "x_n = a(1 − 2^−n): {x} vs {exact}"
        );
        assert!(p["id"].is_string());
    }
}

#[test]
fn each_kind_of_stage_failure_is_retried_and_never_becomes_good() {
    for (mode, kind, stage_extra) in [
        ("fail", "exit-status", ""),
        ("nan", "nonfinite-output", ""),
        ("missing", "missing-output", ""),
        ("sleep", "timeout", "    time-limit: \"0:02\"\n"),
    ] {
        let d = tmp();
        let f = halfstep_campaign(d.path(), mode, "", "[1.0]");
        // one retry, and for `sleep` a 2 s limit, on stage s
        let text = std::fs::read_to_string(&f).unwrap_or_default().replace(
            "    metrics: [x]\n",
            &format!("    metrics: [x]\n    retries: 1\n{stage_extra}"),
        );
        std::fs::write(&f, text).unwrap_or_else(|e| panic!("{e}"));
        let o = run_rondo(d.path(), &["run", "c.yaml", "--grace", "1"]);
        assert_eq!(o.status.code(), Some(0), "mode {mode}: {}", shown(&o));
        let ws = d.path().join("c.rondo");
        let rows: Vec<(i64, String, Option<String>, i64)> = query(&ws, |pool| {
            Box::pin(async move {
                sqlx::query(
                    "SELECT a.attempt, a.state, a.failure_kind, \
                     (SELECT count(*) FROM attempt_outputs o WHERE o.attempt_id = a.id) AS outs \
                     FROM attempts a WHERE a.iteration = 2 ORDER BY a.attempt",
                )
                .fetch_all(pool)
                .await
                .unwrap_or_default()
                .into_iter()
                .map(|r| (r.get(0), r.get(1), r.get(2), r.get(3)))
                .collect()
            })
        });
        assert_eq!(rows.len(), 2, "mode {mode}: {rows:?}");
        assert_eq!(rows[0].1, "failed", "mode {mode}");
        assert_eq!(rows[0].2.as_deref(), Some(kind), "mode {mode}");
        assert_eq!(
            rows[0].3, 0,
            "a failed attempt records no outputs (mode {mode})"
        );
        assert_eq!(rows[1].1, "succeeded", "mode {mode}");
        // The converged value is the exact sequence: the failure left no trace in the numbers.
        let s = status_json(d.path(), &ws);
        let p = &s["points"][0];
        let it = p["iteration"].as_i64().unwrap_or(0) as i32;
        let x = p["metrics"]["s.x"].as_f64().unwrap_or(f64::NAN);
        assert!(
            (x - (1.0 - 0.5f64.powi(it))).abs() < 1e-12,
            "mode {mode}: {p}"
        );
    }
}

#[test]
fn a_point_whose_retries_run_out_fails_with_its_reason_and_the_others_go_on() {
    let d = tmp();
    let f = halfstep_campaign(d.path(), "always-fail-p002", "", "[1.0, 2.0, 3.0]");
    let text = std::fs::read_to_string(&f)
        .unwrap_or_default()
        .replace("    metrics: [x]\n", "    metrics: [x]\n    retries: 2\n");
    std::fs::write(&f, text).unwrap_or_else(|e| panic!("{e}"));
    let o = run_rondo(d.path(), &["run", "c.yaml"]);
    assert_eq!(o.status.code(), Some(3), "{}", shown(&o));
    let s = status_json(d.path(), &d.path().join("c.rondo"));
    let states: Vec<&str> = s["points"]
        .as_array()
        .map(|a| {
            a.iter()
                .map(|p| p["state"].as_str().unwrap_or(""))
                .collect()
        })
        .unwrap_or_default();
    assert_eq!(states, ["converged", "failed", "converged"]);
    let reason = s["points"][1]["reason"].as_str().unwrap_or("");
    assert!(
        reason.contains("stage `s`")
            && reason.contains("3 attempt")
            && reason.contains("exit-status"),
        "{reason}"
    );
    assert!(
        reason.contains("p002 never works"),
        "stderr tail in the reason: {reason}"
    );
}

#[test]
fn bad_input_is_refused_with_file_line_col_and_nothing_is_written() {
    let d = tmp();
    let f = halfstep_campaign(d.path(), "ok", "", "[1.0]");
    let good = std::fs::read_to_string(&f).unwrap_or_default();
    let cases = [
        (
            good.replace("    metrics: [x]\n", "    metrics: [x]\n    retires: 2\n"),
            "retires",
        ),
        (
            good.replace("{{input:x}}", "{{input:y}}"),
            "undefined placeholder",
        ),
        (
            good.replace("previous: s.x", "previous: q.x"),
            "unknown stage",
        ),
        (good.replace("x0.json", "missing.json"), "missing.json"),
    ];
    for (text, needle) in cases {
        std::fs::write(&f, &text).unwrap_or_else(|e| panic!("{e}"));
        let o = run_rondo(d.path(), &["run", "c.yaml"]);
        let err = String::from_utf8_lossy(&o.stderr);
        assert_eq!(o.status.code(), Some(2), "{needle}: {}", shown(&o));
        assert!(err.contains(needle), "{needle}: {err}");
        if needle != "missing.json" {
            // file:line:col: what; hint
            let re_ok = err.lines().any(|l| {
                let mut it = l.splitn(4, ':');
                let (Some(file), Some(line), Some(col)) = (it.next(), it.next(), it.next()) else {
                    return false;
                };
                file.ends_with("c.yaml")
                    && line.parse::<u32>().is_ok()
                    && col.parse::<u32>().is_ok()
            });
            assert!(re_ok, "no file:line:col in: {err}");
            assert!(err.contains("hint"), "{err}");
        }
        assert!(
            !d.path().join("c.rondo").exists(),
            "{needle}: workspace was created"
        );
        let o = run_rondo(d.path(), &["check", "c.yaml"]);
        assert_eq!(o.status.code(), Some(2), "check {needle}: {}", shown(&o));
    }
}

#[test]
fn a_hostile_parameter_value_reaches_the_program_as_one_literal_argument() {
    for shell in [false, true] {
        let d = tmp();
        let marker = d.path().join("pwned");
        let evil = format!("x; touch {}", marker.display());
        let text = format!(
            r#"campaign: inject
programs:
  show: {{ path: {prog} }}
parameters:
  evil: "{evil}"
  quote: "it's $(touch {m2}) `touch {m2}`"
cycle:
  s:
    run: [show, "{{{{param:evil}}}}", "--q={{{{param:quote}}}}"]
    shell: {shell}
    metrics: [n]
stop:
  max-iterations: 1
"#,
            prog = fixture("argv.sh").display(),
            m2 = marker.display(),
        );
        std::fs::write(d.path().join("c.yaml"), text).unwrap_or_else(|e| panic!("{e}"));
        let o = run_rondo(d.path(), &["run", "c.yaml", "--keep-scratch"]);
        // one iteration and no rules: the point stops at its cap
        assert_eq!(o.status.code(), Some(3), "{}", shown(&o));
        assert!(!marker.exists(), "shell={shell}: the value was executed");
        let args =
            std::fs::read_to_string(d.path().join("c.rondo/scratch/p001.i0001.s.a1/args.txt"))
                .unwrap_or_else(|e| panic!("shell={shell}: args.txt: {e}"));
        let lines: Vec<&str> = args.lines().collect();
        assert_eq!(lines.len(), 2, "shell={shell}: {args}");
        assert_eq!(lines[0], evil, "shell={shell}");
        assert_eq!(
            lines[1],
            format!("--q=it's $(touch {m}) `touch {m}`", m = marker.display()),
            "shell={shell}"
        );
    }
}

#[test]
fn a_second_orchestrator_is_refused_and_cancel_stops_the_first() {
    let d = tmp();
    std::fs::write(
        d.path().join("c.yaml"),
        r#"campaign: sleepy
cycle:
  nap:
    run: [/bin/sleep, "30"]
stop:
  max-iterations: 3
"#,
    )
    .unwrap_or_else(|e| panic!("{e}"));
    let mut first = Command::new(rondo())
        .args(["run", "c.yaml", "--grace", "1"])
        .current_dir(d.path())
        .stdout(Stdio::null())
        .stderr(Stdio::piped())
        .spawn()
        .unwrap_or_else(|e| panic!("spawn: {e}"));
    let ws = d.path().join("c.rondo");
    let t0 = Instant::now();
    // wait until the first run has an attempt running
    loop {
        let s = (ws.join("rondo.db").is_file()).then(|| status_json(d.path(), &ws));
        if s.is_some_and(|s| s["points"][0]["attempts"].as_i64().unwrap_or(0) >= 1) {
            break;
        }
        assert!(
            t0.elapsed() < Duration::from_secs(60),
            "first run did not start"
        );
        std::thread::sleep(Duration::from_millis(100));
    }
    let o = run_rondo(d.path(), &["run", "c.yaml"]);
    let err = String::from_utf8_lossy(&o.stderr);
    assert_eq!(o.status.code(), Some(1), "{}", shown(&o));
    assert!(
        err.contains(&format!("pid {}", first.id())) && err.contains("host"),
        "{err}"
    );
    let o = run_rondo(
        d.path(),
        &["cancel", "--workspace", &ws.display().to_string()],
    );
    assert!(o.status.success(), "{}", shown(&o));
    let status = first.wait().unwrap_or_else(|e| panic!("wait: {e}"));
    assert_eq!(status.code(), Some(3));
    let s = status_json(d.path(), &ws);
    assert_eq!(s["points"][0]["state"], "cancelled");
    let ws_id = workspace_id(&ws);
    assert!(
        processes_of_workspace(&ws_id).is_empty(),
        "children left behind"
    );
    let states = strings(&ws, "SELECT state FROM attempts");
    assert_eq!(states, ["cancelled"]);
}

#[test]
fn the_committed_json_schema_matches_the_rust_types() {
    let d = tmp();
    let o = run_rondo(d.path(), &["schema"]);
    assert!(o.status.success(), "{}", shown(&o));
    let committed = std::fs::read_to_string(repo().join("schemas/campaign.schema.json"))
        .unwrap_or_else(|e| panic!("schemas/campaign.schema.json: {e}"));
    assert!(
        committed == String::from_utf8_lossy(&o.stdout),
        "schemas/campaign.schema.json is stale: regenerate it with `rondo schema > schemas/campaign.schema.json`"
    );
}

#[test]
fn a_scheduled_parameter_follows_the_loop_and_is_recorded_per_attempt() {
    let d = tmp();
    let f = halfstep_campaign(d.path(), "ok", "", "[1.0]");
    let text = std::fs::read_to_string(&f)
        .unwrap_or_default()
        .replace(
            r#""{{param:a}}"]"#,
            r#""{{param:a}}", "--sweeps={{param:sweeps}}"]"#,
        )
        .replace(
            "stop:\n",
            "schedules:\n  sweeps: { start: 100, factor: 2, max: 800, metric: s.x, change-below: 0.1 }\nstop:\n",
        );
    std::fs::write(&f, text).unwrap_or_else(|e| panic!("{e}"));
    let o = run_rondo(d.path(), &["run", "c.yaml"]);
    assert_eq!(o.status.code(), Some(0), "{}", shown(&o));
    let rows: Vec<(i64, String, String)> = query(&d.path().join("c.rondo"), |pool| {
        Box::pin(async move {
            sqlx::query("SELECT iteration, parameters_json, argv_json FROM attempts WHERE state = 'succeeded' ORDER BY iteration")
                .fetch_all(pool)
                .await
                .unwrap_or_default()
                .into_iter()
                .map(|r| (r.get(0), r.get(1), r.get(2)))
                .collect()
        })
    });
    assert!(rows.len() >= 8, "{rows:?}");
    for (it, params, argv) in rows {
        // x_n = 1 − 2^−n changes by 2^−j at iteration j: below 0.1 from j = 4 on, so the
        // value doubles once per earlier iteration j in 4..n−1, from 100 up to 800.
        let held = (it - 4).max(0);
        let want = (100i64 << held.min(3)).min(800);
        let p: serde_json::Value = serde_json::from_str(&params).unwrap_or_default();
        assert_eq!(p["sweeps"], want, "iteration {it}: {params}");
        assert!(
            argv.contains(&format!("--sweeps={want}")),
            "iteration {it}: {argv}"
        );
    }
}

#[test]
fn sigterm_stops_starting_ends_the_children_and_a_rerun_continues() {
    let d = tmp();
    std::fs::write(
        d.path().join("c.yaml"),
        r#"campaign: sleepy
sweep:
  product:
    k: [1, 2, 3]
cycle:
  nap:
    run: [/bin/sleep, "30"]
stop:
  max-iterations: 1
"#,
    )
    .unwrap_or_else(|e| panic!("{e}"));
    let mut child = Command::new(rondo())
        .args(["run", "c.yaml", "--grace", "1", "--max-running", "2"])
        .current_dir(d.path())
        .stdout(Stdio::null())
        .stderr(Stdio::piped())
        .spawn()
        .unwrap_or_else(|e| panic!("spawn: {e}"));
    let ws = d.path().join("c.rondo");
    let t0 = Instant::now();
    let running = |ws: &Path| -> i64 {
        query(ws, |pool| {
            Box::pin(async move {
                sqlx::query_scalar("SELECT count(*) FROM attempts WHERE state = 'running'")
                    .fetch_one(pool)
                    .await
                    .unwrap_or(0)
            })
        })
    };
    while !(ws.join("rondo.db").is_file() && running(&ws) == 2) {
        assert!(
            t0.elapsed() < Duration::from_secs(60),
            "attempts did not start"
        );
        std::thread::sleep(Duration::from_millis(100));
    }
    // SAFETY: signalling our own child process.
    unsafe { libc::kill(child.id() as i32, libc::SIGTERM) };
    let status = child.wait().unwrap_or_else(|e| panic!("wait: {e}"));
    assert_eq!(status.code(), Some(4), "interrupted");
    let (states, ws_id): (Vec<String>, String) = query(&ws, |pool| {
        Box::pin(async move {
            let s = sqlx::query_scalar("SELECT state FROM attempts ORDER BY id")
                .fetch_all(pool)
                .await
                .unwrap_or_default();
            let id = sqlx::query_scalar("SELECT workspace_id FROM campaign")
                .fetch_one(pool)
                .await
                .unwrap_or_default();
            (s, id)
        })
    });
    // two were running and were ended and recorded; the third was never started
    assert_eq!(states, ["cancelled", "cancelled"]);
    assert!(
        processes_of_workspace(&ws_id).is_empty(),
        "children left behind"
    );
    let events = strings(&ws, "SELECT kind FROM events ORDER BY seq");
    assert!(events.iter().any(|e| e == "run-interrupted"), "{events:?}");
}

#[test]
fn a_child_whose_row_a_crash_never_wrote_is_ended_before_the_rerun_starts() {
    // A local child is started before its planned row is written (the row rides along with
    // the next store call). Simulate the crash in between: a process tagged with this
    // workspace and an attempt id the store has never seen.
    use std::os::unix::process::CommandExt;
    let d = tmp();
    std::fs::write(
        d.path().join("c.yaml"),
        "campaign: quick\ncycle:\n  nop:\n    run: [/bin/true]\nstop:\n  max-iterations: 1\n",
    )
    .unwrap_or_else(|e| panic!("{e}"));
    let o = run_rondo(d.path(), &["run", "c.yaml", "-q"]);
    // no stopping rule: the one iteration ends at the cap (exit 3, incomplete)
    assert_eq!(o.status.code(), Some(3), "{}", shown(&o));
    let ws = d.path().join("c.rondo");
    let ws_id = workspace_id(&ws);
    let mut stray = Command::new("/bin/sleep")
        .arg("300")
        .env("RONDO_WORKSPACE_ID", &ws_id)
        .env("RONDO_ATTEMPT_ID", "987654")
        .process_group(0)
        .spawn()
        .unwrap_or_else(|e| panic!("spawn: {e}"));
    let o = run_rondo(d.path(), &["run", "c.yaml", "-q", "--grace", "1"]);
    assert_eq!(o.status.code(), Some(3), "{}", shown(&o));
    let t0 = Instant::now();
    let status = loop {
        if let Some(s) = stray.try_wait().unwrap_or_else(|e| panic!("wait: {e}")) {
            break s;
        }
        if t0.elapsed() > Duration::from_secs(10) {
            let _ = stray.kill();
            panic!("the unrecorded child was left running");
        }
        std::thread::sleep(Duration::from_millis(50));
    };
    assert!(!status.success(), "ended by a signal: {status:?}");
    let events = strings(
        &ws,
        "SELECT detail FROM events WHERE kind = 'orphans-ended'",
    );
    assert!(
        events.len() == 1 && events[0].contains("987654"),
        "{events:?}"
    );
}

/// `combine: any`: a point stops as soon as one rule holds while the other does not (its
/// metric climbs by 1 every iteration); the same campaign under the default `all` runs on
/// to the cap. The recorded evaluation of the last iteration shows which rule held.
#[test]
fn combine_any_stops_a_point_when_one_rule_holds_and_all_does_not() {
    let campaign = |combine: &str| {
        format!(
            r#"campaign: either
cycle:
  s:
    run: [/bin/sh, -c, 'printf "{{\"flat\": 1.0, \"climb\": %s}}" "$RONDO_ITERATION" > metrics.json']
    metrics: [flat, climb]
stop:
  when:
    - {{ metric: s.flat, change-below: 1.0e-6 }}
    - {{ metric: s.climb, change-below: 1.0e-6 }}
{combine}  max-iterations: 5
"#
        )
    };
    let point = |dir: &Path| {
        let s = status_json(dir, &dir.join("c.rondo"));
        let points = s["points"].as_array().cloned().unwrap_or_default();
        assert_eq!(points.len(), 1, "{s}");
        points[0].clone()
    };

    // any: flat's change is 0 from iteration 2 on, so the point converges there
    let d = tmp();
    std::fs::write(d.path().join("c.yaml"), campaign("  combine: any\n"))
        .unwrap_or_else(|e| panic!("{e}"));
    let o = run_rondo(d.path(), &["run", "c.yaml", "-q"]);
    assert_eq!(o.status.code(), Some(0), "{}", shown(&o));
    let p = point(d.path());
    assert_eq!(p["state"], "converged", "{p}");
    assert_eq!(p["iteration"], 2, "{p}");
    assert_eq!(p["metrics"]["s.climb"], 2.0, "{p}");
    let stop = strings(
        &d.path().join("c.rondo"),
        "SELECT stop_json FROM iterations WHERE point = 'p001' AND iteration = 2",
    );
    assert_eq!(stop.len(), 1, "{stop:?}");
    let v: serde_json::Value =
        serde_json::from_str(&stop[0]).unwrap_or_else(|e| panic!("stop_json: {e}"));
    let held: Vec<(String, bool)> = v["rules"]
        .as_array()
        .cloned()
        .unwrap_or_default()
        .iter()
        .map(|r| {
            (
                r["metric"].as_str().unwrap_or_default().to_string(),
                r["satisfied"] == true,
            )
        })
        .collect();
    assert_eq!(
        held,
        vec![("s.flat".to_string(), true), ("s.climb".to_string(), false)],
        "{v}"
    );
    assert_eq!(v["rules_met"], true, "{v}");

    // all (the default): climb never settles, so the point runs to the cap
    let d = tmp();
    std::fs::write(d.path().join("c.yaml"), campaign("")).unwrap_or_else(|e| panic!("{e}"));
    let o = run_rondo(d.path(), &["run", "c.yaml", "-q"]);
    assert_eq!(o.status.code(), Some(3), "{}", shown(&o));
    let p = point(d.path());
    assert_eq!(p["state"], "capped", "{p}");
    assert_eq!(p["iteration"], 5, "{p}");
}
