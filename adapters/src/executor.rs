//! The executor contract: how the engine hands an attempt to something that runs it.
//!
//! An executor launches attempts, reports each one's end through a [`Completion`] sent on
//! the channel it was built with, re-attaches to attempts recorded by an earlier (killed)
//! orchestrator, and cancels. Local processes, Slurm and PBS implement the same trait.

use std::collections::BTreeMap;
use std::path::{Path, PathBuf};
use std::time::Duration;

use chrono::{DateTime, Utc};
use serde::{Deserialize, Serialize};

/// Batch resources of a stage, with Slurm's own option names where they exist.
///
/// The local executor uses only `time` (as a time limit) and the CPU count
/// (`ntasks × cpus-per-task`) for `{{cpus}}`; batch executors translate every field.
#[derive(Debug, Clone, Default, PartialEq, Eq, Serialize, Deserialize, schemars::JsonSchema)]
#[serde(deny_unknown_fields, rename_all = "kebab-case")]
pub struct Resources {
    /// Number of nodes (`--nodes`).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub nodes: Option<u32>,
    /// Number of tasks (`--ntasks`).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub ntasks: Option<u32>,
    /// CPUs per task (`--cpus-per-task`).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub cpus_per_task: Option<u32>,
    /// Memory per node, in Slurm's syntax, e.g. `4G` (`--mem`).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub mem: Option<String>,
    /// Wall-time limit as `[days-]hours:minutes:seconds`, `minutes:seconds` or `minutes` (`--time`).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub time: Option<String>,
    /// Partition (`--partition`).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub partition: Option<String>,
    /// Account to charge (`--account`).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub account: Option<String>,
    /// Quality of service (`--qos`).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub qos: Option<String>,
    /// Generic resources (`--gres`).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub gres: Option<String>,
    /// Node features (`--constraint`).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub constraint: Option<String>,
    /// Further `sbatch`/`qsub` arguments, passed as given (one argument per entry).
    #[serde(default, skip_serializing_if = "Vec::is_empty")]
    pub extra: Vec<String>,
    /// Prefix for parallel programs, e.g. `[srun]` or `[mpirun, -np, "{{tasks}}"]`.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub launcher: Option<Vec<String>>,
}

impl Resources {
    /// Fields set here override those of `defaults`; `extra` lists are concatenated.
    pub fn over(&self, defaults: &Resources) -> Resources {
        let mut extra = defaults.extra.clone();
        extra.extend(self.extra.iter().cloned());
        Resources {
            nodes: self.nodes.or(defaults.nodes),
            ntasks: self.ntasks.or(defaults.ntasks),
            cpus_per_task: self.cpus_per_task.or(defaults.cpus_per_task),
            mem: self.mem.clone().or_else(|| defaults.mem.clone()),
            time: self.time.clone().or_else(|| defaults.time.clone()),
            partition: self
                .partition
                .clone()
                .or_else(|| defaults.partition.clone()),
            account: self.account.clone().or_else(|| defaults.account.clone()),
            qos: self.qos.clone().or_else(|| defaults.qos.clone()),
            gres: self.gres.clone().or_else(|| defaults.gres.clone()),
            constraint: self
                .constraint
                .clone()
                .or_else(|| defaults.constraint.clone()),
            extra,
            launcher: self.launcher.clone().or_else(|| defaults.launcher.clone()),
        }
    }

    /// Total CPUs an attempt asks for: ntasks × cpus-per-task (each defaulting to 1).
    pub fn cpus(&self) -> u32 {
        self.ntasks
            .unwrap_or(1)
            .saturating_mul(self.cpus_per_task.unwrap_or(1))
    }
}

/// Everything an executor needs to run one attempt. The command is already rendered.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct LaunchRequest {
    /// The store's id of the attempt (unique within a workspace).
    pub attempt_id: i64,
    /// Human-readable name: campaign, point, iteration and stage (used for batch job names).
    pub job_name: String,
    /// Program and arguments; never re-parsed by a shell (a shell stage renders
    /// `["/bin/sh", "-c", quoted_script]` itself).
    pub argv: Vec<String>,
    /// The attempt's scratch directory; inputs are already placed in it.
    pub workdir: PathBuf,
    /// Extra environment variables for the program.
    pub env: BTreeMap<String, String>,
    /// Wall-time limit, if any.
    pub time_limit: Option<Duration>,
    /// Batch resources (merged with campaign defaults).
    pub resources: Resources,
    /// Local executor: whether the program may outlive the orchestrator (a SIGKILL of rondo
    /// leaves it running, and the next rondo watches it again or adopts its result), or is
    /// ended when the orchestrator is gone (`outlive-rondo: false`). Batch jobs ignore it.
    #[serde(default)]
    pub outlive: bool,
}

/// What the store records about a launched attempt so that it can be found again.
#[derive(Debug, Clone, PartialEq, Eq, Serialize, Deserialize)]
pub struct Handle {
    /// Executor kind: `local`, `slurm`, `pbs`.
    pub executor: String,
    /// Executor-specific id: a process-group id for `local`, a job id for batch systems.
    pub id: String,
    /// Host the attempt was launched from (local: where it runs).
    pub host: String,
}

