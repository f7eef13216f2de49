//! The fault matrix: each test puts one fault to a small campaign of `/bin/sh` stages run
//! through the real `rondo` binary, with real child processes and real files, and checks
//! what the user is promised: a clear refusal that writes nothing, or a run that goes on and
//! ends with the numbers of an undisturbed one. docs/concepts.md ("Faults") lists each row
//! with the name of its test here.

mod common;

use std::collections::BTreeMap;
use std::os::unix::fs::{MetadataExt, PermissionsExt};
use std::path::{Path, PathBuf};
use std::process::{Command, Output, Stdio};
use std::time::{Duration, Instant};

use common::*;

/// The halving loop: x ← (x + a) / 2 in integers, from 0, until it stops moving (a = 1024
/// takes 11 iterations, a = 64 seven). From iteration 3 on, the stage sleeps 30 s while
/// the file `hold` exists beside the campaign, so a test can catch it running.
fn campaign_text() -> String {
    r#"campaign: faults
about: test campaign (not physics)
programs:
  sh: { path: /bin/sh }
sweep:
  product:
    a: [1024, 64]
start:
  x: x0.txt
cycle:
  s:
    run: [sh, -c, 'if [ $RONDO_ITERATION -ge 3 ] && [ -e ../../../hold ]; then sleep 30; fi; x=$(cat "$1"); y=$(( (x + $2) / 2 )); echo $y > x.txt; echo "{\"x\": $y}" > metrics.json; echo "halved."', sh, "{{input:x}}", "{{param:a}}"]
    inputs: { x: { previous: s.x, initially: start.x } }
    outputs: { x: x.txt }
    metrics: [x]
stop:
  when:
    - { metric: s.x, change-below: 0.5, for: 1 }
  max-iterations: 20
"#
    .to_string()
}

/// A temporary folder with the campaign `c.yaml` (and its start file).
fn campaign_dir() -> tempfile::TempDir {
    let d = tempfile::tempdir().unwrap_or_else(|e| panic!("tempdir: {e}"));
    write(&d.path().join("x0.txt"), "0\n");
    write(&d.path().join("c.yaml"), &campaign_text());
    d
}

fn write(path: &Path, text: &str) {
    std::fs::write(path, text).unwrap_or_else(|e| panic!("{}: {e}", path.display()));
}

fn is_root() -> bool {
    // SAFETY: geteuid has no preconditions.
    unsafe { libc::geteuid() == 0 }
}

fn ws_of(d: &Path) -> PathBuf {
    d.join("c.rondo")
}

fn code(o: &Output) -> Option<i32> {
    o.status.code()
}

fn stderr(o: &Output) -> String {
    String::from_utf8_lossy(&o.stderr).into_owned()
}

/// The record of an undisturbed run of the base campaign (computed once per test).
fn reference() -> Record {
    let d = campaign_dir();
    let o = run_rondo(d.path(), &["run", "c.yaml", "-q"]);
    assert_eq!(code(&o), Some(0), "{}", shown(&o));
    record(&ws_of(d.path()))
}

/// Every file under `root` with its size, mode and content hash (the -wal/-shm files of
/// SQLite excluded: a reader may create them empty), to show that nothing was written.
fn snapshot(root: &Path) -> BTreeMap<PathBuf, (u64, u32, String)> {
    let mut out = BTreeMap::new();
    let mut stack = vec![root.to_path_buf()];
    while let Some(dir) = stack.pop() {
        let Ok(entries) = std::fs::read_dir(&dir) else {
            continue;
        };
        for e in entries.flatten() {
            let p = e.path();
            let Ok(m) = std::fs::symlink_metadata(&p) else {
                continue;
            };
            if m.is_dir() {
                stack.push(p.clone());
                out.insert(p, (0, m.mode(), String::new()));
            } else {
                let name = p.file_name().map(|n| n.to_string_lossy().into_owned());
                if name.is_some_and(|n| n.ends_with("-wal") || n.ends_with("-shm")) {
                    continue;
                }
                let hash = std::fs::read(&p)
                    .map(|b| blake3::hash(&b).to_hex().to_string())
                    .unwrap_or_default();
                out.insert(p, (m.len(), m.mode(), hash));
            }
        }
    }
    out
}

/// Poll `cond` every 20 ms up to a generous deadline (not a timing assertion: the
/// deadline only keeps a broken build from hanging the suite).
fn wait_for(what: &str, mut cond: impl FnMut() -> bool) {
    let deadline = Instant::now() + Duration::from_secs(120);
    while !cond() {
        assert!(Instant::now() < deadline, "waited 2 min for: {what}");
        std::thread::sleep(Duration::from_millis(20));
    }
}

/// The workspace's id once its first records exist.
fn workspace_id_when_ready(ws: &Path) -> String {
    wait_for("the workspace's first records", || {
        ws.join("rondo.db").is_file()
            && !strings_ro(ws, "SELECT workspace_id FROM campaign").is_empty()
    });
    strings_ro(ws, "SELECT workspace_id FROM campaign")
        .pop()
        .unwrap_or_default()
}

