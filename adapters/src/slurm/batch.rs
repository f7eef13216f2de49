//! Machinery shared by the batch executors (Slurm, PBS): the generated job script with its
//! start and exit markers, shell quoting, the single poller task that watches every
//! outstanding job with one status query per interval (with backoff while the controller
//! does not answer), and the mapping from a batch system's final state to an [`Outcome`].
//!
//! A batch system plugs in through [`BatchSystem`]: it renders its directives, submits,
//! queries many jobs at once, cancels, and optionally looks up a job that has left the queue.

use std::collections::HashMap;
use std::path::{Path, PathBuf};
use std::sync::atomic::{AtomicU64, Ordering};
use std::sync::{Arc, Mutex};
use std::time::Duration;

use chrono::{DateTime, Utc};
use tokio::sync::mpsc::UnboundedSender;

use crate::executor::{
    Completion, ExecError, Handle, LaunchRequest, Outcome, Reattached, Shutdown, Usage,
};

/// Implements [`crate::executor::Executor`] for a batch executor type that holds its
/// [`BatchCore`] in a field `core`: every call goes to the core, which does the work the
/// same way for every batch system.
#[macro_export]
macro_rules! batch_executor {
    ($ty:ty, $kind:literal) => {
        #[async_trait::async_trait]
        impl $crate::executor::Executor for $ty {
            fn kind(&self) -> &'static str {
                $kind
            }

            fn slots(&self) -> usize {
                self.core.slots()
            }

            async fn launch(
                &self,
                req: $crate::executor::LaunchRequest,
            ) -> Result<$crate::executor::Handle, $crate::executor::ExecError> {
                self.core.launch(req).await
            }

            async fn reattach(
                &self,
                attempt_id: i64,
                handle: &$crate::executor::Handle,
                workdir: &std::path::Path,
            ) -> Result<$crate::executor::Reattached, $crate::executor::ExecError> {
                self.core.reattach(attempt_id, handle, workdir).await
            }

            async fn cancel(
                &self,
                attempt_id: i64,
                reason: &str,
            ) -> Result<(), $crate::executor::ExecError> {
                self.core.cancel(attempt_id, reason).await
            }

            async fn cancel_recorded(
                &self,
                handle: &$crate::executor::Handle,
                reason: &str,
            ) -> Result<(), $crate::executor::ExecError> {
                self.core.cancel_recorded(handle, reason).await
            }

            async fn shutdown(
                &self,
                mode: $crate::executor::Shutdown,
            ) -> Result<(), $crate::executor::ExecError> {
                self.core.shutdown(mode).await
            }
        }
    };
}

/// File (in the attempt's workdir) the job script writes when the program starts:
/// `<host> <UTC time>`.
pub const START_MARKER: &str = ".rondo-start";
/// File (in the attempt's workdir) the job script writes atomically when the program ends:
/// `<exit status> <UTC time>`.
pub const EXIT_MARKER: &str = ".rondo-exit";
/// The generated job script's file name in the workdir.
pub const SCRIPT_NAME: &str = "rondo-job.sh";
/// What the job script's `times` printed after the command: the shell's own user and
/// system time, then its children's (the command and what it waited for).
pub const TIMES_FILE: &str = ".rondo-times";

/// How a job stands according to the batch system.
#[derive(Debug, Clone, PartialEq, Eq)]
pub enum JobState {
    /// Queued, running, completing, held, suspended, requeued: not over yet.
    Active,
    /// Over, in this way.
    Ended(EndKind),
}

/// How a job ended according to the batch system (before the marker file is consulted).
#[derive(Debug, Clone, PartialEq, Eq)]
pub enum EndKind {
    /// It ran to its end (successfully or not); `exit` is the scheduler's `(status, signal)`
    /// if it reports one. The marker file, when present, has the final word.
    Ran { exit: Option<(i32, i32)> },
    /// The wall-time limit ended it.
    TimedOut,
    /// Its node failed.
    NodeFailure,
    /// It was preempted.
    Preempted,
    /// It was cancelled (by whom is decided by whether rondo asked for it).
    Cancelled,
    /// Some other final state the batch system reports (e.g. a boot failure), with its name.
    Other(String),
}

