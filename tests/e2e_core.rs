//! End-to-end tests of the core through the real `rondo` binary and real child processes:
//! convergence and `status --json`, retries after each kind of stage failure, a point that
//! fails for good while the others go on, bad input refused without writing anything, no
//! shell injection through parameter values, the workspace lock and `rondo cancel`, the
//! JSON Schema drift check; and on small real workspaces: numbers that come out bit for bit,
//! the equation-of-state result's recorded command rerun, a program hash recorded as unknown,
//! the status lines, the compact `rondo trace` and `rondo extract`.

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
    run: {run}
    shell: {shell}
    metrics: [n]
stop:
  max-iterations: 1
"#,
            prog = fixture("argv.sh").display(),
            m2 = marker.display(),
            // The shell form is one script; the list form one argument per element.
            run = if shell {
                r#""{{program:show}} {{param:evil}} --q={{param:quote}}""#
            } else {
                r#"[show, "{{param:evil}}", "--q={{param:quote}}"]"#
            },
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
    // Read-only, as a reader beside a run must: `query` opens through `store::open`, whose
    // migrations would race the run's own while it creates the store.
    let running = |ws: &Path| -> i64 {
        strings_ro(
            ws,
            "SELECT CAST(count(*) AS TEXT) FROM attempts WHERE state = 'running'",
        )
        .first()
        .and_then(|n| n.parse().ok())
        .unwrap_or(0)
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

// ---------------------------------------------------------------------------------------
// Numbers and provenance of the equation-of-state analysis, on a real small workspace.

/// Energies (eV) per volume (Å³) that serde_json's default number parser reads one unit in
/// the last place off. Found by a search over the doubles next to a third-order
/// Birch–Murnaghan curve (E0 = −12 eV, V0 = 28 Å³, B0 = 0.5 eV/Å³, B0' = 4.5; invented
/// numbers) with serde_json 1.0.154 without `float_roundtrip`: each text is the shortest
/// representation of its double (Rust's exact parser gives the double back), and the default
/// parser returned the neighbour double instead (−1, +1, −1, +1, −1 units in the last place).
const INEXACT_UNDER_DEFAULT_PARSER: [(&str, &str); 5] = [
    ("26", "-11.959089291369073"),
    ("27", "-11.990455887023707"),
    ("28", "-12.000000000000005"),
    ("29", "-11.991627802281503"),
    ("30", "-11.968529824472133"),
];

/// A campaign of one stage that reports, per volume, the energy of
/// [`INEXACT_UNDER_DEFAULT_PARSER`] (the same at every iteration, so each point converges at
/// iteration 2), at one temperature, with the equation-of-state analysis. With `mix`, the
/// stage also writes the energy as a file that the built-in `mix` stage mixes.
fn eos_campaign(dir: &Path, mix: bool) -> PathBuf {
    use std::os::unix::fs::PermissionsExt;
    let mut script = String::from(
        "#!/bin/sh\n# test program (not physics): fixed energy per volume\ncase \"$1\" in\n",
    );
    for (v, e) in INEXACT_UNDER_DEFAULT_PARSER {
        script.push_str(&format!("  {v}|{v}.0) e={e} ;;\n"));
    }
    script.push_str("  *) echo \"no energy for volume $1\" >&2; exit 64 ;;\nesac\n");
    script.push_str("printf '{\"energy\": %s}\\n' \"$e\" > metrics.json\n");
    if mix {
        script.push_str("cp metrics.json x.json\n");
    }
    let prog = dir.join("energy.sh");
    std::fs::write(&prog, script).unwrap_or_else(|e| panic!("{e}"));
    std::fs::set_permissions(&prog, std::fs::Permissions::from_mode(0o755))
        .unwrap_or_else(|e| panic!("{e}"));
    let volumes: Vec<&str> = INEXACT_UNDER_DEFAULT_PARSER.iter().map(|p| p.0).collect();
    let text = format!(
        r#"campaign: exact-numbers
about: test campaign (not physics)
programs:
  energy: {{ path: {prog} }}
sweep:
  product:
    volume: [{volumes}]
    temperature: [300]
cycle:
  e:
    run: [energy, "{{{{param:volume}}}}"]
    metrics: [energy]
{mix}stop:
  when:
    - {{ metric: e.energy, change-below: 1.0e-9, for: 1 }}
  max-iterations: 3
analysis:
  eos: {{ energy: e.energy, volume: volume }}
"#,
        prog = prog.display(),
        volumes = volumes.join(", "),
        mix = if mix {
            "    outputs: { x: x.json }\n  mix:\n    builtin: mix\n    inputs: { x: e.x }\n    \
             outputs: { x: x.json }\n    settings: { method: linear, alpha: 0.5 }\n"
        } else {
            ""
        },
    );
    let f = dir.join("c.yaml");
    std::fs::write(&f, text).unwrap_or_else(|e| panic!("{e}"));
    f
}

/// The number tokens of a JSON text, in order, as written (outside strings).
fn number_tokens(text: &str) -> Vec<String> {
    let mut out = Vec::new();
    let mut in_string = false;
    let mut escaped = false;
    let mut current = String::new();
    for c in text.chars() {
        if in_string {
            if escaped {
                escaped = false;
            } else if c == '\\' {
                escaped = true;
            } else if c == '"' {
                in_string = false;
            }
            continue;
        }
        if c.is_ascii_digit() || matches!(c, '-' | '+' | '.' | 'e' | 'E') {
            current.push(c);
            continue;
        }
        if !current.is_empty() {
            out.push(std::mem::take(&mut current));
        }
        if c == '"' {
            in_string = true;
        }
    }
    if !current.is_empty() {
        out.push(current);
    }
    out
}

/// The text of the value of `"key": {...}` in a pretty-printed JSON document.
fn object_text<'a>(text: &'a str, key: &str) -> &'a str {
    let start = text
        .find(&format!("\"{key}\": {{"))
        .unwrap_or_else(|| panic!("no object `{key}` in {text}"));
    let body = &text[start..];
    let open = body.find('{').unwrap_or(0);
    let (mut depth, mut in_string, mut escaped) = (0usize, false, false);
    for (i, c) in body[open..].char_indices() {
        if in_string {
            match c {
                _ if escaped => escaped = false,
                '\\' => escaped = true,
                '"' => in_string = false,
                _ => {}
            }
            continue;
        }
        match c {
            '"' => in_string = true,
            '{' | '[' => depth += 1,
            '}' | ']' => {
                depth -= 1;
                if depth == 0 {
                    return &body[open..open + i + 1];
                }
            }
            _ => {}
        }
    }
    panic!("unbalanced object `{key}` in {text}")
}

#[test]
fn published_numbers_come_out_bit_for_bit_as_the_program_wrote_and_the_artifact_stores_them() {
    let d = tmp();
    eos_campaign(d.path(), false);
    let o = run_rondo(d.path(), &["run", "c.yaml", "-q"]);
    assert_eq!(o.status.code(), Some(0), "{}", shown(&o));
    let ws = d.path().join("c.rondo");
    // 1. The store holds each energy exactly as the program printed it.
    let stored: Vec<(String, f64)> = query(&ws, |pool| {
        Box::pin(async move {
            sqlx::query(
                "SELECT p.values_json, m.value FROM metrics m JOIN attempts a ON a.id = m.attempt_id \
                 JOIN points p ON p.id = a.point WHERE m.name = 'e.energy' AND a.iteration = 1 ORDER BY p.idx",
            )
            .fetch_all(pool)
            .await
            .unwrap_or_else(|e| panic!("{e}"))
            .into_iter()
            .map(|r| (r.get(0), r.get(1)))
            .collect()
        })
    });
    assert_eq!(
        stored.len(),
        INEXACT_UNDER_DEFAULT_PARSER.len(),
        "{stored:?}"
    );
    for ((values, got), (v, text)) in stored.iter().zip(INEXACT_UNDER_DEFAULT_PARSER) {
        let want: f64 = text.parse().unwrap_or(f64::NAN);
        assert_eq!(
            got.to_bits(),
            want.to_bits(),
            "volume {v} ({values}): the program wrote {text}, the store holds {got:?}"
        );
    }
    // 2. `status --json` prints the metrics as written ...
    let o = run_rondo(
        d.path(),
        &["status", "--workspace", &ws.display().to_string(), "--json"],
    );
    assert!(o.status.success(), "{}", shown(&o));
    let status = String::from_utf8_lossy(&o.stdout).to_string();
    for (_, text) in INEXACT_UNDER_DEFAULT_PARSER {
        assert!(
            status.contains(&format!("\"e.energy\": {text}")),
            "status --json does not show the energy {text} as written:\n{status}"
        );
    }
    // 3. ... and every number of the analysis artifact exactly as the artifact holds it.
    let artifact = std::fs::read_to_string(ws.join("analysis/eos.json"))
        .unwrap_or_else(|e| panic!("analysis/eos.json: {e}"));
    let stored_numbers = number_tokens(&artifact);
    let shown_numbers = number_tokens(object_text(&status, "eos"));
    assert!(
        stored_numbers.len() > 30,
        "the artifact has its energies, fits and residuals: {artifact}"
    );
    for (v, e) in INEXACT_UNDER_DEFAULT_PARSER {
        assert!(
            artifact.contains(&format!("\"energy\": {e}")),
            "the artifact holds the energy of volume {v} as written: {artifact}"
        );
    }
    let differ: Vec<(&String, &String)> = stored_numbers
        .iter()
        .zip(&shown_numbers)
        .filter(|(a, b)| a != b)
        .collect();
    assert!(
        stored_numbers.len() == shown_numbers.len() && differ.is_empty(),
        "status --json changed numbers of the artifact (stored → shown): {differ:?}"
    );
}