/// Run the base campaign (with the extra environment `env`, e.g. a fake clock) with the `hold`
/// file present, so that every point runs two iterations and then sleeps in its third;
/// wait for both sleeping children and send `signal` to rondo (only to rondo: its children have
/// their own process groups). Returns rondo's exit code and the workspace id; `hold` stays.
fn interrupt_while_running(dir: &Path, signal: i32, env: &[(&str, &str)]) -> (Option<i32>, String) {
    let ws = ws_of(dir);
    write(&dir.join("hold"), "");
    let mut child = Command::new(rondo())
        .envs(env.iter().copied())
        .args(["run", "c.yaml", "-q", "--max-running", "2"])
        .current_dir(dir)
        .env("PATH", path_with_binaries())
        .stdout(Stdio::null())
        .stderr(Stdio::null())
        .spawn()
        .unwrap_or_else(|e| panic!("spawn rondo: {e}"));
    let id = workspace_id_when_ready(&ws);
    // Both points' third attempts saw `hold` and sleep (the shell's `sleep 30` carries the
    // workspace's tag), so every point has two iterations behind it.
    wait_for("both points asleep in their third iteration", || {
        let asleep = processes_of_workspace(&id)
            .iter()
            .filter(|pid| {
                std::fs::read_to_string(format!("/proc/{pid}/cmdline"))
                    .is_ok_and(|c| c.starts_with("sleep\0"))
            })
            .count();
        asleep == 2
    });
    let pid = child.id() as i32;
    // SAFETY: signalling our own child by pid; it has not been waited for, so the pid is ours.
    assert_eq!(unsafe { libc::kill(pid, signal) }, 0);
    let status = child.wait().unwrap_or_else(|e| panic!("wait: {e}"));
    (status.code(), id)
}

/// Attempts in a state that only a running orchestrator may leave.
fn unfinished_attempts(ws: &Path) -> Vec<String> {
    strings(
        ws,
        "SELECT id || ' ' || state FROM attempts WHERE state IN ('planned', 'submitted', 'running')",
    )
}

fn skip_isolation(what: &str) {
    skip_or_fail(
        what,
        "run as root on Linux with util-linux (unshare, mount)",
        &["RONDO_REQUIRE_ISOLATION"],
    );
}

// ---------------------------------------------------------------------------------------
// Signals to rondo.

fn signal_row(signal: i32, name: &str) {
    let reference = reference();
    let d = campaign_dir();
    let ws = ws_of(d.path());
    let (status, id) = interrupt_while_running(d.path(), signal, &[]);
    assert_eq!(status, Some(4), "{name}: exit code 4 (interrupted)");
    assert!(
        processes_of_workspace(&id).is_empty(),
        "{name}: children left behind"
    );
    assert_eq!(
        unfinished_attempts(&ws),
        Vec::<String>::new(),
        "{name}: every attempt's record is complete"
    );
    let ended = strings(
        &ws,
        "SELECT state FROM attempts WHERE state NOT IN ('succeeded') ORDER BY id",
    );
    assert!(
        ended.iter().any(|s| s == "cancelled"),
        "{name}: the sleeping attempt is recorded as ended by rondo: {ended:?}"
    );
    std::fs::remove_file(d.path().join("hold")).unwrap_or_else(|e| panic!("{e}"));
    let o = run_rondo(d.path(), &["run", "c.yaml", "-q"]);
    assert_eq!(
        code(&o),
        Some(0),
        "{name}: the next run continues: {}",
        shown(&o)
    );
    assert_same_record(&reference, &record(&ws), 0);
    assert_no_double_success_nor_children(&ws, 0);
}

#[test]
fn sigterm_ends_children_completes_records_and_exits_4() {
    signal_row(libc::SIGTERM, "SIGTERM");
}

#[test]
fn sigint_ends_children_completes_records_and_exits_4() {
    signal_row(libc::SIGINT, "SIGINT");
}

#[test]
fn sighup_ends_children_completes_records_and_exits_4() {
    signal_row(libc::SIGHUP, "SIGHUP");
}

// ---------------------------------------------------------------------------------------
// Children that do not go quietly.

#[test]
fn a_child_that_ignores_sigterm_is_killed_after_the_grace_period() {
    // The stage ignores TERM (an ignored signal stays ignored across exec, so `sleep` does
    // too) and outlives its time limit: only SIGKILL can end it.
    let d = campaign_dir();
    let text = campaign_text().replace(
        "if [ $RONDO_ITERATION -ge 3 ] && [ -e ../../../hold ]; then sleep 30; fi;",
        "trap \"\" TERM; sleep 300;",
    );
    let text = text.replace(
        "    metrics: [x]\n",
        "    metrics: [x]\n    time-limit: \"00:01\"\n",
    );
    write(&d.path().join("c.yaml"), &text);
    let o = run_rondo(d.path(), &["run", "c.yaml", "-q", "--grace", "1"]);
    assert_eq!(code(&o), Some(3), "the points fail: {}", shown(&o));
    let ws = ws_of(d.path());
    let kinds = strings(&ws, "SELECT DISTINCT failure_kind FROM attempts");
    assert_eq!(kinds, vec!["timeout".to_string()], "{}", shown(&o));
    assert_no_double_success_nor_children(&ws, 0);
}