/// A batch system as seen by [`BatchCore`].
#[async_trait::async_trait]
pub trait BatchSystem: Send + Sync + 'static {
    /// `slurm`, `pbs`.
    fn kind(&self) -> &'static str;
    /// The scheduler directives (`#SBATCH ...`, `#PBS ...`) for this request, one per line.
    fn directives(&self, req: &LaunchRequest) -> Result<Vec<String>, ExecError>;
    /// Submit the script; returns the job id. `Unavailable` errors are retried.
    async fn submit(&self, script: &Path, req: &LaunchRequest) -> Result<String, ExecError>;
    /// The states of these jobs, in one call. Jobs the system no longer knows are absent.
    /// An `Err` means the controller did not answer (the poller backs off).
    async fn query(&self, ids: &[String]) -> Result<HashMap<String, JobState>, ExecError>;
    /// Ask the batch system to cancel this job.
    async fn cancel(&self, id: &str) -> Result<(), ExecError>;
    /// Last resort for a job absent from the queue and without an exit marker: a record of
    /// finished jobs, if the site keeps one. `None` when nothing is known.
    async fn lookup_finished(&self, id: &str) -> Option<EndKind>;
    /// What a finished job cost according to the batch system's accounting, where the site
    /// keeps it; `None` when it does not (then the job script's own measure stands).
    async fn accounting(&self, _id: &str) -> Option<Usage> {
        None
    }
    /// The job of this attempt, found by the tag every job carries, for an attempt whose
    /// job id was never recorded (rondo died between submitting and recording). `Ok(None)`
    /// when no such job is known.
    async fn find_attempt(&self, _attempt_id: i64) -> Result<Option<String>, ExecError> {
        Ok(None)
    }
}

/// Polling and submission settings common to the batch executors.
#[derive(Debug, Clone)]
pub struct PollSettings {
    /// Time between two status queries.
    pub poll_interval: Duration,
    /// Time between two looks at the watched jobs' exit markers (one `stat` per watched job
    /// on the shared file system, no scheduler call). A job whose marker appears is complete
    /// at once; the status query at `poll_interval` only tells queued, running and vanished
    /// jobs apart. `Duration::ZERO` turns marker watching off.
    pub marker_interval: Duration,
    /// Longest wait between queries while the controller does not answer.
    pub max_backoff: Duration,
    /// How often a submission refused as "unavailable" is tried again.
    pub submit_retries: u32,
    /// How many jobs may be outstanding at once.
    pub max_jobs: usize,
}

/// Quote one word for a POSIX shell so that it is passed through unchanged.
pub fn shell_quote(word: &str) -> String {
    if !word.is_empty()
        && word
            .bytes()
            .all(|b| b.is_ascii_alphanumeric() || b"-_./=:,+@%".contains(&b))
    {
        return word.to_string();
    }
    format!("'{}'", word.replace('\'', "'\\''"))
}

/// A job name safe for scheduler options: letters, digits and `._-/:+=` kept, anything else
/// (whitespace, quotes, `#`) becomes `_`; at most 120 characters.
pub fn sanitize_job_name(name: &str) -> String {
    let mut out: String = name
        .chars()
        .map(|c| {
            if c.is_ascii_alphanumeric() || "._-/:+=".contains(c) {
                c
            } else {
                '_'
            }
        })
        .take(120)
        .collect();
    if out.is_empty() {
        out.push_str("rondo");
    }
    out
}

/// Replace `{{cpus}}` and `{{tasks}}` in the launcher prefix with the request's numbers.
/// For callers that build a command themselves: [`job_script`] does not add the launcher,
/// because the engine puts it into [`LaunchRequest::argv`] already (for every executor).
pub fn render_launcher(req: &LaunchRequest) -> Vec<String> {
    let cpus = req.resources.cpus().to_string();
    let tasks = req.resources.ntasks.unwrap_or(1).to_string();
    req.resources
        .launcher
        .iter()
        .flatten()
        .map(|w| w.replace("{{cpus}}", &cpus).replace("{{tasks}}", &tasks))
        .collect()
}

/// The whole job script: shebang, directives, then a body that records the start, exports the
/// environment, runs `argv` as given (already launcher-prefixed by the engine) with every word
/// shell-quoted, and writes the exit status to [`EXIT_MARKER`] through a temporary file and a
/// rename.
pub fn job_script(directives: &[String], req: &LaunchRequest) -> Result<String, ExecError> {
    if req.argv.is_empty() {
        return Err(ExecError::Invalid(format!(
            "attempt {}: empty command",
            req.attempt_id
        )));
    }
    let wd = req.workdir.display().to_string();
    let start = shell_quote(&format!("{wd}/{START_MARKER}"));
    let exit = shell_quote(&format!("{wd}/{EXIT_MARKER}"));
    let times = shell_quote(&format!("{wd}/{TIMES_FILE}"));
    let mut s = String::from("#!/bin/sh\n");
    for d in directives {
        s.push_str(d);
        s.push('\n');
    }
    s.push_str(&format!(
        "# Generated by rondo for attempt {} ({}).\n",
        req.attempt_id,
        sanitize_job_name(&req.job_name)
    ));
    s.push_str(&format!("cd {} || exit 111\n", shell_quote(&wd)));
    // A job the scheduler requeued (preemption, `scontrol requeue`, a node failure) runs
    // this script again from the top: an exit marker its killed first run managed to write
    // must not stand for this run.
    s.push_str(&format!("rm -f {exit} {times}\n"));
    s.push_str(&format!(
        "printf '%s %s\\n' \"$(hostname)\" \"$(date -u +%Y-%m-%dT%H:%M:%SZ)\" > {start}.tmp.$$ && mv -f {start}.tmp.$$ {start}\n"
    ));
    for (k, v) in &req.env {
        if k.is_empty() || !k.bytes().all(|b| b.is_ascii_alphanumeric() || b == b'_') {
            return Err(ExecError::Invalid(format!(
                "attempt {}: environment variable name {k:?} is not a shell name",
                req.attempt_id
            )));
        }
        s.push_str(&format!("export {k}={}\n", shell_quote(v)));
    }
    let words: Vec<String> = req.argv.iter().map(|w| shell_quote(w)).collect();
    s.push_str(&words.join(" "));
    s.push('\n');
    s.push_str("rc=$?\n");
    // The POSIX `times` builtin: CPU time of the shell and of its children, the command
    // among them; no external program, before the exit marker so that it is there once the
    // marker is.
    s.push_str(&format!("times > {times} 2>/dev/null\n"));
    s.push_str(&format!(
        "printf '%s %s\\n' \"$rc\" \"$(date -u +%Y-%m-%dT%H:%M:%SZ)\" > {exit}.tmp.$$ && mv -f {exit}.tmp.$$ {exit}\n"
    ));
    s.push_str("exit \"$rc\"\n");
    Ok(s)
}

