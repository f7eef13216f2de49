//! The engine: turns a validated campaign and its workspace into attempts, hands them to an
//! executor, records every transition in the store, applies the stopping rules, and resumes
//! from whatever the store holds.
//!
//! Crash safety rests on three rules. (1) Whatever runs can be found by a later
//! orchestrator: a built-in's or batch job's attempt row (argv, parameters, program hash,
//! input hashes) is committed before it starts; a local child carries the workspace and
//! attempt ids in its environment, and its row is written with the record of its end (or at
//! the next tick), so children a crash left without a row are ended by their tag at the next
//! start. (2) An attempt becomes `succeeded` in one transaction that also records its output
//! artifacts and metrics; artifacts are copied into the content-addressed store before that
//! transaction, so the record never names a missing file. Successes of attempts under a
//! second are committed in groups (the next tick, `BATCH_MAX` of them, or before the engine
//! next reads the store); a crash loses at most those, and they are repeated. (3) Everything
//! an attempt consumes is an artifact of an earlier succeeded attempt (or a start file) and
//! every random seed is derived from campaign, point, iteration and stage, so re-running a
//! lost attempt gives the same inputs and the same numbers.
//!
//! Attempts lost to a crash, and attempts ended because rondo itself was stopped, do not use
//! up a stage's retries; only real failures (exit status, signal, time limit, bad outputs,
//! scheduler failures) do.

use std::collections::{BTreeMap, HashMap, VecDeque};
use std::path::{Path, PathBuf};
use std::sync::Arc;
use std::time::Duration;

use anyhow::{bail, Context, Result};
use chrono::{DateTime, Utc};
use rondo_adapters::executor::{
    Completion, Executor, Handle, LaunchRequest, Outcome, Reattached, Shutdown,
};
use rondo_adapters::local::LocalExecutor;
use rondo_adapters::pbs::{PbsConfig, PbsExecutor};
use rondo_adapters::slurm::{SlurmConfig, SlurmExecutor};
use rondo_adapters::template::Template;
use sqlx::SqlitePool;
use tokio::sync::mpsc;

use crate::artifacts::{hash_file, ArtifactStore};
use crate::builtins;
use crate::failpoint::{self, Failpoint};
use crate::progress::Progress;
use crate::scratch;
use crate::spec::{Campaign, Placement, PointSpec, Section, Source, Stage, StageKind};
use crate::stop::{self, Sample};
use crate::store::{self, AttemptState, IterationState, PointState};
use crate::validate::{self, Metric};

mod campaign;
mod handoff;
mod iterate;
mod launch;
mod programs;
mod resume;
pub mod revise;
mod settle;
mod shutdown;
mod warm;
mod workspace;

use iterate::{record_verdict, verdict_failpoints};
use programs::ProgramCache;
use settle::{check_outputs, Checked, OutputJob};
use store::attempts::{FolderMembers, LaunchFields, NewAttempt, StoredOutput};
pub use workspace::{prepare_workspace, values_json, PreparedWorkspace};

pub use crate::RONDO_VERSION;

/// Which executor runs the command stages.
#[derive(Debug, Clone)]
pub enum ExecutorChoice {
    /// Local child processes.
    Local,
    /// Slurm batch jobs.
    Slurm(Box<SlurmConfig>),
    /// PBS batch jobs (not yet run against a real PBS server).
    Pbs(Box<PbsConfig>),
}

impl ExecutorChoice {
    fn kind(&self) -> &'static str {
        match self {
            ExecutorChoice::Local => "local",
            ExecutorChoice::Slurm(_) => "slurm",
            ExecutorChoice::Pbs(_) => "pbs",
        }
    }
}

/// What `rondo cancel` writes into the workspace's cancel request, which a running
/// orchestrator reads at every tick (so it reaches a run on another node too).
#[derive(Debug, Clone, PartialEq, Eq, serde::Serialize, serde::Deserialize)]
pub struct CancelRequest {
    /// The reason given with `--reason`.
    pub reason: String,
    /// Who asked: user, host and pid of the `rondo cancel`.
    pub by: String,
    /// When.
    pub at: String,
}

impl CancelRequest {
    /// Read a cancel request; a file that does not parse (written by hand, or an older
    /// rondo) still cancels, with its text as the reason.
    pub fn read(path: &Path) -> Option<CancelRequest> {
        let text = std::fs::read_to_string(path).ok()?;
        Some(serde_json::from_str(&text).unwrap_or_else(|_| {
            let written = std::fs::metadata(path)
                .and_then(|m| m.modified())
                .map(|t| store::time_text(t.into()))
                .unwrap_or_else(|_| store::now());
            CancelRequest {
                reason: text.trim().chars().take(500).collect(),
                by: "unknown".into(),
                at: written,
            }
        }))
    }
}

