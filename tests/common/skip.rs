//! Loud skips, shared by every test crate of the workspace (tests/common, and by path from
//! orchestrator/tests/fixtures and adapters/tests).
//!
//! A test that cannot run (or cannot make one of its checks) because a component is missing
//! calls [`skip_or_fail`]. That is a failure when the run demands the component: under
//! `CI=true`, or when one of the `RONDO_REQUIRE_*` variables the caller names is set (to
//! anything but `0`). Otherwise the skip is written as one line to the skip log
//! (`$RONDO_SKIP_LOG`, else `rondo-skips.log` in cargo's target tmp directory; appended with
//! `O_APPEND` in one write, so parallel tests do not mix their lines) and to the raw standard
//! error of the test process: libtest captures only the print macros, so the line shows even
//! for a test that passes. `scripts/test` gives each run a fresh log and lists it at the end.

#![allow(dead_code)]

use std::io::Write;
use std::path::PathBuf;

/// The variable naming the skip log.
pub const SKIP_LOG_VAR: &str = "RONDO_SKIP_LOG";

/// The skip log of this run.
pub fn skip_log() -> PathBuf {
    match std::env::var_os(SKIP_LOG_VAR) {
        Some(p) if !p.is_empty() => PathBuf::from(p),
        _ => PathBuf::from(env!("CARGO_TARGET_TMPDIR")).join("rondo-skips.log"),
    }
}

/// What demands the component: `CI=true`, or the first of `required_by` that is set (and not
/// `0`); `None` when nothing does.
pub fn demanded_by(required_by: &[&str]) -> Option<String> {
    if std::env::var("CI").is_ok_and(|v| v.eq_ignore_ascii_case("true") || v == "1") {
        return Some("CI=true".to_string());
    }
    required_by.iter().find_map(|var| match std::env::var(var) {
        Ok(v) if !v.is_empty() && v != "0" => Some(format!("{var}={v}")),
        _ => None,
    })
}

/// The running test, as libtest names its thread, prefixed by the test crate.
pub fn test_name() -> String {
    let thread = std::thread::current();
    format!(
        "{}::{}",
        env!("CARGO_CRATE_NAME"),
        thread.name().unwrap_or("(unnamed thread)")
    )
}

/// The running test cannot do what it is for because `missing` is not here (`hint`: how to
/// get it). Panics when CI or one of `required_by` demands the component; else records the
/// skip loudly and returns, and the caller returns (or leaves out the one check).
#[track_caller]
pub fn skip_or_fail(missing: &str, hint: &str, required_by: &[&str]) {
    let test = test_name();
    let one_line = |s: &str| s.replace(['\n', '\r'], " ");
    let (missing, hint) = (one_line(missing), one_line(hint));
    if let Some(by) = demanded_by(required_by) {
        panic!("{test}: {missing}, and {by} makes a missing component a failure; {hint}");
    }
    let line = format!("{test}: {missing}; {hint}\n");
    let log = skip_log();
    let logged = std::fs::OpenOptions::new()
        .create(true)
        .append(true)
        .open(&log)
        .and_then(|mut f| f.write_all(line.as_bytes()));
    let note = match logged {
        Ok(()) => format!("(listed in {})", log.display()),
        Err(e) => format!("(could not be listed in {}: {e})", log.display()),
    };
    // Straight to fd 2: libtest would swallow `eprintln!` of a passing test.
    let _ = std::io::stderr().write_all(format!("\n*** SKIPPED {line}*** {note}\n\n").as_bytes());
}
