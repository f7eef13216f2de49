//! Local attempts that outlive rondo: the real `rondo` binary runs a one-stage `/bin/sh`
//! campaign and is SIGKILLed while the stage runs. The stage writes its pid to a file beside
//! the campaign each time it starts, and runs while the file `hold` exists, so the tests
//! decide when it ends (no timing). docs/concepts.md ("Local attempts outlive rondo") names
//! these tests.

mod common;

use std::path::{Path, PathBuf};
use std::process::{Child, Command, Stdio};
use std::time::{Duration, Instant};

use common::*;

/// One point, one iteration, one stage that appends its pid to `pids` and then waits while
/// `hold` exists. `outlive` is the stage's `outlive-rondo` (`None`: the key is left out).
fn campaign_text(outlive: Option<bool>) -> String {
    let key = outlive.map_or(String::new(), |o| format!("    outlive-rondo: {o}\n"));
    format!(
        r#"campaign: outlive
about: test campaign (not physics)
programs:
  sh: {{ path: /bin/sh }}
sweep:
  product:
    a: [7]
start:
  x: x0.txt
cycle:
  s:
    run: [sh, -c, 'echo $$ >> ../../../pids; while [ -e ../../../hold ]; do sleep 0.05; done; echo $1 > x.txt; echo "{{\"x\": $1}}" > metrics.json', sh, "{{{{param:a}}}}"]
    inputs: {{ x: {{ previous: s.x, initially: start.x }} }}
    outputs: {{ x: x.txt }}
    metrics: [x]
{key}stop:
  max-iterations: 1
"#
    )
}

fn campaign_dir(outlive: Option<bool>) -> tempfile::TempDir {
    let d = tempfile::tempdir().unwrap_or_else(|e| panic!("tempdir: {e}"));
    write(&d.path().join("x0.txt"), "0\n");
    write(&d.path().join("c.yaml"), &campaign_text(outlive));
    write(&d.path().join("hold"), "");
    d
}

fn write(path: &Path, text: &str) {
    std::fs::write(path, text).unwrap_or_else(|e| panic!("{}: {e}", path.display()));
}

fn ws_of(d: &Path) -> PathBuf {
    d.join("c.rondo")
}

/// Poll `cond` every 20 ms up to a generous deadline (not a timing assertion: the deadline
/// only keeps a broken build from hanging the suite).
fn wait_for(what: &str, mut cond: impl FnMut() -> bool) {
    let deadline = Instant::now() + Duration::from_secs(120);
    while !cond() {
        assert!(Instant::now() < deadline, "waited 2 min for: {what}");
        std::thread::sleep(Duration::from_millis(20));
    }
}

fn spawn_rondo(dir: &Path) -> Child {
    Command::new(rondo())
        .args(["run", "c.yaml", "-q"])
        .current_dir(dir)
        .env("PATH", path_with_binaries())
        .stdout(Stdio::null())
        .stderr(Stdio::null())
        .spawn()
        .unwrap_or_else(|e| panic!("spawn rondo: {e}"))
}

/// The pids the stage wrote, one per start of its program.
fn pids(dir: &Path) -> Vec<i32> {
    std::fs::read_to_string(dir.join("pids"))
        .unwrap_or_default()
        .lines()
        .filter_map(|l| l.trim().parse().ok())
        .collect()
}

fn alive(pid: i32) -> bool {
    // A zombie has an empty environ and state Z; both count as gone.
    std::fs::read_to_string(format!("/proc/{pid}/stat"))
        .ok()
        .and_then(|s| {
            s.rfind(')')
                .and_then(|i| s[i + 1..].split_whitespace().next().map(str::to_string))
        })
        .is_some_and(|state| state != "Z" && state != "X")
}

/// Start rondo, wait for the stage's first start, SIGKILL rondo. Returns the stage's pid.
fn kill_rondo_during_the_stage(dir: &Path) -> i32 {
    let mut child = spawn_rondo(dir);
    wait_for("the stage to start", || !pids(dir).is_empty());
    // Its row is written at rondo's next tick, just after the start: a kill before that
    // leaves a child no record accounts for, which the next run ends as an orphan.
    let ws = ws_of(dir);
    wait_for("the attempt's running row", || {
        strings_ro(&ws, "SELECT state FROM attempts")
            .iter()
            .any(|s| s == "running")
    });
    child
        .kill()
        .unwrap_or_else(|e| panic!("SIGKILL rondo: {e}"));
    let _ = child.wait();
    pids(dir)[0]
}