/// Options of `rondo run`.
#[derive(Debug, Clone)]
pub struct RunOptions {
    /// Workspace folder.
    pub workspace: PathBuf,
    /// Executor.
    pub executor: ExecutorChoice,
    /// Most attempts outstanding at once.
    pub jobs: usize,
    /// Give failed points a fresh set of retries.
    pub retry_failed: bool,
    /// Keep scratch directories of succeeded attempts.
    pub keep_scratch: bool,
    /// Grace period between SIGTERM and SIGKILL for local children.
    pub grace: Duration,
    /// Set when rondo runs inside a self-continuing Slurm allocation (`rondo submit`).
    pub allocation: Option<rondo_adapters::slurm::allocation::AllocationEnv>,
    /// Accept a revision of the campaign file that changes its physics (`--accept-revision`).
    pub accept_revision: bool,
}

/// How a run ended.
#[derive(Debug, Clone, Default, PartialEq, Eq)]
pub struct RunSummary {
    /// Points per final state.
    pub states: BTreeMap<PointState, usize>,
    /// Stopped by a signal before every point stopped.
    pub interrupted: bool,
    /// Stopped by `rondo cancel`.
    pub cancelled: bool,
    /// The reason `rondo cancel` gave.
    pub cancelled_because: Option<String>,
    /// Inside an allocation: the job id of the continuation submitted at the warning signal.
    pub continued_as: Option<String>,
    /// Stages outside the loop (`after-point:`, `after-campaign:`) that failed every
    /// attempt in this run (the next `rondo run` runs them again).
    pub after_failed: usize,
}

impl RunSummary {
    /// Whether every point converged.
    pub fn all_converged(&self) -> bool {
        !self.interrupted
            && !self.cancelled
            && self
                .states
                .iter()
                .all(|(s, n)| *s == PointState::Converged || *n == 0)
    }

    /// The counts keyed and ordered by the states' texts (as the log and the `run-ended`
    /// event show them).
    pub fn by_text(&self) -> BTreeMap<&'static str, usize> {
        self.states.iter().map(|(s, n)| (s.as_str(), *n)).collect()
    }
}

/// The workspace's folders and files.
#[derive(Debug, Clone)]
pub struct Paths {
    /// The workspace.
    pub root: PathBuf,
    /// `rondo.db`.
    pub db: PathBuf,
    /// Artifact store.
    pub store: PathBuf,
    /// Scratch directories.
    pub scratch: PathBuf,
    /// A file whose presence asks a running orchestrator to cancel.
    pub cancel_request: PathBuf,
}

impl Paths {
    /// The paths of a workspace folder.
    pub fn of(root: &Path) -> Paths {
        Paths {
            root: root.to_path_buf(),
            db: root.join(store::DB_FILE),
            store: root.join("store"),
            scratch: root.join("scratch"),
            cancel_request: root.join("cancel-request"),
        }
    }
}

/// Default workspace of a campaign file: `<name>.rondo` beside it.
pub fn default_workspace(campaign_file: &Path) -> PathBuf {
    let stem = campaign_file
        .file_stem()
        .map(|s| s.to_string_lossy().into_owned())
        .unwrap_or_else(|| "campaign".into());
    campaign_file
        .parent()
        .unwrap_or(Path::new("."))
        .join(format!("{stem}.rondo"))
}

/// BLAKE3 of the campaign text (hex).
pub fn spec_hash(text: &str) -> String {
    blake3::hash(text.as_bytes()).to_hex().to_string()
}

/// Where a point stands in memory.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
enum PointPhase {
    /// Has work to do.
    Active,
    /// Converged or capped, its `after-point:` stages still to run (on its last good
    /// iteration, which `iteration` names).
    After,
    /// Stopped (converged, capped, failed, cancelled) with nothing left to run.
    Done,
}

/// Active points whose iteration the live status line lists.
const SHOWN_POINTS: usize = 12;

/// Metric samples per good iteration (and the current one), for the stopping rules and
/// the schedules.
type History = BTreeMap<u32, BTreeMap<String, Sample>>;