/// One recorded equation-of-state generation: argv, program BLAKE3, why the hash is unknown,
/// artifact.
type EosRecord = (Vec<String>, Option<String>, Option<String>, String);

/// The recorded equation-of-state generations of a workspace, oldest first.
fn eos_records(ws: &Path) -> Vec<EosRecord> {
    query(ws, |pool| {
        Box::pin(async move {
            sqlx::query(
                "SELECT r.argv_json, r.program_blake3, r.program_unknown, o.artifact FROM reports r \
                 JOIN report_outputs o ON o.report_id = r.id WHERE o.role = 'eos.json' ORDER BY r.id",
            )
            .fetch_all(pool)
            .await
            .unwrap_or_else(|e| panic!("{e}"))
            .into_iter()
            .map(|r| {
                let argv: String = r.get(0);
                (
                    serde_json::from_str(&argv).unwrap_or_else(|e| panic!("{argv}: {e}")),
                    r.get(1),
                    r.get(2),
                    r.get(3),
                )
            })
            .collect()
        })
    })
}

#[test]
fn the_command_recorded_with_the_eos_result_reruns_it_to_the_same_artifact() {
    let d = tmp();
    eos_campaign(d.path(), false);
    let o = run_rondo(d.path(), &["run", "c.yaml", "-q"]);
    assert_eq!(o.status.code(), Some(0), "{}", shown(&o));
    let ws = d.path().join("c.rondo");
    let first = eos_records(&ws);
    assert_eq!(first.len(), 1, "{first:?}");
    let (argv, program, unknown, hash) = &first[0];
    let exe_hash = blake3::hash(&std::fs::read(rondo()).unwrap_or_default())
        .to_hex()
        .to_string();
    assert_eq!(program.as_deref(), Some(exe_hash.as_str()));
    assert_eq!(unknown, &None);
    assert_eq!(
        argv[1..],
        ["analyze", "--workspace", &ws.display().to_string()],
        "{argv:?}"
    );
    // A reader reruns exactly what is recorded, from anywhere.
    let o = Command::new(&argv[0])
        .args(&argv[1..])
        .current_dir("/")
        .output()
        .unwrap_or_else(|e| panic!("cannot run the recorded argv {argv:?}: {e}"));
    assert_eq!(o.status.code(), Some(0), "{argv:?}: {}", shown(&o));
    let out = String::from_utf8_lossy(&o.stdout);
    assert!(
        out.contains("eos at temperature 300, birch-murnaghan: E0 = "),
        "{out}"
    );
    let again = eos_records(&ws);
    assert_eq!(again.len(), 2, "{again:?}");
    assert_eq!(again[1].3, *hash, "the rerun reproduces the artifact");
    assert_eq!(again[1].0, *argv, "and records the same command");
    let file = std::fs::read(ws.join("analysis/eos.json")).unwrap_or_default();
    assert_eq!(blake3::hash(&file).to_hex().to_string(), *hash);
    // A campaign without an analysis has nothing to rerun; the message says so.
    let h = tmp();
    halfstep_campaign(h.path(), "ok", "", "[1.0]");
    let o = run_rondo(h.path(), &["run", "c.yaml", "-q"]);
    assert_eq!(o.status.code(), Some(0), "{}", shown(&o));
    let o = run_rondo(h.path(), &["analyze", "c.yaml"]);
    assert_eq!(o.status.code(), Some(2), "{}", shown(&o));
    assert!(
        String::from_utf8_lossy(&o.stderr).contains("no `analysis:` section"),
        "{}",
        shown(&o)
    );
}

/// Run a copy of rondo whose file is deleted before it starts (it runs from an open file
/// descriptor), so it cannot read its own executable to hash it.
fn run_deleted_rondo(dir: &Path, args: &[&str]) -> std::process::Output {
    use std::os::fd::AsRawFd;
    let bin = dir.join("bin");
    std::fs::create_dir_all(&bin).unwrap_or_else(|e| panic!("{e}"));
    let copy = bin.join("rondo");
    std::fs::copy(rondo(), &copy).unwrap_or_else(|e| panic!("copy rondo: {e}"));
    let file = std::fs::File::open(&copy).unwrap_or_else(|e| panic!("{e}"));
    std::fs::remove_file(&copy).unwrap_or_else(|e| panic!("{e}"));
    let o = Command::new(format!("/proc/self/fd/{}", file.as_raw_fd()))
        .args(args)
        .current_dir(dir)
        .env("PATH", path_with_binaries())
        .output()
        .unwrap_or_else(|e| panic!("cannot run the deleted copy of rondo: {e}"));
    drop(file);
    o
}

#[test]
fn an_unreadable_rondo_executable_is_recorded_as_unknown_and_trace_says_so() {
    let d = tmp();
    eos_campaign(d.path(), true);
    let o = run_deleted_rondo(d.path(), &["run", "c.yaml", "-q"]);
    assert_eq!(o.status.code(), Some(0), "{}", shown(&o));
    let ws = d.path().join("c.rondo");
    let why = |u: &Option<String>| {
        u.as_deref()
            .is_some_and(|u| u.contains("(deleted)") && u.contains("No such file"))
    };
    let mixes: Vec<(Option<String>, Option<String>)> = query(&ws, |pool| {
        Box::pin(async move {
            sqlx::query("SELECT program_blake3, program_unknown FROM attempts WHERE stage = 'mix'")
                .fetch_all(pool)
                .await
                .unwrap_or_else(|e| panic!("{e}"))
                .into_iter()
                .map(|r| (r.get(0), r.get(1)))
                .collect()
        })
    });
    assert_eq!(mixes.len(), 10, "5 points × 2 iterations: {mixes:?}");
    for (hash, unknown) in &mixes {
        assert_eq!(hash, &None, "no hash is made up");
        assert!(why(unknown), "the reason is recorded: {unknown:?}");
    }
    let eos = eos_records(&ws);
    assert_eq!(eos.len(), 1, "{eos:?}");
    assert_eq!(eos[0].1, None);
    assert!(why(&eos[0].2), "{:?}", eos[0].2);
    // The command stage's program was readable: its hash is there.
    let e_hashes = strings(&ws, "SELECT program_blake3 FROM attempts WHERE stage = 'e'");
    assert!(
        e_hashes.len() == 10 && e_hashes.iter().all(|h| h.len() == 64),
        "{e_hashes:?}"
    );
    let wsa = ws.display().to_string();
    for target in ["p001/1/mix.history", "analysis/eos.json"] {
        let o = run_rondo(d.path(), &["trace", target, "--workspace", &wsa]);
        assert!(o.status.success(), "{target}: {}", shown(&o));
        let text = String::from_utf8_lossy(&o.stdout);
        assert!(
            text.contains("program hash unknown: cannot read")
                && text.contains("(deleted): No such file"),
            "{target}: {text}"
        );
        let o = run_rondo(d.path(), &["trace", target, "--workspace", &wsa, "--json"]);
        let j: serde_json::Value = serde_json::from_slice(&o.stdout)
            .unwrap_or_else(|e| panic!("{target}: {e}: {}", shown(&o)));
        let a0 = &j["attempts"][0];
        assert!(a0["program"]["blake3"].is_null(), "{target}: {a0}");
        assert!(
            why(&a0["program_unknown"].as_str().map(str::to_string)),
            "{target}: {a0}"
        );
    }
}

#[test]
fn status_names_the_iteration_a_point_failed_in_and_eos_groups_by_name_and_value() {
    let d = tmp();
    halfstep_campaign(d.path(), "always-fail-p002", "", "[1.0, 2.0]");
    let o = run_rondo(d.path(), &["run", "c.yaml", "-q"]);
    assert_eq!(o.status.code(), Some(3), "{}", shown(&o));
    let s = status_json(d.path(), &d.path().join("c.rondo"));
    let p2 = &s["points"][1];
    assert_eq!(p2["state"], "failed", "{p2}");
    let reason = p2["reason"].as_str().unwrap_or("");
    assert!(reason.contains("failed at iteration 1 "), "{reason}");
    assert_eq!(
        (p2["iteration"].as_i64(), p2["last_iteration"].as_i64()),
        (Some(0), Some(1))
    );
    let o = run_rondo(d.path(), &["status"]);
    assert!(o.status.success(), "{}", shown(&o));
    let text = String::from_utf8_lossy(&o.stdout);
    let line = text
        .lines()
        .find(|l| l.trim_start().starts_with("p002 "))
        .unwrap_or_else(|| panic!("no line for p002: {text}"));
    assert!(
        line.contains("failed at iteration 1 (stage `s` failed at iteration 1 "),
        "{line}"
    );
    let p1 = text
        .lines()
        .find(|l| l.trim_start().starts_with("p001 "))
        .unwrap_or_default();
    let it = s["points"][0]["iteration"].as_i64().unwrap_or(0);
    assert!(p1.contains(&format!("converged at iteration {it}")), "{p1}");

    let e = tmp();
    eos_campaign(e.path(), false);
    let o = run_rondo(e.path(), &["run", "c.yaml"]);
    assert_eq!(o.status.code(), Some(0), "{}", shown(&o));
    let run_err = String::from_utf8_lossy(&o.stderr).to_string();
    let o = run_rondo(e.path(), &["status"]);
    let text = String::from_utf8_lossy(&o.stdout).to_string();
    for shown_by in [&text, &run_err] {
        assert!(
            shown_by.contains("eos at temperature 300, birch-murnaghan: E0 = ")
                && shown_by.contains("eos at temperature 300, vinet: "),
            "{shown_by}"
        );
        assert!(
            !shown_by.contains("{\"temperature\""),
            "raw JSON: {shown_by}"
        );
    }
}

