//! The local executor: attempts as processes on this host.
//!
//! When the binary made itself the keeper ([`use_this_binary`], as `rondo` does), each
//! attempt's program runs under a keeper process of its own ([`keeper`]; rondo's side in
//! `kept`): the keeper holds the program's pipes, the capped logs, its time limit and its
//! exit marker, so a SIGKILL of the orchestrator does not end the program, and the next
//! orchestrator watches it again or adopts its result ([`Executor::reattach`]). A request
//! with `outlive: false` (a stage's `outlive-rondo: false`) has its keeper end the program as
//! soon as the orchestrator is gone.
//!
//! Without a keeper (a library user), the program is started directly (no shell, unless the
//! rendered argv is one) in its own process group, with null stdin, stdout/stderr through
//! pipes into `stdout.txt` and `stderr.txt` in its scratch directory (each capped to its
//! first and last 8 MiB, see [`logs`]; when the orchestrator dies the pipes close, and a
//! child's next write to them ends it with SIGPIPE, as the next orchestrator would end it).
//!
//! Either way the program gets the inherited environment plus the request's variables
//! plus `RONDO_WORKSPACE_ID` and `RONDO_ATTEMPT_ID`. Those two variables are how a later
//! orchestrator recognises the attempt's processes after a crash (see [`sys`]).
//!
//! Ending an attempt (time limit, cancel, shutdown, reattach to an orphan) always goes
//! SIGTERM to the whole group, a grace period, then SIGKILL. When a program exits on its own
//! but left processes behind in its group (`sh -c 'sleep 100 &'`), those are ended the same
//! way before the completion is sent, so the engine never checks outputs that a leftover
//! process is still writing.
//!
//! At most `slots` attempts run at once: [`LocalExecutor::launch`] waits for a free slot.
//!
//! Linux only (`/proc`).

pub mod keeper;
mod kept;
pub mod logs;
pub mod sys;

use std::collections::{BTreeMap, HashMap};
use std::fs::File;
use std::path::Path;
use std::process::{ExitStatus, Stdio};
use std::sync::atomic::{AtomicBool, Ordering};
use std::sync::{Arc, Mutex};
use std::time::Duration;

use chrono::Utc;
use tokio::process::{Child, Command};
use tokio::sync::{mpsc, OwnedSemaphorePermit, Semaphore};
use tokio::task::JoinHandle;
use tokio::time::Instant;

use crate::executor::{
    Completion, ExecError, Executor, Handle, LaunchRequest, Outcome, Reattached, Shutdown,
};

pub use kept::{keeper_command, use_this_binary, KeeperProgram};
pub use sys::{ATTEMPT_VAR, WORKSPACE_VAR};

/// Grace period between SIGTERM and SIGKILL unless configured otherwise.
pub const DEFAULT_GRACE: Duration = Duration::from_secs(10);

/// How often group membership is polled while waiting for processes to go.
const POLL: Duration = Duration::from_millis(20);

/// How long to wait for processes to disappear after SIGKILL before giving up (they may be
/// in uninterruptible sleep); a warning is logged then.
const AFTER_KILL: Duration = Duration::from_secs(5);

/// How long the logs may still be read after the attempt's processes are gone: a process
/// that left the attempt's group and dropped its environment (a daemon) may hold a pipe.
const LOG_DRAIN: Duration = Duration::from_secs(2);

/// Reason recorded for an orphan that a reattach ended.
pub const ORPHAN_ENDED: &str = "orphaned by a previous orchestrator; ended";

/// A request to end a running attempt.
#[derive(Debug)]
struct Stop {
    grace: Duration,
}

struct Running {
    stop: mpsc::UnboundedSender<Stop>,
    task: JoinHandle<()>,
}

struct Shared {
    workspace_id: String,
    host: String,
    completions: mpsc::UnboundedSender<Completion>,
    running: Mutex<HashMap<i64, Running>>,
}

impl Shared {
    fn running(&self) -> std::sync::MutexGuard<'_, HashMap<i64, Running>> {
        // A panic while holding this lock leaves a plain map behind; keep using it.
        self.running.lock().unwrap_or_else(|e| e.into_inner())
    }
}