/// The halving campaign whose stage sleeps 3 s at iteration 2, under a 2 s time limit, with
/// one retry and this `timeout-factor`.
fn sleepy_campaign(factor: &str) -> String {
    let text = campaign_text().replace(
        "if [ $RONDO_ITERATION -ge 3 ] && [ -e ../../../hold ]; then sleep 30; fi;",
        "if [ $RONDO_ITERATION -eq 2 ]; then sleep 3; fi;",
    );
    text.replace(
        "    metrics: [x]\n",
        &format!(
            "    metrics: [x]\n    time-limit: \"00:02\"\n    retries: 1\n    timeout-factor: {factor}\n"
        ),
    )
}

#[test]
fn a_stage_past_its_time_limit_is_retried_with_a_longer_one() {
    // Killed at 2 s, the retry asks for 3 × 2 s and finishes its 3 s: same numbers as an
    // undisturbed run, and an event says what limit the retry had.
    let want = reference();
    let d = campaign_dir();
    write(&d.path().join("c.yaml"), &sleepy_campaign("3"));
    let o = run_rondo(d.path(), &["run", "c.yaml", "-q", "--grace", "1"]);
    assert_eq!(code(&o), Some(0), "{}", shown(&o));
    let ws = ws_of(d.path());
    assert_eq!(record(&ws), want, "same numbers as an undisturbed run");
    let kinds = strings(
        &ws,
        "SELECT point || ' ' || iteration || ' ' || attempt || ' ' || coalesce(failure_kind, state) \
         FROM attempts WHERE iteration = 2 ORDER BY point, attempt",
    );
    assert_eq!(
        kinds.len(),
        4,
        "two attempts per point at iteration 2: {kinds:?}"
    );
    for k in &kinds {
        assert!(
            k.ends_with(" 1 timeout") || k.ends_with(" 2 succeeded"),
            "first killed by its limit, then done: {kinds:?}"
        );
    }
    let events = strings(
        &ws,
        "SELECT detail FROM events WHERE kind = 'time-limit-lengthened' ORDER BY seq",
    );
    assert_eq!(events.len(), 2, "{events:?}");
    for e in &events {
        assert!(e.contains("the limit is 6 s"), "{e}");
    }
    assert_no_double_success_nor_children(&ws, 0);

    // With factor 1 the retry gets the same 2 s and is killed again: the points fail.
    let d = campaign_dir();
    write(&d.path().join("c.yaml"), &sleepy_campaign("1"));
    let o = run_rondo(d.path(), &["run", "c.yaml", "-q", "--grace", "1"]);
    assert_eq!(code(&o), Some(3), "{}", shown(&o));
    let ws = ws_of(d.path());
    let kinds = strings(
        &ws,
        "SELECT DISTINCT coalesce(failure_kind, state) FROM attempts WHERE iteration = 2",
    );
    assert_eq!(kinds, vec!["timeout".to_string()]);
    assert_no_double_success_nor_children(&ws, 0);
}

#[test]
fn grandchildren_and_setsid_children_are_ended_with_the_attempt() {
    // The stage leaves two background sleeps in its group and one in a session of its own
    // (setsid), then exits 0: all three carry the workspace's tag and are ended before the
    // attempt is judged by its outputs.
    let d = campaign_dir();
    let text = campaign_text().replace(
        "if [ $RONDO_ITERATION -ge 3 ] && [ -e ../../../hold ]; then sleep 30; fi;",
        "sleep 300 & sleep 300 & setsid sleep 300 & sleep 0.2;",
    );
    write(&d.path().join("c.yaml"), &text);
    let o = run_rondo(d.path(), &["run", "c.yaml", "-q", "--grace", "1"]);
    assert_eq!(code(&o), Some(0), "{}", shown(&o));
    let ws = ws_of(d.path());
    assert_same_record(&reference(), &record(&ws), 0);
    assert_no_double_success_nor_children(&ws, 0);
}

// ---------------------------------------------------------------------------------------
// Outputs that must not be read.

#[test]
fn outputs_that_are_links_fifos_or_devices_are_refused_without_blocking() {
    for (what, make, needle) in [
        ("symlink", "ln -s /etc/hostname x.txt", "a symbolic link"),
        ("fifo", "mkfifo x.txt", "a FIFO"),
        ("device", "mknod x.txt c 1 3", "a device file"),
        (
            "metrics-fifo",
            "echo 1 > x.txt; mkfifo metrics.json",
            "a FIFO",
        ),
    ] {
        if what == "device" && !is_root() {
            eprintln!("device row: mknod needs root; the other rows ran");
            continue;
        }
        let d = campaign_dir();
        let text = campaign_text().replace(
            r#"x=$(cat "$1"); y=$(( (x + $2) / 2 )); echo $y > x.txt; echo "{\"x\": $y}" > metrics.json;"#,
            &format!("{make};"),
        );
        assert_ne!(text, campaign_text(), "{what}: the stage was rewritten");
        write(&d.path().join("c.yaml"), &text);
        let o = run_rondo(d.path(), &["run", "c.yaml", "-q"]);
        assert_eq!(code(&o), Some(3), "{what}: the points fail: {}", shown(&o));
        let ws = ws_of(d.path());
        let msgs = strings(
            &ws,
            "SELECT failure_kind || ': ' || failure_message FROM attempts",
        );
        assert!(!msgs.is_empty(), "{what}");
        for m in &msgs {
            assert!(
                m.starts_with("malformed-output: ") && m.contains(needle),
                "{what}: {m}"
            );
        }
        // Nothing in the store is anything but a regular file.
        for (p, (_, mode, _)) in snapshot(&ws.join("store")) {
            let ft = mode & libc::S_IFMT;
            assert!(
                ft == libc::S_IFREG || ft == libc::S_IFDIR,
                "{what}: {} in the store is not a regular file",
                p.display()
            );
        }
    }
}

