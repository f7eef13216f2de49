//! The local executor against real child processes: exit statuses, signals, time limits,
//! cancel, shutdown with grandchildren, and finding and ending orphans of an orchestrator
//! that died (simulated by a tokio runtime that is dropped with its children running).

use std::collections::BTreeMap;
use std::path::{Path, PathBuf};
use std::time::Duration;

use rondo_adapters::executor::{
    Completion, Executor, Handle, LaunchRequest, Outcome, Reattached, Resources, Shutdown,
};
use rondo_adapters::local::{find_orphans, kill_orphans, LocalExecutor, ORPHAN_ENDED};
use tokio::sync::mpsc;

const GRACE: Duration = Duration::from_secs(1);

fn workspace(test: &str) -> String {
    format!("test-{test}-{}", std::process::id())
}

fn request(attempt_id: i64, workdir: &Path, argv: &[&str]) -> LaunchRequest {
    LaunchRequest {
        attempt_id,
        job_name: format!("test-{attempt_id}"),
        argv: argv.iter().map(|s| s.to_string()).collect(),
        workdir: workdir.to_path_buf(),
        env: BTreeMap::new(),
        time_limit: None,
        outlive: false,
        resources: Resources::default(),
    }
}

fn executor(slots: usize, ws: &str) -> (LocalExecutor, mpsc::UnboundedReceiver<Completion>) {
    let (tx, rx) = mpsc::unbounded_channel();
    (
        LocalExecutor::new(slots, ws.to_string(), tx).with_grace(GRACE),
        rx,
    )
}

async fn next(rx: &mut mpsc::UnboundedReceiver<Completion>) -> Completion {
    // A generous safety net so a broken executor fails the test instead of hanging it.
    tokio::time::timeout(Duration::from_secs(60), rx.recv())
        .await
        .expect("a completion within 60 s")
        .expect("channel open")
}

/// Whether `pid` is a live (non-zombie) process.
/// Whether `pid` has ended within a few seconds: a signal is delivered asynchronously, so a
/// process may still be listed for a moment after `kill` returned.
async fn ended_soon(pid: i32) -> bool {
    for _ in 0..100 {
        if !alive(pid) {
            return true;
        }
        tokio::time::sleep(Duration::from_millis(50)).await;
    }
    false
}

fn alive(pid: i32) -> bool {
    match std::fs::read_to_string(format!("/proc/{pid}/stat")) {
        Ok(stat) => {
            let state = stat[stat.rfind(')').unwrap() + 1..]
                .trim_start()
                .chars()
                .next();
            !matches!(state, Some('Z') | Some('X'))
        }
        Err(_) => false,
    }
}

/// Wait (bounded) for a file the child writes, e.g. a pid file.
async fn read_when_written(path: &Path) -> String {
    for _ in 0..3000 {
        if let Ok(text) = std::fs::read_to_string(path) {
            if text.ends_with('\n') {
                return text;
            }
        }
        tokio::time::sleep(Duration::from_millis(10)).await;
    }
    panic!("{} never written", path.display());
}