/// Write a file atomically: a temporary name in the same directory, then a rename.
pub fn write_atomic(path: &Path, text: &str) -> Result<(), ExecError> {
    let tmp = path.with_extension("tmp");
    std::fs::write(&tmp, text).map_err(|source| ExecError::Io {
        path: tmp.clone(),
        source,
    })?;
    std::fs::rename(&tmp, path).map_err(|source| ExecError::Io {
        path: path.to_path_buf(),
        source,
    })
}

/// The start marker: host and start time, if the program started.
pub fn read_start(workdir: &Path) -> Option<(String, Option<DateTime<Utc>>)> {
    let text = std::fs::read_to_string(workdir.join(START_MARKER)).ok()?;
    let mut it = text.split_whitespace();
    let host = it.next()?.to_string();
    let at = it.next().and_then(|t| t.parse::<DateTime<Utc>>().ok());
    Some((host, at))
}

/// Whether an exit marker's status settles the job on its own. A status of 128 or more is
/// what a shell reports for a command ended by a signal: with process tracking that signals
/// a job's processes one by one, the job script can outlive its command just long enough to
/// write such a marker when the scheduler kills the job to requeue it (preemption,
/// `scontrol requeue`). Such a marker is believed only once the scheduler no longer lists
/// the job as queued or running.
pub fn marker_settles(code: i32) -> bool {
    (0..128).contains(&code)
}

/// The exit marker: exit status and end time, if the program ended.
pub fn read_exit(workdir: &Path) -> Option<(i32, Option<DateTime<Utc>>)> {
    let text = std::fs::read_to_string(workdir.join(EXIT_MARKER)).ok()?;
    let mut it = text.split_whitespace();
    let code = it.next()?.parse::<i32>().ok()?;
    let at = it.next().and_then(|t| t.parse::<DateTime<Utc>>().ok());
    Some((code, at))
}

/// Name of the machine rondo runs on.
pub fn this_host() -> String {
    std::fs::read_to_string("/proc/sys/kernel/hostname")
        .map(|s| s.trim().to_string())
        .ok()
        .filter(|s| !s.is_empty())
        .or_else(|| std::env::var("HOSTNAME").ok())
        .unwrap_or_else(|| "localhost".to_string())
}

/// What a client command printed and how it exited.
#[derive(Debug, Clone)]
pub struct CommandOutput {
    /// Whether it exited with status 0.
    pub success: bool,
    /// Its exit status as text (for messages).
    pub status: String,
    /// Standard output.
    pub stdout: String,
    /// Standard error, trimmed.
    pub stderr: String,
}

/// Run a command and keep both outputs whatever its exit status (some clients, e.g. `qstat`
/// with an unknown job among several, print the known ones and exit non-zero). `Err` when it
/// could not be run or did not finish within `timeout`.
pub async fn run_full(
    program: &str,
    args: &[String],
    timeout: Duration,
) -> Result<CommandOutput, String> {
    let mut cmd = tokio::process::Command::new(program);
    cmd.args(args)
        .stdin(std::process::Stdio::null())
        .kill_on_drop(true);
    match tokio::time::timeout(timeout, cmd.output()).await {
        Err(_) => Err(format!("{program} did not answer within {timeout:?}")),
        Ok(Err(e)) => Err(format!("cannot run {program}: {e}")),
        Ok(Ok(o)) => Ok(CommandOutput {
            success: o.status.success(),
            status: o.status.to_string(),
            stdout: String::from_utf8_lossy(&o.stdout).into_owned(),
            stderr: String::from_utf8_lossy(&o.stderr).trim().to_string(),
        }),
    }
}