#[test]
fn trace_is_compact_by_default_with_labels_that_say_what_they_are() {
    let d = tmp();
    // p001 converges over about a dozen iterations of one stage, each using the last one's
    // output; p002's values are of order 1e-90.
    halfstep_campaign(d.path(), "ok", "", "[1.0, 1.0e-90]");
    let o = run_rondo(d.path(), &["run", "c.yaml", "-q"]);
    assert_eq!(o.status.code(), Some(0), "{}", shown(&o));
    let s = status_json(d.path(), &d.path().join("c.rondo"));
    let n = s["points"][0]["iteration"].as_i64().unwrap_or(0);
    assert!(n >= 10, "{s}");
    let trace = |args: &[&str]| {
        let mut all = vec!["trace"];
        all.extend_from_slice(args);
        let o = run_rondo(d.path(), &all);
        assert!(o.status.success(), "{args:?}: {}", shown(&o));
        String::from_utf8_lossy(&o.stdout).to_string()
    };
    let compact = trace(&["p001/last/s.x"]);
    let one_liners = |t: &str| t.lines().filter(|l| l.starts_with("  [")).count();
    // The target attempt in full, the one before it on one line, the rest counted.
    assert_eq!(compact.matches("  argv ").count(), 1, "{compact}");
    assert_eq!(one_liners(&compact), 1, "{compact}");
    assert!(
        compact.contains(&format!(
            "{n} attempts upstream (2 shown: the target's iteration and those just before it)"
        )) && compact.contains(&format!("... and {} attempts of earlier iterations", n - 2)),
        "{compact}"
    );
    assert!(compact.lines().count() < 30, "{compact}");
    // A local child is a pid, its emptied scratch folder is said to be gone.
    assert!(compact.contains("local, pid "), "{compact}");
    assert!(!compact.contains(" job "), "{compact}");
    assert!(
        compact.contains(&format!(
            "scratch folder {} was removed",
            d.path()
                .join(format!("c.rondo/scratch/p001.i{n:04}.s.a1"))
                .display()
        )),
        "{compact}"
    );
    // Numbers as `rondo status` shows them.
    let x = s["points"][0]["metrics"]["s.x"]
        .as_f64()
        .unwrap_or(f64::NAN);
    assert!(
        compact.contains(&format!("value    {x:.6} (attempt ")),
        "{compact}"
    );
    let tiny = trace(&["p002/last/s.x"]);
    let x2 = s["points"][1]["metrics"]["s.x"]
        .as_f64()
        .unwrap_or(f64::NAN);
    assert!(x2 > 0.0 && x2 < 1e-90, "{s}");
    assert!(
        tiny.contains(&format!("metric    s.x = {x2:.3e}")),
        "{tiny}"
    );
    assert!(!tiny.contains("0.000000000"), "{tiny}");
    // Every attempt with --depth all, each in full with --long.
    let all = trace(&["p001/last/s.x", "--depth", "all"]);
    assert_eq!(one_liners(&all), n as usize - 1, "{all}");
    let long = trace(&["p001/last/s.x", "--depth", "all", "--long"]);
    assert_eq!(long.matches("  argv ").count(), n as usize, "{long}");
    let three = trace(&["p001/last/s.x", "--depth", "3"]);
    assert_eq!(one_liners(&three), 2, "{three}");
    // --json keeps everything unless a depth is asked for.
    let j: serde_json::Value = serde_json::from_str(&trace(&["p001/last/s.x", "--json"]))
        .unwrap_or_else(|e| panic!("{e}"));
    assert_eq!(j["attempts"].as_array().map(Vec::len), Some(n as usize));
    assert!(j.get("omitted_attempts").is_none(), "{j}");
    assert_eq!(j["attempts"][0]["executor"], "local");
    let j: serde_json::Value =
        serde_json::from_str(&trace(&["p001/last/s.x", "--json", "--depth", "1"]))
            .unwrap_or_else(|e| panic!("{e}"));
    assert_eq!(j["attempts"].as_array().map(Vec::len), Some(1));
    assert_eq!(j["omitted_attempts"], n - 1);
    let o = run_rondo(d.path(), &["trace", "p001/last/s.x", "--depth", "0"]);
    assert_eq!(o.status.code(), Some(2), "{}", shown(&o));
    // An output role is a target too: the metrics file the last iteration wrote.
    let by_role = trace(&["p001/last/s.metrics"]);
    let want = &j["attempts"][0]["outputs"]["metrics"];
    assert!(
        want.as_str()
            .is_some_and(|h| by_role.starts_with(&format!("target   {h}\n"))),
        "{want}: {by_role}"
    );
}

#[test]
fn extract_writes_an_artifact_found_like_a_trace_target_and_never_clobbers() {
    let d = tmp();
    eos_campaign(d.path(), true);
    let o = run_rondo(d.path(), &["run", "c.yaml", "-q"]);
    assert_eq!(o.status.code(), Some(0), "{}", shown(&o));
    let ws = d.path().join("c.rondo");
    let s = status_json(d.path(), &ws);
    let n = s["points"][0]["iteration"].as_i64().unwrap_or(0);
    assert_eq!(n, 2, "{s}");
    // What the store says each name is: the outputs of p001's succeeded attempts.
    let outputs: Vec<String> = strings(
        &ws,
        "SELECT a.iteration || '/' || a.stage || '.' || o.role || '=' || o.artifact \
         FROM attempt_outputs o JOIN attempts a ON a.id = o.attempt_id \
         WHERE a.point = 'p001' AND a.state = 'succeeded' ORDER BY a.iteration, a.stage, o.role",
    );
    let recorded = |key: &str| -> String {
        outputs
            .iter()
            .find_map(|r| r.strip_prefix(&format!("{key}=")))
            .unwrap_or_else(|| panic!("{key} not in {outputs:?}"))
            .to_string()
    };
    let out = d.path().join("out");
    std::fs::create_dir_all(&out).unwrap_or_else(|e| panic!("{e}"));
    let extract = |args: &[&str]| {
        let mut all = vec!["extract"];
        all.extend_from_slice(args);
        run_rondo(d.path(), &all)
    };
    let hash_of = |p: &Path| {
        blake3::hash(&std::fs::read(p).unwrap_or_default())
            .to_hex()
            .to_string()
    };
    // POINT/final/stage.output: the converged point's last output.
    let f = out.join("mixed.json");
    let o = extract(&["p001/final/mix.x", "-o", &f.display().to_string()]);
    assert!(o.status.success(), "{}", shown(&o));
    let mixed = recorded(&format!("{n}/mix.x"));
    assert_eq!(hash_of(&f), mixed);
    assert!(
        String::from_utf8_lossy(&o.stderr).contains(&format!("BLAKE3 {mixed} verified")),
        "{}",
        shown(&o)
    );
    let stored = ws.join("store").join(&mixed[..2]).join(&mixed[2..]);
    assert_eq!(
        std::fs::read(&stored).unwrap_or_default(),
        std::fs::read(&f).unwrap_or_default()
    );
    // The other forms trace accepts.
    let first = recorded("1/e.x");
    let metrics = recorded(&format!("{n}/e.metrics"));
    for (target, name, want) in [
        ("p001/1/e.x".to_string(), "by-iteration.json", first.clone()),
        (
            "p001/last/e.metrics".to_string(),
            "by-last.json",
            metrics.clone(),
        ),
        // a metric names its attempt's metrics file; a final value of one iteration too
        (
            "p001/final/e.energy".to_string(),
            "by-metric.json",
            metrics.clone(),
        ),
        (mixed[..10].to_string(), "by-prefix.json", mixed.clone()),
        (f.display().to_string(), "by-file.json", mixed.clone()),
    ] {
        let g = out.join(name);
        let o = extract(&[&target, "-o", &g.display().to_string()]);
        assert!(o.status.success(), "{target}: {}", shown(&o));
        assert_eq!(hash_of(&g), want, "{target}");
    }
    let text = std::fs::read_to_string(out.join("by-metric.json")).unwrap_or_default();
    assert!(text.contains(INEXACT_UNDER_DEFAULT_PARSER[0].1), "{text}");
    // A folder: the file keeps its recorded name.
    let o = extract(&["p001/final/mix.x", "-o", &out.display().to_string()]);
    assert!(o.status.success(), "{}", shown(&o));
    assert_eq!(hash_of(&out.join("x.json")), mixed);
    // An existing file is refused and left alone; --force replaces it.
    let g = out.join("by-iteration.json");
    std::fs::write(&g, "keep me").unwrap_or_else(|e| panic!("{e}"));
    let o = extract(&["p001/final/mix.x", "-o", &g.display().to_string()]);
    assert_eq!(o.status.code(), Some(2), "{}", shown(&o));
    assert!(
        String::from_utf8_lossy(&o.stderr).contains("exists; pass --force"),
        "{}",
        shown(&o)
    );
    assert_eq!(std::fs::read_to_string(&g).unwrap_or_default(), "keep me");
    let o = extract(&[
        "p001/final/mix.x",
        "-o",
        &g.display().to_string(),
        "--force",
    ]);
    assert!(o.status.success(), "{}", shown(&o));
    assert_eq!(hash_of(&g), mixed);
    // No temporary file is left behind.
    let left: Vec<String> = std::fs::read_dir(&out)
        .map(|r| {
            r.flatten()
                .map(|e| e.file_name().to_string_lossy().into_owned())
                .filter(|n| n.starts_with('.'))
                .collect()
        })
        .unwrap_or_default();
    assert!(left.is_empty(), "{left:?}");
    // A damaged store copy is caught by the hash check, and nothing is written.
    std::fs::write(&stored, "{\"x\": 0}\n").unwrap_or_else(|e| panic!("{e}"));
    let h = out.join("damaged.json");
    let o = extract(&[&mixed, "-o", &h.display().to_string()]);
    assert_eq!(o.status.code(), Some(1), "{}", shown(&o));
    assert!(
        String::from_utf8_lossy(&o.stderr).contains("damaged"),
        "{}",
        shown(&o)
    );
    assert!(!h.exists());
    // Unknown names say what there is.
    let o = extract(&["p001/1/e.y", "-o", "/dev/null"]);
    assert_eq!(o.status.code(), Some(2), "{}", shown(&o));
    let err = String::from_utf8_lossy(&o.stderr);
    assert!(
        err.contains("outputs: e.metrics, e.x, mix.metrics, mix.state, mix.x"),
        "{err}"
    );
}

