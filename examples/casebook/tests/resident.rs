//! The resident mode through rondo's hand-off protocol (docs/resident.md):
//! a real `casebook serve` process, hand-offs written by the test as an orchestrator would,
//! outputs equal to the one-shot band sub-step's, a done marker that never shows before its
//! outputs are complete, numbers that must increase, one server per case, and a clean stop.

mod common;

use common::*;
use std::path::{Path, PathBuf};
use std::process::{Child, Command, Stdio};
use std::time::{Duration, Instant};

/// Generous bound on any wait, so a broken server fails the test instead of hanging it.
const PATIENCE: Duration = Duration::from_secs(120);

fn wait_for(what: &str, mut cond: impl FnMut() -> bool) {
    let t = Instant::now();
    while !cond() {
        assert!(t.elapsed() < PATIENCE, "gave up waiting for {what}");
        std::thread::sleep(Duration::from_millis(2));
    }
}

struct Server(Child);

impl Drop for Server {
    fn drop(&mut self) {
        if let Ok(None) = self.0.try_wait() {
            let _ = self.0.kill();
            let _ = self.0.wait();
        }
    }
}

fn start_server(dir: &Path, name: &str) -> Server {
    let child = spawn(
        Command::new(casebook())
            .args(["serve", name, "--poll-ms", "5"])
            .current_dir(dir)
            .stdout(Stdio::null())
            .stderr(Stdio::piped()),
    );
    let ready = dir.join(name).join("handoff").join("ready");
    wait_for("the ready file", || ready.is_file());
    Server(child)
}

/// Write the input of hand-off `n` and then its go marker (the orchestrator's side).
fn hand_off(case: &Path, n: u64, density: &[u8]) -> PathBuf {
    let d = case.join("handoff").join(n.to_string());
    std::fs::create_dir_all(d.join("in")).unwrap_or_else(|e| panic!("{e}"));
    let tmp = d.join("in").join(".density.tmp");
    std::fs::write(&tmp, density).unwrap_or_else(|e| panic!("{e}"));
    std::fs::rename(&tmp, d.join("in").join("density")).unwrap_or_else(|e| panic!("{e}"));
    std::fs::write(d.join("go"), b"").unwrap_or_else(|e| panic!("{e}"));
    d
}

/// The done marker, parsed: status and the listed outputs with their sizes.
fn parse_done(text: &str) -> (String, Vec<(String, u64)>) {
    assert!(text.starts_with("protocol rondo-handoff-1\n"), "{text}");
    assert!(text.ends_with("end\n"), "done marker not complete: {text}");
    let status = text
        .lines()
        .find_map(|l| l.strip_prefix("status "))
        .unwrap_or_default()
        .to_string();
    let outputs = text
        .lines()
        .filter_map(|l| l.strip_prefix("output "))
        .map(|l| {
            let (name, size) = l.rsplit_once(' ').unwrap_or_default();
            (name.to_string(), size.parse().unwrap_or(u64::MAX))
        })
        .collect();
    (status, outputs)
}

/// Wait for hand-off `dir`'s done marker; the instant it shows, every output it lists must
/// be in place with its listed size, and no temporary file may be left in out/.
fn wait_done_and_check(dir: &Path) -> (String, Vec<(String, u64)>) {
    let done = dir.join("done");
    wait_for("a done marker", || done.exists());
    let text = std::fs::read_to_string(&done).unwrap_or_else(|e| panic!("{e}"));
    let (status, outputs) = parse_done(&text);
    for (name, size) in &outputs {
        let len = std::fs::metadata(dir.join(name)).map(|m| m.len()).ok();
        assert_eq!(len, Some(*size), "{name} not complete when done appeared");
    }
    if let Ok(rd) = std::fs::read_dir(dir.join("out")) {
        for e in rd.flatten() {
            let n = e.file_name().to_string_lossy().into_owned();
            assert!(
                !n.ends_with(".tmp"),
                "temporary {n} left when done appeared"
            );
        }
    }
    (status, outputs)
}

fn stop(server: &mut Server, case: &Path) {
    std::fs::write(case.join("handoff").join("stop"), b"").unwrap_or_else(|e| panic!("{e}"));
    let mut status = None;
    wait_for("the server to exit", || {
        status = server.0.try_wait().ok().flatten();
        status.is_some()
    });
    assert!(
        status.is_some_and(|s| s.success()),
        "serve exited with {status:?}"
    );
    assert!(
        !case.join("handoff").join("ready").exists(),
        "ready left behind"
    );
    assert!(
        !case.join("handoff").join("stop").exists(),
        "stop left behind"
    );
}