#[derive(Debug)]
struct PointRun {
    spec: PointSpec,
    phase: PointPhase,
    iteration: u32,
    next_stage: usize,
    outstanding: Option<i64>,
    /// Highest attempt number recorded per stage in the current iteration. This run is the
    /// workspace's only writer (the lock), so the store need not be asked each time.
    attempts: Vec<u32>,
    /// The point's metric history, read from the store once (on first use) and then kept up
    /// to date as stages succeed; `None` until read.
    history: Option<History>,
    /// The first good iteration whose stopping rules were met (start of the final window);
    /// valid once `history` is read.
    first_met: Option<u32>,
    /// Per stage: the program of its last succeeded attempt (read from the store at the
    /// start of a run, then kept up to date), so a build that changed between iterations
    /// stops the point instead of mixing into it.
    built: Vec<Option<BuiltWith>>,
}

/// The program an attempt ran: path, BLAKE3 and version text, as recorded.
#[derive(Debug, Clone, PartialEq, Eq)]
struct BuiltWith {
    iteration: u32,
    path: String,
    /// BLAKE3 of the program, empty when it could not be computed.
    hash: String,
    /// Why the hash could not be computed (recorded as `program_unknown`).
    unknown: Option<String>,
    version: Option<String>,
}

impl BuiltWith {
    /// Whether the hash says what the file was.
    fn known(&self) -> bool {
        self.unknown.is_none() && !self.hash.is_empty()
    }
}

impl PointRun {
    fn new(spec: &PointSpec, stages: usize) -> PointRun {
        PointRun {
            spec: spec.clone(),
            phase: PointPhase::Active,
            iteration: 1,
            next_stage: 0,
            outstanding: None,
            attempts: vec![0; stages],
            history: None,
            first_met: None,
            built: vec![None; stages],
        }
    }
}

/// What the stopping rules decided for a point's finished iteration: computed before the
/// transaction that records it, applied in memory after the commit.
struct Verdict {
    iteration: u32,
    decision: stop::Decision,
    /// The point stops: its new state and the reason.
    fate: Option<(PointState, String)>,
    /// One-line summary of the rules' changes for the log.
    summary: String,
    first_met: Option<u32>,
}

/// A local attempt's launch not yet written to the store. Recording it costs a transaction
/// per attempt; most short attempts end before it would matter, and their end is recorded
/// with everything the launch knew. Longer ones are written at the next tick. A crash before
/// that leaves the attempt `planned`; resume finds its processes by their environment tag.
#[derive(Debug, Clone)]
struct UnrecordedLaunch {
    handle_id: String,
    host: String,
    started_at: String,
}

/// Successes of attempts that ran shorter than this are committed together (at the next
/// half-second tick, after [`BATCH_MAX`] of them, or before the engine next reads the
/// store); longer ones at once. A crash loses at most half a second of short work, which
/// the next run repeats with the same numbers; nothing that took long is ever held back.
const SHORT_ATTEMPT: Duration = Duration::from_secs(1);

/// Most successes held in one group commit.
const BATCH_MAX: usize = 256;

/// An attempt in flight.
#[derive(Debug, Clone)]
struct InFlight {
    point: usize,
    stage: usize,
    iteration: u32,
    attempt: u32,
    workdir: PathBuf,
    /// The program it runs.
    built: BuiltWith,
    /// Runs as a local child where rondo runs (`placement: host` under a batch executor).
    on_host: bool,
}

/// A success as settle records it.
pub(super) struct Success {
    metrics: Vec<Metric>,
    /// The outputs, stored as artifacts (empty until stored).
    outs: Vec<StoredOutput>,
    /// The members of the folder outputs among them (empty until stored).
    folders: Vec<FolderMembers>,
    started: Option<DateTime<Utc>>,
    ended: Option<DateTime<Utc>>,
    host: Option<String>,
    event: Option<String>,
}

/// How an attempt ended, after output checks.
enum Ended {
    /// It succeeded (outputs and metrics checked).
    Ok(Success),
    Failed {
        kind: String,
        message: String,
        exit_status: Option<i32>,
        started: Option<DateTime<Utc>>,
        ended: Option<DateTime<Utc>>,
        host: Option<String>,
        /// Lost or stopped by rondo: does not use up a retry.
        free: bool,
        /// Final state of the attempt row.
        state: AttemptState,
    },
}