// What a new user tripped over (issue 13, items 5 and 7): program builds that change in
// the middle of a campaign, read-only workspaces, cancel with a reason, finding the
// workspace, exit codes, check diagnostics, the shell form, and `--on pbs`.

/// A loud skip through the shared mechanism (tests/common/skip.rs): under CI or
/// `RONDO_REQUIRE_ISOLATION` a missing prerequisite fails.
#[track_caller]
fn isolation_skip(what: &str) {
    common::skip::skip_or_fail(
        what,
        "run as root on Linux with util-linux (setpriv, unshare)",
        &["RONDO_REQUIRE_ISOLATION"],
    );
}

fn is_root() -> bool {
    // SAFETY: geteuid has no preconditions.
    unsafe { libc::geteuid() == 0 }
}

fn write(path: &Path, text: &str) {
    std::fs::write(path, text).unwrap_or_else(|e| panic!("{}: {e}", path.display()));
}

fn make_executable(path: &Path) {
    use std::os::unix::fs::PermissionsExt;
    std::fs::set_permissions(path, std::fs::Permissions::from_mode(0o755))
        .unwrap_or_else(|e| panic!("chmod {}: {e}", path.display()));
}

fn blake3_of(path: &Path) -> String {
    rondo::artifacts::hash_file(path)
        .unwrap_or_else(|e| panic!("{}: {e}", path.display()))
        .0
}

/// The halfstep campaign with its program replaced by a copy `step.sh` in `dir` that
/// appends a comment to itself when point p001 runs iteration `edit_at` (a real script
/// rewritten during the run, as an edited build would be).
fn self_editing_campaign(dir: &Path, edit_at: u32) -> PathBuf {
    let f = halfstep_campaign(dir, "ok", "", "[1.0]");
    let step = dir.join("step.sh");
    write(
        &step,
        &format!(
            "#!/bin/sh\nif [ \"$RONDO_ITERATION\" = {edit_at} ] && ! grep -q '^# edited' \"$0\"; then\n  echo '# edited' >> \"$0\"\nfi\nexec {} \"$@\"\n",
            fixture("halfstep.sh").display()
        ),
    );
    make_executable(&step);
    let text = std::fs::read_to_string(&f)
        .unwrap_or_default()
        .replace(&fixture("halfstep.sh").display().to_string(), "./step.sh");
    write(&f, &text);
    f
}

#[test]
fn a_program_rewritten_during_the_run_stops_its_point_naming_the_program_and_both_hashes() {
    let d = tmp();
    self_editing_campaign(d.path(), 2);
    let step = d.path().join("step.sh");
    let before = blake3_of(&step);
    let o = run_rondo(d.path(), &["run", "c.yaml", "-q"]);
    assert_eq!(o.status.code(), Some(3), "{}", shown(&o));
    let after = blake3_of(&step);
    assert_ne!(before, after, "the script edited itself");
    let ws = d.path().join("c.rondo");
    let s = status_json(d.path(), &ws);
    let p = &s["points"][0];
    assert_eq!(p["state"], "failed", "{p}");
    // iterations 1 and 2 ran the first build (2 was planned before the edit); 3 never ran
    assert_eq!(p["iteration"], 2, "{p}");
    let reason = p["reason"].as_str().unwrap_or("");
    for needle in [
        step.canonicalize()
            .map(|p| p.display().to_string())
            .unwrap_or_default(),
        before.clone(),
        after.clone(),
        "--retry-failed".to_string(),
    ] {
        assert!(reason.contains(&needle), "`{needle}` not in: {reason}");
    }
    let at3 = strings(&ws, "SELECT state FROM attempts WHERE iteration = 3");
    assert!(
        at3.is_empty(),
        "an attempt of the new build was started: {at3:?}"
    );
    // Rewritten again between runs: still refused (the recorded build is compared).
    let o = run_rondo(d.path(), &["run", "c.yaml", "-q", "--retry-failed"]);
    assert_eq!(o.status.code(), Some(3), "{}", shown(&o));
    // The build that ran put back: the point goes on and converges on one build.
    let original = std::fs::read_to_string(&step)
        .unwrap_or_default()
        .replace("# edited\n", "");
    write(&step, &original);
    assert_eq!(blake3_of(&step), before);
    let o = run_rondo(d.path(), &["run", "c.yaml", "-q", "--retry-failed"]);
    assert_eq!(o.status.code(), Some(0), "{}", shown(&o));
    let hashes = strings(
        &ws,
        "SELECT DISTINCT program_blake3 FROM attempts WHERE state = 'succeeded'",
    );
    assert_eq!(hashes, [before]);
}

#[test]
fn diff_compares_program_hashes_per_stage_and_iteration() {
    let d = tmp();
    halfstep_campaign(d.path(), "ok", "", "[1.0, 1.0]");
    let o = run_rondo(d.path(), &["run", "c.yaml", "-q"]);
    assert_eq!(o.status.code(), Some(0), "{}", shown(&o));
    let ws = d.path().join("c.rondo");
    // A workspace recorded before rondo checked builds: the program changed while both
    // points ran, after p001's iteration 3 and after p002's iteration 1. Over all their
    // attempts both points used the same two builds.
    let new_build = "f".repeat(64);
    query(&ws, |pool| {
        let new_build = new_build.clone();
        Box::pin(async move {
            sqlx::query(
                "UPDATE attempts SET program_blake3 = ? WHERE (point = 'p001' AND iteration > 3) \
                 OR (point = 'p002' AND iteration > 1)",
            )
            .bind(new_build)
            .execute(pool)
            .await
            .unwrap_or_else(|e| panic!("{e}"));
        })
    });
    let ws_s = ws.display().to_string();
    let o = run_rondo(d.path(), &["diff", "p001", "p002", "--workspace", &ws_s]);
    assert!(o.status.success(), "{}", shown(&o));
    let text = String::from_utf8_lossy(&o.stdout);
    assert!(!text.contains("programs: same"), "{text}");
    assert!(text.contains("iterations 2-3"), "{text}");
    assert!(text.contains(&new_build[..16]), "{text}");
    assert!(
        text.contains("A changed at iteration 4") && text.contains("B changed at iteration 2"),
        "{text}"
    );
    let o = run_rondo(
        d.path(),
        &["diff", "p001", "p002", "--workspace", &ws_s, "--json"],
    );
    assert!(o.status.success(), "{}", shown(&o));
    let j: serde_json::Value = serde_json::from_slice(&o.stdout).unwrap_or_default();
    let progs = j["programs"].as_array().cloned().unwrap_or_default();
    assert_eq!(progs.len(), 1, "{j}");
    assert_eq!(progs[0]["stage"], "s");
    assert_eq!(progs[0]["iterations"], serde_json::json!([2, 3]), "{j}");
    assert_eq!(progs[0]["b"]["blake3"], new_build.as_str());
    let changes = j["program_changes"].as_array().cloned().unwrap_or_default();
    assert_eq!(changes.len(), 2, "{j}");
}

/// A converged two-point workspace in a folder others may enter, and the commands that only
/// read it.
fn readable_workspace() -> (tempfile::TempDir, PathBuf) {
    use std::os::unix::fs::PermissionsExt;
    let d = tmp();
    std::fs::set_permissions(d.path(), std::fs::Permissions::from_mode(0o755))
        .unwrap_or_else(|e| panic!("{e}"));
    halfstep_campaign(d.path(), "ok", "", "[1.0, 2.0]");
    let o = run_rondo(d.path(), &["run", "c.yaml", "-q"]);
    assert_eq!(o.status.code(), Some(0), "{}", shown(&o));
    let ws = d.path().join("c.rondo");
    (d, ws)
}