#[test]
fn a_stage_flooding_stdout_keeps_a_capped_log_and_is_judged_by_its_outputs() {
    // 2 GiB on stdout; the kept log is the first and the last 8 MiB with a line between.
    let d = campaign_dir();
    let text = campaign_text().replace(
        "if [ $RONDO_ITERATION -ge 3 ] && [ -e ../../../hold ]; then sleep 30; fi;",
        "yes | head -c 2147483648; echo; echo the-last-line;",
    );
    let text = text.replace("max-iterations: 20", "max-iterations: 1");
    write(&d.path().join("c.yaml"), &text);
    let o = run_rondo(d.path(), &["run", "c.yaml", "-q", "--keep-scratch"]);
    assert_eq!(
        code(&o),
        Some(3),
        "capped after one iteration: {}",
        shown(&o)
    );
    let ws = ws_of(d.path());
    assert_eq!(
        succeeded_attempts(&ws),
        2,
        "judged by outputs: {}",
        shown(&o)
    );
    for p in ["p001", "p002"] {
        let log = ws.join(format!("scratch/{p}.i0001.s.a1/stdout.txt"));
        let m = std::fs::metadata(&log).unwrap_or_else(|e| panic!("{}: {e}", log.display()));
        let cap = 16u64 << 20;
        assert!(
            m.len() > cap && m.len() < cap + 4096,
            "{}: {} bytes kept",
            log.display(),
            m.len()
        );
        let bytes = std::fs::read(&log).unwrap_or_else(|e| panic!("{e}"));
        assert!(bytes.starts_with(b"y\ny\n"));
        assert!(
            bytes.ends_with(b"halved.\n"),
            "the tail is kept: {:?}",
            String::from_utf8_lossy(&bytes[bytes.len() - 64..])
        );
        let text = String::from_utf8_lossy(&bytes[(8 << 20) - 16..(8 << 20) + 400]);
        assert!(text.contains("bytes of this log were left out"), "{text}");
    }
}

// ---------------------------------------------------------------------------------------
// The store damaged between runs.

/// A workspace interrupted (SIGTERM) after a few successes, with work left.
fn interrupted_workspace() -> (tempfile::TempDir, PathBuf) {
    let d = campaign_dir();
    let (status, _) = interrupt_while_running(d.path(), libc::SIGTERM, &[]);
    assert_eq!(status, Some(4));
    std::fs::remove_file(d.path().join("hold")).unwrap_or_else(|e| panic!("{e}"));
    let ws = ws_of(d.path());
    (d, ws)
}

fn stored(ws: &Path, hash: &str) -> PathBuf {
    ws.join("store").join(&hash[..2]).join(&hash[2..])
}