struct Engine<'a> {
    campaign: &'a Campaign,
    opts: &'a RunOptions,
    paths: Paths,
    /// The store: every write and read goes through it (reads only after a flush).
    ledger: store::Ledger,
    artifacts: ArtifactStore,
    executor: Arc<dyn Executor>,
    /// Under a batch executor: the local executor of the stages with `placement: host`.
    on_host: Option<Arc<dyn Executor>>,
    host: String,
    points: Vec<PointRun>,
    ready: VecDeque<usize>,
    inflight: HashMap<i64, InFlight>,
    programs: ProgramCache,
    /// rondo's own executable and its BLAKE3 (the program of built-in stages), hashed on
    /// first use: a release binary is tens of megabytes.
    rondo_exe: (PathBuf, Option<Result<String, String>>),
    progress: Progress,
    parameters: serde_json::Map<String, serde_json::Value>,
    unrecorded: HashMap<i64, UnrecordedLaunch>,
    /// The id the next attempt gets (ids are chosen here: the workspace lock makes this
    /// orchestrator the only writer of attempts).
    next_id: i64,
    workspace_id: String,
    scratch: scratch::Pool,
    /// Where the blocking pool hands back attempts whose outputs it checked and stored.
    checked_tx: mpsc::UnboundedSender<Checked>,
    /// The campaign's retention policies (`keep:`), applied after each good iteration.
    policies: crate::retention::Policies,
    /// Whether the workspace's last writer ended cleanly (`PreparedWorkspace`).
    ended_cleanly: bool,
    /// Attempts on the blocking pool (output checks and storing, built-ins): in flight, but
    /// holding no executor slot.
    storing: std::collections::HashSet<i64>,
    /// What ended attempts cost, from their completions, until their final rows are written.
    usage: HashMap<i64, rondo_adapters::executor::Usage>,
    /// The campaign's hooks (run beside the loop, never waited for in it).
    hooks: crate::hooks::Hooks,
    /// The allow-listed environment recorded with every attempt of this run.
    env_json: String,
    /// Stages outside the loop (`after-point:`, `after-campaign:`) that used up their
    /// retries in this run.
    after_failed: usize,
    /// Resident programs running, per (point, stage) index.
    residents: HashMap<(usize, usize), crate::resident::Process>,
    /// Hand-offs to resident programs being awaited, per attempt.
    handoffs: HashMap<i64, handoff::Handoff>,
    /// The campaign file's revision this run goes on under (recorded with every attempt).
    revision: i64,
}