/// Run a command, returning stdout; a non-zero exit becomes an `Err` with stderr.
pub async fn run_capture(
    program: &str,
    args: &[String],
    timeout: Duration,
) -> Result<String, String> {
    let mut cmd = tokio::process::Command::new(program);
    cmd.args(args)
        .stdin(std::process::Stdio::null())
        .kill_on_drop(true);
    let out = match tokio::time::timeout(timeout, cmd.output()).await {
        Err(_) => return Err(format!("{program} did not answer within {timeout:?}")),
        Ok(Err(e)) => return Err(format!("cannot run {program}: {e}")),
        Ok(Ok(o)) => o,
    };
    if out.status.success() {
        Ok(String::from_utf8_lossy(&out.stdout).into_owned())
    } else {
        let err = String::from_utf8_lossy(&out.stderr).trim().to_string();
        Err(format!("{program} failed ({}): {err}", out.status))
    }
}

#[derive(Debug, Clone)]
struct Watched {
    attempt_id: i64,
    workdir: PathBuf,
    /// Set when rondo asked to cancel it.
    cancelled_by_us: bool,
}

/// What a batch executor has asked of the scheduler so far (for tests, diagnostics and the
/// trace): how many jobs it submitted, how many status queries it made and how many of those
/// got no answer.
#[derive(Debug, Clone, Copy, Default, PartialEq, Eq)]
pub struct BatchStats {
    /// Jobs submitted (accepted by the scheduler).
    pub submissions: u64,
    /// Submission calls that failed and were retried.
    pub failed_submissions: u64,
    /// Status queries (one per poll for all watched jobs, plus one per reattach).
    pub queries: u64,
    /// Status queries the controller did not answer.
    pub failed_queries: u64,
}

#[derive(Default)]
struct Counters {
    submissions: AtomicU64,
    failed_submissions: AtomicU64,
    queries: AtomicU64,
    failed_queries: AtomicU64,
}

struct Shared<B: BatchSystem> {
    system: B,
    settings: PollSettings,
    tx: UnboundedSender<Completion>,
    jobs: Mutex<HashMap<String, Watched>>,
    counters: Counters,
}

impl<B: BatchSystem> Shared<B> {
    async fn query(&self, ids: &[String]) -> Result<HashMap<String, JobState>, ExecError> {
        self.counters.queries.fetch_add(1, Ordering::Relaxed);
        let r = self.system.query(ids).await;
        if r.is_err() {
            self.counters.failed_queries.fetch_add(1, Ordering::Relaxed);
        }
        r
    }
}

/// A batch executor's state: the watched jobs and the poller task.
pub struct BatchCore<B: BatchSystem> {
    shared: Arc<Shared<B>>,
    poller: Mutex<Option<tokio::task::JoinHandle<()>>>,
    host: String,
}

impl<B: BatchSystem> BatchCore<B> {
    /// A core that sends completions on `tx`. The poller starts with the first watched job.
    pub fn new(system: B, settings: PollSettings, tx: UnboundedSender<Completion>) -> Self {
        BatchCore {
            shared: Arc::new(Shared {
                system,
                settings,
                tx,
                jobs: Mutex::new(HashMap::new()),
                counters: Counters::default(),
            }),
            poller: Mutex::new(None),
            host: this_host(),
        }
    }

    /// The batch system.
    pub fn system(&self) -> &B {
        &self.shared.system
    }

    /// How many jobs may be outstanding.
    pub fn slots(&self) -> usize {
        self.shared.settings.max_jobs
    }

    /// Job ids currently watched (for tests and diagnostics).
    pub fn watched(&self) -> Vec<String> {
        lock(&self.shared.jobs).keys().cloned().collect()
    }

    /// What this executor has asked of the scheduler so far.
    pub fn stats(&self) -> BatchStats {
        let c = &self.shared.counters;
        BatchStats {
            submissions: c.submissions.load(Ordering::Relaxed),
            failed_submissions: c.failed_submissions.load(Ordering::Relaxed),
            queries: c.queries.load(Ordering::Relaxed),
            failed_queries: c.failed_queries.load(Ordering::Relaxed),
        }
    }

    fn ensure_poller(&self) {
        let mut p = lock(&self.poller);
        if p.as_ref().is_none_or(|h| h.is_finished()) {
            let shared = Arc::clone(&self.shared);
            *p = Some(tokio::spawn(poll_loop(shared)));
        }
    }

    fn watch(&self, id: String, attempt_id: i64, workdir: PathBuf) {
        lock(&self.shared.jobs).insert(
            id,
            Watched {
                attempt_id,
                workdir,
                cancelled_by_us: false,
            },
        );
        self.ensure_poller();
    }

