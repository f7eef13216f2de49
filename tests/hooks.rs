//! Hooks through the real `rondo` binary with real hook processes: each event (a point
//! failed, converged, the campaign done, the disk low) reaches its program as JSON on stdin
//! with the right fields; a hook that exits 1, one that sleeps past its time limit and one
//! that does not exist are each logged as a `hook-failed` event with the reason, and the
//! campaign's results are those of a run without hooks.

mod common;

use std::path::{Path, PathBuf};

use common::*;
use sqlx::Row;

fn tmp() -> tempfile::TempDir {
    tempfile::tempdir().unwrap_or_else(|e| panic!("tempdir: {e}"))
}

/// tests/fixtures/halfstep.sh over a = 1, 2, 4 in `mode`, with `hooks` appended.
fn campaign(dir: &Path, mode: &str, hooks: &str) -> PathBuf {
    std::fs::create_dir_all(dir.join("state")).unwrap_or_else(|e| panic!("{e}"));
    std::fs::write(dir.join("x0.json"), "{\"x\": 0.0}\n").unwrap_or_else(|e| panic!("{e}"));
    let text = format!(
        r#"campaign: hooked
about: test campaign (not physics)
programs:
  step: {{ path: {prog} }}
parameters:
  mode: {mode}
  state: {state}
sweep:
  product:
    a: [1.0, 2.0, 4.0]
start:
  x: x0.json
cycle:
  s:
    run: [step, "{{{{param:mode}}}}", "{{{{param:state}}}}", "{{{{input:x}}}}", "{{{{output:x}}}}", "{{{{param:a}}}}"]
    inputs: {{ x: {{ previous: s.x, initially: start.x }} }}
    outputs: {{ x: x.json }}
    metrics: [x]
stop:
  when:
    - {{ metric: s.x, change-below: 1.0e-3, for: 2 }}
  max-iterations: 30
{hooks}"#,
        prog = fixture("halfstep.sh").display(),
        state = dir.join("state").display(),
    );
    let f = dir.join("c.yaml");
    std::fs::write(&f, text).unwrap_or_else(|e| panic!("{e}"));
    f
}

/// Write an executable script.
fn script(dir: &Path, name: &str, body: &str) -> PathBuf {
    let p = dir.join(name);
    std::fs::write(&p, format!("#!/bin/sh\n{body}")).unwrap_or_else(|e| panic!("{e}"));
    let _ = std::process::Command::new("chmod")
        .arg("+x")
        .arg(&p)
        .status();
    p
}

fn read_json(p: &Path) -> serde_json::Value {
    let text = std::fs::read_to_string(p).unwrap_or_else(|e| panic!("{}: {e}", p.display()));
    serde_json::from_str(&text).unwrap_or_else(|e| panic!("{}: {e}\n{text}", p.display()))
}

/// The `hook-failed` events: (point, detail JSON).
fn hook_failures(ws: &Path) -> Vec<(Option<String>, serde_json::Value)> {
    query(ws, |pool| {
        Box::pin(async move {
            sqlx::query("SELECT point, detail FROM events WHERE kind = 'hook-failed' ORDER BY seq")
                .fetch_all(pool)
                .await
                .unwrap_or_default()
                .into_iter()
                .map(|r| {
                    let d: String = r.get(1);
                    (r.get(0), serde_json::from_str(&d).unwrap_or_default())
                })
                .collect()
        })
    })
}