/// Runs attempts as local child processes. See the module docs.
pub struct LocalExecutor {
    slots: usize,
    grace: Duration,
    semaphore: Arc<Semaphore>,
    closed: AtomicBool,
    shared: Arc<Shared>,
    keeper: Option<KeeperProgram>,
}

impl LocalExecutor {
    /// An executor running at most `slots` attempts at once (at least 1) for the workspace
    /// `workspace_id`, sending each attempt's end on `completions`.
    pub fn new(
        slots: usize,
        workspace_id: String,
        completions: mpsc::UnboundedSender<Completion>,
    ) -> Self {
        let slots = slots.max(1);
        LocalExecutor {
            slots,
            grace: DEFAULT_GRACE,
            semaphore: Arc::new(Semaphore::new(slots)),
            closed: AtomicBool::new(false),
            shared: Arc::new(Shared {
                workspace_id,
                host: sys::hostname(),
                completions,
                running: Mutex::new(HashMap::new()),
            }),
            keeper: kept::keeper_program(),
        }
    }

    /// Set the grace period between SIGTERM and SIGKILL for time limits, cancels and
    /// reattach (shutdown takes its own).
    pub fn with_grace(mut self, grace: Duration) -> Self {
        self.grace = grace;
        self
    }

    /// The grace period in use.
    pub fn grace(&self) -> Duration {
        self.grace
    }

    /// The host name recorded in handles and completions.
    pub fn host(&self) -> &str {
        &self.shared.host
    }

    /// The workspace id children are tagged with.
    pub fn workspace_id(&self) -> &str {
        &self.shared.workspace_id
    }

    /// Attempt ids currently running under this executor.
    pub fn running_attempts(&self) -> Vec<i64> {
        let mut ids: Vec<i64> = self.shared.running().keys().copied().collect();
        ids.sort_unstable();
        ids
    }

    /// Processes of this workspace not started by this executor instance, as
    /// `(attempt id, pid)`: leftovers of an earlier orchestrator.
    pub fn find_orphans(&self) -> Vec<(i64, i32)> {
        let ours = self.shared.running();
        find_orphans(&self.shared.workspace_id)
            .into_iter()
            .filter(|(attempt, _)| !ours.contains_key(attempt))
            .collect()
    }

    /// End the given orphans (as returned by [`LocalExecutor::find_orphans`]) with this
    /// executor's grace period. Returns how many attempts had live processes.
    pub async fn kill_orphans(&self, orphans: &[(i64, i32)]) -> usize {
        kill_orphans(&self.shared.workspace_id, orphans, self.grace).await
    }

    fn launch_failed(&self, attempt_id: i64, message: String) -> Handle {
        let now = Utc::now();
        let _ = self.shared.completions.send(Completion {
            attempt_id,
            outcome: Outcome::LaunchFailed { message },
            started_at: None,
            ended_at: Some(now),
            host: Some(self.shared.host.clone()),
            usage: None,
        });
        Handle {
            executor: "local".to_string(),
            id: String::new(),
            host: self.shared.host.clone(),
        }
    }
}

/// Every process of workspace `workspace_id` (other than this one), as
/// `(attempt id, pid)`, sorted. Processes whose `RONDO_ATTEMPT_ID` is missing or not a
/// number are skipped. The engine calls this on startup: any attempt found here that the
/// store does not record as running was left by a crash between spawn and record.
pub fn find_orphans(workspace_id: &str) -> Vec<(i64, i32)> {
    let mut found: Vec<(i64, i32)> = sys::tagged_processes(workspace_id)
        .into_iter()
        .filter_map(|p| Some((p.attempt?.parse().ok()?, p.pid)))
        .collect();
    found.sort_unstable();
    found
}

/// End the attempts among `orphans` (TERM, `grace`, KILL), re-checking every process's
/// environment first so that a recycled pid is never signalled. Returns how many attempts
/// still had live processes.
pub async fn kill_orphans(workspace_id: &str, orphans: &[(i64, i32)], grace: Duration) -> usize {
    let mut attempts: Vec<i64> = orphans.iter().map(|(a, _)| *a).collect();
    attempts.sort_unstable();
    attempts.dedup();
    let mut ended = 0;
    for attempt in attempts {
        if terminate_attempt(workspace_id, attempt, None, grace).await {
            ended += 1;
        }
    }
    ended
}