/// Run the reading commands on `ws` through `wrap` (a command prefix) and check each
/// succeeds with the same answer the owner gets; `out` is a folder the reader may write.
fn reading_commands_work(dir: &Path, owner_ws: &Path, ws: &Path, wrap: &[&str], out: &Path) {
    let ws_s = ws.display().to_string();
    let owner_ws = owner_ws.display().to_string();
    let prov = out.join("prov.json").display().to_string();
    let cmds: Vec<Vec<&str>> = vec![
        vec!["status", "--workspace", &ws_s, "--json"],
        vec!["status", "--workspace", &ws_s],
        vec!["trace", "p001/last/s.x", "--workspace", &ws_s],
        vec!["diff", "p001", "p002", "--workspace", &ws_s],
        vec!["export", "--prov", &prov, "--workspace", &ws_s],
    ];
    // What the owner sees, but for the path the reader named the workspace by.
    let seen = |bytes: &[u8]| {
        let mut v: serde_json::Value = serde_json::from_slice(bytes).unwrap_or_default();
        v["workspace"] = serde_json::Value::Null;
        v
    };
    let mut reader_status = Vec::new();
    for args in &cmds {
        let rondo = rondo().display().to_string();
        let mut full: Vec<&str> = wrap.to_vec();
        full.push(&rondo);
        full.extend(args.iter().copied());
        let o = Command::new(full[0])
            .args(&full[1..])
            .current_dir(out)
            .output()
            .unwrap_or_else(|e| panic!("{}: {e}", full[0]));
        assert!(o.status.success(), "{full:?}: {}", shown(&o));
        if args[0] == "status" && args.contains(&"--json") {
            reader_status = o.stdout.clone();
        }
    }
    // Asked after the readers, so that they found the workspace as it was left.
    let owner_status = run_rondo(dir, &["status", "--workspace", &owner_ws, "--json"]);
    assert!(owner_status.status.success(), "{}", shown(&owner_status));
    assert_eq!(
        seen(&reader_status),
        seen(&owner_status.stdout),
        "the reader sees what the owner sees"
    );
    let doc: serde_json::Value =
        serde_json::from_str(&std::fs::read_to_string(&prov).unwrap_or_default())
            .unwrap_or_default();
    assert!(
        doc["activity"].as_object().is_some_and(|a| !a.is_empty()),
        "{doc}"
    );
    // `report` records its own provenance in the workspace: refused plainly, no database error.
    let mut full: Vec<String> = wrap.iter().map(|s| s.to_string()).collect();
    full.push(rondo().display().to_string());
    full.extend(["report", "--workspace", &ws_s, "--out"].map(String::from));
    full.push(out.join("report").display().to_string());
    let o = Command::new(&full[0])
        .args(&full[1..])
        .current_dir(out)
        .output()
        .unwrap_or_else(|e| panic!("{e}"));
    let err = String::from_utf8_lossy(&o.stderr);
    assert_eq!(o.status.code(), Some(1), "{}", shown(&o));
    assert!(
        err.contains("read-only") && !err.contains("database is"),
        "{err}"
    );
}

#[test]
fn another_user_reads_a_workspace_without_write_access() {
    if !is_root() || !Path::new("/usr/bin/setpriv").is_file() {
        isolation_skip("reading as another user needs root and setpriv (util-linux)");
        return;
    }
    let (d, ws) = readable_workspace();
    let out = d.path().join("nobody-out");
    std::fs::create_dir(&out).unwrap_or_else(|e| panic!("{e}"));
    // SAFETY: chown of a folder this test made.
    let c = std::ffi::CString::new(out.display().to_string()).unwrap_or_default();
    assert_eq!(unsafe { libc::chown(c.as_ptr(), 65534, 65534) }, 0);
    let nobody = [
        "/usr/bin/setpriv",
        "--reuid=65534",
        "--regid=65534",
        "--clear-groups",
    ];
    // An archived workspace: no -wal or -shm file, and none can be made.
    assert!(!ws.join("rondo.db-wal").exists());
    reading_commands_work(d.path(), &ws, &ws, &nobody, &out);
    // While the owner has it open (the -wal and -shm files exist, writable by the owner only).
    let rt = tokio::runtime::Builder::new_current_thread()
        .enable_all()
        .build()
        .unwrap_or_else(|e| panic!("{e}"));
    let pool = rt
        .block_on(rondo::store::open(&ws.join("rondo.db")))
        .unwrap_or_else(|e| panic!("{e:#}"));
    assert!(ws.join("rondo.db-wal").exists() && ws.join("rondo.db-shm").exists());
    reading_commands_work(d.path(), &ws, &ws, &nobody, &out);
    rt.block_on(pool.close());
}

#[test]
fn a_workspace_on_a_read_only_mount_is_read() {
    if !is_root() || !Path::new("/usr/bin/unshare").is_file() {
        isolation_skip("a read-only bind mount needs root and unshare (util-linux)");
        return;
    }
    let (d, ws) = readable_workspace();
    let ro = d.path().join("ro.rondo");
    std::fs::create_dir(&ro).unwrap_or_else(|e| panic!("{e}"));
    // A private mount namespace per command: the read-only bind mount is gone when it ends.
    let script = format!(
        "mount --bind {ws} {ro} && mount -o remount,bind,ro {ro} && exec \"$@\"",
        ws = ws.display(),
        ro = ro.display()
    );
    // The probe also shows the mount is really read-only: a file cannot be made in it.
    let no_write = format!("! touch {}/probe 2>/dev/null", ro.display());
    let probe = Command::new("/usr/bin/unshare")
        .args([
            "--mount", "sh", "-c", &script, "sh", "/bin/sh", "-c", &no_write,
        ])
        .output()
        .unwrap_or_else(|e| panic!("{e}"));
    if !probe.status.success() {
        isolation_skip(&format!(
            "cannot make a read-only bind mount here: {}",
            String::from_utf8_lossy(&probe.stderr)
        ));
        return;
    }
    let wrap = ["/usr/bin/unshare", "--mount", "sh", "-c", &script, "sh"];
    let out = d.path().join("out");
    std::fs::create_dir(&out).unwrap_or_else(|e| panic!("{e}"));
    // An archived workspace (no -wal, no -shm), then one its owner has read since (a
    // read-only reader leaves both files behind).
    assert!(!ws.join("rondo.db-wal").exists() && !ws.join("rondo.db-shm").exists());
    reading_commands_work(d.path(), &ws, &ro, &wrap, &out);
    assert!(ws.join("rondo.db-wal").exists() && ws.join("rondo.db-shm").exists());
    reading_commands_work(d.path(), &ws, &ro, &wrap, &out);
    assert!(!ws.join("probe").exists());
}

#[test]
fn cancel_reaches_the_running_orchestrator_and_records_the_reason() {
    let d = tmp();
    write(
        &d.path().join("c.yaml"),
        "campaign: sleepy\nsweep:\n  product:\n    k: [1, 2]\ncycle:\n  nap:\n    run: [/bin/sleep, \"30\"]\nstop:\n  max-iterations: 3\n",
    );
    let mut first = Command::new(rondo())
        .args(["run", "c.yaml", "--grace", "1"])
        .current_dir(d.path())
        .stdout(Stdio::null())
        .stderr(Stdio::piped())
        .spawn()
        .unwrap_or_else(|e| panic!("spawn: {e}"));
    let ws = d.path().join("c.rondo");
    let t0 = Instant::now();
    loop {
        let s = (ws.join("rondo.db").is_file()).then(|| status_json(d.path(), &ws));
        if s.is_some_and(|s| s["points"][1]["attempts"].as_i64().unwrap_or(0) >= 1) {
            break;
        }
        assert!(
            t0.elapsed() < Duration::from_secs(60),
            "the run did not start"
        );
        std::thread::sleep(Duration::from_millis(100));
    }
    let o = run_rondo(d.path(), &["cancel", "--reason", "wrong U: 6 eV, not 8"]);
    let err = String::from_utf8_lossy(&o.stderr);
    assert!(o.status.success(), "{}", shown(&o));
    assert!(!err.contains("in use"), "{err}");
    assert!(err.contains(&format!("pid {}", first.id())), "{err}");
    let status = first.wait().unwrap_or_else(|e| panic!("wait: {e}"));
    assert_eq!(status.code(), Some(3), "a cancelled run exits 3");
    let s = status_json(d.path(), &ws);
    for p in s["points"].as_array().cloned().unwrap_or_default() {
        assert_eq!(p["state"], "cancelled", "{p}");
        assert!(
            p["reason"]
                .as_str()
                .is_some_and(|r| r.contains("wrong U: 6 eV, not 8")),
            "{p}"
        );
    }
    let msgs = strings(&ws, "SELECT failure_message FROM attempts");
    assert_eq!(msgs.len(), 2, "{msgs:?}");
    assert!(msgs.iter().all(|m| m.contains("wrong U")), "{msgs:?}");
    let events = strings(&ws, "SELECT detail FROM events WHERE kind = 'cancel'");
    assert!(
        events.len() == 1 && events[0].contains("wrong U: 6 eV, not 8"),
        "{events:?}"
    );
    assert!(
        !ws.join("cancel-request").exists(),
        "the request was consumed"
    );
    assert!(
        processes_of_workspace(&workspace_id(&ws)).is_empty(),
        "children left"
    );
}