    /// Write the script into the workdir, submit it (retrying while the controller is
    /// unavailable), and start watching the job.
    pub async fn launch(&self, req: LaunchRequest) -> Result<Handle, ExecError> {
        let directives = self.shared.system.directives(&req)?;
        let script = job_script(&directives, &req)?;
        let path = req.workdir.join(SCRIPT_NAME);
        // A stale marker from an earlier attempt in the same directory would be misread.
        for m in [START_MARKER, EXIT_MARKER] {
            let _ = std::fs::remove_file(req.workdir.join(m));
        }
        write_atomic(&path, &script)?;
        let mut delay = self
            .shared
            .settings
            .poll_interval
            .min(Duration::from_secs(5));
        let mut tries = 0;
        let id = loop {
            match self.shared.system.submit(&path, &req).await {
                Ok(id) => {
                    self.shared
                        .counters
                        .submissions
                        .fetch_add(1, Ordering::Relaxed);
                    break id;
                }
                Err(ExecError::Unavailable { what, message })
                    if tries < self.shared.settings.submit_retries =>
                {
                    tries += 1;
                    self.shared
                        .counters
                        .failed_submissions
                        .fetch_add(1, Ordering::Relaxed);
                    tracing::warn!(%what, %message, tries, "submission failed; retrying");
                    tokio::time::sleep(delay).await;
                    delay = (delay * 2).min(self.shared.settings.max_backoff);
                }
                Err(e) => return Err(e),
            }
        };
        self.watch(id.clone(), req.attempt_id, req.workdir.clone());
        Ok(Handle {
            executor: self.shared.system.kind().to_string(),
            id,
            host: self.host.clone(),
        })
    }

    /// Find a job recorded by an earlier orchestrator.
    pub async fn reattach(
        &self,
        attempt_id: i64,
        handle: &Handle,
        workdir: &Path,
    ) -> Result<Reattached, ExecError> {
        if handle.executor != self.shared.system.kind() {
            return Err(ExecError::Invalid(format!(
                "attempt {attempt_id} was launched by the `{}` executor, not `{}`",
                handle.executor,
                self.shared.system.kind()
            )));
        }
        if handle.id.trim().is_empty() {
            // Killed between submission and recording the job id: the job may exist all the
            // same. Its marker tells if it ended; else ask the scheduler for the job tagged
            // with this attempt, so it is adopted instead of submitted a second time.
            if read_exit(workdir).is_some() {
                return Ok(Reattached::Finished(completion(
                    attempt_id, workdir, None, false,
                )));
            }
            return match self.shared.system.find_attempt(attempt_id).await? {
                Some(id) => {
                    let found = Handle {
                        id,
                        ..handle.clone()
                    };
                    match Box::pin(self.reattach(attempt_id, &found, workdir)).await? {
                        Reattached::Active => Ok(Reattached::Found(found)),
                        other => Ok(other),
                    }
                }
                None => Ok(Reattached::Gone {
                    reason: "no job id was recorded for it and the scheduler knows no job of it"
                        .into(),
                }),
            };
        }
        // The controller may be restarting just when rondo is: retry like a submission.
        let mut delay = self
            .shared
            .settings
            .poll_interval
            .min(Duration::from_secs(5));
        let mut tries = 0;
        let states = loop {
            match self.shared.query(std::slice::from_ref(&handle.id)).await {
                Ok(s) => break s,
                Err(ExecError::Unavailable { what, message })
                    if tries < self.shared.settings.submit_retries =>
                {
                    tries += 1;
                    tracing::warn!(%what, %message, tries, "status query failed; retrying");
                    tokio::time::sleep(delay).await;
                    delay = (delay * 2).min(self.shared.settings.max_backoff);
                }
                Err(e) => return Err(e),
            }
        };
        match states.get(&handle.id) {
            // The exit marker is the job script's last act: once it exists the command has
            // ended, even while the scheduler still lists the job (e.g. COMPLETING).
            Some(JobState::Active)
                if read_exit(workdir).is_some_and(|(code, _)| marker_settles(code)) =>
            {
                Ok(Reattached::Finished(completion(
                    attempt_id, workdir, None, false,
                )))
            }
            Some(JobState::Active) => {
                self.watch(handle.id.clone(), attempt_id, workdir.to_path_buf());
                Ok(Reattached::Active)
            }
            Some(JobState::Ended(end)) => Ok(Reattached::Finished(completion(
                attempt_id,
                workdir,
                Some(end.clone()),
                false,
            ))),
            None => {
                if read_exit(workdir).is_some() {
                    return Ok(Reattached::Finished(completion(
                        attempt_id, workdir, None, false,
                    )));
                }
                match self.shared.system.lookup_finished(&handle.id).await {
                    Some(end) => Ok(Reattached::Finished(completion(
                        attempt_id,
                        workdir,
                        Some(end),
                        false,
                    ))),
                    None => Ok(Reattached::Gone {
                        reason: format!(
                            "{} job {} is no longer known to the scheduler and left no exit marker",
                            self.shared.system.kind(),
                            handle.id
                        ),
                    }),
                }
            }
        }
    }

