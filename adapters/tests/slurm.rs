//! Tests of the Slurm executor against the real one-node Slurm started by
//! `scripts/dev-slurm start`. They skip loudly (tests/common/skip.rs) when `sbatch` is not on
//! PATH (or, for the tests that set the node down or restart slurmctld, when not run as root),
//! and fail instead when `RONDO_REQUIRE_SLURM=1` (as in `scripts/test`) or `CI=true`.
//!
//! Tests that disturb the whole scheduler (node down, controller restart) take the lock below
//! exclusively; the others share it, so they never see each other's disturbances. The long
//! tests are named `a1_`, `a2_`, `a3_` so that libtest (which starts tests in name order)
//! runs them first, side by side, keeping the whole file near two minutes.

use std::path::{Path, PathBuf};
use std::process::Command;
use std::sync::Arc;
use std::time::Duration;

use rondo_adapters::executor::{
    Completion, Executor, Handle, LaunchRequest, Outcome, Reattached, Resources, Shutdown,
};
use rondo_adapters::slurm::allocation::{
    submit_continuation, time_left, warning_signal, write_allocation_script, AllocationEnv,
    AllocationSpec,
};
use rondo_adapters::slurm::{lengthen_time, parse_kv_line, SlurmConfig, SlurmExecutor};
use tokio::sync::mpsc::{unbounded_channel, UnboundedReceiver};
use tokio::sync::RwLock;

/// Shared by ordinary tests, held exclusively by those that disturb the scheduler.
static SCHEDULER: RwLock<()> = RwLock::const_new(());

/// Loud skips, shared with the other test crates.
#[path = "../../tests/common/skip.rs"]
mod skip;

/// Straight to the process's stderr: libtest hides `eprintln!` output of passing tests.
fn loud(message: &str) {
    use std::io::Write;
    let _ = writeln!(std::io::stderr(), "{message}");
}

fn slurm_available() -> bool {
    let found = std::env::var_os("PATH")
        .map(|p| std::env::split_paths(&p).any(|d| d.join("sbatch").is_file()))
        .unwrap_or(false);
    if !found {
        skip::skip_or_fail(
            "sbatch is not on PATH",
            "start the one-node Slurm with `bash scripts/dev-slurm start` (as root)",
            &["RONDO_REQUIRE_SLURM"],
        );
    }
    found
}

/// Slurm is there and we may change node states and restart the controller.
fn slurm_admin_available() -> bool {
    if !slurm_available() {
        return false;
    }
    let uid = cmd_out("id", &["-u"]);
    if uid.trim() != "0" {
        skip::skip_or_fail(
            "not root, and this test sets the node down or restarts slurmctld",
            "run the Slurm tests as root",
            &["RONDO_REQUIRE_SLURM"],
        );
        return false;
    }
    true
}

fn cmd_out(program: &str, args: &[&str]) -> String {
    let out = Command::new(program)
        .args(args)
        .output()
        .unwrap_or_else(|e| panic!("cannot run {program}: {e}"));
    String::from_utf8_lossy(&out.stdout).into_owned()
}

fn config() -> SlurmConfig {
    SlurmConfig {
        poll_interval: Duration::from_secs(1),
        max_backoff: Duration::from_secs(4),
        ..SlurmConfig::default()
    }
}

fn request(id: i64, dir: &Path, script: &str) -> LaunchRequest {
    LaunchRequest {
        attempt_id: id,
        job_name: format!("test campaign/point {id}/it 1/stage"),
        argv: vec!["/bin/sh".into(), "-c".into(), script.into()],
        workdir: dir.to_path_buf(),
        env: [("RONDO_TEST_VALUE".to_string(), "a b'c".to_string())].into(),
        time_limit: None,
        resources: Resources::default(),
        outlive: false,
    }
}

async fn next_within(rx: &mut UnboundedReceiver<Completion>, secs: u64) -> Completion {
    tokio::time::timeout(Duration::from_secs(secs), rx.recv())
        .await
        .unwrap_or_else(|_| panic!("no completion within {secs} s"))
        .expect("channel closed")
}

async fn next(rx: &mut UnboundedReceiver<Completion>) -> Completion {
    next_within(rx, 120).await
}