/// Run (or continue) a campaign in its workspace until every point stops, a signal arrives,
/// or `rondo cancel` asks to stop.
pub async fn run(campaign: &Campaign, opts: &RunOptions, progress: Progress) -> Result<RunSummary> {
    let paths = Paths::of(&opts.workspace);
    let before_lock = store::now();
    let ws = prepare_workspace(campaign, &paths, opts.accept_revision).await?;
    // The campaign under its revision: the points with the store's ids (a revision adds
    // points after the recorded ones, whatever their place in the sweep).
    let revised = Campaign {
        points: ws.points.clone(),
        ..campaign.clone()
    };
    let campaign = &revised;
    // A cancel request left from before this run is void: running again means go on. One
    // written since this run took the lock (`rondo cancel` found it holding it) stands.
    if CancelRequest::read(&paths.cancel_request).is_some_and(|r| r.at < before_lock) {
        let _ = std::fs::remove_file(&paths.cancel_request);
    }
    std::fs::create_dir_all(&paths.scratch)
        .with_context(|| format!("{}: cannot create", paths.scratch.display()))?;
    let (tx, rx) = mpsc::unbounded_channel::<Completion>();
    let executor: Arc<dyn Executor> = match &opts.executor {
        ExecutorChoice::Local => Arc::new(
            LocalExecutor::new(opts.jobs, ws.workspace_id.clone(), tx.clone())
                .with_grace(opts.grace),
        ),
        ExecutorChoice::Slurm(cfg) => {
            let mut cfg = (**cfg).clone();
            cfg.max_jobs = cfg.max_jobs.min(opts.jobs.max(1));
            Arc::new(SlurmExecutor::new(cfg, ws.workspace_id.clone(), tx.clone()))
        }
        ExecutorChoice::Pbs(cfg) => {
            let mut cfg = (**cfg).clone();
            cfg.max_jobs = cfg.max_jobs.min(opts.jobs.max(1));
            Arc::new(PbsExecutor::new(cfg, tx.clone()))
        }
    };
    let on_host = host_executor(campaign, opts, &ws.workspace_id, &tx);
    let rondo_exe = std::env::current_exe().unwrap_or_else(|_| PathBuf::from("rondo"));
    let mut parameters = serde_json::Map::new();
    for (k, v) in &campaign.parameters {
        parameters.insert(k.clone(), v.to_json());
    }
    let paths_scratch = paths.scratch.clone();
    let (checked_tx, checked_rx) = mpsc::unbounded_channel::<Checked>();
    let mut engine = Engine {
        campaign,
        opts,
        paths,
        ledger: store::Ledger::new(ws.pool.clone()),
        artifacts: ws.artifacts.clone(),
        executor,
        on_host,
        host: store::hostname(),
        points: Vec::new(),
        ready: VecDeque::new(),
        inflight: HashMap::new(),
        programs: ProgramCache::default(),
        rondo_exe: (rondo_exe, None),
        progress,
        parameters,
        unrecorded: HashMap::new(),
        next_id: 0,
        workspace_id: ws.workspace_id.clone(),
        scratch: scratch::Pool::open(&paths_scratch)?,
        env_json: crate::environment::recorded_json(),
        checked_tx,
        policies: crate::retention::Policies::of(campaign),
        storing: Default::default(),
        usage: Default::default(),
        hooks: crate::hooks::Hooks::new(campaign, &opts.workspace),
        after_failed: 0,
        residents: HashMap::new(),
        handoffs: HashMap::new(),
        revision: ws.revision,
        ended_cleanly: ws.ended_cleanly,
    };
    engine
        .event(
            "run-started",
            None,
            None,
            None,
            &format!(
                "pid {} on {}; executor {}; jobs {}",
                std::process::id(),
                engine.host,
                opts.executor.kind(),
                opts.jobs
            ),
        )
        .await?;
    let result = engine.main(rx, checked_rx).await;
    let summary = match result {
        Ok(s) => s,
        Err(e) => {
            let _ = engine
                .executor
                .shutdown(Shutdown::Terminate { grace: opts.grace })
                .await;
            let _ = engine
                .event("run-error", None, None, None, &format!("{e:#}"))
                .await;
            engine.progress.finish();
            return Err(e);
        }
    };
    let done = (!summary.interrupted && !summary.cancelled).then(|| summary.by_text());
    engine
        .hooks
        .finish(&mut engine.ledger, done.as_ref())
        .await?;
    engine
        .event(
            "run-ended",
            None,
            None,
            None,
            &format!("{:?}", summary.by_text()),
        )
        .await?;
    engine.progress.finish();
    engine.ledger.close().await;
    // Closed cleanly, still under the lock: the next start may skip the page check.
    store::seal::seal(&engine.paths.db);
    drop(ws);
    Ok(summary)
}

/// Under a batch executor, the local executor for stages with `placement: host`: at most
/// half the cores of this machine (at least one) and at most `--jobs` at once, since that
/// machine may be a login node that others share.
fn host_executor(
    campaign: &Campaign,
    opts: &RunOptions,
    workspace_id: &str,
    tx: &mpsc::UnboundedSender<Completion>,
) -> Option<Arc<dyn Executor>> {
    let batch = !matches!(opts.executor, ExecutorChoice::Local);
    let wanted = campaign
        .stages
        .iter()
        .any(|s| !s.kind.is_builtin() && s.placement == Placement::Host);
    if !(batch && wanted) {
        return None;
    }
    let cores = std::thread::available_parallelism().map_or(1, |n| n.get());
    let slots = (cores / 2).clamp(1, opts.jobs.max(1));
    Some(Arc::new(
        LocalExecutor::new(slots, workspace_id.to_string(), tx.clone()).with_grace(opts.grace),
    ))
}