    /// Cancel a watched attempt; its completion comes from the poller.
    pub async fn cancel(&self, attempt_id: i64, reason: &str) -> Result<(), ExecError> {
        let id = {
            let mut jobs = lock(&self.shared.jobs);
            let found = jobs
                .iter_mut()
                .find(|(_, w)| w.attempt_id == attempt_id)
                .map(|(id, w)| {
                    w.cancelled_by_us = true;
                    id.clone()
                });
            found.ok_or_else(|| {
                ExecError::Invalid(format!("attempt {attempt_id} is not outstanding here"))
            })?
        };
        tracing::info!(job = %id, attempt_id, reason, "cancelling");
        self.shared.system.cancel(&id).await
    }

    /// Cancel a job known only from the store.
    pub async fn cancel_recorded(&self, handle: &Handle, reason: &str) -> Result<(), ExecError> {
        tracing::info!(job = %handle.id, reason, "cancelling recorded job");
        if let Some(w) = lock(&self.shared.jobs).get_mut(&handle.id) {
            w.cancelled_by_us = true;
        }
        self.shared.system.cancel(&handle.id).await
    }

    /// Detach (jobs keep running) or cancel everything outstanding; the poller stops.
    pub async fn shutdown(&self, mode: Shutdown) -> Result<(), ExecError> {
        if let Some(h) = lock(&self.poller).take() {
            h.abort();
        }
        if let Shutdown::Terminate { .. } = mode {
            let jobs: Vec<(String, Watched)> = lock(&self.shared.jobs).drain().collect();
            let mut first_err = None;
            for (id, w) in jobs {
                if let Err(e) = self.shared.system.cancel(&id).await {
                    first_err.get_or_insert(e);
                }
                let (host, started_at) =
                    read_start(&w.workdir).map_or((None, None), |(h, t)| (Some(h), t));
                let _ = self.shared.tx.send(Completion {
                    attempt_id: w.attempt_id,
                    outcome: Outcome::Cancelled { by: "rondo".into() },
                    started_at,
                    ended_at: Some(Utc::now()),
                    host,
                    usage: None,
                });
            }
            if let Some(e) = first_err {
                return Err(e);
            }
        } else {
            lock(&self.shared.jobs).clear();
        }
        Ok(())
    }
}

impl<B: BatchSystem> Drop for BatchCore<B> {
    fn drop(&mut self) {
        if let Some(h) = lock(&self.poller).take() {
            h.abort();
        }
    }
}

fn lock<T>(m: &Mutex<T>) -> std::sync::MutexGuard<'_, T> {
    m.lock().unwrap_or_else(|poisoned| poisoned.into_inner())
}

/// The completion of a job that has ended, from the scheduler's final state (if known) and
/// the markers in its workdir.
pub fn completion(
    attempt_id: i64,
    workdir: &Path,
    end: Option<EndKind>,
    cancelled_by_us: bool,
) -> Completion {
    let (host, started_at) = read_start(workdir).map_or((None, None), |(h, t)| (Some(h), t));
    let exit = read_exit(workdir);
    let ended_at = exit
        .as_ref()
        .and_then(|(_, t)| *t)
        .or_else(|| Some(Utc::now()));
    let outcome = match (&end, &exit) {
        (Some(EndKind::TimedOut), _) => Outcome::TimedOut,
        (Some(EndKind::NodeFailure), _) => Outcome::NodeFailure,
        (Some(EndKind::Preempted), _) => Outcome::Preempted,
        (Some(EndKind::Cancelled), _) => Outcome::Cancelled {
            by: if cancelled_by_us {
                "rondo".to_string()
            } else {
                "external (the scheduler or another user)".to_string()
            },
        },
        (_, Some((code, _))) => Outcome::Exited { code: *code },
        (
            Some(EndKind::Ran {
                exit: Some((_, sig)),
            }),
            None,
        ) if *sig != 0 => Outcome::Signaled { signal: *sig },
        (
            Some(EndKind::Ran {
                exit: Some((code, _)),
            }),
            None,
        ) if started_at.is_some() => Outcome::Exited { code: *code },
        (Some(EndKind::Ran { .. }), None) => Outcome::Lost {
            reason: "the job ended without writing its exit marker".to_string(),
        },
        (Some(EndKind::Other(state)), None) => Outcome::Lost {
            reason: format!("the job ended in state {state} without writing its exit marker"),
        },
        (None, None) => Outcome::Lost {
            reason: "the job left the queue without writing its exit marker".to_string(),
        },
    };
    let usage = script_usage(workdir, started_at, exit.as_ref().and_then(|(_, t)| *t));
    Completion {
        attempt_id,
        outcome,
        started_at,
        ended_at,
        host,
        usage,
    }
}

/// Minutes and seconds as the shell's `times` prints them (`1m2.345s`, `0m0.01s`).
fn times_seconds(word: &str) -> Option<f64> {
    let (m, s) = word.strip_suffix('s')?.split_once('m')?;
    Some(m.parse::<f64>().ok()? * 60.0 + s.parse::<f64>().ok()?)
}