/// Wait (up to `secs`) until `cond` holds.
async fn wait_for(what: &str, secs: u64, mut cond: impl FnMut() -> bool) {
    for _ in 0..secs * 10 {
        if cond() {
            return;
        }
        tokio::time::sleep(Duration::from_millis(100)).await;
    }
    panic!("{what}: not within {secs} s");
}

fn squeue_name(id: &str) -> String {
    cmd_out("squeue", &["-h", "-t", "all", "-o", "%j", "-j", id])
        .trim()
        .to_string()
}

/// `scontrol -o show job ID` as fields (empty once the job is purged).
fn job_fields(id: &str) -> std::collections::HashMap<String, String> {
    cmd_out("scontrol", &["-o", "show", "job", id])
        .lines()
        .next()
        .map(parse_kv_line)
        .unwrap_or_default()
}

/// Seconds a finished job stays in slurmctld's memory (`MinJobAge`, slurm.conf(5)).
fn min_job_age() -> u64 {
    cmd_out("scontrol", &["show", "config"])
        .lines()
        .find_map(|l| {
            let (k, v) = l.split_once('=')?;
            (k.trim() == "MinJobAge").then(|| v.split_whitespace().next()?.parse().ok())?
        })
        .unwrap_or(300)
}

fn node_name() -> String {
    cmd_out("sinfo", &["-h", "-N", "-o", "%N"])
        .lines()
        .next()
        .expect("sinfo lists a node")
        .trim()
        .to_string()
}

fn node_state() -> String {
    cmd_out("sinfo", &["-h", "-N", "-o", "%T"])
        .lines()
        .next()
        .unwrap_or("")
        .trim()
        .to_string()
}

fn scontrol(args: &[&str]) {
    let st = Command::new("scontrol")
        .args(args)
        .status()
        .expect("scontrol runs");
    assert!(st.success(), "scontrol {args:?} failed");
}

fn dev_slurm() -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR")).join("../scripts/dev-slurm")
}

fn pid_alive(pid: &str) -> bool {
    Command::new("kill")
        .args(["-0", pid])
        .stderr(std::process::Stdio::null())
        .status()
        .map(|s| s.success())
        .unwrap_or(false)
}

/// Puts the node back into service when dropped, whether the test passed or not.
struct ResumeNode(String);

impl Drop for ResumeNode {
    fn drop(&mut self) {
        let _ = Command::new("scontrol")
            .args(["update", &format!("nodename={}", self.0), "state=resume"])
            .status();
        for _ in 0..300 {
            if node_state() == "idle" {
                return;
            }
            std::thread::sleep(Duration::from_millis(100));
        }
        loud(&format!(
            "!!! node {} did not return to idle after resume !!!",
            self.0
        ));
    }
}

/// Starts slurmctld again (through scripts/dev-slurm) when dropped, if it is not running.
struct RestartController;