/// TERM every process of the attempt (and its recorded group, when a live member of it is
/// verified to be ours), wait up to `grace` for them to go, then KILL what is left and wait
/// for that too. Returns whether any process was found.
async fn terminate_attempt(
    workspace_id: &str,
    attempt_id: i64,
    pgid: Option<i32>,
    grace: Duration,
) -> bool {
    let procs = sys::attempt_processes(workspace_id, attempt_id);
    if procs.is_empty() {
        return false;
    }
    // The recorded group may have lost its leader; members with our variables prove it is
    // still the attempt's group and not a recycled id.
    let verified_group = pgid.filter(|g| procs.iter().any(|p| p.pgrp == *g));
    let signal_all = |signal: i32| {
        if let Some(g) = verified_group {
            if let Err(err) = sys::signal_group(g, signal) {
                tracing::warn!(pgid = g, %err, "could not signal process group");
            }
        }
        sys::signal_attempt(workspace_id, attempt_id, signal)
    };
    signal_all(libc::SIGTERM);
    if wait_until_gone(workspace_id, attempt_id, Instant::now() + grace).await {
        return true;
    }
    signal_all(libc::SIGKILL);
    if !wait_until_gone(workspace_id, attempt_id, Instant::now() + AFTER_KILL).await {
        tracing::warn!(
            attempt_id,
            "processes of the attempt survived SIGKILL for {AFTER_KILL:?}"
        );
    }
    true
}

/// Poll until no live process of the attempt remains or `deadline` passes.
/// TERM the process group `pgid` (of our own child), wait up to `grace` for it to go, then
/// KILL it.
async fn end_bare_group(pgid: i32, grace: Duration) {
    let _ = sys::signal_group(pgid, libc::SIGTERM);
    let deadline = Instant::now() + grace;
    while sys::group_exists(pgid) && Instant::now() < deadline {
        tokio::time::sleep(POLL).await;
    }
    if sys::group_exists(pgid) {
        let _ = sys::signal_group(pgid, libc::SIGKILL);
    }
}

async fn wait_until_gone(workspace_id: &str, attempt_id: i64, deadline: Instant) -> bool {
    loop {
        if sys::attempt_processes(workspace_id, attempt_id).is_empty() {
            return true;
        }
        if Instant::now() >= deadline {
            return false;
        }
        tokio::time::sleep(POLL).await;
    }
}

/// Leftovers: processes of the attempt still alive after its program (leader of group
/// `pgid`) was reaped, or every process of it when rondo `ended` it. The common case
/// (nothing left in the group) costs one kill(2) call.
pub(crate) async fn end_leftovers(
    workspace_id: &str,
    attempt_id: i64,
    pgid: i32,
    ended: bool,
    grace: Duration,
) {
    if !(sys::group_exists(pgid) || ended) {
        return;
    }
    if !ended && !sys::attempt_processes(workspace_id, attempt_id).is_empty() {
        tracing::warn!(
            attempt_id,
            "program exited but left processes behind; ending them"
        );
    }
    if !terminate_attempt(workspace_id, attempt_id, Some(pgid), grace).await
        && sys::group_exists(pgid)
    {
        // No member was readable by its environment (a process can be unreadable for an
        // instant while it forks or execs), yet the group of our own child, just reaped,
        // still has members: it is ours, since a group id is not reused while any
        // process is in it.
        end_bare_group(pgid, grace).await;
    }
}

/// Map an exit status to an outcome.
fn outcome_of(status: ExitStatus) -> Outcome {
    use std::os::unix::process::ExitStatusExt;
    match (status.code(), status.signal()) {
        (Some(code), _) => Outcome::Exited { code },
        (None, Some(signal)) => Outcome::Signaled { signal },
        // Neither: stopped/continued statuses are not reported by wait here.
        (None, None) => Outcome::Lost {
            reason: format!("unrecognised wait status {status:?}"),
        },
    }
}