/// The job script's own measure (see [`TIMES_FILE`]): the children's user and system
/// time from `times`, and the wall time between the start and exit markers (whole
/// seconds). No peak memory: `times` has none.
pub fn script_usage(
    workdir: &Path,
    started: Option<DateTime<Utc>>,
    ended: Option<DateTime<Utc>>,
) -> Option<Usage> {
    let text = std::fs::read_to_string(workdir.join(TIMES_FILE)).ok()?;
    let children = text.lines().nth(1)?;
    let mut it = children.split_whitespace().map(times_seconds);
    let (user, system) = (it.next()??, it.next()??);
    let wall = match (started, ended) {
        (Some(a), Some(b)) => (b - a).to_std().ok().map(|d| d.as_secs_f64()),
        _ => None,
    };
    Some(Usage {
        user_s: user,
        system_s: system,
        max_rss_kib: None,
        wall_s: wall,
        source: "job-script".to_string(),
    })
}

/// The exit marker's path in a job's workdir (see [`job_script`]).
fn exit_marker(workdir: &Path) -> PathBuf {
    workdir.join(EXIT_MARKER)
}

/// Report the end of job `id` (if still watched) and stop watching it. `false` when the
/// engine has gone away.
async fn finish<B: BatchSystem>(shared: &Shared<B>, id: &str, end: Option<EndKind>) -> bool {
    let Some(w) = lock(&shared.jobs).remove(id) else {
        return true;
    };
    let mut c = completion(w.attempt_id, &w.workdir, end, w.cancelled_by_us);
    if let Some(acct) = shared.system.accounting(id).await {
        c.usage = Some(match c.usage.take() {
            // The accounting's figures win; the script's fill what it lacks.
            Some(own) => Usage {
                max_rss_kib: acct.max_rss_kib.or(own.max_rss_kib),
                wall_s: acct.wall_s.or(own.wall_s),
                ..acct
            },
            None => acct,
        });
    }
    tracing::debug!(job = %id, attempt_id = w.attempt_id, outcome = ?c.outcome, "job ended");
    shared.tx.send(c).is_ok()
}