/// Attempts as `state` strings, in id order.
fn attempt_states(ws: &Path) -> Vec<String> {
    strings(ws, "SELECT state FROM attempts ORDER BY id")
}

fn events_of(ws: &Path, kind: &'static str) -> Vec<String> {
    match kind {
        "attempt-adopted" => strings(
            ws,
            "SELECT detail FROM events WHERE kind = 'attempt-adopted' ORDER BY rowid",
        ),
        _ => unreachable!(),
    }
}

#[test]
fn a_long_local_stage_survives_a_sigkill_of_rondo_and_is_recorded_once() {
    let d = campaign_dir(None);
    let ws = ws_of(d.path());
    let pid = kill_rondo_during_the_stage(d.path());
    assert!(alive(pid), "the stage's program outlived rondo's SIGKILL");
    // The next rondo watches the same process again; only then may the stage end.
    let mut again = spawn_rondo(d.path());
    wait_for("the next rondo to adopt the running attempt", || {
        strings_ro(
            &ws,
            "SELECT detail FROM events WHERE kind = 'attempt-adopted'",
        )
        .iter()
        .any(|e| e == "still queued or running")
    });
    assert!(alive(pid), "adopting did not end the program");
    std::fs::remove_file(d.path().join("hold")).unwrap_or_else(|e| panic!("{e}"));
    let status = again.wait().unwrap_or_else(|e| panic!("wait: {e}"));
    assert_eq!(status.code(), Some(3), "capped after its one iteration");
    assert_eq!(pids(d.path()), vec![pid], "the program started once");
    assert_eq!(
        attempt_states(&ws),
        vec!["succeeded"],
        "one attempt, recorded once"
    );
    assert_eq!(
        strings(&ws, "SELECT handle_id FROM attempts"),
        vec![pid.to_string()],
        "its handle is the program's process group"
    );
    let s = status_json(d.path(), &ws);
    assert_eq!(s["points"][0]["metrics"]["s.x"], 7.0, "{s}");
    assert_no_double_success_nor_children(&ws, 0);
}

#[test]
fn a_stage_that_ended_while_rondo_was_dead_is_adopted_without_a_rerun() {
    let d = campaign_dir(Some(true));
    let ws = ws_of(d.path());
    let pid = kill_rondo_during_the_stage(d.path());
    let id = workspace_id(&ws);
    std::fs::remove_file(d.path().join("hold")).unwrap_or_else(|e| panic!("{e}"));
    wait_for(
        "the stage and its keeper to end with nobody watching",
        || !alive(pid) && processes_of_workspace(&id).is_empty(),
    );
    let o = run_rondo(d.path(), &["run", "c.yaml", "-q"]);
    assert_eq!(o.status.code(), Some(3), "{}", shown(&o));
    assert_eq!(pids(d.path()), vec![pid], "the program was not run again");
    assert_eq!(attempt_states(&ws), vec!["succeeded"]);
    assert_eq!(
        events_of(&ws, "attempt-adopted"),
        vec!["finished while no orchestrator watched"]
    );
    assert_no_double_success_nor_children(&ws, 0);
}

#[test]
fn an_outlive_rondo_false_stage_ends_with_rondo_and_runs_again() {
    let d = campaign_dir(Some(false));
    let ws = ws_of(d.path());
    let pid = kill_rondo_during_the_stage(d.path());
    let id = workspace_id(&ws);
    // Its keeper notices that rondo is gone and ends it, with nobody starting rondo again.
    wait_for("the opted-out stage to end without rondo", || {
        !alive(pid) && processes_of_workspace(&id).is_empty()
    });
    std::fs::remove_file(d.path().join("hold")).unwrap_or_else(|e| panic!("{e}"));
    let o = run_rondo(d.path(), &["run", "c.yaml", "-q"]);
    assert_eq!(o.status.code(), Some(3), "{}", shown(&o));
    let started = pids(d.path());
    assert_eq!(started.len(), 2, "run again after the kill: {started:?}");
    assert_eq!(attempt_states(&ws), vec!["lost", "succeeded"]);
    assert!(
        events_of(&ws, "attempt-adopted").is_empty(),
        "nothing was adopted"
    );
    assert_no_double_success_nor_children(&ws, 0);
}

// ---------------------------------------------------------------------------------------
// What each attempt cost (`wait4` of the program, through its keeper).