#[test]
fn every_event_reaches_its_hook_as_json_on_stdin() {
    let d = tmp();
    let got = d.path().join("got");
    std::fs::create_dir_all(&got).unwrap_or_else(|e| panic!("{e}"));
    script(
        d.path(),
        "record.sh",
        "cat > \"$1/$RONDO_HOOK_EVENT-$RONDO_HOOK_POINT.json\"\n",
    );
    let g = got.display();
    campaign(
        d.path(),
        "always-fail-p002",
        &format!(
            "hooks:\n  point-failed: [./record.sh, {g}]\n  point-converged: [./record.sh, {g}]\n  \
             campaign-done: [./record.sh, {g}]\n  disk-low: [./record.sh, {g}]\n  disk-free-below: 100%\n"
        ),
    );
    let o = run_rondo(d.path(), &["run", "c.yaml"]);
    assert_eq!(o.status.code(), Some(3), "p002 fails: {}", shown(&o));
    let ws = d.path().join("c.rondo");
    let ws_text = ws.display().to_string();
    let status = status_json(d.path(), &ws);

    let failed = read_json(&got.join("point-failed-p002.json"));
    assert_eq!(failed["event"], "point-failed");
    assert_eq!(failed["campaign"], "hooked");
    assert!(
        failed["workspace"]
            .as_str()
            .is_some_and(|w| w.ends_with("c.rondo")),
        "{failed}"
    );
    assert_eq!(failed["point"]["id"], "p002");
    assert_eq!(failed["point"]["values"]["a"], 2.0);
    assert_eq!(failed["iteration"], 1);
    assert_eq!(failed["reason"], status["points"][1]["reason"], "{failed}");
    assert!(
        failed["time"].as_str().is_some_and(|t| t.ends_with('Z')),
        "{failed}"
    );

    for (i, id) in [(0, "p001"), (2, "p003")] {
        let c = read_json(&got.join(format!("point-converged-{id}.json")));
        let p = &status["points"][i];
        assert_eq!(c["event"], "point-converged");
        assert_eq!(c["point"]["id"], id);
        assert_eq!(c["point"]["values"], p["values"]);
        assert_eq!(c["iteration"], p["iteration"]);
        assert_eq!(c["reason"], p["reason"]);
        let f = &c["final"]["s.x"];
        assert_eq!(
            f["value"].as_f64().map(f64::to_bits),
            p["metrics"]["s.x"].as_f64().map(f64::to_bits),
            "{c}"
        );
        assert_eq!(f["how"], "last");
        assert_eq!(f["iterations"], serde_json::json!([p["iteration"]]));
    }

    let done = read_json(&got.join("campaign-done-.json"));
    assert_eq!(
        done["counts"],
        serde_json::json!({"converged": 2, "failed": 1})
    );
    let low = read_json(&got.join("disk-low-.json"));
    assert_eq!(low["event"], "disk-low");
    assert!(
        low["free_bytes"].as_u64().is_some() && low["total_bytes"].as_u64().is_some(),
        "{low}"
    );
    assert_eq!(
        std::fs::read_dir(&got).map(|r| r.count()).unwrap_or(0),
        5,
        "one call per event"
    );
    assert!(
        hook_failures(&ws).is_empty(),
        "{:?} ({ws_text})",
        hook_failures(&ws)
    );
}