/// The one poller of a batch executor. Two clocks: every `marker_interval` it looks for the
/// exit markers of the watched jobs (cheap: a `stat` each, on the shared file system), so a
/// short job's end is noticed within about a second; every `poll_interval` it asks the
/// scheduler about all of them in one call, to notice jobs that ended without a marker
/// (time limit, node failure, cancellation, preemption). The scheduler therefore sees one
/// status query per poll interval, however many jobs end in between.
async fn poll_loop<B: BatchSystem>(shared: Arc<Shared<B>>) {
    let interval = shared.settings.poll_interval;
    let marker = shared.settings.marker_interval;
    let tick = if marker.is_zero() {
        interval
    } else {
        marker.min(interval)
    };
    let mut delay = interval;
    let mut next_query = tokio::time::Instant::now() + delay;
    // Jobs whose exit marker waits for the scheduler's word (see [`marker_settles`]).
    let mut confirming: std::collections::HashSet<String> = std::collections::HashSet::new();
    loop {
        let now = tokio::time::Instant::now();
        tokio::time::sleep(next_query.saturating_duration_since(now).min(tick)).await;
        let ids: Vec<(String, PathBuf)> = lock(&shared.jobs)
            .iter()
            .map(|(id, w)| (id.clone(), w.workdir.clone()))
            .collect();
        if ids.is_empty() {
            delay = interval;
            next_query = tokio::time::Instant::now() + delay;
            continue;
        }
        if !marker.is_zero() {
            for (id, workdir) in &ids {
                // The marker is written by rename, so its existence means it is complete.
                if !exit_marker(workdir).exists() {
                    confirming.remove(id);
                    continue;
                }
                match read_exit(workdir) {
                    Some((code, _)) if marker_settles(code) => {
                        if !finish(&shared, id, None).await {
                            return;
                        }
                    }
                    // A signal's status (or a marker that does not parse): the scheduler
                    // decides, at a query brought forward once per job so that a command
                    // that really died of a signal is not held a whole poll interval.
                    _ => {
                        if confirming.insert(id.clone()) {
                            next_query = next_query.min(tokio::time::Instant::now() + tick * 2);
                        }
                    }
                }
            }
        }
        if tokio::time::Instant::now() < next_query {
            continue;
        }
        let ids: Vec<String> = lock(&shared.jobs).keys().cloned().collect();
        if ids.is_empty() {
            next_query = tokio::time::Instant::now() + interval;
            continue;
        }
        let states = match shared.query(&ids).await {
            Ok(s) => {
                delay = interval;
                next_query = tokio::time::Instant::now() + delay;
                s
            }
            Err(e) => {
                delay = (delay * 2).min(shared.settings.max_backoff.max(interval));
                next_query = tokio::time::Instant::now() + delay;
                tracing::warn!(error = %e, next_try = ?delay, "status query failed; backing off");
                continue;
            }
        };
        for id in ids {
            let end = match states.get(&id) {
                Some(JobState::Active) => continue,
                Some(JobState::Ended(end)) => Some(end.clone()),
                None => None,
            };
            let Some(w) = lock(&shared.jobs).get(&id).cloned() else {
                continue;
            };
            let end = match end {
                Some(e) => Some(e),
                None if read_exit(&w.workdir).is_some() => None,
                None => shared.system.lookup_finished(&id).await,
            };
            confirming.remove(&id);
            if !finish(&shared, &id, end).await {
                return;
            }
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn quoting_keeps_every_word_intact() {
        assert_eq!(shell_quote("plain-word_1.txt"), "plain-word_1.txt");
        assert_eq!(shell_quote(""), "''");
        assert_eq!(shell_quote("a b"), "'a b'");
        assert_eq!(shell_quote("it's"), "'it'\\''s'");
        assert_eq!(shell_quote("$HOME;rm -rf"), "'$HOME;rm -rf'");
    }

    #[test]
    fn job_names_are_sanitized() {
        assert_eq!(
            sanitize_job_name("eos/V=0.95 T=300/it 3/solver"),
            "eos/V=0.95_T=300/it_3/solver"
        );
        assert_eq!(sanitize_job_name("a'b\"c#d"), "a_b_c_d");
        assert_eq!(sanitize_job_name(""), "rondo");
        assert_eq!(sanitize_job_name(&"x".repeat(500)).len(), 120);
    }

    #[test]
    fn script_runs_quoted_words_and_writes_markers_atomically() {
        let req = LaunchRequest {
            attempt_id: 7,
            job_name: "c/p/1/s".into(),
            argv: vec![
                "mpirun".into(),
                "-np".into(),
                "4".into(),
                "/bin/echo".into(),
                "a b".into(),
                "$X".into(),
            ],
            workdir: "/tmp/w d".into(),
            env: [("OMP_NUM_THREADS".to_string(), "2".to_string())].into(),
            time_limit: None,
            outlive: false,
            resources: crate::executor::Resources {
                ntasks: Some(4),
                launcher: Some(vec!["mpirun".into(), "-np".into(), "{{tasks}}".into()]),
                ..Default::default()
            },
        };
        let s = job_script(&["#SBATCH --ntasks=4".into()], &req).expect("script");
        assert!(s.starts_with("#!/bin/sh\n#SBATCH --ntasks=4\n"));
        // The launcher in `resources` is not added a second time.
        assert!(s.contains("\nmpirun -np 4 /bin/echo 'a b' '$X'\n"));
        assert_eq!(s.matches("mpirun").count(), 1);
        assert_eq!(
            render_launcher(&req),
            ["mpirun".to_string(), "-np".into(), "4".into()]
        );
        assert!(s.contains("export OMP_NUM_THREADS=2\n"));
        assert!(s.contains("> '/tmp/w d/.rondo-exit'.tmp.$$ && mv -f '/tmp/w d/.rondo-exit'.tmp.$$ '/tmp/w d/.rondo-exit'"));
        let bad = LaunchRequest {
            env: [("A B".to_string(), "1".to_string())].into(),
            ..req
        };
        assert!(matches!(job_script(&[], &bad), Err(ExecError::Invalid(_))));
    }

    #[test]
    fn the_job_script_measures_its_commands_cpu_time_with_times() {
        let d = tempfile::tempdir().expect("tempdir");
        let req = LaunchRequest {
            attempt_id: 8,
            job_name: "c/p/1/s".into(),
            argv: vec![
                "/bin/sh".into(),
                "-c".into(),
                "i=0; while [ $i -lt 300000 ]; do i=$((i+1)); done".into(),
            ],
            workdir: d.path().to_path_buf(),
            env: Default::default(),
            time_limit: None,
            outlive: false,
            resources: Default::default(),
        };
        let script = d.path().join(SCRIPT_NAME);
        std::fs::write(&script, job_script(&[], &req).expect("script")).expect("write");
        let st = std::process::Command::new("/bin/sh")
            .arg(&script)
            .status()
            .expect("run the job script");
        assert!(st.success());
        let (_, started) = read_start(d.path()).expect("start marker");
        let (_, ended) = read_exit(d.path()).expect("exit marker");
        let u = script_usage(d.path(), started, ended).expect("times recorded");
        assert_eq!(u.source, "job-script");
        assert!(u.user_s > 0.0, "a busy loop used CPU: {u:?}");
        assert!(u.wall_s.is_some_and(|w| w >= 0.0), "{u:?}");
        assert_eq!(times_seconds("1m2.5s"), Some(62.5));
        assert_eq!(times_seconds("0m0.000000s"), Some(0.0));
    }
}