async fn pids_in(path: &Path) -> Vec<i32> {
    read_when_written(path)
        .await
        .split_whitespace()
        .map(|s| s.parse().unwrap())
        .collect()
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn exit_codes_output_files_env_and_cwd() {
    let dir = tempfile::tempdir().unwrap();
    let ws = workspace("exit");
    let (ex, mut rx) = executor(2, &ws);
    assert_eq!(ex.kind(), "local");
    assert_eq!(ex.slots(), 2);

    let mut req = request(
        1,
        dir.path(),
        &[
            "/bin/sh",
            "-c",
            "echo \"$RONDO_WORKSPACE_ID $RONDO_ATTEMPT_ID $EXTRA\"; pwd; echo oops >&2; \
             read line && echo stdin-not-null; exit 3",
        ],
    );
    req.env.insert("EXTRA".into(), "extra value".into());
    let handle = ex.launch(req).await.unwrap();
    assert_eq!(handle.executor, "local");
    assert!(handle.id.parse::<i32>().unwrap() > 1);
    assert_eq!(handle.host, ex.host());

    let done = next(&mut rx).await;
    assert_eq!(done.attempt_id, 1);
    assert_eq!(done.outcome, Outcome::Exited { code: 3 });
    let (start, end) = (done.started_at.unwrap(), done.ended_at.unwrap());
    assert!(start <= end);
    assert_eq!(done.host.as_deref(), Some(ex.host()));

    let stdout = std::fs::read_to_string(dir.path().join("stdout.txt")).unwrap();
    let cwd = std::fs::canonicalize(dir.path()).unwrap();
    assert_eq!(stdout, format!("{ws} 1 extra value\n{}\n", cwd.display()));
    let stderr = std::fs::read_to_string(dir.path().join("stderr.txt")).unwrap();
    assert_eq!(stderr, "oops\n");

    ex.launch(request(2, dir.path(), &["true"])).await.unwrap();
    assert_eq!(next(&mut rx).await.outcome, Outcome::Exited { code: 0 });
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn killed_by_a_signal() {
    let dir = tempfile::tempdir().unwrap();
    let (ex, mut rx) = executor(1, &workspace("signal"));
    ex.launch(request(1, dir.path(), &["/bin/sh", "-c", "kill -USR1 $$"]))
        .await
        .unwrap();
    assert_eq!(
        next(&mut rx).await.outcome,
        Outcome::Signaled {
            signal: libc::SIGUSR1
        }
    );
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn missing_program_is_a_launch_failure() {
    let dir = tempfile::tempdir().unwrap();
    let (ex, mut rx) = executor(1, &workspace("missing"));
    let handle = ex
        .launch(request(
            7,
            dir.path(),
            &["/nonexistent/rondo-test-program", "x"],
        ))
        .await
        .unwrap();
    assert_eq!(handle.id, "");
    let done = next(&mut rx).await;
    assert_eq!(done.attempt_id, 7);
    match done.outcome {
        Outcome::LaunchFailed { message } => {
            assert!(
                message.contains("/nonexistent/rondo-test-program"),
                "{message}"
            );
            assert!(message.contains("No such file"), "{message}");
        }
        other => panic!("expected LaunchFailed, got {other:?}"),
    }
    // The slot was given back: another launch goes through.
    ex.launch(request(8, dir.path(), &["true"])).await.unwrap();
    assert_eq!(next(&mut rx).await.outcome, Outcome::Exited { code: 0 });
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn time_limit_terminates_the_group() {
    let dir = tempfile::tempdir().unwrap();
    let ws = workspace("timeout");
    let (ex, mut rx) = executor(2, &ws);
    let mut req = request(
        1,
        dir.path(),
        &["/bin/sh", "-c", "sleep 100 & echo $! > bg.pid; wait"],
    );
    req.time_limit = Some(Duration::from_secs(1));
    ex.launch(req).await.unwrap();
    let bg = pids_in(&dir.path().join("bg.pid")).await;
    assert_eq!(next(&mut rx).await.outcome, Outcome::TimedOut);
    assert!(
        ended_soon(bg[0]).await,
        "background sleep survived the time limit"
    );
    assert!(find_orphans(&ws).is_empty());
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn time_limit_escalates_to_kill_when_term_is_ignored() {
    let dir = tempfile::tempdir().unwrap();
    let ws = workspace("ignore-term");
    let (ex, mut rx) = executor(1, &ws);
    // Ignored dispositions survive exec, so the sleep ignores SIGTERM too.
    let mut req = request(
        1,
        dir.path(),
        &[
            "/bin/sh",
            "-c",
            "trap '' TERM; sleep 100 & echo $! > bg.pid; wait",
        ],
    );
    req.time_limit = Some(Duration::from_secs(1));
    ex.launch(req).await.unwrap();
    let bg = pids_in(&dir.path().join("bg.pid")).await;
    assert_eq!(next(&mut rx).await.outcome, Outcome::TimedOut);
    assert!(ended_soon(bg[0]).await);
    assert!(find_orphans(&ws).is_empty());
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn cancel_ends_the_attempt() {
    let dir = tempfile::tempdir().unwrap();
    let ws = workspace("cancel");
    let (ex, mut rx) = executor(1, &ws);
    ex.launch(request(
        4,
        dir.path(),
        &["/bin/sh", "-c", "echo $$ > pid; sleep 100"],
    ))
    .await
    .unwrap();
    let pid = pids_in(&dir.path().join("pid")).await;
    assert_eq!(ex.running_attempts(), vec![4]);
    ex.cancel(4, "test").await.unwrap();
    let done = next(&mut rx).await;
    assert_eq!(done.attempt_id, 4);
    assert_eq!(done.outcome, Outcome::Cancelled { by: "rondo".into() });
    assert!(ended_soon(pid[0]).await);
    assert!(ex.running_attempts().is_empty());
    assert!(ex.cancel(4, "again").await.is_err());
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn exited_program_leftovers_are_ended() {
    let dir = tempfile::tempdir().unwrap();
    let ws = workspace("leftover");
    let (ex, mut rx) = executor(1, &ws);
    ex.launch(request(
        1,
        dir.path(),
        &["/bin/sh", "-c", "sleep 100 & echo $! > bg.pid"],
    ))
    .await
    .unwrap();
    let done = next(&mut rx).await;
    assert_eq!(done.outcome, Outcome::Exited { code: 0 });
    let bg = pids_in(&dir.path().join("bg.pid")).await;
    assert!(
        ended_soon(bg[0]).await,
        "leftover background process still running"
    );
    assert!(find_orphans(&ws).is_empty());
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn shutdown_terminates_children_and_grandchildren() {
    let dir = tempfile::tempdir().unwrap();
    let ws = workspace("shutdown");
    let (ex, mut rx) = executor(2, &ws);
    let mut pid_files = Vec::new();
    for id in 1..=2 {
        let wd = dir.path().join(format!("a{id}"));
        std::fs::create_dir(&wd).unwrap();
        ex.launch(request(
            id,
            &wd,
            &[
                "/bin/sh",
                "-c",
                "sleep 100 & a=$!; sleep 100 & echo $$ $a $! > pids; wait",
            ],
        ))
        .await
        .unwrap();
        pid_files.push(wd.join("pids"));
    }
    let mut pids = Vec::new();
    for f in &pid_files {
        pids.extend(pids_in(f).await);
    }
    assert_eq!(pids.len(), 6);
    // A process between fork and exec may briefly not show its environment in /proc: look
    // again for a moment before counting it missing.
    let mut seen = find_orphans(&ws).len();
    for _ in 0..100 {
        if seen == 6 {
            break;
        }
        tokio::time::sleep(Duration::from_millis(50)).await;
        seen = find_orphans(&ws).len();
    }
    assert_eq!(seen, 6, "every process of both attempts found by its tag");

    ex.shutdown(Shutdown::Terminate { grace: GRACE })
        .await
        .unwrap();
    let mut ended: Vec<(i64, Outcome)> = Vec::new();
    for _ in 0..2 {
        let c = next(&mut rx).await;
        ended.push((c.attempt_id, c.outcome));
    }
    ended.sort_by_key(|(id, _)| *id);
    let cancelled = Outcome::Cancelled { by: "rondo".into() };
    assert_eq!(ended, vec![(1, cancelled.clone()), (2, cancelled)]);
    for pid in pids {
        assert!(ended_soon(pid).await, "process {pid} survived shutdown");
    }
    assert!(find_orphans(&ws).is_empty());
    // No new work after shutdown.
    assert!(ex.launch(request(3, dir.path(), &["true"])).await.is_err());
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn slots_bound_parallelism() {
    let dir = tempfile::tempdir().unwrap();
    let (ex, mut rx) = executor(1, &workspace("slots"));
    let ex = std::sync::Arc::new(ex);
    ex.launch(request(1, dir.path(), &["sleep", "100"]))
        .await
        .unwrap();
    let second = {
        let ex = ex.clone();
        let wd = dir.path().to_path_buf();
        tokio::spawn(async move { ex.launch(request(2, &wd, &["true"])).await })
    };
    // While attempt 1 holds the only slot, attempt 2 cannot have started.
    tokio::time::sleep(Duration::from_millis(300)).await;
    assert!(!second.is_finished());
    assert_eq!(ex.running_attempts(), vec![1]);
    ex.cancel(1, "make room").await.unwrap();
    assert_eq!(next(&mut rx).await.attempt_id, 1);
    second.await.unwrap().unwrap();
    let done = next(&mut rx).await;
    assert_eq!(
        (done.attempt_id, done.outcome),
        (2, Outcome::Exited { code: 0 })
    );
}

/// Launch an attempt from an orchestrator that then dies: a separate runtime with its own
/// executor, whose completion receiver is dropped and which is torn down with the child
/// still running. Returns the handle and the pids the child reports.
fn launch_and_die(ws: &str, attempt_id: i64, workdir: &Path) -> (Handle, PathBuf) {
    let ws = ws.to_string();
    let workdir = workdir.to_path_buf();
    std::thread::spawn(move || {
        let rt = tokio::runtime::Builder::new_current_thread()
            .enable_all()
            .build()
            .unwrap();
        let handle = rt.block_on(async {
            let (tx, rx) = mpsc::unbounded_channel();
            drop(rx);
            let ex = LocalExecutor::new(1, ws, tx);
            ex.launch(request(
                attempt_id,
                &workdir,
                &[
                    "/bin/sh",
                    "-c",
                    "sleep 100 & a=$!; sleep 100 & echo $$ $a $! > pids; wait",
                ],
            ))
            .await
            .unwrap()
        });
        drop(rt);
        (handle, workdir.join("pids"))
    })
    .join()
    .unwrap()
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn reattach_ends_an_orphan_of_a_dead_orchestrator() {
    let dir = tempfile::tempdir().unwrap();
    let ws = workspace("reattach");
    let (handle, pid_file) = launch_and_die(&ws, 11, dir.path());
    let pids = pids_in(&pid_file).await;
    assert_eq!(pids.len(), 3, "the shell and its two sleeps: {pids:?}");
    assert!(pids.iter().all(|p| alive(*p)));
    let mut orphans: Vec<i64> = find_orphans(&ws).into_iter().map(|(a, _)| a).collect();
    orphans.dedup();
    assert_eq!(orphans, vec![11]);

    let (ex, _rx) = executor(1, &ws);
    let seen = ex.find_orphans();
    assert!(!seen.is_empty(), "the executor sees the orphans");
    assert!(seen.iter().all(|(a, _)| *a == 11), "{seen:?}");
    let state = ex.reattach(11, &handle, dir.path()).await.unwrap();
    assert_eq!(
        state,
        Reattached::Gone {
            reason: ORPHAN_ENDED.into()
        }
    );
    for pid in pids {
        assert!(
            ended_soon(pid).await,
            "orphan process {pid} survived reattach"
        );
    }
    let again = ex.reattach(11, &handle, dir.path()).await.unwrap();
    assert_eq!(
        again,
        Reattached::Gone {
            reason: "not running".into()
        }
    );
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn reattach_never_kills_a_recycled_group_id() {
    // An unrelated process in its own group, standing in for a recycled pgid.
    let mut other = std::process::Command::new("sleep");
    std::os::unix::process::CommandExt::process_group(&mut other, 0);
    let mut other = other.arg("100").spawn().unwrap();
    let pgid = other.id() as i32;

    let (ex, _rx) = executor(1, &workspace("recycled"));
    let handle = Handle {
        executor: "local".into(),
        id: pgid.to_string(),
        host: ex.host().to_string(),
    };
    let dir = tempfile::tempdir().unwrap();
    let state = ex.reattach(5, &handle, dir.path()).await.unwrap();
    assert_eq!(
        state,
        Reattached::Gone {
            reason: "not running".into()
        }
    );
    ex.cancel_recorded(&handle, "test").await.unwrap();
    assert!(alive(pgid), "an unrelated process was signalled");
    other.kill().unwrap();
    other.wait().unwrap();
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn reattach_on_another_host_is_refused() {
    let (ex, _rx) = executor(1, &workspace("host"));
    let handle = Handle {
        executor: "local".into(),
        id: "12345".into(),
        host: format!("not-{}", ex.host()),
    };
    let err = ex.reattach(1, &handle, Path::new("/")).await.unwrap_err();
    assert!(err.to_string().contains("not-"), "{err}");
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn find_and_kill_orphans_left_between_spawn_and_record() {
    let dir = tempfile::tempdir().unwrap();
    let ws = workspace("orphans");
    let a = dir.path().join("a");
    let b = dir.path().join("b");
    std::fs::create_dir(&a).unwrap();
    std::fs::create_dir(&b).unwrap();
    let (_h1, f1) = launch_and_die(&ws, 21, &a);
    let (_h2, f2) = launch_and_die(&ws, 22, &b);
    let mut pids = pids_in(&f1).await;
    pids.extend(pids_in(&f2).await);
    assert_eq!(pids.len(), 6, "two shells and their sleeps: {pids:?}");

    let orphans = find_orphans(&ws);
    let mut attempts: Vec<i64> = orphans.iter().map(|(a, _)| *a).collect();
    attempts.dedup();
    assert_eq!(attempts, vec![21, 22]);
    assert_eq!(orphans.len(), 6);
    // Another workspace's processes are not ours.
    assert!(find_orphans(&workspace("someone-else")).is_empty());

    assert_eq!(kill_orphans(&ws, &orphans, GRACE).await, 2);
    for pid in pids {
        assert!(ended_soon(pid).await, "orphan {pid} survived");
    }
    assert!(find_orphans(&ws).is_empty());
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn cancel_recorded_ends_a_recorded_group() {
    let dir = tempfile::tempdir().unwrap();
    let ws = workspace("cancel-recorded");
    let (handle, pid_file) = launch_and_die(&ws, 31, dir.path());
    let pids = pids_in(&pid_file).await;
    assert_eq!(pids.len(), 3, "the shell and its two sleeps: {pids:?}");
    let (ex, _rx) = executor(1, &ws);
    ex.cancel_recorded(&handle, "rondo cancel").await.unwrap();
    for pid in pids {
        assert!(
            ended_soon(pid).await,
            "process {pid} survived cancel_recorded"
        );
    }
    assert!(find_orphans(&ws).is_empty());
}