#[test]
fn failing_hanging_and_missing_hooks_are_logged_and_change_nothing() {
    // The reference: the same campaign without hooks.
    let plain = tmp();
    campaign(plain.path(), "ok", "");
    let o = run_rondo(plain.path(), &["run", "c.yaml"]);
    assert_eq!(o.status.code(), Some(0), "{}", shown(&o));
    let reference = status_json(plain.path(), &plain.path().join("c.rondo"));

    let d = tmp();
    script(
        d.path(),
        "fail.sh",
        "cat > /dev/null\necho 'no mail server' >&2\nexit 1\n",
    );
    let pid_file = d.path().join("sleeper.pid");
    script(
        d.path(),
        "sleep.sh",
        &format!("echo $$ > {}\nsleep 30\n", pid_file.display()),
    );
    campaign(
        d.path(),
        "ok",
        "hooks:\n  point-converged: [./fail.sh]\n  campaign-done: [./sleep.sh]\n  \
         disk-low: [./no-such-hook]\n  disk-free-below: 100%\n  time-limit: \"0:01\"\n",
    );
    let o = run_rondo(d.path(), &["run", "c.yaml"]);
    assert_eq!(
        o.status.code(),
        Some(0),
        "hooks never stop a campaign: {}",
        shown(&o)
    );
    let ws = d.path().join("c.rondo");
    let s = status_json(d.path(), &ws);
    for (a, b) in s["points"]
        .as_array()
        .into_iter()
        .flatten()
        .zip(reference["points"].as_array().into_iter().flatten())
    {
        assert_eq!(a["state"], b["state"]);
        assert_eq!(a["iteration"], b["iteration"]);
        assert_eq!(
            a["metrics"], b["metrics"],
            "the same numbers with and without hooks"
        );
    }

    let failures = hook_failures(&ws);
    let of = |hook: &str| -> Vec<&(Option<String>, serde_json::Value)> {
        failures.iter().filter(|(_, d)| d["hook"] == hook).collect()
    };
    let conv = of("point-converged");
    assert_eq!(conv.len(), 3, "{failures:?}");
    for (point, d) in &conv {
        assert!(point.is_some());
        let r = d["reason"].as_str().unwrap_or("");
        assert!(
            r.contains("exit status: 1") && r.contains("no mail server"),
            "{r}"
        );
    }
    let done = of("campaign-done");
    assert_eq!(done.len(), 1, "{failures:?}");
    let r = done[0].1["reason"].as_str().unwrap_or("");
    assert!(r.contains("longer than its time limit of 1 s"), "{r}");
    let missing = of("disk-low");
    assert_eq!(missing.len(), 1, "{failures:?}");
    let r = missing[0].1["reason"].as_str().unwrap_or("");
    assert!(
        r.contains("cannot start") && r.contains("no-such-hook"),
        "{r}"
    );

    // The hung hook was killed, not left behind.
    let pid = std::fs::read_to_string(&pid_file).unwrap_or_default();
    let pid = pid.trim();
    assert!(!pid.is_empty(), "the sleeping hook ran");
    let gone = (0..50).any(|_| {
        let alive = std::fs::read_to_string(format!("/proc/{pid}/stat"))
            .map(|s| !s.contains(") Z "))
            .unwrap_or(false);
        if alive {
            std::thread::sleep(std::time::Duration::from_millis(100));
        }
        !alive
    });
    assert!(gone, "hook process {pid} still runs");
}

#[test]
fn a_capped_point_reaches_the_point_capped_hook_and_a_rerun_calls_nothing_again() {
    let d = tmp();
    let got = d.path().join("got");
    std::fs::create_dir_all(&got).unwrap_or_else(|e| panic!("{e}"));
    script(
        d.path(),
        "record.sh",
        "cat > \"$1/$RONDO_HOOK_EVENT-$RONDO_HOOK_POINT.json\"\n",
    );
    let f = campaign(
        d.path(),
        "ok",
        &format!(
            "hooks:\n  point-capped: [./record.sh, {}]\n  point-converged: [./record.sh, {}]\n",
            got.display(),
            got.display()
        ),
    );
    let text = std::fs::read_to_string(&f)
        .unwrap_or_default()
        .replace("max-iterations: 30", "max-iterations: 2");
    std::fs::write(&f, text).unwrap_or_else(|e| panic!("{e}"));
    let o = run_rondo(d.path(), &["run", "c.yaml"]);
    assert_eq!(o.status.code(), Some(3), "capped points: {}", shown(&o));
    for id in ["p001", "p002", "p003"] {
        let c = read_json(&got.join(format!("point-capped-{id}.json")));
        assert_eq!(c["event"], "point-capped");
        assert_eq!(c["iteration"], 2);
        assert!(
            c["reason"]
                .as_str()
                .is_some_and(|r| r.contains("max-iterations")),
            "{c}"
        );
        assert!(
            c.get("final").is_none(),
            "final values only for converged points"
        );
    }
    assert_eq!(std::fs::read_dir(&got).map(|r| r.count()).unwrap_or(0), 3);
    // Running again finds every point stopped: no event, no hook.
    for e in std::fs::read_dir(&got).into_iter().flatten().flatten() {
        let _ = std::fs::remove_file(e.path());
    }
    let o = run_rondo(d.path(), &["run", "c.yaml"]);
    assert_eq!(o.status.code(), Some(3), "{}", shown(&o));
    assert_eq!(std::fs::read_dir(&got).map(|r| r.count()).unwrap_or(0), 0);
}