impl Engine<'_> {
    /// Whether a stage's attempts run where rondo runs although the campaign runs on a batch
    /// system.
    fn runs_on_host(&self, stage: &Stage) -> bool {
        self.on_host.is_some() && !stage.kind.is_builtin() && stage.placement == Placement::Host
    }

    /// The executor of an attempt.
    fn executor_for(&self, on_host: bool) -> Arc<dyn Executor> {
        match (&self.on_host, on_host) {
            (Some(local), true) => local.clone(),
            _ => self.executor.clone(),
        }
    }

    async fn main(
        &mut self,
        mut rx: mpsc::UnboundedReceiver<Completion>,
        mut checked: mpsc::UnboundedReceiver<Checked>,
    ) -> Result<RunSummary> {
        self.restore().await?;
        self.reconcile().await?;
        self.end_untracked_children().await?;
        self.retain_everywhere().await?;
        self.next_id = self.ledger.flush().await?.next_attempt_id().await?;
        let mut sigint = tokio::signal::unix::signal(tokio::signal::unix::SignalKind::interrupt())
            .context("cannot install the SIGINT handler")?;
        let mut sigterm = tokio::signal::unix::signal(tokio::signal::unix::SignalKind::terminate())
            .context("cannot install the SIGTERM handler")?;
        // A closed terminal (SIGHUP) stops like SIGTERM: children ended, records complete.
        let mut sighup = tokio::signal::unix::signal(tokio::signal::unix::SignalKind::hangup())
            .context("cannot install the SIGHUP handler")?;
        // Inside an allocation, Slurm's warning signal (USR1) means: stop, and continue in
        // the next job of the chain. Installed early: USR1 would otherwise end the process.
        let mut usr1 = match &self.opts.allocation {
            Some(_) => Some(
                rondo_adapters::slurm::allocation::warning_signal()
                    .context("cannot install the USR1 handler")?,
            ),
            None => None,
        };
        let mut warned = false;
        let mut tick = tokio::time::interval(Duration::from_millis(500));
        tick.set_missed_tick_behavior(tokio::time::MissedTickBehavior::Delay);
        let mut interrupted = false;
        let mut cancelled: Option<CancelRequest> = None;
        loop {
            self.schedule().await?;
            self.end_idle_residents().await?;
            self.show();
            if self.inflight.is_empty() && self.points.iter().all(|p| p.phase == PointPhase::Done) {
                break;
            }
            if self.inflight.is_empty() && self.ready.is_empty() {
                bail!("internal: no attempt in flight and no point ready, yet not every point stopped");
            }
            tokio::select! {
                c = rx.recv() => match c {
                    Some(c) => self.on_completion(c).await?,
                    None => bail!("the executor's completion channel closed"),
                },
                c = checked.recv() => match c {
                    Some(c) => self.on_checked(c).await?,
                    None => bail!("internal: the output channel closed"),
                },
                _ = sigint.recv() => { interrupted = true; break; }
                _ = sigterm.recv() => { interrupted = true; break; }
                _ = sighup.recv() => { interrupted = true; break; }
                _ = async {
                    match usr1.as_mut() {
                        Some(s) => { s.recv().await; }
                        None => std::future::pending::<()>().await,
                    }
                } => { interrupted = true; warned = true; break; }
                _ = tick.tick() => {
                    self.record_launches().await?;
                    self.hooks.tick(&mut self.ledger).await?;
                    if let Some(r) = CancelRequest::read(&self.paths.cancel_request) {
                        cancelled = Some(r);
                        break;
                    }
                }
            }
        }
        self.ledger.flush().await?;
        let mut continued_as = None;
        if !(interrupted || cancelled.is_some()) {
            self.stop_residents("every point stopped").await?;
        }
        if interrupted || cancelled.is_some() {
            self.stop_everything(&mut rx, &mut checked, cancelled.as_ref())
                .await?;
            if warned {
                continued_as = self.continue_allocation().await?;
            }
        } else {
            interrupted = self.after_campaign().await?;
        }
        let states: BTreeMap<PointState, usize> = self
            .ledger
            .flush()
            .await?
            .point_state_counts()
            .await?
            .into_iter()
            .collect();
        Ok(RunSummary {
            states,
            interrupted,
            cancelled: cancelled.is_some(),
            cancelled_because: cancelled.map(|r| r.reason),
            continued_as,
            after_failed: self.after_failed,
        })
    }

    /// Append an event to the log (after everything held back).
    async fn event(
        &mut self,
        kind: &str,
        point: Option<&str>,
        iteration: Option<u32>,
        attempt: Option<i64>,
        detail: &str,
    ) -> Result<()> {
        self.ledger
            .write(Failpoint::EventRecorded, |s| {
                s.event(kind, point, iteration, attempt, detail)
            })
            .await
    }

    fn show(&mut self) {
        if !self.progress.live() {
            return;
        }
        let mut active = 0;
        let mut done = 0;
        let mut its = Vec::new();
        for p in &self.points {
            match p.phase {
                PointPhase::Active => {
                    active += 1;
                    if its.len() < SHOWN_POINTS {
                        its.push(format!("{}:{}", p.spec.id, p.iteration));
                    }
                }
                PointPhase::After | PointPhase::Done => done += 1,
            }
        }
        let more = if active > its.len() { " …" } else { "" };
        self.progress.status(format!(
            "{done}/{} points stopped · {active} active · {} attempts running · {}{more}",
            self.points.len(),
            self.inflight.len(),
            its.join(" ")
        ));
    }
}