/// `rondo cancel` with no orchestrator running (it was SIGKILLed with two attempts running):
/// the outstanding attempts are ended and recorded cancelled, the points cancelled, both with
/// the reason.
#[test]
fn cancel_with_no_orchestrator_ends_what_a_killed_one_left_outstanding() {
    let d = tmp();
    write(
        &d.path().join("c.yaml"),
        "campaign: sleepy\nsweep:\n  product:\n    k: [1, 2]\ncycle:\n  nap:\n    run: [/bin/sleep, \"30\"]\nstop:\n  max-iterations: 3\n",
    );
    let mut first = Command::new(rondo())
        .args(["run", "c.yaml", "--grace", "1"])
        .current_dir(d.path())
        .stdout(Stdio::null())
        .stderr(Stdio::null())
        .spawn()
        .unwrap_or_else(|e| panic!("spawn: {e}"));
    let ws = d.path().join("c.rondo");
    let t0 = Instant::now();
    // both launches written to the store (the next tick after the start)
    let running = |ws: &Path| -> i64 {
        query(ws, |pool| {
            Box::pin(async move {
                sqlx::query_scalar(
                    "SELECT count(*) FROM attempts WHERE state = 'running' AND handle_id IS NOT NULL",
                )
                .fetch_one(pool)
                .await
                .unwrap_or(0)
            })
        })
    };
    while !(ws.join("rondo.db").is_file() && running(&ws) == 2) {
        if t0.elapsed() > Duration::from_secs(60) {
            let _ = first.kill();
            panic!("the run did not start two attempts");
        }
        std::thread::sleep(Duration::from_millis(100));
    }
    first.kill().unwrap_or_else(|e| panic!("kill: {e}")); // SIGKILL: nothing is recorded
    first.wait().unwrap_or_else(|e| panic!("wait: {e}"));
    let ws_id = workspace_id(&ws);
    assert_eq!(
        programs_of_workspace(&ws_id).len(),
        2,
        "the children outlive the killed orchestrator"
    );
    let o = run_rondo(d.path(), &["cancel", "--reason", "wrong U"]);
    let err = String::from_utf8_lossy(&o.stderr);
    assert!(o.status.success(), "{}", shown(&o));
    assert!(
        err.contains("no orchestrator was running; cancelled 2 outstanding attempt(s)"),
        "{err}"
    );
    let rows: Vec<(String, String, String)> = query(&ws, |pool| {
        Box::pin(async move {
            sqlx::query("SELECT state, failure_kind, failure_message FROM attempts ORDER BY id")
                .fetch_all(pool)
                .await
                .unwrap_or_default()
                .into_iter()
                .map(|r| (r.get(0), r.get(1), r.get(2)))
                .collect()
        })
    });
    let want = (
        "cancelled".to_string(),
        "cancelled".to_string(),
        "cancelled: wrong U".to_string(),
    );
    assert_eq!(rows, [want.clone(), want], "{rows:?}");
    let s = status_json(d.path(), &ws);
    for p in s["points"].as_array().cloned().unwrap_or_default() {
        assert_eq!(p["state"], "cancelled", "{p}");
        assert_eq!(p["reason"], "cancelled: wrong U", "{p}");
    }
    let events = strings(&ws, "SELECT detail FROM events WHERE kind = 'cancel'");
    assert_eq!(
        events,
        ["rondo cancel: wrong U; 2 outstanding attempt(s) cancelled"],
        "{events:?}"
    );
    let t0 = Instant::now();
    while !processes_of_workspace(&ws_id).is_empty() {
        assert!(
            t0.elapsed() < Duration::from_secs(30),
            "children left: {:?}",
            processes_of_workspace(&ws_id)
        );
        std::thread::sleep(Duration::from_millis(100));
    }
}

#[test]
fn without_file_or_workspace_the_only_workspace_here_or_one_level_below_is_used() {
    let d = tmp();
    let sub = d.path().join("examples");
    std::fs::create_dir(&sub).unwrap_or_else(|e| panic!("{e}"));
    halfstep_campaign(&sub, "ok", "", "[1.0]");
    let o = run_rondo(&sub, &["run", "c.yaml", "-q"]);
    assert_eq!(o.status.code(), Some(0), "{}", shown(&o));
    // From the parent (the project root after the demo): the one workspace below is used.
    let o = run_rondo(d.path(), &["status"]);
    assert!(o.status.success(), "{}", shown(&o));
    assert!(
        String::from_utf8_lossy(&o.stdout).contains("converged"),
        "{}",
        shown(&o)
    );
    assert!(
        String::from_utf8_lossy(&o.stderr).contains("examples/c.rondo"),
        "says which workspace: {}",
        shown(&o)
    );
    let o = run_rondo(d.path(), &["trace", "p001/last/s.x"]);
    assert!(o.status.success(), "{}", shown(&o));
    // A folder named *.rondo without a database is not a workspace.
    std::fs::create_dir(d.path().join("empty.rondo")).unwrap_or_else(|e| panic!("{e}"));
    let o = run_rondo(d.path(), &["status"]);
    assert!(o.status.success(), "{}", shown(&o));
    // Two candidates: both are named and the user is asked to choose.
    let other = d.path().join("other");
    std::fs::create_dir(&other).unwrap_or_else(|e| panic!("{e}"));
    halfstep_campaign(&other, "ok", "", "[1.0]");
    let o = run_rondo(&other, &["run", "c.yaml", "-q"]);
    assert_eq!(o.status.code(), Some(0), "{}", shown(&o));
    let o = run_rondo(d.path(), &["status"]);
    let err = String::from_utf8_lossy(&o.stderr);
    assert_eq!(o.status.code(), Some(2), "{}", shown(&o));
    assert!(
        err.contains("examples/c.rondo")
            && err.contains("other/c.rondo")
            && err.contains("--workspace"),
        "{err}"
    );
}

#[test]
fn the_demo_script_says_where_the_binary_is() {
    let demo = std::fs::read_to_string(repo().join("scripts/demo")).unwrap_or_default();
    assert!(
        demo.contains("rondo is at"),
        "scripts/demo prints the binary's path"
    );
    let readme = std::fs::read_to_string(repo().join("README.md")).unwrap_or_default();
    assert!(
        readme.contains("target/release/rondo"),
        "README says where rondo is"
    );
}

/// A revision that changes what the points compute is refused as bad input, with the diff
/// (the other kinds of revision: tests/revisions.rs).
#[test]
fn a_changed_campaign_file_is_bad_input_exit_2() {
    let d = tmp();
    let f = halfstep_campaign(d.path(), "ok", "", "[1.0]");
    let o = run_rondo(d.path(), &["run", "c.yaml", "-q"]);
    assert_eq!(o.status.code(), Some(0), "{}", shown(&o));
    let text = std::fs::read_to_string(&f).unwrap_or_default();
    write(
        &f,
        &text.replace(
            "about: test campaign",
            "about: test campaign, edited\nseed: 7\n#",
        ),
    );
    let o = run_rondo(d.path(), &["run", "c.yaml", "-q"]);
    assert_eq!(o.status.code(), Some(2), "{}", shown(&o));
    let err = String::from_utf8_lossy(&o.stderr);
    assert!(
        err.contains("changed what its points compute") && err.contains("+ seed: 7"),
        "{}",
        shown(&o)
    );
    let concepts = std::fs::read_to_string(repo().join("docs/concepts.md")).unwrap_or_default();
    assert!(
        concepts.contains("| 2 | bad input"),
        "docs/concepts.md lists exit 2"
    );
}

/// `rondo check` of a campaign text in a fresh folder: (exit code, stderr, stdout).
fn check(text: &str, setup: impl FnOnce(&Path)) -> (Option<i32>, String, String) {
    let d = tmp();
    setup(d.path());
    write(&d.path().join("c.yaml"), text);
    let o = run_rondo(d.path(), &["check", "c.yaml"]);
    (
        o.status.code(),
        String::from_utf8_lossy(&o.stderr).into_owned(),
        String::from_utf8_lossy(&o.stdout).into_owned(),
    )
}

#[test]
fn check_refuses_a_program_that_is_not_executable_at_its_entry() {
    let text = "campaign: c\nprograms:\n  step: { path: ./step.sh }\ncycle:\n  s:\n    run: [step]\nstop:\n  when:\n    - { metric: s.x, change-below: 0.1 }\n  max-iterations: 2\n";
    let (code, err, _) = check(text, |d| write(&d.join("step.sh"), "#!/bin/sh\n"));
    assert_eq!(code, Some(2), "{err}");
    assert!(
        err.contains("c.yaml:3:17:") && err.contains("not executable"),
        "{err}"
    );
    assert!(err.contains("chmod"), "{err}");
    // A misspelt path: one diagnostic, at the entry, and not "declare it under programs:".
    let (code, err, _) = check(&text.replace("./step.sh", "./stpe.sh"), |d| {
        write(&d.join("step.sh"), "#!/bin/sh\n");
        make_executable(&d.join("step.sh"));
    });
    assert_eq!(code, Some(2), "{err}");
    assert_eq!(err.lines().count(), 1, "{err}");
    assert!(
        err.contains("c.yaml:3:17:") && err.contains("./stpe.sh"),
        "{err}"
    );
    assert!(!err.contains("declare it under"), "{err}");
    // A literal program path in `run` that is not executable: at the `run` element.
    let (code, err, _) = check(
        "campaign: c\ncycle:\n  s:\n    run: [./tool.sh, x]\nstop:\n  max-iterations: 1\n",
        |d| write(&d.join("tool.sh"), "#!/bin/sh\n"),
    );
    assert_eq!(code, Some(2), "{err}");
    assert!(
        err.contains("c.yaml:4:11:") && err.contains("not executable"),
        "{err}"
    );
}