/// Three stages: a busy loop, one that holds 200 MiB in a shell variable, and one that
/// sleeps.
fn cost_campaign() -> String {
    let stage = |name: &str, script: &str| {
        format!(
            "  {name}:\n    run: [sh, -c, '{script}; echo 1 > x.txt; echo \"{{\\\"x\\\": 1}}\" > metrics.json']\n    outputs: {{ x: x.txt }}\n    metrics: [x]\n"
        )
    };
    format!(
        "campaign: cost\nabout: test campaign (not physics)\nprograms:\n  sh: {{ path: /bin/sh }}\n\
         sweep:\n  product:\n    a: [1]\ncycle:\n{}{}{}stop:\n  max-iterations: 1\n",
        stage("busy", "i=0; while [ $i -lt 1000000 ]; do i=$((i+1)); done"),
        stage(
            "big",
            "x=$(head -c 209715200 /dev/zero | tr \"\\\\0\" a); [ ${#x} -eq 209715200 ]"
        ),
        stage("idle", "sleep 0.5"),
    )
}

#[test]
fn each_attempt_records_its_cpu_time_peak_memory_and_wall_time() {
    let d = tempfile::tempdir().unwrap_or_else(|e| panic!("tempdir: {e}"));
    write(&d.path().join("c.yaml"), &cost_campaign());
    let ws = ws_of(d.path());
    let o = run_rondo(d.path(), &["run", "c.yaml", "-q"]);
    assert_eq!(o.status.code(), Some(3), "{}", shown(&o));
    let rows = strings(
        &ws,
        "SELECT stage || ' ' || cpu_user_s || ' ' || cpu_system_s || ' ' || max_rss_kib || ' ' \
         || wall_s || ' ' || usage_source FROM attempts ORDER BY id",
    );
    let mut got = std::collections::BTreeMap::new();
    for r in &rows {
        let f: Vec<&str> = r.split(' ').collect();
        assert_eq!(f.len(), 6, "every figure recorded: {r}");
        assert_eq!(f[5], "wait4", "{r}");
        let n = |i: usize| f[i].parse::<f64>().unwrap_or_else(|e| panic!("{r}: {e}"));
        got.insert(f[0].to_string(), (n(1), n(2), n(3), n(4)));
    }
    let (user, sys, _, wall) = got["busy"];
    assert!(
        user > 0.1 && user + sys >= 0.25 * wall && wall >= 0.9 * user,
        "a busy loop's CPU time is a good part of its wall time: user {user} s, system {sys} \
         s, wall {wall} s"
    );
    let (_, _, rss, _) = got["big"];
    assert!(rss >= 200.0 * 1024.0, "200 MiB held: max RSS {rss} KiB");
    let (user, sys, rss_idle, wall) = got["idle"];
    assert!(
        user + sys < 0.25 && wall >= 0.5 && rss_idle < 50.0 * 1024.0,
        "sleeping costs little CPU and memory: user {user} s, system {sys} s, wall {wall} s, \
         RSS {rss_idle} KiB"
    );
    // Status sums them to core-hours per stage and per point, in text and JSON.
    let s = status_json(d.path(), &ws);
    let cpu: f64 = got.values().map(|(u, s, _, _)| u + s).sum();
    let total = s["usage"]["total"]["core_hours"].as_f64().unwrap_or(-1.0);
    assert!(
        (total - cpu / 3600.0).abs() < 1e-9,
        "{total} vs {cpu} s: {s}"
    );
    let point = &s["points"][0]["usage"];
    assert_eq!(point["total"]["attempts"], 3, "{point}");
    assert_eq!(
        point["total"]["core_hours"],
        s["usage"]["total"]["core_hours"]
    );
    let busy = s["usage"]["by_stage"]["busy"]["core_hours"]
        .as_f64()
        .unwrap_or(-1.0);
    assert!((busy - (got["busy"].0 + got["busy"].1) / 3600.0).abs() < 1e-9);
    assert_eq!(
        s["usage"]["by_stage"]["big"]["max_rss_kib"].as_f64(),
        Some(got["big"].2)
    );
    let text = run_rondo(d.path(), &["status", "c.yaml"]);
    let text = String::from_utf8_lossy(&text.stdout).into_owned();
    assert!(
        text.contains("cost: ") && text.contains("core-hours") && text.contains("busy "),
        "{text}"
    );
}