#[test]
fn a_deleted_truncated_or_changed_artifact_is_refused_on_use() {
    for fault in ["deleted", "truncated", "changed"] {
        let (d, ws) = interrupted_workspace();
        let before = succeeded_attempts(&ws);
        // Damage every stored `x` output: the next attempt of each point places one.
        let hashes = strings(
            &ws,
            "SELECT DISTINCT artifact FROM attempt_outputs WHERE role = 'x'",
        );
        assert!(!hashes.is_empty());
        for h in &hashes {
            let p = stored(&ws, h);
            match fault {
                "deleted" => std::fs::remove_file(&p).unwrap_or_else(|e| panic!("{e}")),
                "truncated" => {
                    std::fs::OpenOptions::new()
                        .write(true)
                        .open(&p)
                        .and_then(|f| f.set_len(1))
                        .unwrap_or_else(|e| panic!("{}: {e}", p.display()));
                }
                _ => {
                    // Same size, one digit changed: only the hash tells.
                    let mut b = std::fs::read(&p).unwrap_or_else(|e| panic!("{e}"));
                    b[0] = if b[0] == b'9' { b'8' } else { b'9' };
                    let mut perm = std::fs::metadata(&p)
                        .unwrap_or_else(|e| panic!("{e}"))
                        .permissions();
                    perm.set_mode(0o644);
                    std::fs::set_permissions(&p, perm).unwrap_or_else(|e| panic!("{e}"));
                    std::fs::write(&p, b).unwrap_or_else(|e| panic!("{e}"));
                }
            }
        }
        let o = run_rondo(d.path(), &["run", "c.yaml", "-q"]);
        let err = stderr(&o);
        assert_eq!(code(&o), Some(1), "{fault}: {}", shown(&o));
        let want = match fault {
            "deleted" => "is missing",
            _ => "has changed",
        };
        assert!(
            err.contains("artifact ") && err.contains(want) && err.contains("backup"),
            "{fault}: a clear message with what to do: {err}"
        );
        assert!(hashes.iter().any(|h| err.contains(h.as_str())), "{err}");
        assert_eq!(
            succeeded_attempts(&ws),
            before,
            "{fault}: nothing ran on wrong content"
        );
        assert!(unfinished_attempts(&ws).is_empty());
        assert_no_double_success_nor_children(&ws, 0);
        // `rondo trace` names a missing or resized artifact of the lineage it shows (a
        // `stat` each: a change of the same size is left to extract and placement).
        let wsn = ws.display().to_string();
        let t = run_rondo(d.path(), &["trace", "p001/2/s.x", "--workspace", &wsn]);
        assert_eq!(code(&t), Some(0), "{}", shown(&t));
        let terr = stderr(&t);
        let want = match fault {
            "deleted" => Some("is missing from the store"),
            "truncated" => Some("bytes in the store, recorded"),
            _ => None,
        };
        if let Some(want) = want {
            assert!(
                terr.contains("warning: artifact")
                    && terr.contains(want)
                    && terr.contains("backup"),
                "{fault}: {terr}"
            );
        }
        // `rondo extract` checks the hash of what it copies out too.
        let out = d.path().join("out");
        std::fs::create_dir(&out).unwrap_or_else(|e| panic!("{e}"));
        let outn = out.display().to_string();
        let o = run_rondo(
            d.path(),
            &["extract", &hashes[0], "--workspace", &wsn, "-o", &outn],
        );
        assert_ne!(code(&o), Some(0), "{fault}: extract refuses: {}", shown(&o));
        assert!(
            std::fs::read_dir(&out).map(|r| r.count()).unwrap_or(0) == 0,
            "{fault}: extract left nothing"
        );
    }
}

#[test]
fn a_deleted_database_with_its_store_is_refused_and_nothing_is_written() {
    let (d, ws) = interrupted_workspace();
    for f in ["rondo.db", "rondo.db-wal", "rondo.db-shm"] {
        let _ = std::fs::remove_file(ws.join(f));
    }
    let before = snapshot(&ws);
    let o = run_rondo(d.path(), &["run", "c.yaml", "-q"]);
    assert_eq!(code(&o), Some(1), "{}", shown(&o));
    let err = stderr(&o);
    assert!(
        err.contains("rondo.db is missing") && err.contains("--workspace"),
        "{err}"
    );
    assert!(!ws.join("rondo.db").exists(), "no new database");
    assert_eq!(before, snapshot(&ws), "nothing written");
}

#[test]
fn a_database_with_a_damaged_last_page_is_refused_and_nothing_is_written() {
    let (d, ws) = interrupted_workspace();
    // A cleanly stopped run leaves no write-ahead log: the file is the whole database.
    assert!(
        std::fs::metadata(ws.join("rondo.db-wal")).map_or(true, |m| m.len() == 0),
        "a log is left"
    );
    // ... and seals it (store/seal.rs): the damage below must be found all the same.
    assert!(
        ws.join("rondo.db.sealed").is_file(),
        "no seal after a clean stop"
    );
    let db = ws.join("rondo.db");
    let mut bytes = std::fs::read(&db).unwrap_or_else(|e| panic!("{e}"));
    let page = u16::from_be_bytes([bytes[16], bytes[17]]) as usize;
    let n = bytes.len();
    assert!(n >= 2 * page && n % page == 0);
    for b in &mut bytes[n - page..] {
        *b = 0xA5;
    }
    std::fs::write(&db, &bytes).unwrap_or_else(|e| panic!("{e}"));
    let before = snapshot(&ws);
    let o = run_rondo(d.path(), &["run", "c.yaml", "-q"]);
    assert_eq!(code(&o), Some(1), "{}", shown(&o));
    let err = stderr(&o);
    assert!(
        err.contains("database is damaged") && err.contains("backup"),
        "{err}"
    );
    assert_eq!(before, snapshot(&ws), "nothing written");
}

// ---------------------------------------------------------------------------------------
// The workspace itself.

#[test]
fn a_read_only_workspace_is_refused_clearly_and_nothing_is_written() {
    // Root ignores permission bits, so `chmod -w` proves nothing here; a read-only bind
    // mount in a private mount namespace is refused by the kernel for root too.
    if !is_root() || !Path::new("/usr/bin/unshare").is_file() {
        skip_isolation("a read-only bind mount needs root and unshare (util-linux)");
        return;
    }
    let (d, ws) = interrupted_workspace();
    let before = snapshot(&ws);
    let script = format!(
        "mount --bind {ws} {ws} && mount -o remount,bind,ro {ws} && exec \"$@\"",
        ws = ws.display()
    );
    let o = Command::new("/usr/bin/unshare")
        .args(["--mount", "sh", "-c", &script, "sh"])
        .arg(rondo())
        .args(["run", "c.yaml", "-q"])
        .current_dir(d.path())
        .env("PATH", path_with_binaries())
        .output()
        .unwrap_or_else(|e| panic!("{e}"));
    if stderr(&o).contains("mount:") {
        skip_isolation(&format!(
            "cannot make a read-only bind mount here: {}",
            stderr(&o)
        ));
        return;
    }
    assert_eq!(code(&o), Some(1), "{}", shown(&o));
    let err = stderr(&o);
    assert!(
        err.contains(&ws.display().to_string()) && err.contains("read-only"),
        "names the workspace and says why: {err}"
    );
    assert_eq!(before, snapshot(&ws), "nothing written");
    // And the same workspace, writable again, continues.
    let o = run_rondo(d.path(), &["run", "c.yaml", "-q"]);
    assert_eq!(code(&o), Some(0), "{}", shown(&o));
}