#[test]
fn three_hand_offs_give_the_one_shot_band_results_then_stop() {
    let tmp = tempfile::tempdir().unwrap_or_else(|e| panic!("{e}"));
    let dir = tmp.path();
    let served = init_case(dir, "served", &DEMO, &[]);
    let oneshot = init_case(dir, "oneshot", &DEMO, &[]);
    let mut server = start_server(dir, "served");
    for n in 1..=3u64 {
        // the density of this iteration: the one-shot case's, as an orchestrator hands it on
        let density = std::fs::read(file(&oneshot, "density")).unwrap_or_else(|e| panic!("{e}"));
        let hd = hand_off(&served, n, &density);
        let (status, outputs) = wait_done_and_check(&hd);
        assert_eq!(status, "ok");
        ok(&casebook(), dir, &["band", "oneshot"]);
        let names: Vec<&str> = outputs.iter().map(|(n, _)| n.as_str()).collect();
        assert_eq!(names, ["out/hamiltonian.npy", "out/eigen", "out/levels"]);
        for (name, _) in &outputs {
            let suffix = name.trim_start_matches("out/");
            let got = std::fs::read(hd.join(name)).unwrap_or_else(|e| panic!("{e}"));
            let want = std::fs::read(file(&oneshot, suffix)).unwrap_or_else(|e| panic!("{e}"));
            assert!(
                got == want,
                "hand-off {n}: {suffix} differs from the one-shot band"
            );
        }
        for step in ["project", "solve", "update"] {
            ok(&casebook(), dir, &[step, "oneshot"]);
        }
    }
    // the served case's log has the same band blocks as the one-shot case's
    let blocks = |c: &Path| {
        let t = std::fs::read_to_string(file(c, "log")).unwrap_or_default();
        log_values(&t, "f level")
    };
    assert_eq!(blocks(&served).len(), 3);
    let ones: Vec<f64> = blocks(&oneshot).iter().map(|x| x.0).collect();
    let serv: Vec<f64> = blocks(&served).iter().map(|x| x.0).collect();
    assert_eq!(serv, ones);
    // a second server on the same case is refused while the first runs
    let out = run(&casebook(), dir, &["serve", "served"]);
    let err = String::from_utf8_lossy(&out.stderr);
    assert!(
        !out.status.success() && err.contains("already served"),
        "{err}"
    );
    stop(&mut server, &served);
}

#[test]
fn done_markers_never_precede_complete_outputs_and_numbers_must_increase() {
    let tmp = tempfile::tempdir().unwrap_or_else(|e| panic!("{e}"));
    let dir = tmp.path();
    // a large mesh (1771 points) makes the outputs big enough to be caught half written
    let big = Setup {
        kmesh: "40",
        ..DEMO
    };
    let case = init_case(dir, "big", &big, &[]);
    let density = std::fs::read(file(&case, "density")).unwrap_or_else(|e| panic!("{e}"));
    let mut server = start_server(dir, "big");
    for n in [1u64, 2, 3, 5, 8] {
        let hd = hand_off(&case, n, &density);
        let (status, outputs) = wait_done_and_check(&hd);
        assert_eq!(status, "ok", "hand-off {n}");
        assert!(outputs.iter().any(|(_, s)| *s > 70_000), "{outputs:?}");
    }
    // a number not above the last one handled is answered, never run
    let hd = hand_off(&case, 4, &density);
    let (status, outputs) = wait_done_and_check(&hd);
    assert_eq!(status, "rejected");
    assert!(outputs.is_empty() && !hd.join("out").exists());
    // a bad input is an error with a message, no outputs listed
    let hd = hand_off(&case, 9, b"n_f = 7\n");
    let (status, outputs) = wait_done_and_check(&hd);
    assert_eq!(status, "error");
    assert!(outputs.is_empty());
    let text = std::fs::read_to_string(hd.join("done")).unwrap_or_default();
    assert!(
        text.contains("message ") && text.contains("in/density"),
        "{text}"
    );
    // the server goes on after an error
    let hd = hand_off(&case, 10, &density);
    assert_eq!(wait_done_and_check(&hd).0, "ok");
    stop(&mut server, &case);
    // a restarted server continues the numbering: 10 was the last
    let mut server = start_server(dir, "big");
    let ready = std::fs::read_to_string(case.join("handoff").join("ready")).unwrap_or_default();
    assert!(ready.contains("last 10\n"), "{ready}");
    stop(&mut server, &case);
}
