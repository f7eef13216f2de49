//! The shared skip mechanism (tests/common/skip.rs), run in a child copy of this test binary:
//! a skip of a passing test still shows on its captured stderr and lands in the skip log, and
//! `CI=true` or the named `RONDO_REQUIRE_*` variable turns the same skip into a failure.

#[path = "../../tests/common/skip.rs"]
mod skip;

use std::path::Path;
use std::process::{Command, Output};

/// Set in the child that plays the skipping test.
const CHILD: &str = "RONDO_SKIP_SELFTEST_CHILD";
/// The component requirement the child's skip names.
const REQUIRE: &str = "RONDO_REQUIRE_SKIP_SELFTEST";

/// The test that skips: only does something inside the child (ignored otherwise, so that a
/// plain run does not list it as passed).
#[test]
#[ignore = "run by a_skip_is_logged_and_shown_and_a_requirement_makes_it_fail"]
fn child_that_skips() {
    if std::env::var_os(CHILD).is_none() {
        panic!(
            "run only as the child of a_skip_is_logged_and_shown_and_a_requirement_makes_it_fail"
        );
    }
    skip::skip_or_fail(
        "the frobnicator is not installed",
        "install the frobnicator",
        &[REQUIRE],
    );
}

/// Run the child test with this environment (CI and the requirement cleared first).
fn child(log: &Path, env: &[(&str, &str)]) -> Output {
    let exe = std::env::current_exe().unwrap_or_else(|e| panic!("current_exe: {e}"));
    let mut c = Command::new(exe);
    c.args(["--ignored", "--exact", "child_that_skips"])
        .env(CHILD, "1")
        .env(skip::SKIP_LOG_VAR, log)
        .env_remove("CI")
        .env_remove(REQUIRE);
    for (k, v) in env {
        c.env(k, v);
    }
    c.output()
        .unwrap_or_else(|e| panic!("cannot run the child test: {e}"))
}

fn text(o: &Output) -> String {
    format!(
        "status {:?}\n--- stdout\n{}\n--- stderr\n{}",
        o.status.code(),
        String::from_utf8_lossy(&o.stdout),
        String::from_utf8_lossy(&o.stderr)
    )
}

#[test]
fn a_skip_is_logged_and_shown_and_a_requirement_makes_it_fail() {
    let d = tempfile::tempdir().unwrap_or_else(|e| panic!("{e}"));
    let log = d.path().join("skips.log");
    let logged = || std::fs::read_to_string(&log).unwrap_or_default();

    // Nothing demands the component: the test passes, and says that it skipped, both on
    // stderr (libtest captures the print macros of a passing test, not fd 2) and in the log.
    for env in [&[][..], &[(REQUIRE, "0")][..], &[("CI", "false")][..]] {
        let o = child(&log, env);
        assert_eq!(o.status.code(), Some(0), "{env:?}: {}", text(&o));
        let err = String::from_utf8_lossy(&o.stderr);
        assert!(
            err.contains("*** SKIPPED skips::child_that_skips: the frobnicator is not installed"),
            "{env:?}: {}",
            text(&o)
        );
    }
    let lines: Vec<String> = logged().lines().map(str::to_string).collect();
    assert_eq!(lines.len(), 3, "one line per skip: {lines:?}");
    for l in &lines {
        assert_eq!(
            l,
            "skips::child_that_skips: the frobnicator is not installed; install the frobnicator"
        );
    }

    // CI=true, or the requirement: the same skip is a failure that says why, and is not logged.
    for (k, v) in [("CI", "true"), (REQUIRE, "1")] {
        let o = child(&log, &[(k, v)]);
        assert_eq!(o.status.code(), Some(101), "{k}={v}: {}", text(&o));
        let all = text(&o);
        assert!(
            all.contains(&format!(
                "the frobnicator is not installed, and {k}={v} makes a missing component a failure"
            )),
            "{all}"
        );
    }
    assert_eq!(logged().lines().count(), 3, "a failure is not a skip");
}