/// An ext4 file system in a file, mounted (loop device, `errors=remount-ro`) at a path, and
/// unmounted when dropped.
struct LoopFs {
    image: PathBuf,
    at: PathBuf,
}

impl LoopFs {
    fn make(image: PathBuf, at: &Path) -> Result<LoopFs, String> {
        let run = |cmd: &mut Command| -> Result<(), String> {
            let o = cmd.output().map_err(|e| format!("{cmd:?}: {e}"))?;
            o.status
                .success()
                .then_some(())
                .ok_or_else(|| format!("{cmd:?}: {}", String::from_utf8_lossy(&o.stderr)))
        };
        let f = std::fs::File::create(&image).map_err(|e| e.to_string())?;
        f.set_len(64 << 20).map_err(|e| e.to_string())?;
        run(Command::new("mkfs.ext4").args(["-q", "-F"]).arg(&image))?;
        std::fs::create_dir_all(at).map_err(|e| e.to_string())?;
        let fs = LoopFs {
            image,
            at: at.to_path_buf(),
        };
        fs.mount()?;
        Ok(fs)
    }

    fn mount(&self) -> Result<(), String> {
        let o = Command::new("mount")
            .args(["-o", "loop,errors=remount-ro"])
            .arg(&self.image)
            .arg(&self.at)
            .output()
            .map_err(|e| e.to_string())?;
        o.status
            .success()
            .then_some(())
            .ok_or_else(|| format!("mount: {}", String::from_utf8_lossy(&o.stderr)))
    }

    /// What the kernel does on a disk error: the file system turns itself read-only under its
    /// writers (ext4's `trigger_fs_error`, the same path as a real metadata error).
    fn fail(&self) {
        let o = Command::new("findmnt")
            .args(["-no", "SOURCE"])
            .arg(&self.at)
            .output()
            .unwrap_or_else(|e| panic!("findmnt: {e}"));
        let source = String::from_utf8_lossy(&o.stdout).trim().to_string();
        let dev = source.rsplit('/').next().unwrap_or_default().to_string();
        std::fs::write(
            format!("/sys/fs/ext4/{dev}/trigger_fs_error"),
            "test fault\n",
        )
        .unwrap_or_else(|e| panic!("trigger_fs_error of {source}: {e}"));
    }

    /// Unmount, repair as an administrator would (`e2fsck -fy`), and mount writable again.
    fn repair(&self) {
        let o = Command::new("umount").arg(&self.at).output();
        assert!(o.is_ok_and(|o| o.status.success()), "umount");
        let o = Command::new("e2fsck")
            .args(["-fy"])
            .arg(&self.image)
            .output()
            .unwrap_or_else(|e| panic!("e2fsck: {e}"));
        // 0: clean, 1: errors corrected.
        assert!(matches!(o.status.code(), Some(0 | 1)), "e2fsck: {o:?}");
        self.mount().unwrap_or_else(|e| panic!("{e}"));
    }
}

impl Drop for LoopFs {
    fn drop(&mut self) {
        let _ = Command::new("umount").arg("-l").arg(&self.at).output();
    }
}