/// How an attempt ended, as far as the executor can tell. The engine then checks outputs.
#[derive(Debug, Clone, PartialEq, Eq, Serialize, Deserialize)]
#[serde(tag = "kind", rename_all = "kebab-case")]
pub enum Outcome {
    /// The program exited with this status.
    Exited { code: i32 },
    /// The program was killed by this signal (not by rondo).
    Signaled { signal: i32 },
    /// The wall-time limit ended it (local limit or the scheduler's TIMEOUT).
    TimedOut,
    /// Cancelled by rondo (`rondo cancel`, shutdown) or by someone else (e.g. external scancel).
    Cancelled { by: String },
    /// The node it ran on failed.
    NodeFailure,
    /// The scheduler preempted it.
    Preempted,
    /// It could not be started (program missing, sbatch refused, ...).
    LaunchFailed { message: String },
    /// It vanished without a trace of its end (e.g. purged from the queue with no marker).
    Lost { reason: String },
}

impl Outcome {
    /// Whether a retry could help without the user changing anything.
    pub fn is_transient(&self) -> bool {
        matches!(
            self,
            Outcome::TimedOut | Outcome::NodeFailure | Outcome::Preempted | Outcome::Lost { .. }
        )
    }
}

/// The end of an attempt, sent by the executor on its completion channel.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Completion {
    /// Which attempt ended.
    pub attempt_id: i64,
    /// How it ended.
    pub outcome: Outcome,
    /// When the program started, if known (UTC).
    pub started_at: Option<DateTime<Utc>>,
    /// When it ended, if known (UTC).
    pub ended_at: Option<DateTime<Utc>>,
    /// The host it ran on, if known.
    pub host: Option<String>,
    /// What it cost, if measured.
    #[serde(default)]
    pub usage: Option<Usage>,
}

/// What an attempt cost: CPU time, peak memory and wall time of its program.
#[derive(Debug, Clone, Default, PartialEq, Serialize, Deserialize)]
pub struct Usage {
    /// CPU time in user mode, seconds.
    pub user_s: f64,
    /// CPU time in the kernel on its behalf, seconds.
    pub system_s: f64,
    /// Largest resident set, KiB, if known.
    pub max_rss_kib: Option<u64>,
    /// Wall time, seconds, if measured.
    pub wall_s: Option<f64>,
    /// Where the figures come from: `wait4` (a local keeper), `job-script` (a batch job
    /// script's own measure) or `sacct` (the scheduler's accounting).
    #[serde(default)]
    pub source: String,
}

/// The state of an attempt recorded as launched by an earlier orchestrator.
#[derive(Debug, Clone, PartialEq)]
pub enum Reattached {
    /// Still queued or running; its [`Completion`] will arrive on the channel later.
    Active,
    /// Still queued or running under this handle, which the store did not know (the
    /// orchestrator died between submitting and recording it): record it, then as `Active`.
    Found(Handle),
    /// It ended while nobody watched; here is how.
    Finished(Completion),
    /// It is gone without a trace (or was ended by the reattach, e.g. a local orphan):
    /// record it as lost and run it again.
    Gone { reason: String },
}

/// What to do with running attempts when the orchestrator stops.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Shutdown {
    /// End every running attempt (TERM, grace period, KILL) — the local executor's behaviour.
    Terminate { grace: Duration },
    /// Leave batch jobs queued and running; a later `rondo run` re-attaches to them.
    Detach,
}

/// Errors an executor reports to the engine.
#[derive(Debug, thiserror::Error)]
pub enum ExecError {
    /// The scheduler or the system refused or failed; retrying later may help.
    #[error("{what}: {message}")]
    Unavailable { what: String, message: String },
    /// The request cannot be carried out as given (bad resources, missing program).
    #[error("{0}")]
    Invalid(String),
    /// An I/O error with the path it concerns.
    #[error("{path}: {source}")]
    Io {
        path: PathBuf,
        source: std::io::Error,
    },
}

/// The contract between the engine and whatever runs attempts.
#[async_trait::async_trait]
pub trait Executor: Send + Sync {
    /// `local`, `slurm`, `pbs`: recorded with every attempt.
    fn kind(&self) -> &'static str;

    /// How many attempts may be outstanding at once.
    fn slots(&self) -> usize;

    /// Start an attempt. Returns once it is handed off (spawned / submitted); its end comes
    /// later as a [`Completion`] on the executor's channel.
    async fn launch(&self, req: LaunchRequest) -> Result<Handle, ExecError>;

    /// Find an attempt launched by an earlier orchestrator again.
    async fn reattach(
        &self,
        attempt_id: i64,
        handle: &Handle,
        workdir: &Path,
    ) -> Result<Reattached, ExecError>;

    /// Cancel one outstanding attempt; its [`Completion`] (Cancelled) follows on the channel.
    async fn cancel(&self, attempt_id: i64, reason: &str) -> Result<(), ExecError>;

    /// Cancel an attempt known only from the store (e.g. `rondo cancel` while no
    /// orchestrator runs): a batch job is `scancel`ed, a local process group is terminated.
    async fn cancel_recorded(&self, handle: &Handle, reason: &str) -> Result<(), ExecError>;

    /// Stop: terminate or detach from everything outstanding.
    async fn shutdown(&self, mode: Shutdown) -> Result<(), ExecError>;
}