#[test]
fn a_campaign_without_stopping_rule_is_warned_about_and_its_status_says_so() {
    let d = tmp();
    write(
        &d.path().join("c.yaml"),
        "campaign: c\ncycle:\n  s:\n    run: [/bin/true]\nstop:\n  max-iterations: 2\n",
    );
    let o = run_rondo(d.path(), &["check", "c.yaml"]);
    let err = String::from_utf8_lossy(&o.stderr);
    assert_eq!(o.status.code(), Some(0), "{}", shown(&o));
    assert!(
        err.contains(
            "c.yaml:5:1: warning: no stopping rule: every point runs max-iterations iterations"
        ),
        "{err}"
    );
    let o = run_rondo(d.path(), &["run", "c.yaml"]);
    assert_eq!(o.status.code(), Some(3), "{}", shown(&o));
    assert!(
        !String::from_utf8_lossy(&o.stderr).contains("()"),
        "{}",
        shown(&o)
    );
    let o = run_rondo(d.path(), &["status"]);
    let out = String::from_utf8_lossy(&o.stdout);
    assert!(
        out.contains("capped at iteration 2 (ran all 2 iterations of max-iterations: the campaign has no stopping rule)"),
        "{out}"
    );
}

#[test]
fn a_shell_stage_runs_one_script_with_every_value_single_quoted() {
    let d = tmp();
    let marker = d.path().join("pwned");
    let evil = format!(
        "a b; touch {m} | cat && $(touch {m}) `touch {m}` 'q' \"dq\" * ~ \\",
        m = marker.display()
    );
    let text = format!(
        r#"campaign: shelly
programs:
  show: {{ path: {prog} }}
parameters:
  evil: {evil_yaml}
cycle:
  s:
    run: "{{{{program:show}}}} {{{{param:evil}}}} --n={{{{point:index}}}} | tee log.txt > /dev/null && test -s log.txt"
    shell: true
    metrics: [n]
stop:
  max-iterations: 1
"#,
        prog = fixture("argv.sh").display(),
        evil_yaml = serde_json::to_string(&evil).unwrap_or_default(),
    );
    write(&d.path().join("c.yaml"), &text);
    let o = run_rondo(d.path(), &["run", "c.yaml", "--keep-scratch", "-q"]);
    assert_eq!(o.status.code(), Some(3), "{}", shown(&o));
    assert!(!marker.exists(), "the value was executed");
    let dir = d.path().join("c.rondo/scratch/p001.i0001.s.a1");
    let args = std::fs::read_to_string(dir.join("args.txt")).unwrap_or_else(|e| panic!("{e}"));
    assert_eq!(args, format!("{evil}\n--n=1\n"));
    // The script's program is hashed and recorded; the shell ran it.
    let ws = d.path().join("c.rondo");
    let rows = strings(
        &ws,
        "SELECT program_path || ' ' || coalesce(program_version, '') FROM attempts",
    );
    assert_eq!(rows.len(), 1);
    assert!(rows[0].starts_with("/bin/sh "), "{rows:?}");
    assert!(
        rows[0].contains(&blake3_of(&fixture("argv.sh"))),
        "{rows:?}"
    );
    // The list form with shell: true, and a string without it, are refused at check.
    for (from, to, needle) in [
        (
            r#"run: "{{program:show}} {{param:evil}} --n={{point:index}} | tee log.txt > /dev/null && test -s log.txt""#,
            "run: [show, \"{{param:evil}}\"]",
            "`shell: true` takes one script string",
        ),
        ("    shell: true\n", "", "`run` is one string"),
        (
            "{{program:show}} {{param:evil}}",
            "{{program:shw}} {{param:evil}}",
            "no program `shw`",
        ),
        (
            "{{program:show}} {{param:evil}}",
            "{{program:show}} \\\"{{param:evil}}\\\"",
            "inside quotes",
        ),
    ] {
        assert!(text.contains(from), "{from}");
        write(&d.path().join("bad.yaml"), &text.replace(from, to));
        let o = run_rondo(d.path(), &["check", "bad.yaml"]);
        let err = String::from_utf8_lossy(&o.stderr);
        assert_eq!(o.status.code(), Some(2), "{to}: {}", shown(&o));
        assert!(
            err.contains(needle) && err.contains("bad.yaml:"),
            "{to}: {err}"
        );
    }
}

#[test]
fn run_on_pbs_is_selectable_and_its_help_says_it_was_never_run_on_a_real_server() {
    let d = tmp();
    let o = run_rondo(d.path(), &["run", "--help"]);
    let help = String::from_utf8_lossy(&o.stdout);
    assert!(help.contains("pbs"), "{help}");
    assert!(
        help.contains("not been run against a real PBS server"),
        "{help}"
    );
    let clusters = std::fs::read_to_string(repo().join("docs/clusters.md")).unwrap_or_default();
    assert!(
        clusters.contains("--on pbs"),
        "docs/clusters.md shows --on pbs"
    );
    // Stand-ins for the PBS clients (not a PBS server): qsub runs the job script at once
    // and prints an id; qstat -f -x reports each asked job finished; qdel does nothing.
    let bin = d.path().join("pbs-bin");
    std::fs::create_dir(&bin).unwrap_or_else(|e| panic!("{e}"));
    write(
        &bin.join("qsub"),
        "#!/bin/sh\nfor a; do s=$a; done\nn=$(($(cat \"$0.n\" 2>/dev/null || echo 4241) + 1)); echo $n > \"$0.n\"\n/bin/sh \"$s\" > /dev/null 2>&1\necho \"$n.pbs01\"\n",
    );
    write(
        &bin.join("qstat"),
        "#!/bin/sh\nfor a; do case $a in -*) ;; *) printf 'Job Id: %s\\n    job_state = F\\n    substate = 92\\n    Exit_status = 0\\n\\n' \"$a\";; esac; done\n",
    );
    write(&bin.join("qdel"), "#!/bin/sh\nexit 0\n");
    for c in ["qsub", "qstat", "qdel"] {
        make_executable(&bin.join(c));
    }
    halfstep_campaign(d.path(), "ok", "", "[1.0]");
    let o = Command::new(rondo())
        .args(["run", "c.yaml", "--on", "pbs", "--poll-interval", "1", "-q"])
        .current_dir(d.path())
        .env(
            "PATH",
            format!("{}:{}", bin.display(), path_with_binaries()),
        )
        .output()
        .unwrap_or_else(|e| panic!("{e}"));
    assert_eq!(o.status.code(), Some(0), "{}", shown(&o));
    let ws = d.path().join("c.rondo");
    let kinds = strings(&ws, "SELECT DISTINCT executor FROM attempts");
    assert_eq!(kinds, ["pbs"]);
    let handles = strings(&ws, "SELECT handle_id FROM attempts ORDER BY id LIMIT 1");
    assert_eq!(handles, ["4242.pbs01"]);
    let s = status_json(d.path(), &ws);
    assert_eq!(s["points"][0]["state"], "converged");
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

// ---------------------------------------------------------------------------------------
// Built-in stages: the recorded `rondo builtin mix|filter` argv reruns each attempt.
// ---------------------------------------------------------------------------------------

/// A campaign with both built-ins and one program: tests/fixtures/halfstep.sh maps x to
/// (x + 1)/2 and reads back the mixed x; the mix stage mixes that JSON object with a
/// constant real array (Anderson, a weight on the array); the filter runs on start files,
/// G(τ) = −e^{−ετ}/(1 + e^{−βε}) of a free level ε = 0.3 at β = 10 (a fact of the trade)
/// with error bars, Δ = 0, so it writes all four of its outputs.
fn builtins_campaign(dir: &Path) -> PathBuf {
    use rondo_numerics::npy;
    let w = |name: &str, text: &str| {
        std::fs::write(dir.join(name), text).unwrap_or_else(|e| panic!("{name}: {e}"))
    };
    std::fs::create_dir_all(dir.join("state")).unwrap_or_else(|e| panic!("{e}"));
    w("x0.json", "{\"x\": 0.0, \"label\": \"start\"}\n");
    w("levels.json", "{\"level\": 0.3}\n");
    npy::write_real(dir.join("z0.npy"), &[2, 2], &[0.25, -1.5, 3.0, 1e-3])
        .unwrap_or_else(|e| panic!("{e}"));
    let (beta, eps, n) = (10.0f64, 0.3f64, 101usize);
    let mut g = Vec::with_capacity(3 * n);
    for i in 0..n {
        let t = beta * i as f64 / (n - 1) as f64;
        g.extend([t, -(-eps * t).exp() / (1.0 + (-beta * eps).exp()), 1e-5]);
    }
    npy::write_real(dir.join("gtau.npy"), &[n, 3], &g).unwrap_or_else(|e| panic!("{e}"));
    let zero = vec![num_complex::Complex64::new(0.0, 0.0); 32];
    npy::write_complex(dir.join("delta.npy"), &[32], &zero).unwrap_or_else(|e| panic!("{e}"));
    let text = format!(
        r#"campaign: builtins-rerun
about: test campaign (not physics)
programs:
  step: {{ path: {prog} }}
parameters:
  state: {state}
start:
  x: x0.json
  z: z0.npy
  gtau: gtau.npy
  delta: delta.npy
  levels: levels.json
cycle:
  s:
    run: [step, ok, "{{{{param:state}}}}", "{{{{input:x}}}}", "{{{{output:x}}}}", "1.0"]
    inputs: {{ x: {{ previous: mix.x, initially: start.x }} }}
    outputs: {{ x: x.json }}
    metrics: [x]
  mix:
    builtin: mix
    inputs: {{ x: s.x, z: start.z }}
    outputs: {{ x: x.json, z: z.npy }}
    settings: {{ method: anderson, alpha: 0.4, history: 3, weights: {{ z: 2.5 }} }}
  filter:
    builtin: filter
    inputs: {{ gtau: start.gtau, delta: start.delta, levels: start.levels }}
    outputs: {{ giw: giw.npy, sigma: sigma.npy, gl: gl.npy, gtau: gtau.npy }}
    settings: {{ legendre: 20, matsubara: 32 }}
stop:
  when:
    - {{ metric: s.x, change-below: 1.0e-6, for: 2 }}
  max-iterations: 6
"#,
        prog = fixture("halfstep.sh").display(),
        state = dir.join("state").display(),
    );
    let f = dir.join("c.yaml");
    std::fs::write(&f, text).unwrap_or_else(|e| panic!("{e}"));
    f
}

/// One succeeded built-in attempt as recorded.
#[derive(Debug)]
struct BuiltinRecord {
    iteration: i64,
    stage: String,
    argv: Vec<String>,
    program_blake3: Option<String>,
    inputs: std::collections::BTreeMap<String, String>,
    outputs: std::collections::BTreeMap<String, String>,
    metrics: std::collections::BTreeMap<String, f64>,
}

fn builtin_records(ws: &Path) -> Vec<BuiltinRecord> {
    query(ws, |pool| {
        Box::pin(async move {
            let rows = sqlx::query(
                "SELECT id, iteration, stage, argv_json, program_blake3 FROM attempts \
                 WHERE executor = 'builtin' AND state = 'succeeded' ORDER BY id",
            )
            .fetch_all(pool)
            .await
            .unwrap_or_else(|e| panic!("{e}"));
            let mut out = Vec::new();
            for r in rows {
                let id: i64 = r.get(0);
                let pairs = |table: &'static str| async move {
                    sqlx::query(&format!(
                        "SELECT role, artifact FROM {table} WHERE attempt_id = ?"
                    ))
                    .bind(id)
                    .fetch_all(pool)
                    .await
                    .unwrap_or_else(|e| panic!("{e}"))
                    .into_iter()
                    .map(|r| (r.get::<String, _>(0), r.get::<String, _>(1)))
                    .collect()
                };
                let metrics = sqlx::query("SELECT name, value FROM metrics WHERE attempt_id = ?")
                    .bind(id)
                    .fetch_all(pool)
                    .await
                    .unwrap_or_else(|e| panic!("{e}"))
                    .into_iter()
                    .map(|r| (r.get::<String, _>(0), r.get::<f64, _>(1)))
                    .collect();
                let argv: String = r.get(3);
                out.push(BuiltinRecord {
                    iteration: r.get(1),
                    stage: r.get(2),
                    argv: serde_json::from_str(&argv).unwrap_or_else(|e| panic!("{argv}: {e}")),
                    program_blake3: r.get(4),
                    inputs: pairs("attempt_inputs").await,
                    outputs: pairs("attempt_outputs").await,
                    metrics,
                });
            }
            out
        })
    })
}

