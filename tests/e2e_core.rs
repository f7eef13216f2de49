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
    assert!(matches!(o.status.code(), Some(0 | 3)), "{}", shown(&o));
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
    assert!(matches!(o.status.code(), Some(0 | 3)), "{}", shown(&o));
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