/// Everything the supervising task needs.
struct Supervised {
    child: Child,
    pgid: i32,
    attempt_id: i64,
    time_limit: Option<Duration>,
    grace: Duration,
    stop: mpsc::UnboundedReceiver<Stop>,
    started_at: chrono::DateTime<Utc>,
    shared: Arc<Shared>,
    logs: Vec<KeptLog>,
    _permit: OwnedSemaphorePermit,
}

/// One stream's copying task and the switch that ends it.
pub(crate) struct KeptLog {
    task: JoinHandle<std::io::Result<u64>>,
    stop: tokio::sync::oneshot::Sender<()>,
}

impl KeptLog {
    pub(crate) fn start(
        pipe: Option<impl tokio::io::AsyncRead + Unpin + Send + 'static>,
        file: File,
    ) -> Option<KeptLog> {
        let pipe = pipe?;
        let (stop, rx) = tokio::sync::oneshot::channel();
        let task = tokio::spawn(logs::keep_log(pipe, file, logs::log_keep(), rx));
        Some(KeptLog { task, stop })
    }

    /// Wait for the stream to end (up to [`LOG_DRAIN`]), then stop reading and write the
    /// kept tail.
    pub(crate) async fn finish(self, attempt_id: i64) {
        let KeptLog { mut task, stop } = self;
        let done = match tokio::time::timeout(LOG_DRAIN, &mut task).await {
            Ok(r) => r,
            Err(_) => {
                tracing::warn!(
                    attempt_id,
                    "a process outside the attempt still holds its log open; log cut here"
                );
                let _ = stop.send(());
                task.await
            }
        };
        if let Ok(Err(err)) = done {
            tracing::warn!(attempt_id, %err, "could not write the attempt's log");
        }
    }
}

/// End our own child's group: TERM, wait for the leader up to the grace period, KILL.
/// While the leader is unreaped its pid (= the group id) cannot be reused, so signalling
/// the group is safe.
async fn end_group(child: &mut Child, pgid: i32, grace: Duration) -> (Option<ExitStatus>, Instant) {
    if let Err(err) = sys::signal_group(pgid, libc::SIGTERM) {
        tracing::warn!(pgid, %err, "could not send SIGTERM");
    }
    let deadline = Instant::now() + grace;
    let status = match tokio::time::timeout_at(deadline, child.wait()).await {
        Ok(status) => status.ok(),
        Err(_) => {
            if let Err(err) = sys::signal_group(pgid, libc::SIGKILL) {
                tracing::warn!(pgid, %err, "could not send SIGKILL");
            }
            child.wait().await.ok()
        }
    };
    (status, deadline)
}

async fn supervise(mut s: Supervised) {
    let limit = async {
        match s.time_limit {
            Some(d) => tokio::time::sleep(d).await,
            None => std::future::pending().await,
        }
    };
    tokio::pin!(limit);
    let mut stop_open = true;
    // `ended` is the outcome rondo imposed (time limit or cancel), if any.
    let (status, ended, grace_deadline) = loop {
        tokio::select! {
            status = s.child.wait() => break (status.ok(), None, None),
            () = &mut limit => {
                let (status, deadline) = end_group(&mut s.child, s.pgid, s.grace).await;
                break (status, Some(Outcome::TimedOut), Some(deadline));
            }
            stop = s.stop.recv(), if stop_open => match stop {
                Some(Stop { grace }) => {
                    let (status, deadline) = end_group(&mut s.child, s.pgid, grace).await;
                    break (status, Some(Outcome::Cancelled { by: "rondo".to_string() }), Some(deadline));
                }
                None => stop_open = false,
            },
        }
    };
    let grace = match grace_deadline {
        Some(deadline) => deadline.saturating_duration_since(Instant::now()),
        None => s.grace,
    };
    end_leftovers(
        &s.shared.workspace_id,
        s.attempt_id,
        s.pgid,
        ended.is_some(),
        grace,
    )
    .await;
    for log in std::mem::take(&mut s.logs) {
        log.finish(s.attempt_id).await;
    }
    let outcome = match (ended, status) {
        (Some(o), _) => o,
        (None, Some(status)) => outcome_of(status),
        (None, None) => Outcome::Lost {
            reason: "waiting for the process failed".to_string(),
        },
    };
    let completion = Completion {
        attempt_id: s.attempt_id,
        outcome,
        started_at: Some(s.started_at),
        ended_at: Some(Utc::now()),
        host: Some(s.shared.host.clone()),
        usage: None,
    };
    s.shared.running().remove(&s.attempt_id);
    // The receiver may be gone (orchestrator stopping); nothing to report to then.
    let _ = s.shared.completions.send(completion);
}