/// For every built-in attempt (mix at each iteration, with and without a mixer history, and
/// filter): take its input artifacts out of the store with `rondo extract`, lay them out in
/// an empty folder where the recorded argv names them, run the recorded argv there, and
/// find every output, the mixer state and the metrics file bit-identical to the recorded
/// artifacts, and the printed metrics equal to the recorded values.
#[test]
fn the_recorded_argv_of_a_builtin_attempt_reruns_it_bit_for_bit() {
    let d = tmp();
    builtins_campaign(d.path());
    let o = run_rondo(d.path(), &["run", "c.yaml", "-q"]);
    assert_eq!(o.status.code(), Some(0), "{}", shown(&o));
    let ws = d.path().join("c.rondo");
    let records = builtin_records(&ws);
    let exe = rondo();
    let exe_hash = blake3::hash(&std::fs::read(&exe).unwrap_or_default())
        .to_hex()
        .to_string();
    let mixes: Vec<&BuiltinRecord> = records.iter().filter(|r| r.stage == "mix").collect();
    let filters = records.iter().filter(|r| r.stage == "filter").count();
    assert!(mixes.len() >= 3, "{records:#?}");
    assert_eq!(filters, mixes.len(), "{records:#?}");
    assert!(
        mixes.iter().any(|r| r.inputs.contains_key("state")),
        "a mix with a history: {mixes:#?}"
    );
    for (k, rec) in records.iter().enumerate() {
        let what = format!(
            "{} at iteration {}: {:?}",
            rec.stage, rec.iteration, rec.argv
        );
        // The program is rondo's executable, by absolute path, with its hash.
        assert_eq!(rec.argv[0], exe.display().to_string(), "{what}");
        assert_eq!(rec.argv[1..3], ["builtin", rec.stage.as_str()], "{what}");
        assert_eq!(
            rec.program_blake3.as_deref(),
            Some(exe_hash.as_str()),
            "{what}"
        );
        let dir = d.path().join(format!("rerun{k}"));
        std::fs::create_dir_all(dir.join("inputs")).unwrap_or_else(|e| panic!("{e}"));
        // Which recorded artifact each file option names.
        let mut wants_in: Vec<(String, String)> = Vec::new();
        let mut wants_out: Vec<(String, String)> = Vec::new();
        for a in &rec.argv[3..] {
            let Some((flag, value)) = a.split_once('=') else {
                continue;
            };
            let role_file = || {
                value
                    .split_once('=')
                    .map(|(r, f)| (r.to_string(), f.to_string()))
                    .unwrap_or_else(|| panic!("{a} is not ROLE=PATH: {what}"))
            };
            match flag {
                "--input" => wants_in.push(role_file()),
                "--state" => wants_in.push(("state".into(), value.into())),
                "--output" => wants_out.push(role_file()),
                "--state-out" => wants_out.push(("state".into(), value.into())),
                "--metrics" => wants_out.push(("metrics".into(), value.into())),
                _ => {}
            }
        }
        // The argv names every recorded input and output, nothing else.
        let named = |v: &[(String, String)]| v.iter().map(|p| p.0.clone()).collect::<Vec<_>>();
        let mut roles_in = named(&wants_in);
        roles_in.sort();
        assert_eq!(
            roles_in,
            rec.inputs.keys().cloned().collect::<Vec<_>>(),
            "{what}"
        );
        let mut roles_out = named(&wants_out);
        roles_out.sort();
        assert_eq!(
            roles_out,
            rec.outputs.keys().cloned().collect::<Vec<_>>(),
            "{what}"
        );
        assert!(rec.outputs.contains_key("metrics"), "{what}");
        for (role, file) in &wants_in {
            assert!(file.starts_with("inputs/"), "{what}");
            let o = run_rondo(
                d.path(),
                &[
                    "extract",
                    &rec.inputs[role],
                    "-o",
                    &dir.join(file).display().to_string(),
                ],
            );
            assert!(o.status.success(), "{what}: {}", shown(&o));
        }
        let o = Command::new(&rec.argv[0])
            .args(&rec.argv[1..])
            .current_dir(&dir)
            .output()
            .unwrap_or_else(|e| panic!("cannot run {what}: {e}"));
        assert_eq!(o.status.code(), Some(0), "{what}: {}", shown(&o));
        for (role, file) in &wants_out {
            let got = blake3::hash(&std::fs::read(dir.join(file)).unwrap_or_default())
                .to_hex()
                .to_string();
            assert_eq!(got, rec.outputs[role], "{role} = {file} of {what}");
        }
        // The printed metrics are the recorded values, bit for bit.
        let printed: std::collections::BTreeMap<String, f64> = String::from_utf8_lossy(&o.stdout)
            .lines()
            .filter_map(|l| l.split_once(' '))
            .map(|(n, v)| {
                let x: f64 = v.parse().unwrap_or_else(|e| panic!("{n} {v}: {e}"));
                (format!("{}.{n}", rec.stage), x)
            })
            .collect();
        let bits = |m: &std::collections::BTreeMap<String, f64>| {
            m.iter()
                .map(|(k, v)| (k.clone(), v.to_bits()))
                .collect::<Vec<_>>()
        };
        assert!(!printed.is_empty(), "{what}: {}", shown(&o));
        assert_eq!(bits(&printed), bits(&rec.metrics), "{what}");
    }
}
