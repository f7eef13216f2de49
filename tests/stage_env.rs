//! A stage's own environment (`env:`) and the further programs a wrapper runs (`also-runs:`),
//! through the real `rondo` binary with real child processes: the variables reach the
//! program and its records, the wrapper's inner program is hashed with it (a change of it
//! between iterations stops the point), and `rondo diff` compares the environments.

mod common;

use std::os::unix::fs::PermissionsExt;
use std::path::Path;

use common::*;

fn write(path: &Path, text: &str) {
    std::fs::write(path, text).unwrap_or_else(|e| panic!("{}: {e}", path.display()));
}

fn executable(path: &Path, text: &str) {
    write(path, text);
    std::fs::set_permissions(path, std::fs::Permissions::from_mode(0o755))
        .unwrap_or_else(|e| panic!("{}: {e}", path.display()));
}

/// A wrapper that runs an inner program found through the stage's environment, as site
/// scripts do; the inner program fails at iteration 3 while the file `fail` exists.
fn setup(dir: &Path, mode: &str) {
    executable(&dir.join("wrap.sh"), "#!/bin/sh\nexec \"$INNER\" \"$@\"\n");
    executable(
        &dir.join("inner.sh"),
        "#!/bin/sh\n\
         if [ \"$1\" = --version ]; then echo 'inner 1.0'; exit 0; fi\n\
         if [ \"$RONDO_ITERATION\" -ge 3 ] && [ -e ../../../fail ]; then exit 1; fi\n\
         echo \"$OMP_NUM_THREADS $CODE_MODE\" > seen.txt\n\
         echo \"{\\\"x\\\": $(( $1 * RONDO_ITERATION ))}\" > metrics.json\n",
    );
    let campaign = format!(
        "campaign: stage-env
about: test campaign (not physics)
programs:
  wrap: {{ path: ./wrap.sh }}
  inner: {{ path: ./inner.sh, version-flag: --version }}
sweep:
  product:
    a: [1, 2]
cycle:
  s:
    run: [wrap, \"{{{{param:a}}}}\"]
    env:
      OMP_NUM_THREADS: 3
      CODE_MODE: {mode}
      INNER: {inner}
    also-runs: [inner]
    outputs: {{ seen: seen.txt }}
    metrics: [x]
stop:
  max-iterations: 4
",
        inner = dir.join("inner.sh").display()
    );
    write(&dir.join("c.yaml"), &campaign);
}

fn blake3_of(path: &Path) -> String {
    let bytes = std::fs::read(path).unwrap_or_else(|e| panic!("{}: {e}", path.display()));
    blake3::hash(&bytes).to_hex().to_string()
}

#[test]
fn the_stage_environment_reaches_the_program_and_its_records() {
    let d = tempfile::tempdir().unwrap_or_else(|e| panic!("{e}"));
    setup(d.path(), "fast");
    let o = run_rondo(d.path(), &["run", "c.yaml", "-q"]);
    // Every point runs to the cap (no stopping rule): exit 3, "stopped without converging".
    assert_eq!(o.status.code(), Some(3), "{}", shown(&o));
    let ws = d.path().join("c.rondo");
    // What the program saw.
    let seen = strings(
        &ws,
        "SELECT o.artifact FROM attempt_outputs o JOIN attempts a ON a.id = o.attempt_id \
         WHERE a.state = 'succeeded' AND o.role = 'seen'",
    );
    assert_eq!(seen.len(), 8, "2 points × 4 iterations");
    for h in &seen {
        let text = std::fs::read_to_string(ws.join("store").join(&h[..2]).join(&h[2..]))
            .unwrap_or_else(|e| panic!("{h}: {e}"));
        assert_eq!(text, "3 fast\n");
    }
    // What was recorded: every variable the stage sets, beside the allow-listed ones.
    let envs = strings(
        &ws,
        "SELECT env_json FROM attempts WHERE state = 'succeeded'",
    );
    assert_eq!(envs.len(), 8);
    for e in &envs {
        let v: serde_json::Value = serde_json::from_str(e).unwrap_or_else(|e| panic!("{e}"));
        assert_eq!(v["OMP_NUM_THREADS"], "3", "{e}");
        assert_eq!(v["CODE_MODE"], "fast", "{e}");
        assert_eq!(
            v["INNER"],
            d.path().join("inner.sh").display().to_string(),
            "{e}"
        );
        assert!(
            v.get("PATH").is_some(),
            "the allow-listed environment too: {e}"
        );
    }
    // The program: the wrapper, hashed together with what it runs.
    let wrap = d.path().join("wrap.sh");
    let inner = d.path().join("inner.sh");
    let list = format!(
        "inner\t{}\t{}\nwrap\t{}\t{}\n",
        inner.display(),
        blake3_of(&inner),
        wrap.display(),
        blake3_of(&wrap)
    );
    let expected = blake3::hash(list.as_bytes()).to_hex().to_string();
    let programs = strings(
        &ws,
        "SELECT DISTINCT program_path || '|' || program_blake3 || '|' || program_version \
         FROM attempts WHERE state = 'succeeded'",
    );
    assert_eq!(programs.len(), 1, "{programs:?}");
    let parts: Vec<&str> = programs[0].splitn(3, '|').collect();
    assert_eq!(parts[0], wrap.display().to_string());
    assert_eq!(
        parts[1], expected,
        "the hash covers wrapper and inner program"
    );
    assert!(
        parts[2].contains("inner = ") && parts[2].contains("version inner 1.0"),
        "the version text names the inner program: {}",
        parts[2]
    );
    // `rondo trace` shows the environment and the programs.
    let o = run_rondo(d.path(), &["trace", "p001/last/s.x"]);
    assert_eq!(o.status.code(), Some(0), "{}", shown(&o));
    let text = String::from_utf8_lossy(&o.stdout);
    assert!(
        text.contains("inner 1.0") && text.contains("CODE_MODE"),
        "{text}"
    );
}

#[test]
fn a_changed_inner_program_stops_the_point_like_a_changed_stage_program() {
    let d = tempfile::tempdir().unwrap_or_else(|e| panic!("{e}"));
    setup(d.path(), "fast");
    write(&d.path().join("fail"), "");
    let o = run_rondo(d.path(), &["run", "c.yaml", "-q"]);
    assert_eq!(o.status.code(), Some(3), "{}", shown(&o));
    let ws = d.path().join("c.rondo");
    assert_eq!(
        strings(&ws, "SELECT DISTINCT state FROM points"),
        vec!["failed".to_string()],
        "iteration 3 failed in both points"
    );
    // A rebuilt inner program (the wrapper unchanged), then a retry of the failed points.
    std::fs::remove_file(d.path().join("fail")).unwrap_or_else(|e| panic!("{e}"));
    let inner = d.path().join("inner.sh");
    let text = std::fs::read_to_string(&inner).unwrap_or_else(|e| panic!("{e}"));
    executable(&inner, &format!("{text}# rebuilt\n"));
    let o = run_rondo(d.path(), &["run", "c.yaml", "-q", "--retry-failed"]);
    assert_ne!(o.status.code(), Some(0), "{}", shown(&o));
    let reasons = strings(
        &ws,
        "SELECT detail FROM events WHERE kind = 'program-changed' ORDER BY seq",
    );
    assert_eq!(reasons.len(), 2, "one per point: {reasons:?}");
    for r in &reasons {
        assert!(
            r.contains("the programs of stage `s` changed") && r.contains("inner = "),
            "{r}"
        );
    }
    // Nothing of the new build ran: no succeeded attempt beyond iteration 2.
    assert_eq!(
        strings(
            &ws,
            "SELECT CAST(count(*) AS TEXT) FROM attempts WHERE state = 'succeeded' AND iteration > 2"
        ),
        vec!["0".to_string()]
    );
}

#[test]
fn diff_compares_the_recorded_environments() {
    let d = tempfile::tempdir().unwrap_or_else(|e| panic!("{e}"));
    let (da, db) = (d.path().join("a"), d.path().join("b"));
    for (dir, mode) in [(&da, "fast"), (&db, "careful")] {
        std::fs::create_dir(dir).unwrap_or_else(|e| panic!("{e}"));
        setup(dir, mode);
        let o = run_rondo(dir, &["run", "c.yaml", "-q"]);
        assert_eq!(o.status.code(), Some(3), "{}", shown(&o));
    }
    let (wa, wb) = (da.join("c.rondo"), db.join("c.rondo"));
    let o = run_rondo(
        d.path(),
        &[
            "diff",
            "p001",
            "p001",
            "--workspace",
            &wa.display().to_string(),
            "--other-workspace",
            &wb.display().to_string(),
            "--json",
        ],
    );
    assert_eq!(o.status.code(), Some(0), "{}", shown(&o));
    let v: serde_json::Value =
        serde_json::from_slice(&o.stdout).unwrap_or_else(|e| panic!("{e}: {}", shown(&o)));
    let env = v["environment"].as_array().cloned().unwrap_or_default();
    let names: Vec<&str> = env.iter().filter_map(|e| e["name"].as_str()).collect();
    assert!(names.contains(&"s.CODE_MODE"), "{env:?}");
    assert!(
        names.contains(&"s.INNER"),
        "the folders differ too: {env:?}"
    );
    assert!(
        !names.contains(&"s.OMP_NUM_THREADS"),
        "equal values do not show: {env:?}"
    );
    let mode = env
        .iter()
        .find(|e| e["name"] == "s.CODE_MODE")
        .cloned()
        .unwrap_or_default();
    assert_eq!(mode["a"], "fast");
    assert_eq!(mode["b"], "careful");
    // The text form has the section.
    let o = run_rondo(
        d.path(),
        &[
            "diff",
            "p001",
            "p001",
            "--workspace",
            &wa.display().to_string(),
            "--other-workspace",
            &wb.display().to_string(),
        ],
    );
    let text = String::from_utf8_lossy(&o.stdout);
    assert!(
        text.contains("environment:") && text.contains("s.CODE_MODE"),
        "{text}"
    );
}
