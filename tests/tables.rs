//! The study tools through the real `rondo` binary on real workspaces: the tidy tables
//! (`rondo table metrics|finals`, CSV and JSON Lines) read back to the store's numbers bit
//! for bit and to `rondo status --json`'s final values, page by page; and `rondo plan`'s
//! estimate after a partial run matches the durations recorded in the store.

mod common;

use std::collections::BTreeMap;
use std::path::{Path, PathBuf};
use std::process::{Command, Stdio};

use common::*;
use sqlx::Row;

fn tmp() -> tempfile::TempDir {
    tempfile::tempdir().unwrap_or_else(|e| panic!("tempdir: {e}"))
}

/// A stage program: x ← (x + a) / 2, reported as `x` and as a noisy-looking `e` with an
/// error bar (an invented wobble of ±1/3000 by iteration parity). Usage: IN OUT A [PAUSE].
const STEP: &str = r#"#!/bin/sh
set -eu
in=$1 out=$2 a=$3
if [ $# -ge 4 ]; then sleep "$4"; fi
x=$(sed 's/[^0-9.eE+-]//g' "$in")
y=$(awk -v x="$x" -v a="$a" 'BEGIN { printf "%.17g", 0.5 * (x + a) }')
e=$(awk -v y="$y" -v i="$RONDO_ITERATION" 'BEGIN { w = (i % 2 == 1) ? 1 : -1; printf "%.17g", y + w / 3000 }')
printf '{"x": %s}\n' "$y" > "$out"
printf '{"x": %s, "e": {"value": %s, "error": 0.0033333333333333335}}\n' "$y" "$e" > metrics.json
"#;

/// A campaign over two axes (a number and a text) with a final window of 2; `pause` seconds
/// per attempt; `extra` appended at the top level.
fn campaign(dir: &Path, pause: &str, extra: &str) -> PathBuf {
    let step = dir.join("step.sh");
    std::fs::write(&step, STEP).unwrap_or_else(|e| panic!("{e}"));
    let _ = Command::new("chmod").arg("+x").arg(&step).status();
    std::fs::write(dir.join("x0.json"), "{\"x\": 0.0}\n").unwrap_or_else(|e| panic!("{e}"));
    let text = format!(
        r#"campaign: tidy
about: test campaign (not physics; invented numbers)
programs:
  step: {{ path: ./step.sh }}
sweep:
  product:
    a: [1.0, 3.0]
    label: [left, "with,comma"]
start:
  x: x0.json
cycle:
  s:
    run: [step, "{{{{input:x}}}}", "{{{{output:x}}}}", "{{{{param:a}}}}"{pause}]
    inputs: {{ x: {{ previous: s.x, initially: start.x }} }}
    outputs: {{ x: x.json }}
    metrics: [x, e]
    resources: {{ ntasks: 2, cpus-per-task: 3 }}
stop:
  when:
    - {{ metric: s.x, change-below: 1.0e-2, for: 2 }}
  final-window: 2
  max-iterations: 20
{extra}"#,
        pause = if pause.is_empty() {
            String::new()
        } else {
            format!(", \"{pause}\"")
        }
    );
    let f = dir.join("c.yaml");
    std::fs::write(&f, text).unwrap_or_else(|e| panic!("{e}"));
    f
}

/// RFC 4180 records of a CSV text (quoted fields, doubled quotes; no newline inside quotes
/// is needed here, but commas are).
fn parse_csv(text: &str) -> Vec<Vec<String>> {
    let mut out = Vec::new();
    for line in text.lines() {
        let mut fields = Vec::new();
        let mut cur = String::new();
        let mut quoted = false;
        let mut chars = line.chars().peekable();
        while let Some(c) = chars.next() {
            match (c, quoted) {
                ('"', true) if chars.peek() == Some(&'"') => {
                    cur.push('"');
                    chars.next();
                }
                ('"', _) => quoted = !quoted,
                (',', false) => fields.push(std::mem::take(&mut cur)),
                (c, _) => cur.push(c),
            }
        }
        fields.push(cur);
        out.push(fields);
    }
    out
}

/// Rows of a CSV as maps column → text.
fn csv_maps(text: &str) -> Vec<BTreeMap<String, String>> {
    let mut rows = parse_csv(text).into_iter();
    let header = rows.next().unwrap_or_default();
    rows.map(|r| header.iter().cloned().zip(r).collect())
        .collect()
}

fn table(dir: &Path, args: &[&str]) -> String {
    let mut all = vec!["table"];
    all.extend_from_slice(args);
    all.extend_from_slice(&["--workspace", "c.rondo"]);
    let o = run_rondo(dir, &all);
    assert!(o.status.success(), "{}", shown(&o));
    String::from_utf8(o.stdout).unwrap_or_default()
}

/// Every metric in the store: (attempt id, name) → (value, error).
fn stored_metrics(ws: &Path) -> BTreeMap<(i64, String), (f64, Option<f64>)> {
    query(ws, |pool| {
        Box::pin(async move {
            sqlx::query("SELECT attempt_id, name, value, error FROM metrics")
                .fetch_all(pool)
                .await
                .unwrap_or_default()
                .into_iter()
                .map(|r| ((r.get(0), r.get(1)), (r.get(2), r.get(3))))
                .collect()
        })
    })
}

fn num(s: &str) -> f64 {
    s.parse::<f64>()
        .unwrap_or_else(|e| panic!("`{s}` is not a number: {e}"))
}

#[test]
fn the_metrics_table_has_one_row_per_recorded_metric_with_the_stored_numbers() {
    let d = tmp();
    campaign(d.path(), "", "");
    let o = run_rondo(d.path(), &["run", "c.yaml", "--max-running", "2"]);
    assert_eq!(o.status.code(), Some(0), "{}", shown(&o));
    let ws = d.path().join("c.rondo");
    let stored = stored_metrics(&ws);
    assert!(stored.len() > 20, "{} metrics", stored.len());

    let csv = table(d.path(), &["metrics"]);
    let rows = csv_maps(&csv);
    assert_eq!(rows.len(), stored.len(), "one row per recorded metric");
    let header = parse_csv(&csv).remove(0);
    for col in [
        "point",
        "iteration",
        "stage",
        "attempt",
        "metric",
        "value",
        "error",
        "attempt_state",
        "iteration_state",
        "started_at",
        "ended_at",
        "a",
        "label",
    ] {
        assert!(
            header.iter().any(|h| h == col),
            "column {col} in {header:?}"
        );
    }
    let mut seen = std::collections::BTreeSet::new();
    for r in &rows {
        let key = (num(&r["attempt_id"]) as i64, r["metric"].clone());
        let (v, e) = stored[&key];
        assert_eq!(num(&r["value"]).to_bits(), v.to_bits(), "{r:?}");
        assert_eq!(
            e.map(f64::to_bits),
            Some(r["error"].as_str())
                .filter(|s| !s.is_empty())
                .map(|s| num(s).to_bits()),
            "{r:?}"
        );
        assert_eq!(r["stage"], "s");
        assert_eq!(r["attempt_state"], "succeeded");
        assert_eq!(r["iteration_state"], "good");
        assert!(r["started_at"] <= r["ended_at"], "{r:?}");
        assert!(
            ["left", "with,comma"].contains(&r["label"].as_str()),
            "{r:?}"
        );
        assert!(["1.0", "3.0"].contains(&r["a"].as_str()), "{r:?}");
        seen.insert(key);
    }
    assert_eq!(seen.len(), stored.len(), "no metric twice");

    // Read page by page (3 at a time): the same table.
    assert_eq!(table(d.path(), &["metrics", "--page", "3"]), csv);

    // JSON Lines: the same rows and numbers.
    let jsonl = table(d.path(), &["metrics", "--format", "jsonl"]);
    let lines: Vec<serde_json::Value> = jsonl
        .lines()
        .map(|l| serde_json::from_str(l).unwrap_or_else(|e| panic!("{e}: {l}")))
        .collect();
    assert_eq!(lines.len(), stored.len());
    for (l, r) in lines.iter().zip(&rows) {
        assert_eq!(
            l["value"].as_f64().map(f64::to_bits),
            Some(num(&r["value"]).to_bits())
        );
        assert_eq!(l["label"].as_str(), Some(r["label"].as_str()));
        assert_eq!(l["a"].as_f64(), Some(num(&r["a"])));
        assert_eq!(l["attempt_id"].as_i64(), Some(num(&r["attempt_id"]) as i64));
    }

    // --out writes the same table to a file.
    let o = run_rondo(
        d.path(),
        &[
            "table",
            "metrics",
            "--workspace",
            "c.rondo",
            "--out",
            "m.csv",
        ],
    );
    assert!(o.status.success(), "{}", shown(&o));
    assert_eq!(
        std::fs::read_to_string(d.path().join("m.csv")).unwrap_or_default(),
        csv
    );
}

#[test]
fn the_final_values_equal_status_and_python_reads_the_same_numbers() {
    let d = tmp();
    campaign(d.path(), "", "");
    let o = run_rondo(d.path(), &["run", "c.yaml"]);
    assert_eq!(o.status.code(), Some(0), "{}", shown(&o));
    let ws = d.path().join("c.rondo");
    let status = status_json(d.path(), &ws);
    let csv = table(d.path(), &["finals"]);
    let rows = csv_maps(&csv);
    let points = status["points"].as_array().cloned().unwrap_or_default();
    assert_eq!(points.len(), 4);
    assert_eq!(rows.len(), 4 * 2, "one row per point and metric");
    for r in &rows {
        let p = points
            .iter()
            .find(|p| p["id"] == r["point"].as_str())
            .unwrap_or_else(|| panic!("{r:?}"));
        let m = r["metric"].as_str();
        // A final window of 2: every point's final values are window averages.
        assert_eq!(r["how"], "window", "{r:?}");
        assert_eq!(r["n_iterations"], "2");
        let avg = &p["averages"][m];
        assert_eq!(
            avg["value"].as_f64().map(f64::to_bits),
            Some(num(&r["value"]).to_bits()),
            "{r:?} vs {avg}"
        );
        assert_eq!(
            avg["error"].as_f64().map(f64::to_bits),
            Some(num(&r["error"]).to_bits()),
            "{r:?} vs {avg}"
        );
        let its: Vec<i64> = avg["iterations"]
            .as_array()
            .into_iter()
            .flatten()
            .filter_map(|i| i.as_i64())
            .collect();
        assert_eq!(
            its.first().map(|i| i.to_string()).as_deref(),
            Some(r["first_iteration"].as_str())
        );
        assert_eq!(
            its.last().map(|i| i.to_string()).as_deref(),
            Some(r["last_iteration"].as_str())
        );
        assert_eq!(p["values"]["label"].as_str(), Some(r["label"].as_str()));
        assert_eq!(r["point_state"], "converged");
    }

    // Python's csv module reads the same doubles (when python3 is here).
    let py = "import csv, sys, json\nrows = list(csv.DictReader(sys.stdin))\n\
              print(json.dumps([[r['point'], r['metric'], float(r['value']).hex(), r['label']] for r in rows]))\n";
    let child = Command::new("python3")
        .args(["-c", py])
        .stdin(Stdio::piped())
        .stdout(Stdio::piped())
        .spawn();
    let Ok(mut child) = child else {
        skip_or_fail(
            "python3 is not installed: the CSV was read back in Rust only",
            "install python3 to check the CSV with its csv module",
            &[],
        );
        return;
    };
    if let Some(mut stdin) = child.stdin.take() {
        use std::io::Write;
        stdin
            .write_all(csv.as_bytes())
            .unwrap_or_else(|e| panic!("{e}"));
    }
    let out = child.wait_with_output().unwrap_or_else(|e| panic!("{e}"));
    assert!(
        out.status.success(),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    let read: Vec<(String, String, String, String)> =
        serde_json::from_slice(&out.stdout).unwrap_or_else(|e| panic!("{e}"));
    assert_eq!(read.len(), rows.len());
    for ((point, metric, hex, label), r) in read.iter().zip(&rows) {
        assert_eq!(
            (point, metric, label),
            (&r["point"], &r["metric"], &r["label"])
        );
        let x = num(&r["value"]);
        assert_eq!(
            hex,
            &hex_of(x),
            "python reads {point} {metric} as {hex}, not {x:?}"
        );
    }
}

/// Python's `float.hex()` of a (normal, non-zero) double.
fn hex_of(x: f64) -> String {
    let bits = x.to_bits();
    let sign = if bits >> 63 == 1 { "-" } else { "" };
    let exp = ((bits >> 52) & 0x7ff) as i64 - 1023;
    let mantissa = bits & ((1u64 << 52) - 1);
    format!(
        "{sign}0x1.{mantissa:013x}p{}{exp}",
        if exp >= 0 { "+" } else { "" }
    )
}

/// Wall times of the ended attempts of stage `s`, in seconds, as the store holds them.
fn stored_walls(ws: &Path) -> (Vec<f64>, i64) {
    query(ws, |pool| {
        Box::pin(async move {
            let walls: Vec<f64> = sqlx::query_scalar(
                "SELECT (julianday(ended_at) - julianday(started_at)) * 86400.0 FROM attempts \
                 WHERE stage = 's' AND state IN ('succeeded', 'failed') \
                 AND started_at IS NOT NULL AND ended_at IS NOT NULL",
            )
            .fetch_all(pool)
            .await
            .unwrap_or_default();
            let good: i64 =
                sqlx::query_scalar("SELECT count(*) FROM iterations WHERE state = 'good'")
                    .fetch_one(pool)
                    .await
                    .unwrap_or(-1);
            (walls, good)
        })
    })
}

fn plan_json(dir: &Path, args: &[&str]) -> (serde_json::Value, String) {
    let mut all = vec!["plan", "c.yaml", "--json"];
    all.extend_from_slice(args);
    let o = run_rondo(dir, &all);
    assert!(o.status.success(), "{}", shown(&o));
    (
        serde_json::from_slice(&o.stdout).unwrap_or_else(|e| panic!("{e}\n{}", shown(&o))),
        String::from_utf8_lossy(&o.stderr).into_owned(),
    )
}

fn close(a: f64, b: f64) -> bool {
    (a - b).abs() <= 1e-9 * a.abs().max(b.abs()).max(1e-12)
}

#[test]
fn the_plan_after_a_partial_run_rests_on_the_recorded_durations() {
    let d = tmp();
    campaign(d.path(), "0.2", "budget: { core-hours: 0.000001 }\n");
    // Before anything ran: nothing recorded, every stage unknown.
    let (before, _) = plan_json(d.path(), &[]);
    assert_eq!(before["workspace_exists"], false);
    assert_eq!(before["points_to_go"], 4);
    assert_eq!(before["stages"][0]["core_hours"], serde_json::Value::Null);
    assert_eq!(before["total_core_hours"], serde_json::Value::Null);
    assert_eq!(before["iterations"]["upper"].as_f64(), Some(4.0 * 20.0));

    // A partial run: stopped (SIGINT) once a few attempts have succeeded.
    let ws = d.path().join("c.rondo");
    let mut child = Command::new(rondo())
        .args(["run", "c.yaml", "--max-running", "1", "--quiet"])
        .current_dir(d.path())
        .stdout(Stdio::null())
        .stderr(Stdio::null())
        .spawn()
        .unwrap_or_else(|e| panic!("{e}"));
    loop {
        std::thread::sleep(std::time::Duration::from_millis(200));
        if ws.join("rondo.db").is_file() && succeeded_attempts_ro(&ws) >= 5 {
            break;
        }
        if let Ok(Some(s)) = child.try_wait() {
            panic!("the run ended before it was stopped: {s}");
        }
    }
    // SAFETY: kill(2) on our own child.
    unsafe {
        libc::kill(child.id() as i32, libc::SIGINT);
    }
    let status = child.wait().unwrap_or_else(|e| panic!("{e}"));
    assert_eq!(status.code(), Some(4), "interrupted");

    let (mut walls, good) = stored_walls(&ws);
    assert!(walls.len() >= 5, "{walls:?}");
    walls.sort_by(f64::total_cmp);
    let n = walls.len();
    let median = if n % 2 == 1 {
        walls[n / 2]
    } else {
        0.5 * (walls[n / 2 - 1] + walls[n / 2])
    };
    let (plan, stderr) = plan_json(d.path(), &[]);
    let st = &plan["stages"][0];
    assert_eq!(st["stage"], "s");
    assert_eq!(st["cpus"], 6, "ntasks 2 × cpus-per-task 3");
    assert_eq!(st["recorded_attempts"].as_u64(), Some(n as u64));
    let w = &st["wall_seconds"];
    assert!(
        close(w["median"].as_f64().unwrap_or(-1.0), median),
        "{w} vs {median}"
    );
    assert!(close(w["min"].as_f64().unwrap_or(-1.0), walls[0]), "{w}");
    assert!(
        close(w["max"].as_f64().unwrap_or(-1.0), walls[n - 1]),
        "{w}"
    );
    // No point converged yet in 5 attempts of 4 points: the upper bound stands for both.
    assert_eq!(plan["converged_points"], 0);
    let upper = 4.0 * 20.0 - good as f64;
    assert_eq!(plan["iterations"]["upper"].as_f64(), Some(upper));
    assert_eq!(plan["iterations"]["typical"].as_f64(), Some(upper));
    let attempts = st["attempts"]["upper"].as_f64().unwrap_or(-1.0);
    assert!(
        close(attempts, upper),
        "one attempt per iteration: {attempts}"
    );
    let ch = &st["core_hours"];
    assert!(
        close(
            ch["typical"].as_f64().unwrap_or(-1.0),
            upper * median * 6.0 / 3600.0
        ),
        "{ch}"
    );
    assert!(
        close(
            ch["upper"].as_f64().unwrap_or(-1.0),
            upper * walls[n - 1] * 6.0 / 3600.0
        ),
        "{ch}"
    );
    assert_eq!(plan["over_budget"], true);
    assert!(stderr.contains("exceeds the budget of"), "{stderr}");

    // The text says what it rests on.
    let o = run_rondo(d.path(), &["plan", "c.yaml"]);
    let text = String::from_utf8_lossy(&o.stdout);
    assert!(
        text.contains(&format!("over {n} recorded attempt(s)")),
        "{text}"
    );
    assert!(text.contains("no converged point recorded"), "{text}");

    // Finish the run; a new workspace planned with these durations uses the median
    // iterations-to-converge of the converged points.
    let o = run_rondo(d.path(), &["run", "c.yaml", "--max-running", "2"]);
    assert_eq!(o.status.code(), Some(0), "{}", shown(&o));
    let (done, _) = plan_json(d.path(), &[]);
    assert_eq!(done["points_to_go"], 0);
    assert_eq!(done["total_core_hours"]["upper"].as_f64(), Some(0.0));
    let fresh = d.path().join("fresh.rondo").display().to_string();
    let from = ws.display().to_string();
    let (other, _) = plan_json(
        d.path(),
        &["--workspace", &fresh, "--durations-from", &from],
    );
    assert_eq!(other["converged_points"], 4);
    let med = other["median_to_converge"].as_f64().unwrap_or(-1.0);
    let its: Vec<i64> = status_json(d.path(), &ws)["points"]
        .as_array()
        .into_iter()
        .flatten()
        .filter_map(|p| p["iteration"].as_i64())
        .collect();
    let mut sorted = its.clone();
    sorted.sort();
    assert!(
        close(med, 0.5 * (sorted[1] + sorted[2]) as f64),
        "{med} vs {its:?}"
    );
    assert!(close(
        other["iterations"]["typical"].as_f64().unwrap_or(-1.0),
        4.0 * med.ceil()
    ));
    assert_eq!(
        other["stages"][0]["recorded_attempts"].as_u64(),
        Some(stored_walls(&ws).0.len() as u64)
    );
}