impl Drop for RestartController {
    fn drop(&mut self) {
        let st = Command::new("bash").arg(dev_slurm()).arg("start").status();
        if !matches!(st, Ok(s) if s.success()) {
            loud("!!! scripts/dev-slurm start failed after the controller test !!!");
        }
    }
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn exit_codes_markers_and_job_names() {
    if !slurm_available() {
        return;
    }
    let _shared = SCHEDULER.read().await;
    let (tx, mut rx) = unbounded_channel();
    let ex = SlurmExecutor::new(config(), "ws-test".into(), tx);
    let ok = tempfile::tempdir().expect("tempdir");
    let bad = tempfile::tempdir().expect("tempdir");
    let h1 = ex
        .launch(request(
            1,
            ok.path(),
            "printf '%s' \"$RONDO_TEST_VALUE\" > value.txt",
        ))
        .await
        .expect("submit");
    let h2 = ex
        .launch(request(2, bad.path(), "exit 3"))
        .await
        .expect("submit");
    assert_eq!(h1.executor, "slurm");
    assert!(h1.id.parse::<u64>().is_ok(), "job id {:?}", h1.id);
    assert_eq!(squeue_name(&h1.id), "test_campaign/point_1/it_1/stage");
    assert_eq!(job_fields(&h2.id)["Comment"], "rondo:ws-test:2");
    let mut got = [next(&mut rx).await, next(&mut rx).await];
    got.sort_by_key(|c| c.attempt_id);
    assert_eq!(got[0].outcome, Outcome::Exited { code: 0 });
    assert_eq!(got[1].outcome, Outcome::Exited { code: 3 });
    assert!(got[0].started_at.is_some() && got[0].host.is_some());
    // The environment value arrived unchanged, quotes and spaces included.
    let v = std::fs::read_to_string(ok.path().join("value.txt")).expect("value.txt");
    assert_eq!(v, "a b'c");
    assert!(ok.path().join(format!("slurm-{}.out", h1.id)).exists());
    assert_eq!(ex.stats().submissions, 2);

    // A launcher prefix, as the engine renders it: already in argv, and in resources.
    let par = tempfile::tempdir().expect("tempdir");
    let mut req = request(3, par.path(), "echo \"step $SLURM_STEP_ID\" > step.txt");
    req.argv
        .splice(0..0, ["srun".to_string(), "-n1".to_string()]);
    req.resources.launcher = Some(vec!["srun".into(), "-n1".into()]);
    let script = ex.render_script(&req).expect("script");
    assert_eq!(script.matches("srun").count(), 1, "{script}");
    ex.launch(req).await.expect("submit");
    let c = next(&mut rx).await;
    assert_eq!((c.attempt_id, c.outcome), (3, Outcome::Exited { code: 0 }));
    let step = std::fs::read_to_string(par.path().join("step.txt")).expect("step.txt");
    assert_eq!(step.trim(), "step 0", "ran as the job's first srun step");
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn external_scancel_and_rondo_cancel_are_told_apart() {
    if !slurm_available() {
        return;
    }
    let _shared = SCHEDULER.read().await;
    let (tx, mut rx) = unbounded_channel();
    let ex = SlurmExecutor::new(config(), "ws-test".into(), tx);
    let d1 = tempfile::tempdir().expect("tempdir");
    let d2 = tempfile::tempdir().expect("tempdir");
    let h1 = ex
        .launch(request(11, d1.path(), "sleep 60"))
        .await
        .expect("submit");
    ex.launch(request(12, d2.path(), "sleep 60"))
        .await
        .expect("submit");
    // Let the externally cancelled one start, so that it is cancelled while running.
    wait_for("job 11 starts", 60, || {
        d1.path().join(".rondo-start").exists()
    })
    .await;
    let st = Command::new("scancel")
        .arg(&h1.id)
        .status()
        .expect("scancel");
    assert!(st.success());
    ex.cancel(12, "test").await.expect("cancel");
    let mut got = [next(&mut rx).await, next(&mut rx).await];
    got.sort_by_key(|c| c.attempt_id);
    assert_eq!(
        got[0].outcome,
        Outcome::Cancelled {
            by: "external (the scheduler or another user)".into()
        }
    );
    assert!(got[0].started_at.is_some(), "it had started");
    assert_eq!(got[1].outcome, Outcome::Cancelled { by: "rondo".into() });
    assert!(ex.watched().is_empty());

    // `rondo cancel` while no orchestrator runs: a fresh executor cancels a job it knows
    // only from its recorded handle.
    let d3 = tempfile::tempdir().expect("tempdir");
    let h3 = ex
        .launch(request(13, d3.path(), "sleep 60"))
        .await
        .expect("submit");
    ex.shutdown(Shutdown::Detach).await.expect("detach");
    let (tx, _rx) = unbounded_channel();
    let other = SlurmExecutor::new(config(), "ws-test".into(), tx);
    other
        .cancel_recorded(&h3, "rondo cancel")
        .await
        .expect("cancel recorded");
    wait_for("job 13 is cancelled", 60, || {
        job_fields(&h3.id)
            .get("JobState")
            .is_some_and(|s| s == "CANCELLED")
    })
    .await;
    // A handle of another executor is refused, not misread.
    let local = Handle {
        executor: "local".into(),
        ..h3
    };
    assert!(other.reattach(13, &local, d3.path()).await.is_err());
}

/// A 1-minute limit on a job that sleeps 5 minutes: Slurm's TIMEOUT (about 60 to 90 s plus
/// KillWait) becomes `TimedOut`; the retry asks for a longer limit and is accepted with it.
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn a1_time_limit_kill_is_timed_out_and_retried_longer() {
    if !slurm_available() {
        return;
    }
    let _shared = SCHEDULER.read().await;
    let (tx, mut rx) = unbounded_channel();
    let ex = SlurmExecutor::new(config(), "ws-test".into(), tx);
    let dir = tempfile::tempdir().expect("tempdir");
    // `&&`, not `;`: Slurm signals the step's processes one by one, so a shell whose `sleep`
    // was ended first could still run a `;`-joined next command before its own SIGTERM lands.
    let mut req = request(31, dir.path(), "sleep 300 && echo never > out.txt");
    req.resources.time = Some("1".into());
    let h = ex.launch(req.clone()).await.expect("submit");
    assert_eq!(job_fields(&h.id)["TimeLimit"], "00:01:00");
    let c = next_within(&mut rx, 240).await;
    assert_eq!(
        (c.attempt_id, &c.outcome),
        (31, &Outcome::TimedOut),
        "{c:?}"
    );
    assert!(c.outcome.is_transient(), "a wall-time kill is retried");
    assert!(c.started_at.is_some(), "start marker read: {c:?}");
    assert!(
        !dir.path().join("out.txt").exists(),
        "the command was cut short"
    );
    // Slurm agrees (scontrol may lag behind squeue by a moment).
    let id = h.id.clone();
    wait_for("scontrol shows TIMEOUT", 30, move || {
        job_fields(&id).get("JobState").map(String::as_str) == Some("TIMEOUT")
    })
    .await;

    // The retry: twice the time, in the same directory (stale markers are removed).
    let retry = LaunchRequest {
        attempt_id: 32,
        argv: vec!["/bin/sh".into(), "-c".into(), "echo ok > out.txt".into()],
        resources: lengthen_time(&req.resources, 2.0),
        ..req
    };
    assert_eq!(retry.resources.time.as_deref(), Some("00:02:00"));
    let h2 = ex.launch(retry).await.expect("resubmit");
    assert_eq!(job_fields(&h2.id)["TimeLimit"], "00:02:00");
    let c = next(&mut rx).await;
    assert_eq!((c.attempt_id, c.outcome), (32, Outcome::Exited { code: 0 }));
    assert!(dir.path().join("out.txt").exists());
}

/// A job requeued while it runs (what preemption with `PreemptMode=REQUEUE` or `scontrol
/// requeue` does) comes back under the same id and runs its script again. Its first run
/// leaves an exit marker with a signal's status, as a job script can when the scheduler's
/// kill reaches the command before the shell: that marker is not taken for the job's end.
/// The executor keeps watching through the pending spell and reports the second run's exit.
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn a_requeued_job_is_watched_to_its_second_run_past_a_signal_marker() {
    if !slurm_admin_available() {
        return;
    }
    let _shared = SCHEDULER.read().await;
    let (tx, mut rx) = unbounded_channel();
    let ex = SlurmExecutor::new(config(), "ws-test".into(), tx);
    let dir = tempfile::tempdir().expect("tempdir");
    let script = r#"if [ "${SLURM_RESTART_COUNT:-0}" = 0 ]; then
  printf '143 2026-01-01T00:00:00Z\n' > .rondo-exit.tmp && mv -f .rondo-exit.tmp .rondo-exit
  scontrol requeue "$SLURM_JOB_ID"
  sleep 120
else
  echo "run $SLURM_RESTART_COUNT" > out.txt
fi"#;
    let h = ex
        .launch(request(51, dir.path(), script))
        .await
        .expect("submit");
    let id = h.id.clone();
    wait_for("job 51 is requeued (pending again)", 90, || {
        dir.path().join(".rondo-exit").exists()
            && cmd_out("squeue", &["-h", "-t", "all", "-o", "%T", "-j", &id]).trim() == "PENDING"
    })
    .await;
    // Marker checks every second and the query they bring forward: none may end it.
    tokio::time::sleep(Duration::from_secs(4)).await;
    assert!(
        rx.try_recv().is_err(),
        "a signal's marker of a requeued job's first run was taken for its end"
    );
    assert_eq!(ex.watched(), vec![h.id.clone()], "still watched");
    // Slurm holds a requeued job back for about two minutes; let it start now.
    scontrol(&["update", &format!("JobId={}", h.id), "StartTime=now"]);
    let c = next(&mut rx).await;
    assert_eq!(
        (c.attempt_id, &c.outcome),
        (51, &Outcome::Exited { code: 0 }),
        "{c:?}"
    );
    let out = std::fs::read_to_string(dir.path().join("out.txt")).expect("second run's output");
    assert_eq!(out.trim(), "run 1");
}

/// The node goes down under a `--no-requeue` job: NODE_FAIL becomes `NodeFailure`. The node
/// is put back into service afterwards in every case.
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn node_down_under_a_no_requeue_job_is_a_node_failure() {
    if !slurm_admin_available() {
        return;
    }
    let _exclusive = SCHEDULER.write().await;
    let node = node_name();
    let (tx, mut rx) = unbounded_channel();
    let ex = SlurmExecutor::new(config(), "ws-test".into(), tx);
    let dir = tempfile::tempdir().expect("tempdir");
    let mut req = request(41, dir.path(), "sleep 120");
    req.resources.extra = vec!["--no-requeue".into()];
    let h = ex.launch(req).await.expect("submit");
    wait_for("job 41 starts", 60, || {
        dir.path().join(".rondo-start").exists()
    })
    .await;
    let restore = ResumeNode(node.clone());
    scontrol(&[
        "update",
        &format!("nodename={node}"),
        "state=down",
        "reason=rondo-test",
    ]);
    let c = next(&mut rx).await;
    assert_eq!((c.attempt_id, &c.outcome), (41, &Outcome::NodeFailure));
    assert!(c.outcome.is_transient());
    assert_eq!(job_fields(&h.id)["JobState"], "NODE_FAIL");
    drop(restore);
    assert_eq!(node_state(), "idle", "the node is back in service");
}

/// slurmctld stops while a job runs and another is being submitted: squeue and sbatch fail
/// (after blocking about 9 s), the executor backs off and retries, and once the controller is
/// back both attempts complete normally.
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn slurmctld_restart_during_a_run_is_survived() {
    if !slurm_admin_available() {
        return;
    }
    let _exclusive = SCHEDULER.write().await;
    let (tx, mut rx) = unbounded_channel();
    let ex = Arc::new(SlurmExecutor::new(config(), "ws-test".into(), tx));
    let d1 = tempfile::tempdir().expect("tempdir");
    let d2 = tempfile::tempdir().expect("tempdir");
    ex.launch(request(51, d1.path(), "sleep 15; echo done > out.txt"))
        .await
        .expect("submit");
    wait_for("job 51 starts", 60, || {
        d1.path().join(".rondo-start").exists()
    })
    .await;

    let restart = RestartController;
    let pid = std::fs::read_to_string("/run/slurmctld.pid").expect("slurmctld pid file");
    let pid = pid.trim().to_string();
    assert!(
        Command::new("kill")
            .args(["-TERM", &pid])
            .status()
            .expect("kill")
            .success(),
        "cannot stop slurmctld (pid {pid})"
    );
    wait_for("slurmctld exits", 30, || !pid_alive(&pid)).await;

    // A submission while the controller is down is retried.
    let ex2 = Arc::clone(&ex);
    let d2_path = d2.path().to_path_buf();
    let late = tokio::spawn(async move {
        ex2.launch(request(52, &d2_path, "echo late > out.txt"))
            .await
    });
    let ex3 = Arc::clone(&ex);
    wait_for("a failed squeue and a failed sbatch", 90, move || {
        let s = ex3.stats();
        s.failed_queries >= 1 && s.failed_submissions >= 1
    })
    .await;
    drop(restart); // scripts/dev-slurm start: slurmctld comes back

    let h2 = late
        .await
        .expect("task")
        .expect("submitted after the restart");
    assert_eq!(h2.executor, "slurm");
    let mut got = [next(&mut rx).await, next(&mut rx).await];
    got.sort_by_key(|c| c.attempt_id);
    assert_eq!(got[0].outcome, Outcome::Exited { code: 0 });
    assert_eq!(got[1].outcome, Outcome::Exited { code: 0 });
    assert!(d1.path().join("out.txt").exists() && d2.path().join("out.txt").exists());
    let s = ex.stats();
    eprintln!("scheduler calls across the restart: {s:?}");
    assert_eq!(s.submissions, 2, "each attempt submitted exactly once");
}

/// The orchestrator dies (the executor is dropped) while jobs are queued, running and
/// finished; a new executor adopts them from their recorded handles without submitting
/// anything: queued/running → Active (completion later), finished with a marker → Finished
/// (also after the scheduler has purged it), vanished without a marker → Gone.
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn a3_second_instance_adopts_finished_and_running_jobs() {
    if !slurm_available() {
        return;
    }
    let _shared = SCHEDULER.read().await;
    let fin = tempfile::tempdir().expect("tempdir");
    let run = tempfile::tempdir().expect("tempdir");
    let held = tempfile::tempdir().expect("tempdir");
    let purged = tempfile::tempdir().expect("tempdir");
    let lost = tempfile::tempdir().expect("tempdir");
    let (tx, _rx) = unbounded_channel();
    let first = SlurmExecutor::new(config(), "ws-test".into(), tx);
    let hf = first
        .launch(request(21, fin.path(), "exit 5"))
        .await
        .expect("submit");
    let hr = first
        .launch(request(
            22,
            run.path(),
            "while [ ! -e go ]; do sleep 1; done; echo done > out.txt",
        ))
        .await
        .expect("submit");
    let mut pending = request(24, held.path(), "echo released > out.txt");
    pending.resources.extra = vec!["--hold".into()];
    let hh = first.launch(pending).await.expect("submit");
    let hp = first
        .launch(request(25, purged.path(), "echo kept > out.txt"))
        .await
        .expect("submit");
    let hl = first
        .launch(request(26, lost.path(), "true"))
        .await
        .expect("submit");
    assert_eq!(first.stats().submissions, 5);
    drop(first); // rondo killed: nobody watches

    // Jobs 21, 25 and 26 finish; 25 and 26 are purged from the queue (MinJobAge), and the
    // exit marker of 26 is removed, as if its node had lost the file system.
    wait_for("jobs 21, 25, 26 end", 120, || {
        [&fin, &purged, &lost]
            .iter()
            .all(|d| d.path().join(".rondo-exit").exists())
    })
    .await;
    wait_for(
        "the scheduler purges jobs 25 and 26",
        min_job_age() + 120,
        || squeue_name(&hp.id).is_empty() && squeue_name(&hl.id).is_empty(),
    )
    .await;
    std::fs::remove_file(lost.path().join(".rondo-exit")).expect("remove marker");
    assert_eq!(job_fields(&hh.id)["JobState"], "PENDING");

    let (tx, mut rx) = unbounded_channel();
    let second = SlurmExecutor::new(config(), "ws-test".into(), tx);
    match second
        .reattach(21, &hf, fin.path())
        .await
        .expect("reattach")
    {
        Reattached::Finished(c) => assert_eq!(c.outcome, Outcome::Exited { code: 5 }),
        other => panic!("finished job came back as {other:?}"),
    }
    match second
        .reattach(25, &hp, purged.path())
        .await
        .expect("reattach")
    {
        Reattached::Finished(c) => {
            assert_eq!(c.outcome, Outcome::Exited { code: 0 });
            assert!(c.started_at.is_some() && c.ended_at.is_some());
        }
        other => panic!("purged finished job came back as {other:?}"),
    }
    assert!(matches!(
        second
            .reattach(26, &hl, lost.path())
            .await
            .expect("reattach"),
        Reattached::Gone { .. }
    ));
    assert_eq!(
        second
            .reattach(22, &hr, run.path())
            .await
            .expect("reattach"),
        Reattached::Active
    );
    assert_eq!(
        second
            .reattach(24, &hh, held.path())
            .await
            .expect("reattach"),
        Reattached::Active
    );
    // The running job may end and the queued one gets its turn only now.
    std::fs::write(run.path().join("go"), "").expect("write go");
    scontrol(&["release", &hh.id]);
    let mut got = [next(&mut rx).await, next(&mut rx).await];
    got.sort_by_key(|c| c.attempt_id);
    assert_eq!(
        (got[0].attempt_id, &got[0].outcome),
        (22, &Outcome::Exited { code: 0 })
    );
    assert_eq!(
        (got[1].attempt_id, &got[1].outcome),
        (24, &Outcome::Exited { code: 0 })
    );
    assert!(run.path().join("out.txt").exists() && held.path().join("out.txt").exists());
    // A job id the scheduler never had, with no marker: gone.
    let empty = tempfile::tempdir().expect("tempdir");
    let ghost = Handle {
        executor: "slurm".into(),
        id: "99999999".into(),
        host: "x".into(),
    };
    assert!(matches!(
        second
            .reattach(23, &ghost, empty.path())
            .await
            .expect("reattach"),
        Reattached::Gone { .. }
    ));
    // No job id recorded (killed between sbatch and the store): gone, without a query.
    let unrecorded = Handle {
        id: String::new(),
        ..ghost
    };
    assert!(matches!(
        second
            .reattach(27, &unrecorded, empty.path())
            .await
            .expect("reattach"),
        Reattached::Gone { .. }
    ));
    assert_eq!(second.stats().submissions, 0, "nothing was resubmitted");
    second.shutdown(Shutdown::Detach).await.expect("detach");
}

const WORKER_VAR: &str = "RONDO_TEST_ALLOCATION_WORKER";
const CHAIN_TEST: &str = "a2_allocation_chain_continues_after_the_warning_signal";

/// An allocation script runs this test binary (as a stand-in for `rondo run`) in a job with a
/// 1-minute limit and `--signal=B:USR1@40`. The first job waits for the warning signal and
/// submits its continuation with the adapters' helper; the second finishes. Two successive
/// jobs, joined by an `afterany` dependency.
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn a2_allocation_chain_continues_after_the_warning_signal() {
    if let Ok(dir) = std::env::var(WORKER_VAR) {
        // Inside the allocation job: play rondo's part.
        allocation_worker(Path::new(&dir)).await;
        return;
    }
    if !slurm_available() {
        return;
    }
    let _shared = SCHEDULER.read().await;
    let dir = tempfile::tempdir().expect("tempdir");
    let script = dir.path().join("allocation.sh");
    let exe = std::env::current_exe().expect("test binary path");
    let spec = AllocationSpec {
        job_name: "test campaign/allocation".into(),
        resources: Resources {
            time: Some("1".into()),
            ..Default::default()
        },
        warning: Duration::from_secs(40),
        workdir: dir.path().to_path_buf(),
        command: vec![
            exe.display().to_string(),
            "--exact".into(),
            CHAIN_TEST.into(),
            "--nocapture".into(),
            "--test-threads=1".into(),
        ],
        env: [(WORKER_VAR.to_string(), dir.path().display().to_string())].into(),
        max_continuations: 1,
    };
    write_allocation_script(&spec, &script).expect("write script");
    let first = submit_continuation("sbatch", &script, None, 0, Duration::from_secs(60))
        .await
        .expect("submit the first job");
    wait_for("the second job of the chain finishes", 240, || {
        dir.path().join("done").exists()
    })
    .await;
    let read = |f: &str| std::fs::read_to_string(dir.path().join(f)).unwrap_or_default();
    assert_eq!(read("signal-0"), first, "the first job got USR1");
    let second = read("submitted-1");
    assert!(!second.is_empty() && second != first);
    assert_eq!(read("done"), format!("1 {second}"));
    assert!(dir.path().join("left-0").exists() && dir.path().join("left-1").exists());
    assert_eq!(job_fields(&first)["JobState"], "COMPLETED");
    // The continuation waited for the first job.
    let f = job_fields(&second);
    assert!(
        f.get("JobState")
            .is_some_and(|s| s == "COMPLETED" || s == "COMPLETING"),
        "{f:?}"
    );
}

async fn allocation_worker(dir: &Path) {
    let mut usr1 = warning_signal().expect("USR1 handler");
    let env = AllocationEnv::from_env();
    assert!(env.in_allocation(), "{env:?}");
    let job = env.job_id.clone().expect("SLURM_JOB_ID");
    let script = env.script.clone().expect("allocation script");
    let left = time_left("squeue", &job, Duration::from_secs(60))
        .await
        .expect("squeue answers")
        .expect("the job has a limit");
    assert!(
        left <= Duration::from_secs(60),
        "{left:?} left of a 1-minute job"
    );
    std::fs::write(dir.join(format!("left-{}", env.continuation)), "").expect("write");
    if env.continuation == 0 {
        // Work that never ends by itself: only the warning stops it.
        tokio::time::timeout(Duration::from_secs(200), usr1.recv())
            .await
            .expect("USR1 before the time limit");
        std::fs::write(dir.join("signal-0"), &job).expect("write");
        let next = submit_continuation("sbatch", &script, Some(&job), 1, Duration::from_secs(60))
            .await
            .expect("submit the continuation");
        std::fs::write(dir.join("submitted-1"), next).expect("write");
    } else {
        std::fs::write(dir.join("done"), format!("{} {job}", env.continuation)).expect("write");
    }
}

/// A job's end is noticed from its exit marker on the file system, without a status query:
/// with an hour between `squeue` calls, three jobs that end at once and one that ends later
/// all complete, and the scheduler was never asked about them. The marker is the only way
/// the end could have been noticed, so this needs no timing.
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn job_ends_are_noticed_from_their_markers_between_status_queries() {
    if !slurm_available() {
        return;
    }
    let _shared = SCHEDULER.read().await;
    let (tx, mut rx) = unbounded_channel();
    let cfg = SlurmConfig {
        poll_interval: Duration::from_secs(3600),
        marker_interval: Duration::from_millis(500),
        ..config()
    };
    let ex = SlurmExecutor::new(cfg, "ws-markers".into(), tx);
    let dirs: Vec<_> = (0..4)
        .map(|_| tempfile::tempdir().expect("tempdir"))
        .collect();
    for (i, d) in dirs.iter().enumerate() {
        let script = if i == 3 { "sleep 2; exit 5" } else { "exit 0" };
        ex.launch(request(10 + i as i64, d.path(), script))
            .await
            .expect("submit");
    }
    let mut got = Vec::new();
    for _ in 0..4 {
        got.push(next_within(&mut rx, 180).await);
    }
    got.sort_by_key(|c| c.attempt_id);
    let outcomes: Vec<_> = got
        .iter()
        .map(|c| (c.attempt_id, c.outcome.clone()))
        .collect();
    assert_eq!(
        outcomes,
        vec![
            (10, Outcome::Exited { code: 0 }),
            (11, Outcome::Exited { code: 0 }),
            (12, Outcome::Exited { code: 0 }),
            (13, Outcome::Exited { code: 5 }),
        ]
    );
    assert!(got
        .iter()
        .all(|c| c.started_at.is_some() && c.host.is_some()));
    let stats = ex.stats();
    assert_eq!(stats.submissions, 4);
    assert_eq!(
        stats.queries, 0,
        "every end came from its marker; the scheduler was not polled"
    );
    assert!(ex.watched().is_empty());
}

/// With marker watching off, the ends come from the status queries (the scheduler path the
/// marker watch must not replace: jobs that end without a marker rely on it).
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn without_marker_watching_ends_come_from_status_queries() {
    if !slurm_available() {
        return;
    }
    let _shared = SCHEDULER.read().await;
    let (tx, mut rx) = unbounded_channel();
    let cfg = SlurmConfig {
        marker_interval: Duration::ZERO,
        ..config()
    };
    let ex = SlurmExecutor::new(cfg, "ws-nomarkers".into(), tx);
    let d = tempfile::tempdir().expect("tempdir");
    ex.launch(request(20, d.path(), "exit 0"))
        .await
        .expect("submit");
    let c = next(&mut rx).await;
    assert_eq!(c.outcome, Outcome::Exited { code: 0 });
    assert!(ex.stats().queries >= 1, "{:?}", ex.stats());
}