#[test]
fn a_workspace_that_becomes_read_only_mid_run_stops_clearly_and_continues_when_writable() {
    let tools = ["mkfs.ext4", "e2fsck", "findmnt", "mount", "umount"];
    if !is_root() || !Path::new("/dev/loop-control").exists() {
        skip_isolation("an ext4 file system on a loop device needs root and /dev/loop-control");
        return;
    }
    let reference = reference();
    let d = campaign_dir();
    let ws = ws_of(d.path());
    let fs = match LoopFs::make(d.path().join("disk.img"), &ws) {
        Ok(fs) => fs,
        Err(e) => {
            skip_isolation(&format!(
                "cannot make an ext4 file system on a loop device ({tools:?}): {e}"
            ));
            return;
        }
    };
    write(&d.path().join("hold"), "");
    let child = Command::new(rondo())
        .args(["run", "c.yaml", "-q", "--max-running", "2"])
        .current_dir(d.path())
        .env("PATH", path_with_binaries())
        .stdout(Stdio::null())
        .stderr(Stdio::piped())
        .spawn()
        .unwrap_or_else(|e| panic!("spawn rondo: {e}"));
    let id = workspace_id_when_ready(&ws);
    let sleeping = || -> Vec<i32> {
        processes_of_workspace(&id)
            .into_iter()
            .filter(|pid| {
                std::fs::read_to_string(format!("/proc/{pid}/cmdline"))
                    .is_ok_and(|c| c.starts_with("sleep\0"))
            })
            .collect()
    };
    wait_for("both points asleep in their third iteration", || {
        sleeping().len() == 2
    });
    fs.fail();
    // The sleeping stages go on: each now writes its outputs into a read-only scratch folder,
    // and rondo has to record that.
    for pid in sleeping() {
        // SAFETY: signalling a sleep(1) process of this test's workspace by pid.
        unsafe { libc::kill(pid, libc::SIGTERM) };
    }
    let o = child
        .wait_with_output()
        .unwrap_or_else(|e| panic!("wait: {e}"));
    let err = stderr(&o);
    assert_eq!(code(&o), Some(1), "{err}");
    assert!(
        err.contains(&ws.display().to_string()) && err.contains("became read-only"),
        "names the workspace and says why: {err}"
    );
    assert!(
        processes_of_workspace(&id).is_empty(),
        "children left behind"
    );
    // Repaired and writable again: the next run continues to the same numbers.
    fs.repair();
    std::fs::remove_file(d.path().join("hold")).unwrap_or_else(|e| panic!("{e}"));
    let o = run_rondo(d.path(), &["run", "c.yaml", "-q"]);
    assert_eq!(code(&o), Some(0), "{}", shown(&o));
    assert_same_record(&reference, &record(&ws), 0);
    assert_no_double_success_nor_children(&ws, 0);
    assert!(unfinished_attempts(&ws).is_empty());
    drop(fs);
}

#[test]
fn a_workspace_moved_between_runs_continues_at_its_new_path() {
    let reference = reference();
    let (d, ws) = interrupted_workspace();
    let moved = d.path().join("elsewhere").join("moved.rondo");
    std::fs::create_dir(d.path().join("elsewhere")).unwrap_or_else(|e| panic!("{e}"));
    std::fs::rename(&ws, &moved).unwrap_or_else(|e| panic!("{e}"));
    let m = moved.display().to_string();
    let o = run_rondo(d.path(), &["run", "c.yaml", "-q", "--workspace", &m]);
    assert_eq!(code(&o), Some(0), "{}", shown(&o));
    assert!(!ws.exists(), "nothing recreated at the old path");
    assert_same_record(&reference, &record(&moved), 0);
    assert_no_double_success_nor_children(&moved, 0);
    // New scratch folders are under the new path.
    let dirs = strings(
        &moved,
        "SELECT workdir FROM attempts WHERE id = (SELECT max(id) FROM attempts)",
    );
    assert!(dirs[0].starts_with(&m), "{dirs:?}");
}

// ---------------------------------------------------------------------------------------
// The clock.

#[test]
fn a_clock_that_jumps_backwards_between_runs_changes_no_number_nor_order() {
    // libfaketime (Debian's `faketime`) preloaded into rondo and its children: the wall
    // clock moved, the monotonic clock (timers, grace periods) left alone.
    let lib = "/usr/lib/x86_64-linux-gnu/faketime/libfaketimeMT.so.1";
    if !Path::new(lib).is_file() {
        skip_or_fail(
            "the clock row needs libfaketime",
            "apt-get install faketime",
            &["RONDO_REQUIRE_FAKETIME"],
        );
        return;
    }
    let reference = reference();
    let d = campaign_dir();
    let ws = ws_of(d.path());
    let clock = |offset: &'static str| {
        [
            ("LD_PRELOAD", lib),
            ("FAKETIME", offset),
            ("FAKETIME_DONT_FAKE_MONOTONIC", "1"),
        ]
    };
    // The first run five years ahead, stopped by SIGTERM while work is left.
    let (status, _) = interrupt_while_running(d.path(), libc::SIGTERM, &clock("+5y"));
    assert_eq!(status, Some(4));
    std::fs::remove_file(d.path().join("hold")).unwrap_or_else(|e| panic!("{e}"));
    // The second one a year back: the clock jumped six years backwards between them.
    let o = Command::new(rondo())
        .envs(clock("-1y"))
        .args(["run", "c.yaml", "-q"])
        .current_dir(d.path())
        .env("PATH", path_with_binaries())
        .output()
        .unwrap_or_else(|e| panic!("{e}"));
    assert_eq!(code(&o), Some(0), "{}", shown(&o));
    assert_same_record(&reference, &record(&ws), 0);
    assert_no_double_success_nor_children(&ws, 0);
    let years = strings(
        &ws,
        "SELECT DISTINCT substr(created_at, 1, 4) FROM attempts ORDER BY 1",
    );
    assert_eq!(years.len(), 2, "both clocks are in the records: {years:?}");
    let first_run_last = strings(
        &ws,
        "SELECT created_at FROM attempts WHERE id = (SELECT min(id) FROM attempts)",
    );
    let second_run_last = strings(
        &ws,
        "SELECT created_at FROM attempts WHERE id = (SELECT max(id) FROM attempts)",
    );
    assert!(
        second_run_last[0] < first_run_last[0],
        "the later attempt has the earlier time: {first_run_last:?} {second_run_last:?}"
    );
    // Attempt ids follow iterations within each point, whatever the clock said.
    let order = strings(
        &ws,
        "SELECT point || ' ' || iteration FROM attempts WHERE state = 'succeeded' ORDER BY id",
    );
    let mut last: BTreeMap<String, i64> = BTreeMap::new();
    for row in order {
        let (p, it) = row.split_once(' ').unwrap_or_default();
        let it: i64 = it.parse().unwrap_or(-1);
        let prev = last.insert(p.to_string(), it).unwrap_or(0);
        assert!(
            it > prev,
            "attempt ids follow iterations: {p} {it} after {prev}"
        );
    }
    let s = status_json(d.path(), &ws);
    for p in s["points"].as_array().cloned().unwrap_or_default() {
        assert_eq!(p["state"], "converged", "{p}");
    }
}