fn create_output(workdir: &Path, name: &str) -> Result<File, ExecError> {
    let path = workdir.join(name);
    File::create(&path).map_err(|source| ExecError::Io { path, source })
}

#[async_trait::async_trait]
impl Executor for LocalExecutor {
    fn kind(&self) -> &'static str {
        "local"
    }

    fn slots(&self) -> usize {
        self.slots
    }

    /// Waits for a free slot, then spawns. A program that cannot be started still returns
    /// `Ok` (with an empty handle id); its [`Outcome::LaunchFailed`] completion follows on
    /// the channel like any other end.
    async fn launch(&self, req: LaunchRequest) -> Result<Handle, ExecError> {
        if self.closed.load(Ordering::SeqCst) {
            return Err(ExecError::Unavailable {
                what: format!("launch attempt {}", req.attempt_id),
                message: "the local executor is shutting down".to_string(),
            });
        }
        let Some(program) = req.argv.first() else {
            return Err(ExecError::Invalid(format!(
                "attempt {}: empty command line",
                req.attempt_id
            )));
        };
        let permit = Arc::clone(&self.semaphore)
            .acquire_owned()
            .await
            .map_err(|_| ExecError::Unavailable {
                what: format!("launch attempt {}", req.attempt_id),
                message: "the local executor is shutting down".to_string(),
            })?;
        if let Some(kp) = &self.keeper {
            return self.launch_kept(kp, req, permit).await;
        }
        let stdout = create_output(&req.workdir, "stdout.txt")?;
        let stderr = create_output(&req.workdir, "stderr.txt")?;
        let mut env: BTreeMap<String, String> = req.env.clone();
        env.insert(WORKSPACE_VAR.to_string(), self.shared.workspace_id.clone());
        env.insert(ATTEMPT_VAR.to_string(), req.attempt_id.to_string());

        let mut cmd = Command::new(program);
        cmd.args(&req.argv[1..])
            .current_dir(&req.workdir)
            .stdin(Stdio::null())
            .stdout(Stdio::piped())
            .stderr(Stdio::piped())
            .envs(&env)
            .process_group(0)
            .kill_on_drop(false);

        let started_at = Utc::now();
        // Hold the lock across spawn and insert so the task cannot remove its entry first.
        let mut running = self.shared.running();
        // Checked under the lock: shutdown sets `closed` before it drains this map.
        if self.closed.load(Ordering::SeqCst) {
            return Err(ExecError::Unavailable {
                what: format!("launch attempt {}", req.attempt_id),
                message: "the local executor is shutting down".to_string(),
            });
        }
        if running.contains_key(&req.attempt_id) {
            return Err(ExecError::Invalid(format!(
                "attempt {} is already running",
                req.attempt_id
            )));
        }
        let mut child = match cmd.spawn() {
            Ok(child) => child,
            Err(err) => {
                drop(running);
                drop(permit);
                let message = format!(
                    "cannot start program `{program}` in {}: {err}",
                    req.workdir.display()
                );
                return Ok(self.launch_failed(req.attempt_id, message));
            }
        };
        let Some(pid) = child.id() else {
            // Only possible once the child has been waited for, which nobody did yet.
            return Err(ExecError::Invalid(format!(
                "attempt {}: spawned child has no pid",
                req.attempt_id
            )));
        };
        let pgid = pid as i32;
        let logs = [
            KeptLog::start(child.stdout.take(), stdout),
            KeptLog::start(child.stderr.take(), stderr),
        ]
        .into_iter()
        .flatten()
        .collect();
        let (stop_tx, stop_rx) = mpsc::unbounded_channel();
        let task = tokio::spawn(supervise(Supervised {
            child,
            pgid,
            attempt_id: req.attempt_id,
            time_limit: req.time_limit,
            grace: self.grace,
            stop: stop_rx,
            started_at,
            shared: Arc::clone(&self.shared),
            logs,
            _permit: permit,
        }));
        running.insert(
            req.attempt_id,
            Running {
                stop: stop_tx,
                task,
            },
        );
        Ok(Handle {
            executor: "local".to_string(),
            id: pgid.to_string(),
            host: self.shared.host.clone(),
        })
    }

    async fn reattach(
        &self,
        attempt_id: i64,
        handle: &Handle,
        workdir: &Path,
    ) -> Result<Reattached, ExecError> {
        if handle.host != self.shared.host {
            return Err(ExecError::Unavailable {
                what: format!("reattach attempt {attempt_id}"),
                message: format!(
                    "it was started on host `{}` and this is `{}`; run rondo on `{}` so \
                     that its processes can be found and ended",
                    handle.host, self.shared.host, handle.host
                ),
            });
        }
        if self.shared.running().contains_key(&attempt_id) {
            return Ok(Reattached::Active);
        }
        if let Some(r) = self.reattach_kept(attempt_id, handle, workdir).await {
            return Ok(r);
        }
        let pgid = handle.id.parse::<i32>().ok();
        if terminate_attempt(&self.shared.workspace_id, attempt_id, pgid, self.grace).await {
            Ok(Reattached::Gone {
                reason: ORPHAN_ENDED.to_string(),
            })
        } else {
            Ok(Reattached::Gone {
                reason: "not running".to_string(),
            })
        }
    }

    async fn cancel(&self, attempt_id: i64, reason: &str) -> Result<(), ExecError> {
        let running = self.shared.running();
        let Some(entry) = running.get(&attempt_id) else {
            return Err(ExecError::Invalid(format!(
                "attempt {attempt_id} is not running on this executor"
            )));
        };
        tracing::info!(attempt_id, reason, "cancelling attempt");
        // A closed channel means the attempt is ending anyway.
        let _ = entry.stop.send(Stop { grace: self.grace });
        Ok(())
    }

    /// Ends the attempt's processes, verified by their environment, and waits for them.
    /// The attempt id is taken from the processes in the recorded group.
    async fn cancel_recorded(&self, handle: &Handle, reason: &str) -> Result<(), ExecError> {
        let Ok(pgid) = handle.id.parse::<i32>() else {
            // An empty id: the program never started.
            return Ok(());
        };
        if handle.host != self.shared.host {
            return Err(ExecError::Unavailable {
                what: format!("cancel process group {pgid}"),
                message: format!(
                    "it was started on host `{}` and this is `{}`; run the cancel there",
                    handle.host, self.shared.host
                ),
            });
        }
        let mut attempts: Vec<i64> = sys::tagged_processes(&self.shared.workspace_id)
            .into_iter()
            .filter(|p| p.pgrp == pgid)
            .filter_map(|p| p.attempt?.parse().ok())
            .collect();
        attempts.sort_unstable();
        attempts.dedup();
        for attempt in attempts {
            tracing::info!(
                attempt_id = attempt,
                pgid,
                reason,
                "cancelling recorded attempt"
            );
            let own = self
                .shared
                .running()
                .get(&attempt)
                .map(|r| r.stop.send(Stop { grace: self.grace }).is_ok());
            if own != Some(true) {
                terminate_attempt(&self.shared.workspace_id, attempt, Some(pgid), self.grace).await;
            }
        }
        Ok(())
    }

    async fn shutdown(&self, mode: Shutdown) -> Result<(), ExecError> {
        self.closed.store(true, Ordering::SeqCst);
        self.semaphore.close();
        let grace = match mode {
            Shutdown::Terminate { grace } => grace,
            // Local children cannot outlive the executor usefully; the next orchestrator
            // would end them as orphans. Leave them to that.
            Shutdown::Detach => return Ok(()),
        };
        let entries: Vec<Running> = self.shared.running().drain().map(|(_, r)| r).collect();
        for entry in &entries {
            let _ = entry.stop.send(Stop { grace });
        }
        for entry in entries {
            if let Err(err) = entry.task.await {
                tracing::warn!(%err, "attempt supervisor failed");
            }
        }
        Ok(())
    }
}