// ---------------------------------------------------------------------------------------
// Permissions and secrets.

#[test]
fn workspace_files_follow_the_umask_and_are_never_world_writable() {
    for mask in ["022", "077"] {
        let d = campaign_dir();
        let script = format!("umask {mask} && exec \"$@\"");
        let o = Command::new("/bin/sh")
            .args(["-c", &script, "sh"])
            .arg(rondo())
            .args(["run", "c.yaml", "-q", "--keep-scratch"])
            .current_dir(d.path())
            .env("PATH", path_with_binaries())
            .output()
            .unwrap_or_else(|e| panic!("{e}"));
        assert_eq!(code(&o), Some(0), "umask {mask}: {}", shown(&o));
        let ws = ws_of(d.path());
        let files = snapshot(&ws);
        assert!(files.len() > 20, "{files:?}");
        let forbidden = if mask == "077" { 0o077 } else { 0o022 };
        for (p, (_, mode, _)) in files {
            if mode & libc::S_IFMT == libc::S_IFLNK {
                continue;
            }
            assert_eq!(
                mode & forbidden,
                0,
                "umask {mask}: {} has mode {:o}",
                p.display(),
                mode & 0o7777
            );
        }
    }
}

#[test]
fn secrets_in_the_environment_never_reach_the_records_nor_exports() {
    let d = campaign_dir();
    let o = Command::new(rondo())
        .args(["run", "c.yaml", "-q"])
        .current_dir(d.path())
        .env("PATH", path_with_binaries())
        .env("GITLAB_TOKEN", "fake-secret-123")
        .env("MY_PASSWORD", "fake-secret-456")
        .env("AWS_SECRET_ACCESS_KEY", "fake-secret-789")
        .env("OMP_NUM_THREADS", "3")
        .output()
        .unwrap_or_else(|e| panic!("{e}"));
    assert_eq!(code(&o), Some(0), "{}", shown(&o));
    let ws = ws_of(d.path());
    // The allow-listed environment is recorded with each attempt.
    let envs = strings(&ws, "SELECT coalesce(env_json, '') FROM attempts");
    assert!(!envs.is_empty());
    for e in &envs {
        let v: serde_json::Value = serde_json::from_str(e).unwrap_or_else(|x| panic!("{x}: {e}"));
        assert_eq!(v["OMP_NUM_THREADS"], "3", "{e}");
        assert!(v.get("PATH").is_some(), "{e}");
        assert!(v.get("GITLAB_TOKEN").is_none(), "{e}");
    }
    let wsn = ws.display().to_string();
    let prov = d.path().join("prov.json");
    let provn = prov.display().to_string();
    let o = run_rondo(d.path(), &["export", "--workspace", &wsn, "--prov", &provn]);
    assert_eq!(code(&o), Some(0), "{}", shown(&o));
    let prov_text = std::fs::read_to_string(&prov).unwrap_or_else(|e| panic!("{e}"));
    assert!(
        prov_text.contains("OMP_NUM_THREADS"),
        "exported with the activity"
    );
    let trace = run_rondo(d.path(), &["trace", "p001/2/s.x", "--workspace", &wsn]);
    assert_eq!(code(&trace), Some(0), "{}", shown(&trace));
    assert!(
        String::from_utf8_lossy(&trace.stdout).contains("OMP_NUM_THREADS=3"),
        "{}",
        shown(&trace)
    );
    let rep = d.path().join("report");
    let o = run_rondo(
        d.path(),
        &[
            "report",
            "--workspace",
            &wsn,
            "--out",
            &rep.display().to_string(),
        ],
    );
    assert_eq!(code(&o), Some(0), "{}", shown(&o));
    let mut haystacks: Vec<(String, Vec<u8>)> = vec![
        ("PROV".into(), prov_text.into_bytes()),
        ("trace".into(), trace.stdout.clone()),
    ];
    for (p, _) in snapshot(&ws).into_iter().chain(snapshot(&rep)) {
        if let Ok(b) = std::fs::read(&p) {
            haystacks.push((p.display().to_string(), b));
        }
    }
    for f in ["rondo.db-wal", "rondo.db-shm"] {
        if let Ok(b) = std::fs::read(ws.join(f)) {
            haystacks.push((f.into(), b));
        }
    }
    for (name, bytes) in haystacks {
        let hit = bytes.windows(11).any(|w| w == b"fake-secret");
        assert!(!hit, "a secret reached {name}");
    }
}
