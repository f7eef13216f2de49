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
use sqlx::{Row, SqlitePool};
use tokio::sync::mpsc;

use crate::artifacts::{hash_file, ArtifactStore};
use crate::builtins;
use crate::progress::Progress;
use crate::scratch;
use crate::spec::{Campaign, PointSpec, Source, Stage, StageKind};
use crate::stop::{self, Sample};
use crate::store::{self, AttemptState, IterationState, PointState};
use crate::validate::{self, Metric};

/// The rondo version recorded with every attempt.
pub const RONDO_VERSION: &str = env!("CARGO_PKG_VERSION");

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

/// Hashes and version texts of programs, recomputed when the file changes.
#[derive(Default)]
struct ProgramCache {
    map: HashMap<PathBuf, (FileKey, String, Option<String>)>,
}

type FileKey = (u64, u64, i64, i64);

fn file_key(path: &Path) -> Option<FileKey> {
    use std::os::unix::fs::MetadataExt;
    let m = std::fs::metadata(path).ok()?;
    Some((m.dev(), m.ino(), m.mtime(), m.mtime_nsec()))
}

impl ProgramCache {
    async fn get(&mut self, path: &Path, version_flag: Option<&str>) -> (String, Option<String>) {
        let key = file_key(path).unwrap_or((0, 0, 0, 0));
        if let Some((k, h, v)) = self.map.get(path) {
            if *k == key {
                return (h.clone(), v.clone());
            }
        }
        let hash = match hash_file(path) {
            Ok((h, _)) => h,
            Err(e) => format!("unreadable: {e}"),
        };
        let version = match version_flag {
            Some(flag) => Some(version_text(path, flag).await),
            None => None,
        };
        self.map
            .insert(path.to_path_buf(), (key, hash.clone(), version.clone()));
        (hash, version)
    }
}

async fn version_text(path: &Path, flag: &str) -> String {
    let run = tokio::process::Command::new(path)
        .arg(flag)
        .stdin(std::process::Stdio::null())
        .kill_on_drop(true)
        .output();
    match tokio::time::timeout(Duration::from_secs(30), run).await {
        Ok(Ok(out)) => {
            let mut text = String::from_utf8_lossy(&out.stdout).trim().to_string();
            if text.is_empty() {
                text = String::from_utf8_lossy(&out.stderr).trim().to_string();
            }
            text.chars().take(2000).collect()
        }
        Ok(Err(e)) => format!("(could not run `{} {flag}`: {e})", path.display()),
        Err(_) => format!("(`{} {flag}` did not answer within 30 s)", path.display()),
    }
}

/// A random-enough workspace id: BLAKE3 of time, pid and path.
fn new_workspace_id(root: &Path) -> String {
    let seed = format!(
        "{}-{}-{}",
        Utc::now().timestamp_nanos_opt().unwrap_or(0),
        std::process::id(),
        root.display()
    );
    blake3::hash(seed.as_bytes()).to_hex()[..16].to_string()
}

/// Create the workspace records of a campaign (first run) or check that an existing
/// workspace belongs to this campaign file. Start files are hashed before anything is
/// written, so a missing start file leaves no workspace behind.
pub async fn prepare_workspace(campaign: &Campaign, paths: &Paths) -> Result<PreparedWorkspace> {
    for (name, file) in &campaign.start {
        if !file.is_file() {
            bail!(
                "{}: start file `{name}` ({}) does not exist; fix `start:` or create the file",
                campaign.file.display(),
                file.display()
            );
        }
    }
    std::fs::create_dir_all(&paths.root)
        .with_context(|| format!("{}: cannot create the workspace", paths.root.display()))?;
    let lock = store::lock(&paths.root)?;
    let pool = store::open(&paths.db).await?;
    let artifacts = ArtifactStore::open(&paths.store).with_context(|| {
        format!(
            "{}: cannot create the artifact store",
            paths.store.display()
        )
    })?;
    let hash = spec_hash(&campaign.text);
    let workspace_id = match store::campaign_row(&pool).await? {
        Some(row) => {
            if row.spec_blake3 != hash {
                // Bad input (exit 2): the file, not the machine, is at fault.
                bail!(crate::cli::BadInput(format!(
                    "{}: this workspace was made from a different campaign file (BLAKE3 {} at \
                     its first run, {} now); restore the file, or run the changed campaign in \
                     a new workspace with --workspace",
                    paths.root.display(),
                    row.spec_blake3.get(..12).unwrap_or(&row.spec_blake3),
                    &hash[..12]
                )));
            }
            row.workspace_id
        }
        None => {
            let workspace_id = new_workspace_id(&paths.root);
            let mut starts = Vec::new();
            for (name, file) in &campaign.start {
                let (h, size) = artifacts
                    .put_file(file)
                    .with_context(|| format!("{}: cannot store the start file", file.display()))?;
                let fname = file
                    .file_name()
                    .map(|f| f.to_string_lossy().into_owned())
                    .unwrap_or_else(|| name.clone());
                starts.push((name.clone(), h, size, fname));
            }
            let mut tx = pool.begin().await?;
            sqlx::query(
                "INSERT INTO campaign(id, name, spec_path, spec_text, spec_blake3, created_at, \
                 rondo_version, workspace_id) VALUES (1,?,?,?,?,?,?,?)",
            )
            .bind(&campaign.name)
            .bind(campaign.file.display().to_string())
            .bind(&campaign.text)
            .bind(&hash)
            .bind(store::now())
            .bind(RONDO_VERSION)
            .bind(&workspace_id)
            .execute(&mut *tx)
            .await?;
            // Multi-row inserts: a sweep of thousands of points is a few statements.
            for chunk in campaign.points.chunks(300) {
                let mut q = sqlx::QueryBuilder::<sqlx::Sqlite>::new(
                    "INSERT INTO points(id, idx, values_json, state) ",
                );
                q.push_values(chunk, |mut b, p| {
                    b.push_bind(&p.id)
                        .push_bind(p.index as i64)
                        .push_bind(values_json(p).to_string())
                        .push_bind(PointState::Planned);
                });
                q.build().execute(&mut *tx).await?;
            }
            for (name, h, size, fname) in &starts {
                store::artifact(&mut *tx, h, *size, fname).await?;
                sqlx::query("INSERT INTO start_files(name, artifact) VALUES (?,?)")
                    .bind(name)
                    .bind(h)
                    .execute(&mut *tx)
                    .await?;
            }
            store::event(
                &mut *tx,
                "campaign-created",
                None,
                None,
                None,
                &campaign.name,
            )
            .await?;
            tx.commit().await?;
            workspace_id
        }
    };
    Ok(PreparedWorkspace {
        pool,
        artifacts,
        workspace_id,
        _lock: lock,
    })
}

/// An open, locked workspace.
pub struct PreparedWorkspace {
    /// The database.
    pub pool: SqlitePool,
    /// The artifact store.
    pub artifacts: ArtifactStore,
    /// The id children are tagged with.
    pub workspace_id: String,
    _lock: store::WorkspaceLock,
}

/// Sweep values of a point as a JSON object.
pub fn values_json(p: &PointSpec) -> serde_json::Value {
    serde_json::Value::Object(
        p.values
            .iter()
            .map(|(k, v)| (k.clone(), v.to_json()))
            .collect(),
    )
}

/// Where a point stands in memory.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
enum PointPhase {
    /// Has work to do.
    Active,
    /// Stopped (converged, capped, failed, cancelled).
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

/// The planned row of a local attempt, not yet written. A local child is started before its
/// row reaches the store; the row goes into the store call that records the attempt's end
/// (or the next tick, or a stop), so a short attempt costs one store call instead of two.
/// A crash in between leaves a child with no row: the next run ends it by its environment
/// tag before starting anything (`end_untracked_children`), and the attempt number and id
/// are simply used again.
#[derive(Debug, Clone)]
struct PlannedRow {
    id: i64,
    point: String,
    iteration: u32,
    stage: String,
    attempt: u32,
    argv_json: String,
    workdir: String,
    executor: &'static str,
    program_path: String,
    program_blake3: Option<String>,
    /// Why the program's hash is unknown (`program_blake3` is then NULL).
    program_unknown: Option<String>,
    program_version: Option<String>,
    parameters_json: String,
    seed: Option<String>,
    created_at: String,
    host: Option<String>,
    inputs: Vec<(String, String)>,
}

/// Successes of attempts that ran shorter than this are committed together (at the next
/// half-second tick, after [`BATCH_MAX`] of them, or before the engine next reads the
/// store); longer ones at once. A crash loses at most half a second of short work, which
/// the next run repeats with the same numbers; nothing that took long is ever held back.
const SHORT_ATTEMPT: Duration = Duration::from_secs(1);

/// Most successes held in one group commit.
const BATCH_MAX: usize = 256;

/// Append the INSERTs of planned attempt rows (and their inputs) to a store script.
fn push_planned(script: &mut store::Script, rows: Vec<PlannedRow>) {
    if rows.is_empty() {
        return;
    }
    script.stmt(&format!(
        "INSERT INTO attempts(id, point, iteration, stage, attempt, state, argv_json, workdir, executor, \
         program_path, program_blake3, program_unknown, program_version, parameters_json, seed, rondo_version, \
         created_at, host) VALUES {}",
        vec!["(?,?,?,?,?,?,?,?,?,?,?,?,?,?,?,?,?,?)"; rows.len()].join(",")
    ));
    let mut inputs: Vec<(i64, String, String)> = Vec::new();
    for r in rows {
        inputs.extend(r.inputs.into_iter().map(|(role, h)| (r.id, role, h)));
        script
            .bind(r.id)
            .bind(r.point)
            .bind(i64::from(r.iteration))
            .bind(r.stage)
            .bind(i64::from(r.attempt))
            .bind(AttemptState::Planned)
            .bind(r.argv_json)
            .bind(r.workdir)
            .bind(r.executor)
            .bind(r.program_path)
            .bind(r.program_blake3)
            .bind(r.program_unknown)
            .bind(r.program_version)
            .bind(r.parameters_json)
            .bind(r.seed)
            .bind(RONDO_VERSION)
            .bind(r.created_at)
            .bind(r.host);
    }
    if !inputs.is_empty() {
        script.stmt(&format!(
            "INSERT INTO attempt_inputs(attempt_id, role, artifact) VALUES {}",
            store::rows(inputs.len(), 3)
        ));
        for (id, role, h) in inputs {
            script.bind(id).bind(role).bind(h);
        }
    }
}

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
}

/// How an attempt ended, after output checks.
enum Ended {
    Ok {
        metrics: Vec<Metric>,
        started: Option<DateTime<Utc>>,
        ended: Option<DateTime<Utc>>,
        host: Option<String>,
        event: Option<String>,
    },
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
    pool: SqlitePool,
    artifacts: ArtifactStore,
    executor: Arc<dyn Executor>,
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
    /// Planned rows of started local attempts, not yet written (see [`PlannedRow`]).
    planned: Vec<PlannedRow>,
    /// Records of short successes not yet committed (group commit, see [`SHORT_ATTEMPT`]),
    /// and how many.
    batch: store::Script,
    batched: usize,
    /// The id the next attempt gets (ids are chosen here: the workspace lock makes this
    /// orchestrator the only writer of attempts).
    next_id: i64,
    workspace_id: String,
    scratch: scratch::Pool,
}

/// Run (or continue) a campaign in its workspace until every point stops, a signal arrives,
/// or `rondo cancel` asks to stop.
pub async fn run(campaign: &Campaign, opts: &RunOptions, progress: Progress) -> Result<RunSummary> {
    let paths = Paths::of(&opts.workspace);
    let before_lock = store::now();
    let ws = prepare_workspace(campaign, &paths).await?;
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
            LocalExecutor::new(opts.jobs, ws.workspace_id.clone(), tx).with_grace(opts.grace),
        ),
        ExecutorChoice::Slurm(cfg) => {
            let mut cfg = (**cfg).clone();
            cfg.max_jobs = cfg.max_jobs.min(opts.jobs.max(1));
            Arc::new(SlurmExecutor::new(cfg, ws.workspace_id.clone(), tx))
        }
        ExecutorChoice::Pbs(cfg) => {
            let mut cfg = (**cfg).clone();
            cfg.max_jobs = cfg.max_jobs.min(opts.jobs.max(1));
            Arc::new(PbsExecutor::new(cfg, tx))
        }
    };
    let rondo_exe = std::env::current_exe().unwrap_or_else(|_| PathBuf::from("rondo"));
    let mut parameters = serde_json::Map::new();
    for (k, v) in &campaign.parameters {
        parameters.insert(k.clone(), v.to_json());
    }
    let paths_scratch = paths.scratch.clone();
    let mut engine = Engine {
        campaign,
        opts,
        paths,
        pool: ws.pool.clone(),
        artifacts: ws.artifacts.clone(),
        executor,
        host: store::hostname(),
        points: Vec::new(),
        ready: VecDeque::new(),
        inflight: HashMap::new(),
        programs: ProgramCache::default(),
        rondo_exe: (rondo_exe, None),
        progress,
        parameters,
        unrecorded: HashMap::new(),
        planned: Vec::new(),
        batch: store::Script::new(),
        batched: 0,
        next_id: 0,
        workspace_id: ws.workspace_id.clone(),
        scratch: scratch::Pool::open(&paths_scratch)?,
    };
    store::event(
        &engine.pool,
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
    let result = engine.main(rx).await;
    let summary = match result {
        Ok(s) => s,
        Err(e) => {
            let _ = engine
                .executor
                .shutdown(Shutdown::Terminate { grace: opts.grace })
                .await;
            let _ = store::event(
                &engine.pool,
                "run-error",
                None,
                None,
                None,
                &format!("{e:#}"),
            )
            .await;
            engine.progress.finish();
            return Err(e);
        }
    };
    store::event(
        &engine.pool,
        "run-ended",
        None,
        None,
        None,
        &format!("{:?}", summary.by_text()),
    )
    .await?;
    engine.progress.finish();
    engine.pool.close().await;
    drop(ws);
    Ok(summary)
}

impl Engine<'_> {
    async fn main(&mut self, mut rx: mpsc::UnboundedReceiver<Completion>) -> Result<RunSummary> {
        self.restore().await?;
        self.reconcile().await?;
        self.end_untracked_children().await?;
        self.next_id =
            sqlx::query_scalar::<_, i64>("SELECT coalesce(max(id), 0) + 1 FROM attempts")
                .fetch_one(&self.pool)
                .await?;
        let mut sigint = tokio::signal::unix::signal(tokio::signal::unix::SignalKind::interrupt())
            .context("cannot install the SIGINT handler")?;
        let mut sigterm = tokio::signal::unix::signal(tokio::signal::unix::SignalKind::terminate())
            .context("cannot install the SIGTERM handler")?;
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
                _ = sigint.recv() => { interrupted = true; break; }
                _ = sigterm.recv() => { interrupted = true; break; }
                _ = async {
                    match usr1.as_mut() {
                        Some(s) => { s.recv().await; }
                        None => std::future::pending::<()>().await,
                    }
                } => { interrupted = true; warned = true; break; }
                _ = tick.tick() => {
                    self.record_launches().await?;
                    if let Some(r) = CancelRequest::read(&self.paths.cancel_request) {
                        cancelled = Some(r);
                        break;
                    }
                }
            }
        }
        self.flush().await?;
        let mut continued_as = None;
        if interrupted || cancelled.is_some() {
            self.stop_everything(&mut rx, cancelled.as_ref()).await?;
            if warned {
                continued_as = self.continue_allocation().await?;
            }
        } else if let Some(eos) = &self.campaign.eos {
            let doc =
                crate::analysis::record_eos(&self.pool, &self.paths.root, &self.artifacts, eos)
                    .await?;
            for line in crate::analysis::eos_lines(&doc) {
                self.progress.line(line);
            }
        }
        let mut states = BTreeMap::new();
        for (state, n) in sqlx::query_as::<_, (PointState, i64)>(
            "SELECT state, count(*) AS n FROM points GROUP BY state",
        )
        .fetch_all(&self.pool)
        .await
        .context("reading the points' states")?
        {
            states.insert(state, n as usize);
        }
        Ok(RunSummary {
            states,
            interrupted,
            cancelled: cancelled.is_some(),
            cancelled_because: cancelled.map(|r| r.reason),
            continued_as,
        })
    }

    /// After the allocation's warning signal: submit the next job of the chain (the same
    /// script, after this job) when any point still has work.
    async fn continue_allocation(&mut self) -> Result<Option<String>> {
        let Some(env) = self.opts.allocation.clone() else {
            return Ok(None);
        };
        if self.points.iter().all(|p| p.phase == PointPhase::Done) {
            return Ok(None);
        }
        let Some(script) = env.script.clone() else {
            return Ok(None);
        };
        let next = env.continuation + 1;
        let id = rondo_adapters::slurm::allocation::submit_continuation(
            "sbatch",
            &script,
            env.job_id.as_deref(),
            next,
            Duration::from_secs(60),
        )
        .await
        .map_err(|e| anyhow::anyhow!("cannot submit the continuation job: {e}"))?;
        let detail = format!(
            "allocation job {} ends; continuation {next} submitted as job {id}",
            env.job_id.as_deref().unwrap_or("?")
        );
        store::event(
            &self.pool,
            "allocation-continued",
            None,
            None,
            None,
            &detail,
        )
        .await?;
        self.progress.line(detail);
        Ok(Some(id))
    }

    /// Rebuild each point's place from the store.
    async fn restore(&mut self) -> Result<()> {
        // Three reads for all points and one transaction, whatever the number of points: a
        // sweep of thousands of points resumes in a handful of statements.
        let states: HashMap<String, PointState> =
            sqlx::query_as::<_, (String, PointState)>("SELECT id, state FROM points")
                .fetch_all(&self.pool)
                .await
                .context("reading the points' states")?
                .into_iter()
                .collect();
        // SQLite's bare-column rule: with max(), `state` comes from the row holding the max.
        let lasts: HashMap<String, (i64, IterationState)> =
            sqlx::query_as::<_, (String, i64, IterationState)>(
                "SELECT point, max(iteration), state FROM iterations GROUP BY point",
            )
            .fetch_all(&self.pool)
            .await
            .context("reading the iterations' states")?
            .into_iter()
            .map(|(p, it, st)| (p, (it, st)))
            .collect();
        // Per point and stage of its last iteration: attempts so far and whether one succeeded.
        let mut tried: HashMap<(String, String), (u32, bool)> = HashMap::new();
        for (point, stage, max_attempt, succeeded) in
            sqlx::query_as::<_, (String, String, i64, bool)>(
                "SELECT a.point, a.stage, max(a.attempt), max(a.state = ?) FROM attempts a \
             JOIN (SELECT point, max(iteration) AS it FROM iterations GROUP BY point) l \
             ON l.point = a.point AND a.iteration = l.it GROUP BY a.point, a.stage",
            )
            .bind(AttemptState::Succeeded)
            .fetch_all(&self.pool)
            .await?
        {
            tried.insert((point, stage), (max_attempt as u32, succeeded));
        }
        // Per point and stage: the program of the last succeeded attempt (bare columns come
        // from the row holding max(iteration)).
        let mut built: HashMap<(String, String), BuiltWith> = HashMap::new();
        for (point, stage, it, path, hash, version) in sqlx::query_as::<
            _,
            (
                String,
                String,
                i64,
                Option<String>,
                Option<String>,
                Option<String>,
            ),
        >(
            "SELECT point, stage, max(iteration), program_path, program_blake3, program_version \
             FROM attempts WHERE state = ? GROUP BY point, stage",
        )
        .bind(AttemptState::Succeeded)
        .fetch_all(&self.pool)
        .await?
        {
            built.insert(
                (point, stage),
                BuiltWith {
                    iteration: it as u32,
                    path: path.unwrap_or_default(),
                    hash: hash.unwrap_or_default(),
                    unknown: None,
                    version,
                },
            );
        }
        let nstages = self.campaign.stages.len();
        let mut new_iterations: Vec<(String, i64)> = Vec::new();
        let mut tx = self.pool.begin().await?;
        for spec in &self.campaign.points {
            let Some(state) = states.get(&spec.id) else {
                bail!(
                    "internal: point {} is not in the workspace database",
                    spec.id
                );
            };
            let mut run = PointRun::new(spec, nstages);
            let resumable = match *state {
                PointState::Converged | PointState::Capped => false,
                PointState::Failed => self.opts.retry_failed,
                PointState::Planned | PointState::Running | PointState::Cancelled => true,
            };
            if !resumable {
                run.phase = PointPhase::Done;
                self.points.push(run);
                continue;
            }
            for (k, st) in self.campaign.stages.iter().enumerate() {
                run.built[k] = built.remove(&(spec.id.clone(), st.name.clone()));
            }
            let mut fresh_iteration = true;
            match lasts.get(&spec.id) {
                None => {
                    // A point that never ran has no history to read: keep it in memory from
                    // its first metric on.
                    let mut h = History::new();
                    h.entry(1).or_default();
                    run.history = Some(h);
                    new_iterations.push((spec.id.clone(), 1));
                }
                Some((it, st)) => {
                    run.iteration = *it as u32;
                    if *st == IterationState::Good {
                        // The decision after a good iteration is committed with it; a good
                        // last iteration of a resumable point means the next one is due.
                        run.iteration = *it as u32 + 1;
                        new_iterations.push((spec.id.clone(), it + 1));
                    } else {
                        fresh_iteration = false;
                        if matches!(st, IterationState::Failed | IterationState::Cancelled) {
                            // Only reached with --retry-failed or after a cancel: run it again.
                            sqlx::query("UPDATE iterations SET state = ?, ended_at = NULL WHERE point = ? AND iteration = ?")
                                .bind(IterationState::Running)
                                .bind(&spec.id)
                                .bind(it)
                                .execute(&mut *tx)
                                .await?;
                        }
                    }
                }
            }
            if !fresh_iteration {
                for (k, st) in self.campaign.stages.iter().enumerate() {
                    if let Some((n, _)) = tried.get(&(spec.id.clone(), st.name.clone())) {
                        run.attempts[k] = *n;
                    }
                }
                run.next_stage = self
                    .campaign
                    .stages
                    .iter()
                    .position(|st| {
                        !tried
                            .get(&(spec.id.clone(), st.name.clone()))
                            .is_some_and(|(_, ok)| *ok)
                    })
                    .unwrap_or(nstages);
            }
            if !matches!(state, PointState::Planned | PointState::Running) {
                sqlx::query("UPDATE points SET state = ?, reason = NULL WHERE id = ?")
                    .bind(PointState::Running)
                    .bind(&spec.id)
                    .execute(&mut *tx)
                    .await?;
                store::event(
                    &mut *tx,
                    "point-resumed",
                    Some(&spec.id),
                    Some(run.iteration),
                    None,
                    &format!("was {state}"),
                )
                .await?;
            }
            self.points.push(run);
        }
        let now = store::now();
        for chunk in new_iterations.chunks(300) {
            let mut q = sqlx::QueryBuilder::<sqlx::Sqlite>::new(
                "INSERT INTO iterations(point, iteration, state, started_at) ",
            );
            q.push_values(chunk, |mut b, (point, it)| {
                b.push_bind(point)
                    .push_bind(*it)
                    .push_bind(IterationState::Running)
                    .push_bind(now.clone());
            });
            q.build().execute(&mut *tx).await?;
        }
        tx.commit().await?;
        Ok(())
    }

    /// Read a point's metric history from the store unless it is already in memory: the
    /// metrics of its good iterations and of the current one, and the start of its final
    /// window. A resumed run reads exactly what an uninterrupted one kept in memory.
    async fn ensure_history(&mut self, p: usize) -> Result<()> {
        if self.points[p].history.is_some() {
            return Ok(());
        }
        self.flush().await?;
        let point_id = self.points[p].spec.id.clone();
        let n = self.points[p].iteration;
        let rows = sqlx::query(
            "SELECT a.iteration AS it, m.name AS name, m.value AS value, m.error AS error \
             FROM metrics m JOIN attempts a ON a.id = m.attempt_id \
             LEFT JOIN iterations i ON i.point = a.point AND i.iteration = a.iteration \
             WHERE a.point = ? AND a.state = ? AND (i.state = ? OR a.iteration = ?)",
        )
        .bind(&point_id)
        .bind(AttemptState::Succeeded)
        .bind(IterationState::Good)
        .bind(i64::from(n))
        .fetch_all(&self.pool)
        .await?;
        let mut history = History::new();
        history.entry(n).or_default();
        for r in rows {
            history
                .entry(r.get::<i64, _>("it") as u32)
                .or_default()
                .insert(
                    r.get("name"),
                    Sample {
                        value: r.get("value"),
                        error: r.get("error"),
                    },
                );
        }
        let first_met: Option<i64> = sqlx::query_scalar(
            "SELECT min(iteration) FROM iterations WHERE point = ? AND state = ? \
             AND json_extract(stop_json, '$.rules_met') = 1",
        )
        .bind(&point_id)
        .bind(IterationState::Good)
        .fetch_one(&self.pool)
        .await?;
        let pr = &mut self.points[p];
        pr.history = Some(history);
        pr.first_met = first_met.map(|i| i as u32);
        Ok(())
    }

    /// Settle attempts an earlier orchestrator left planned, submitted or running.
    async fn reconcile(&mut self) -> Result<()> {
        let sql = format!(
            "SELECT id, point, iteration, stage, attempt, executor, handle_id, host, workdir, \
             program_path, program_blake3, program_version FROM attempts \
             WHERE state IN {} ORDER BY id",
            store::rows(1, AttemptState::OUTSTANDING.len())
        );
        let mut query = sqlx::query(&sql);
        for s in AttemptState::OUTSTANDING {
            query = query.bind(s);
        }
        let rows = query.fetch_all(&self.pool).await?;
        for row in rows {
            let id: i64 = row.get("id");
            let point_id: String = row.get("point");
            let iteration = row.get::<i64, _>("iteration") as u32;
            let stage_name: String = row.get("stage");
            let executor: String = row.get("executor");
            let handle_id: Option<String> = row.get("handle_id");
            let host: Option<String> = row.get("host");
            let workdir = PathBuf::from(row.get::<String, _>("workdir"));
            let pidx = self.points.iter().position(|p| p.spec.id == point_id);
            let sidx = self
                .campaign
                .stages
                .iter()
                .position(|s| s.name == stage_name);
            let lost = |reason: String| Ended::Failed {
                kind: "lost".into(),
                message: reason,
                exit_status: None,
                started: None,
                ended: Some(Utc::now()),
                host: None,
                free: true,
                state: AttemptState::Lost,
            };
            if executor == "builtin" {
                self.settle(
                    id,
                    None,
                    lost("the orchestrator stopped during a built-in stage".into()),
                )
                .await?;
                continue;
            }
            if executor != self.opts.executor.kind() {
                bail!(
                    "attempt {id} ({point_id} iteration {iteration} stage {stage_name}) was left \
                     outstanding on the `{executor}` executor; continue with --on {executor} \
                     so it can be reconciled"
                );
            }
            let handle = Handle {
                executor: executor.clone(),
                id: handle_id.clone().unwrap_or_default(),
                host: host.clone().unwrap_or_else(|| self.host.clone()),
            };
            let answer = self
                .executor
                .reattach(id, &handle, &workdir)
                .await
                .with_context(|| format!("cannot reconcile attempt {id}"))?;
            let (Some(p), Some(s)) = (pidx, sidx) else {
                self.settle(
                    id,
                    None,
                    lost("its point or stage is not in the campaign".into()),
                )
                .await?;
                continue;
            };
            let fl = InFlight {
                point: p,
                stage: s,
                iteration,
                attempt: row.get::<i64, _>("attempt") as u32,
                workdir,
                built: BuiltWith {
                    iteration,
                    path: row
                        .get::<Option<String>, _>("program_path")
                        .unwrap_or_default(),
                    hash: row
                        .get::<Option<String>, _>("program_blake3")
                        .unwrap_or_default(),
                    unknown: None,
                    version: row.get("program_version"),
                },
            };
            match answer {
                Reattached::Found(h) => {
                    sqlx::query(
                        "UPDATE attempts SET state = ?, handle_id = ?, host = ? WHERE id = ?",
                    )
                    .bind(AttemptState::Submitted)
                    .bind(&h.id)
                    .bind(&h.host)
                    .bind(id)
                    .execute(&self.pool)
                    .await?;
                    store::event(
                        &self.pool,
                        "attempt-adopted",
                        Some(&point_id),
                        Some(iteration),
                        Some(id),
                        &format!(
                            "job {} found by its tag; its id had not been recorded",
                            h.id
                        ),
                    )
                    .await?;
                    self.points[p].outstanding = Some(id);
                    self.inflight.insert(id, fl);
                }
                Reattached::Active => {
                    store::event(
                        &self.pool,
                        "attempt-adopted",
                        Some(&point_id),
                        Some(iteration),
                        Some(id),
                        "still queued or running",
                    )
                    .await?;
                    self.points[p].outstanding = Some(id);
                    self.inflight.insert(id, fl);
                }
                Reattached::Finished(c) => {
                    store::event(
                        &self.pool,
                        "attempt-adopted",
                        Some(&point_id),
                        Some(iteration),
                        Some(id),
                        "finished while no orchestrator watched",
                    )
                    .await?;
                    self.points[p].outstanding = Some(id);
                    self.inflight.insert(id, fl);
                    self.on_completion(c).await?;
                }
                Reattached::Gone { reason } => {
                    self.settle(
                        id,
                        Some(&fl),
                        lost(format!("lost when the orchestrator stopped: {reason}")),
                    )
                    .await?;
                }
            }
        }
        // Completions that arrived during the reattach calls are processed by the main loop.
        for (i, p) in self.points.iter().enumerate() {
            if p.phase == PointPhase::Active && p.outstanding.is_none() {
                self.ready.push_back(i);
            }
        }
        Ok(())
    }

    /// Start work for ready points while slots are free.
    async fn schedule(&mut self) -> Result<()> {
        let slots = self.executor.slots().max(1);
        let mut waiting = VecDeque::new();
        while let Some(p) = self.ready.pop_front() {
            if self.points[p].phase != PointPhase::Active || self.points[p].outstanding.is_some() {
                continue;
            }
            if self.points[p].next_stage >= self.campaign.stages.len() {
                self.finish_iteration(p).await?;
                if self.points[p].phase == PointPhase::Active {
                    self.ready.push_back(p);
                }
                continue;
            }
            let stage = &self.campaign.stages[self.points[p].next_stage];
            let is_builtin = stage.kind.is_builtin();
            if !is_builtin && self.inflight.len() >= slots {
                // Every slot is taken: the rest wait for the next completion as they are
                // (scanning them all on every event would cost O(points) per attempt).
                waiting.push_back(p);
                waiting.extend(self.ready.drain(..));
                break;
            }
            self.start_attempt(p).await?;
            if self.points[p].outstanding.is_none() && self.points[p].phase == PointPhase::Active {
                // A built-in ran to its end, or a launch failed at once: go on with this point.
                self.ready.push_back(p);
            }
        }
        self.ready = waiting;
        Ok(())
    }

    /// The BLAKE3 of rondo's executable, or why it cannot be computed; computed once.
    fn rondo_hash(&mut self) -> Result<String, String> {
        if let Some(h) = &self.rondo_exe.1 {
            return h.clone();
        }
        let path = &self.rondo_exe.0;
        let h = hash_file(path)
            .map(|(h, _)| h)
            .map_err(|e| format!("cannot read {}: {e}", path.display()));
        self.rondo_exe.1 = Some(h.clone());
        h
    }

    /// The program a stage's next attempt runs: path, BLAKE3 and version text. Built-ins
    /// run inside rondo; a command stage runs its program; a shell stage runs `/bin/sh`, and
    /// its hash is the BLAKE3 of the list `NAME<tab>PATH<tab>BLAKE3<newline>` of the programs
    /// its script names as `{{program:NAME}}` (sorted by name), each listed in the version
    /// text; the shell itself and other tools the script calls are not hashed.
    async fn program_identity(&mut self, stage: &Stage, iteration: u32) -> Result<BuiltWith> {
        let built = |path: &Path, hash: Result<String, String>, version: Option<String>| {
            let (hash, unknown) = match hash {
                Ok(h) if h.starts_with("unreadable") => (String::new(), Some(h)),
                Ok(h) => (h, None),
                Err(why) => (String::new(), Some(why)),
            };
            BuiltWith {
                iteration,
                path: path.display().to_string(),
                hash,
                unknown,
                version,
            }
        };
        Ok(match &stage.kind {
            StageKind::Filter(_) | StageKind::Mix(_) => {
                let exe = self.rondo_exe.0.clone();
                built(
                    &exe,
                    self.rondo_hash(),
                    Some(format!("rondo {RONDO_VERSION}")),
                )
            }
            StageKind::Command { program, .. } => {
                let Some(resolved) = self.campaign.programs.get(program).cloned() else {
                    bail!("internal: program `{program}` was not resolved");
                };
                let (hash, version) = self
                    .programs
                    .get(&resolved.path, resolved.version_flag.as_deref())
                    .await;
                built(&resolved.path, Ok(hash), version)
            }
            StageKind::Shell { programs, .. } => {
                let mut list = String::new();
                let mut described = Vec::new();
                for name in programs {
                    let Some(resolved) = self.campaign.programs.get(name).cloned() else {
                        bail!("internal: program `{name}` was not resolved");
                    };
                    let (hash, version) = self
                        .programs
                        .get(&resolved.path, resolved.version_flag.as_deref())
                        .await;
                    let path = resolved.path.display().to_string();
                    list.push_str(&format!("{name}\t{path}\t{hash}\n"));
                    described.push(format!(
                        "{name} = {path} (BLAKE3 {hash}{})",
                        version
                            .map(|v| format!("; version {v}"))
                            .unwrap_or_default()
                    ));
                }
                let text = if described.is_empty() {
                    "shell script naming no program of `programs:`".to_string()
                } else {
                    format!("shell script; programs: {}", described.join("; "))
                };
                built(
                    Path::new("/bin/sh"),
                    Ok(blake3::hash(list.as_bytes()).to_hex().to_string()),
                    Some(text),
                )
            }
        })
    }

    /// The program of a stage changed since an earlier iteration of this point ran it: stop
    /// the point (failed) before anything of the new build runs, saying what to do.
    async fn stop_for_changed_program(
        &mut self,
        p: usize,
        stage: &Stage,
        before: &BuiltWith,
        now: &BuiltWith,
    ) -> Result<()> {
        self.flush().await?;
        let iteration = self.points[p].iteration;
        let what = match &stage.kind {
            StageKind::Shell { .. } => format!(
                "the programs of shell stage `{}` changed between iterations: iteration {} ran \
                 with {} (BLAKE3 {} over them), now {} (BLAKE3 {})",
                stage.name,
                before.iteration,
                before.version.as_deref().unwrap_or("?"),
                before.hash,
                now.version.as_deref().unwrap_or("?"),
                now.hash
            ),
            _ => format!(
                "program {} of stage `{}` changed between iterations: BLAKE3 {} ran iteration {}{}, \
                 the file now has BLAKE3 {}",
                now.path,
                stage.name,
                before.hash,
                before.iteration,
                if before.path == now.path {
                    String::new()
                } else {
                    format!(" (as {})", before.path)
                },
                now.hash
            ),
        };
        let reason = format!(
            "{what}; the point stops so that its iterations do not mix two builds. To go on, put \
             back the build that ran and run again with --retry-failed; to use the new build, \
             run the campaign in a new workspace (--workspace)"
        );
        self.fail_point(p, iteration, None, &reason, Some("program-changed"))
            .await
    }

    /// Stop point `p` as failed at `iteration`, in one transaction: the iteration and the
    /// point are marked failed with `reason`, and a `point-failed` event (after `event`, if
    /// given, with the same text) names the attempt that ended it, if any.
    async fn fail_point(
        &mut self,
        p: usize,
        iteration: u32,
        attempt: Option<i64>,
        reason: &str,
        event: Option<&str>,
    ) -> Result<()> {
        self.points[p].phase = PointPhase::Done;
        let point_id = self.points[p].spec.id.clone();
        let mut tx = self.pool.begin().await?;
        sqlx::query(
            "UPDATE iterations SET state = ?, ended_at = ? WHERE point = ? AND iteration = ?",
        )
        .bind(IterationState::Failed)
        .bind(store::now())
        .bind(&point_id)
        .bind(i64::from(iteration))
        .execute(&mut *tx)
        .await?;
        sqlx::query("UPDATE points SET state = ?, reason = ? WHERE id = ?")
            .bind(PointState::Failed)
            .bind(reason)
            .bind(&point_id)
            .execute(&mut *tx)
            .await?;
        for kind in event.into_iter().chain(["point-failed"]) {
            let at = if kind == "point-failed" {
                attempt
            } else {
                None
            };
            store::event(&mut *tx, kind, Some(&point_id), Some(iteration), at, reason).await?;
        }
        tx.commit().await?;
        self.progress.line(format!("{point_id} failed: {reason}"));
        Ok(())
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
                PointPhase::Done => done += 1,
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

    /// Resolve the artifact feeding one input of a stage.
    async fn input_hash(
        &self,
        point: &str,
        iteration: u32,
        src: &Source,
    ) -> Result<Option<String>> {
        let output_of = |stage: &str, role: &str, it: u32| {
            let stage = stage.to_string();
            let role = role.to_string();
            async move {
                let h: Option<String> = sqlx::query_scalar(
                    "SELECT o.artifact FROM attempts a JOIN attempt_outputs o ON o.attempt_id = a.id \
                     WHERE a.point = ? AND a.iteration = ? AND a.stage = ? AND a.state = ? AND o.role = ?",
                )
                .bind(point)
                .bind(i64::from(it))
                .bind(&stage)
                .bind(AttemptState::Succeeded)
                .bind(&role)
                .fetch_optional(&self.pool)
                .await?;
                anyhow::Ok(h)
            }
        };
        let start = |name: &str| {
            let name = name.to_string();
            async move {
                let h: Option<String> =
                    sqlx::query_scalar("SELECT artifact FROM start_files WHERE name = ?")
                        .bind(&name)
                        .fetch_optional(&self.pool)
                        .await?;
                anyhow::Ok(h)
            }
        };
        match src {
            Source::Same { stage, role } => output_of(stage, role, iteration).await,
            Source::Start(name) => start(name).await,
            Source::Previous {
                stage,
                role,
                initially,
            } => {
                if iteration > 1 {
                    output_of(stage, role, iteration - 1).await
                } else {
                    match initially {
                        Some(name) => start(name).await,
                        None => Ok(None),
                    }
                }
            }
        }
    }

    /// Plan, record and launch (or run, for built-ins) the next attempt of a point.
    async fn start_attempt(&mut self, p: usize) -> Result<()> {
        let sidx = self.points[p].next_stage;
        let stage = self.campaign.stages[sidx].clone();
        let point = self.points[p].spec.clone();
        let iteration = self.points[p].iteration;
        let attempt = self.points[p].attempts[sidx] + 1;
        let built = self.program_identity(&stage, iteration).await?;
        if let Some(before) = self.points[p].built[sidx].clone() {
            if before.iteration < iteration
                && before.known()
                && built.known()
                && before.hash != built.hash
            {
                return self
                    .stop_for_changed_program(p, &stage, &before, &built)
                    .await;
            }
        }
        let workdir = scratch::attempt_dir(
            &self.paths.scratch,
            &point.id,
            iteration,
            &stage.name,
            attempt,
        );
        if workdir.exists() {
            std::fs::remove_dir_all(&workdir)
                .with_context(|| format!("{}: cannot clear the scratch dir", workdir.display()))?;
        }
        self.scratch.create(&workdir)?;
        let inputs_dir = workdir.join("inputs");
        if (!stage.inputs.is_empty() || matches!(stage.kind, StageKind::Mix(_)))
            && !inputs_dir.is_dir()
        {
            std::fs::create_dir(&inputs_dir)
                .with_context(|| format!("{}: cannot create", inputs_dir.display()))?;
        }
        // Inputs: resolve and place (from the store, so held-back records go in first).
        if !stage.inputs.is_empty() || matches!(stage.kind, StageKind::Mix(_)) {
            self.flush().await?;
        }
        let mut inputs: Vec<(String, String, PathBuf)> = Vec::new();
        for (role, src) in &stage.inputs {
            let Some(hash) = self.input_hash(&point.id, iteration, src).await? else {
                if stage.kind.is_builtin() || iteration == 1 {
                    continue;
                }
                bail!(
                    "internal: input `{role}` of stage `{}` at {} iteration {iteration} has no artifact",
                    stage.name,
                    point.id
                );
            };
            let ext: String = sqlx::query_scalar::<_, String>(
                "SELECT original_name FROM artifacts WHERE hash = ?",
            )
            .bind(&hash)
            .fetch_one(&self.pool)
            .await
            .map(|n| {
                Path::new(&n)
                    .extension()
                    .map(|e| format!(".{}", e.to_string_lossy()))
                    .unwrap_or_default()
            })?;
            let dest = inputs_dir.join(format!("{role}{ext}"));
            self.artifacts
                .place(&hash, &dest, stage.writable_inputs.contains(role))
                .with_context(|| format!("cannot place artifact {hash} as {}", dest.display()))?;
            let rel = format!("inputs/{role}{ext}");
            inputs.push((role.clone(), hash, PathBuf::from(rel)));
        }
        // The mixer's own history: the state of the previous iteration's attempt.
        if matches!(stage.kind, StageKind::Mix(_)) && iteration > 1 {
            let src = Source::Previous {
                stage: stage.name.clone(),
                role: "state".into(),
                initially: None,
            };
            if let Some(h) = self.input_hash(&point.id, iteration, &src).await? {
                let dest = inputs_dir.join("state.json");
                self.artifacts.place(&h, &dest, false).with_context(|| {
                    format!("cannot place the mixer state as {}", dest.display())
                })?;
                inputs.push((
                    "state".into(),
                    h.clone(),
                    PathBuf::from("inputs/state.json"),
                ));
            }
        }
        let seed = rondo_numerics::rng::derive_seed(
            self.campaign.seed,
            &[
                &self.campaign.name,
                &point.id,
                &iteration.to_string(),
                &stage.name,
            ],
        );
        let mut params = self.parameters.clone();
        for (k, v) in &point.values {
            params.insert(k.clone(), v.to_json());
        }
        let scheduled = self.schedule_values(p, iteration).await?;
        for (k, v) in &scheduled {
            let value = v
                .parse::<i64>()
                .map(serde_json::Value::from)
                .or_else(|_| v.parse::<f64>().map(serde_json::Value::from))
                .unwrap_or_else(|_| serde_json::Value::from(v.clone()));
            params.insert(k.clone(), value);
        }
        let (argv, uses_seed, executor_kind) = match &stage.kind {
            StageKind::Filter(_) | StageKind::Mix(_) => (
                // The `rondo builtin` command that reruns it in this scratch layout.
                builtins::BuiltinCommand::for_stage(
                    &stage.kind,
                    inputs.iter().map(|(r, _, f)| (r.as_str(), f.as_path())),
                    &stage.outputs,
                )
                .map(|c| c.to_argv(&self.rondo_exe.0))
                .ok_or_else(|| anyhow::anyhow!("internal: `{}` is no built-in", stage.name))?,
                false,
                "builtin",
            ),
            StageKind::Command { template, .. } | StageKind::Shell { template, .. } => {
                let shell = matches!(stage.kind, StageKind::Shell { .. });
                let lookup = |ns: Option<&str>, name: &str| -> Option<String> {
                    match (ns, name) {
                        (Some("param"), n) => point
                            .values
                            .iter()
                            .find(|(k, _)| k == n)
                            .map(|(_, v)| v.to_string())
                            .or_else(|| {
                                self.campaign
                                    .parameters
                                    .iter()
                                    .find(|(k, _)| k == n)
                                    .map(|(_, v)| v.to_string())
                            })
                            .or_else(|| {
                                scheduled
                                    .iter()
                                    .find(|(k, _)| k == n)
                                    .map(|(_, v)| v.clone())
                            }),
                        (Some("input"), n) => inputs
                            .iter()
                            .find(|(r, _, _)| r == n)
                            .map(|(_, _, f)| f.display().to_string()),
                        (Some("output"), n) => stage
                            .outputs
                            .iter()
                            .find(|(r, _)| r == n)
                            .map(|(_, f)| f.clone()),
                        (Some("program"), n) if shell => self
                            .campaign
                            .programs
                            .get(n)
                            .map(|r| r.path.display().to_string()),
                        (Some("point"), "id") => Some(point.id.clone()),
                        (Some("point"), "index") => Some(point.index.to_string()),
                        (None, "iteration") => Some(iteration.to_string()),
                        (None, "cpus") => Some(stage.resources.cpus().to_string()),
                        (None, "tasks") => Some(stage.resources.ntasks.unwrap_or(1).to_string()),
                        (None, "seed") => Some(seed.to_string()),
                        (None, "stage") => Some(stage.name.clone()),
                        (None, "campaign") => Some(self.campaign.name.clone()),
                        (None, "workdir") => Some(workdir.display().to_string()),
                        _ => None,
                    }
                };
                let rendered = if shell {
                    template.render_shell(lookup)
                } else {
                    template.render(lookup)
                };
                let mut argv = match rendered {
                    Ok(a) => a,
                    Err(e) => bail!("stage `{}`: {e}", stage.name),
                };
                if !shell {
                    // The first element names the program: run its resolved path.
                    if let Some(first) = argv.first_mut() {
                        first.clone_from(&built.path);
                    }
                }
                if let Some(launcher) = &stage.resources.launcher {
                    let t = Template::parse(launcher)
                        .map_err(|e| anyhow::anyhow!("stage `{}`: launcher: {e}", stage.name))?;
                    let mut pre = t
                        .render(lookup)
                        .map_err(|e| anyhow::anyhow!("stage `{}`: launcher: {e}", stage.name))?;
                    pre.extend(argv);
                    argv = pre;
                }
                let uses_seed = template
                    .placeholders()
                    .any(|(ns, n, _)| ns.is_none() && n == "seed");
                (argv, uses_seed, self.opts.executor.kind())
            }
        };
        // The planned row: written now (one store call) for built-ins and batch jobs, whose
        // later updates need it; for a local child it rides along with the store call that
        // records the attempt's end (see `PlannedRow`).
        let local_host = matches!(executor_kind, "local" | "builtin").then(|| self.host.clone());
        let id = self.next_id;
        self.next_id += 1;
        let row = PlannedRow {
            id,
            point: point.id.clone(),
            iteration,
            stage: stage.name.clone(),
            attempt,
            argv_json: serde_json::to_string(&argv)?,
            workdir: workdir.display().to_string(),
            executor: executor_kind,
            program_path: built.path.clone(),
            program_blake3: (!built.hash.is_empty()).then(|| built.hash.clone()),
            program_unknown: built.unknown.clone(),
            program_version: built.version.clone(),
            parameters_json: serde_json::Value::Object(params).to_string(),
            seed: uses_seed.then(|| seed.to_string()),
            created_at: store::now(),
            host: local_host,
            inputs: inputs
                .iter()
                .map(|(role, hash, _)| (role.clone(), hash.clone()))
                .collect(),
        };
        if executor_kind == "local" && !stage.kind.is_builtin() {
            self.planned.push(row);
        } else {
            // After everything held back (its iteration's row may be among it).
            let (mut script, _) = self.held_back();
            push_planned(&mut script, vec![row]);
            script.commit(&self.pool).await?;
        }
        self.points[p].attempts[sidx] = attempt;
        let fl = InFlight {
            point: p,
            stage: sidx,
            iteration,
            attempt,
            workdir: workdir.clone(),
            built,
        };
        match &stage.kind {
            StageKind::Mix(_) | StageKind::Filter(_) => {
                let started = Utc::now();
                sqlx::query("UPDATE attempts SET state = ?, started_at = ?, host = ? WHERE id = ?")
                    .bind(AttemptState::Running)
                    .bind(store::time_text(started))
                    .bind(&self.host)
                    .bind(id)
                    .execute(&self.pool)
                    .await?;
                // Runs exactly the recorded argument list, in the scratch folder.
                let result = builtins::run_argv(&argv, &workdir);
                let ended = match result {
                    Ok(report) => {
                        let mut ended = self.check_outputs(
                            &stage,
                            &workdir,
                            Some(report.metrics),
                            Some(started),
                            Some(Utc::now()),
                            Some(self.host.clone()),
                        );
                        if let Ended::Ok { event, .. } = &mut ended {
                            *event = report.event;
                        }
                        ended
                    }
                    Err(message) => Ended::Failed {
                        kind: "builtin-failed".into(),
                        message,
                        exit_status: None,
                        started: Some(started),
                        ended: Some(Utc::now()),
                        host: Some(self.host.clone()),
                        free: false,
                        state: AttemptState::Failed,
                    },
                };
                self.settle(id, Some(&fl), ended).await?;
            }
            StageKind::Command { .. } | StageKind::Shell { .. } => {
                let mut env = BTreeMap::new();
                env.insert("RONDO_POINT".to_string(), point.id.clone());
                env.insert("RONDO_ITERATION".to_string(), iteration.to_string());
                env.insert("RONDO_STAGE".to_string(), stage.name.clone());
                let req = LaunchRequest {
                    attempt_id: id,
                    job_name: format!(
                        "{}.{}.i{}.{}",
                        self.campaign.name, point.id, iteration, stage.name
                    ),
                    argv,
                    workdir: workdir.clone(),
                    env,
                    time_limit: stage.time_limit,
                    resources: stage.resources.clone(),
                };
                self.points[p].outstanding = Some(id);
                self.inflight.insert(id, fl.clone());
                match self.executor.launch(req).await {
                    Ok(handle) if self.opts.executor.kind() == "local" => {
                        self.unrecorded.insert(
                            id,
                            UnrecordedLaunch {
                                handle_id: handle.id,
                                host: handle.host,
                                started_at: store::now(),
                            },
                        );
                    }
                    Ok(handle) => {
                        sqlx::query(
                            "UPDATE attempts SET state = ?, handle_id = ?, host = ?, started_at = coalesce(started_at, ?) \
                             WHERE id = ? AND state = ?",
                        )
                        .bind(AttemptState::Submitted)
                        .bind(&handle.id)
                        .bind(&handle.host)
                        .bind(store::now())
                        .bind(id)
                        .bind(AttemptState::Planned)
                        .execute(&self.pool)
                        .await?;
                    }
                    Err(e) => {
                        let ended = Ended::Failed {
                            kind: "launch-failed".into(),
                            message: e.to_string(),
                            exit_status: None,
                            started: None,
                            ended: Some(Utc::now()),
                            host: None,
                            free: false,
                            state: AttemptState::Failed,
                        };
                        self.settle(id, Some(&fl), ended).await?;
                    }
                }
            }
        }
        Ok(())
    }

    /// Values of the loop-driven parameters for a point's iteration, from the metrics of its
    /// earlier good iterations (so a resumed run computes the same values).
    async fn schedule_values(&mut self, p: usize, iteration: u32) -> Result<Vec<(String, String)>> {
        let mut out = Vec::new();
        if self.campaign.schedules.is_empty() {
            return Ok(out);
        }
        self.ensure_history(p).await?;
        let history = self.points[p].history.as_ref();
        for sc in &self.campaign.schedules {
            // Every iteration before the current one in the history is a good one.
            let samples: Vec<Sample> = history
                .into_iter()
                .flat_map(|h| h.range(..iteration))
                .filter_map(|(_, m)| m.get(&sc.metric).copied())
                .collect();
            let held = samples
                .windows(2)
                .filter(|w| stop::holds(sc.test, w[0], w[1]).0)
                .count();
            let mut v = sc.start;
            for _ in 0..held {
                v *= sc.factor;
                if v >= sc.max {
                    break;
                }
            }
            let v = v.min(sc.max);
            out.push((
                sc.name.clone(),
                if sc.integer {
                    format!("{}", v.round() as i64)
                } else {
                    format!("{v:?}")
                },
            ));
        }
        Ok(out)
    }

    /// Output checks after a clean exit (or a built-in's end).
    fn check_outputs(
        &self,
        stage: &Stage,
        workdir: &Path,
        builtin_metrics: Option<Vec<Metric>>,
        started: Option<DateTime<Utc>>,
        ended: Option<DateTime<Utc>>,
        host: Option<String>,
    ) -> Ended {
        let fail = |inv: validate::Invalid| Ended::Failed {
            kind: inv.kind.to_string(),
            message: inv.message,
            exit_status: Some(0),
            started,
            ended,
            host: host.clone(),
            free: false,
            state: AttemptState::Failed,
        };
        for (role, file) in &stage.outputs {
            if let Err(inv) =
                validate::check_output(&workdir.join(file), role, stage.allow_nonfinite)
            {
                return fail(inv);
            }
        }
        let metrics = match builtin_metrics {
            Some(m) => m,
            None => match validate::read_metrics(
                workdir,
                &stage.required_metrics,
                stage.allow_nonfinite,
            ) {
                Ok(m) => m,
                Err(inv) => return fail(inv),
            },
        };
        Ended::Ok {
            metrics,
            started,
            ended,
            host,
            event: None,
        }
    }

    async fn on_completion(&mut self, c: Completion) -> Result<()> {
        let Some(fl) = self.inflight.get(&c.attempt_id).cloned() else {
            tracing::warn!(
                attempt = c.attempt_id,
                "completion for an attempt not in flight"
            );
            return Ok(());
        };
        let stage = self.campaign.stages[fl.stage].clone();
        let failed = |kind: &str,
                      message: String,
                      exit_status: Option<i32>,
                      free: bool,
                      state: AttemptState| Ended::Failed {
            kind: kind.to_string(),
            message,
            exit_status,
            started: c.started_at,
            ended: c.ended_at,
            host: c.host.clone(),
            free,
            state,
        };
        let ended = match &c.outcome {
            Outcome::Exited { code: 0 } => self.check_outputs(
                &stage,
                &fl.workdir,
                None,
                c.started_at,
                c.ended_at,
                c.host.clone(),
            ),
            Outcome::Exited { code } => failed(
                "exit-status",
                format!("exited with status {code}{}", stderr_tail(&fl.workdir)),
                Some(*code),
                false,
                AttemptState::Failed,
            ),
            Outcome::Signaled { signal } => failed(
                "signal",
                format!("killed by signal {signal}{}", stderr_tail(&fl.workdir)),
                None,
                false,
                AttemptState::Failed,
            ),
            Outcome::TimedOut => failed(
                "timeout",
                format!(
                    "exceeded its time limit{}",
                    stage
                        .time_limit
                        .map(|d| format!(" of {} s", d.as_secs()))
                        .unwrap_or_default()
                ),
                None,
                false,
                AttemptState::Failed,
            ),
            Outcome::Cancelled { by } if by == "rondo" => failed(
                "cancelled",
                "stopped by rondo".into(),
                None,
                true,
                AttemptState::Cancelled,
            ),
            Outcome::Cancelled { by } => failed(
                "cancelled",
                format!("cancelled by {by}"),
                None,
                false,
                AttemptState::Failed,
            ),
            Outcome::NodeFailure => failed(
                "node-failure",
                "its node failed".into(),
                None,
                false,
                AttemptState::Failed,
            ),
            Outcome::Preempted => failed(
                "preempted",
                "preempted by the scheduler".into(),
                None,
                false,
                AttemptState::Failed,
            ),
            Outcome::LaunchFailed { message } => failed(
                "launch-failed",
                message.clone(),
                None,
                false,
                AttemptState::Failed,
            ),
            Outcome::Lost { reason } => {
                failed("lost", reason.clone(), None, true, AttemptState::Lost)
            }
        };
        self.settle(c.attempt_id, Some(&fl), ended).await
    }

    /// Record the end of an attempt and move its point on.
    async fn settle(&mut self, id: i64, fl: Option<&InFlight>, ended: Ended) -> Result<()> {
        self.inflight.remove(&id);
        let stage = fl.map(|f| self.campaign.stages[f.stage].clone());
        match ended {
            Ended::Ok {
                metrics,
                started,
                ended,
                host,
                event,
            } => {
                let (Some(fl), Some(stage)) = (fl, stage) else {
                    bail!("internal: success without a stage");
                };
                // Artifacts into the store first, then one transaction.
                let mut outs: Vec<(String, String, u64, String)> = Vec::new();
                let mut files: Vec<(String, String)> = stage.outputs.clone();
                if matches!(stage.kind, StageKind::Mix(_)) {
                    files.push(("state".into(), builtins::STATE_FILE.into()));
                }
                if fl.workdir.join(validate::METRICS_FILE).is_file() {
                    files.push(("metrics".into(), validate::METRICS_FILE.into()));
                }
                for (role, file) in &files {
                    let path = fl.workdir.join(file);
                    // Linked into the store (no copy; read-only from now on) unless the
                    // user keeps the scratch folders to work in them.
                    let stored = if self.opts.keep_scratch {
                        self.artifacts.put_file(&path)
                    } else {
                        self.artifacts.put_file_linked(&path)
                    };
                    let (h, size) = stored
                        .with_context(|| format!("{}: cannot store the output", path.display()))?;
                    outs.push((role.clone(), h, size, file.clone()));
                }
                let point_id = self.points[fl.point].spec.id.clone();
                let (launch_started, launch_host, launch_handle) =
                    launch_fields(started, host, self.unrecorded.remove(&id));
                // The iteration's last stage: its verdict goes into the same transaction.
                let last = fl.stage + 1 == self.campaign.stages.len();
                if last {
                    self.ensure_history(fl.point).await?;
                }
                if let Some(h) = self.points[fl.point].history.as_mut() {
                    let at = h.entry(fl.iteration).or_default();
                    for m in &metrics {
                        at.insert(
                            format!("{}.{}", stage.name, m.name),
                            Sample {
                                value: m.value,
                                error: m.error,
                            },
                        );
                    }
                }
                let verdict = if last {
                    Some(self.judge(fl.point)?)
                } else {
                    None
                };
                // Everything of this success (and the iteration's verdict) in one script, after
                // the planned rows not yet written (this attempt's among them, if it was short).
                let (mut script, held) = self.held_back();
                if !outs.is_empty() {
                    let now = store::now();
                    script.stmt(&format!(
                        "INSERT INTO artifacts(hash, size, original_name, created_at) VALUES {} \
                         ON CONFLICT(hash) DO NOTHING",
                        store::rows(outs.len(), 4)
                    ));
                    for (_, h, size, file) in &outs {
                        script
                            .bind(h.clone())
                            .bind(i64::try_from(*size).unwrap_or(i64::MAX))
                            .bind(file.clone())
                            .bind(now.clone());
                    }
                    script.stmt(&format!(
                        "INSERT INTO attempt_outputs(attempt_id, role, artifact) VALUES {}",
                        store::rows(outs.len(), 3)
                    ));
                    for (role, h, _, _) in &outs {
                        script.bind(id).bind(role.clone()).bind(h.clone());
                    }
                }
                for chunk in metrics.chunks(200) {
                    script.stmt(&format!(
                        "INSERT INTO metrics(attempt_id, name, value, error) VALUES {}",
                        store::rows(chunk.len(), 4)
                    ));
                    for m in chunk {
                        script
                            .bind(id)
                            .bind(format!("{}.{}", stage.name, m.name))
                            .bind(m.value)
                            .bind(m.error);
                    }
                }
                script
                    .stmt(
                        "UPDATE attempts SET state = ?, exit_status = 0, ended_at = ?, \
                         started_at = coalesce(?, started_at), host = coalesce(?, host), \
                         handle_id = coalesce(?, handle_id) WHERE id = ?",
                    )
                    .bind(AttemptState::Succeeded)
                    .bind(store::time_text(ended.unwrap_or_else(Utc::now)))
                    .bind(launch_started)
                    .bind(launch_host)
                    .bind(launch_handle)
                    .bind(id);
                if let Some(v) = &verdict {
                    record_verdict(&mut script, &point_id, v)?;
                }
                if let Some(ev) = &event {
                    store::event_stmt(
                        &mut script,
                        "mixer",
                        Some(&point_id),
                        Some(fl.iteration),
                        Some(id),
                        ev,
                    );
                }
                let short = match (started, ended) {
                    (Some(a), Some(b)) => (b - a).to_std().is_ok_and(|d| d < SHORT_ATTEMPT),
                    _ => false,
                };
                if short && held + 1 < BATCH_MAX {
                    self.batch = script;
                    self.batched = held + 1;
                } else {
                    script.commit(&self.pool).await?;
                }
                if let Some(ev) = event {
                    self.progress
                        .line(format!("{point_id} iteration {}: {ev}", fl.iteration));
                }
                if !self.opts.keep_scratch {
                    self.scratch.recycle(&fl.workdir);
                }
                let pr = &mut self.points[fl.point];
                pr.outstanding = None;
                pr.next_stage = fl.stage + 1;
                pr.built[fl.stage] = Some(BuiltWith {
                    iteration: fl.iteration,
                    ..fl.built.clone()
                });
                if let Some(v) = verdict {
                    self.apply_verdict(fl.point, v);
                }
                if self.points[fl.point].phase == PointPhase::Active {
                    self.ready.push_back(fl.point);
                }
            }
            Ended::Failed {
                kind,
                message,
                exit_status,
                started,
                ended,
                host,
                free,
                state,
            } => {
                self.flush().await?;
                let (launch_started, launch_host, launch_handle) =
                    launch_fields(started, host, self.unrecorded.remove(&id));
                sqlx::query(
                    "UPDATE attempts SET state = ?, failure_kind = ?, failure_message = ?, exit_status = ?, \
                     ended_at = ?, started_at = coalesce(?, started_at), host = coalesce(?, host), \
                     handle_id = coalesce(?, handle_id) WHERE id = ?",
                )
                .bind(state)
                .bind(&kind)
                .bind(&message)
                .bind(exit_status)
                .bind(store::time_text(ended.unwrap_or_else(Utc::now)))
                .bind(launch_started)
                .bind(launch_host)
                .bind(launch_handle)
                .bind(id)
                .execute(&self.pool)
                .await?;
                let Some(fl) = fl else { return Ok(()) };
                let Some(stage) = stage else { return Ok(()) };
                let point_id = self.points[fl.point].spec.id.clone();
                store::event(
                    &self.pool,
                    &format!("attempt-{state}"),
                    Some(&point_id),
                    Some(fl.iteration),
                    Some(id),
                    &format!("{kind}: {message}"),
                )
                .await?;
                if free {
                    let pr = &mut self.points[fl.point];
                    pr.outstanding = None;
                    self.ready.push_back(fl.point);
                    return Ok(());
                }
                self.progress.line(format!(
                    "{point_id} iteration {} stage {} attempt {} failed ({kind}): {}",
                    fl.iteration,
                    stage.name,
                    fl.attempt,
                    first_line(&message)
                ));
                let failures: i64 = sqlx::query_scalar(
                    "SELECT count(*) FROM attempts WHERE point = ? AND iteration = ? AND stage = ? AND state = ?",
                )
                .bind(&point_id)
                .bind(i64::from(fl.iteration))
                .bind(&stage.name)
                .bind(AttemptState::Failed)
                .fetch_one(&self.pool)
                .await?;
                let pr = &mut self.points[fl.point];
                pr.outstanding = None;
                if failures > i64::from(stage.retries) {
                    let reason = format!(
                        "stage `{}` failed at iteration {} after {failures} attempt(s); last: {kind}: {}",
                        stage.name,
                        fl.iteration,
                        first_line(&message)
                    );
                    self.fail_point(fl.point, fl.iteration, Some(id), &reason, None)
                        .await?;
                } else {
                    self.ready.push_back(fl.point);
                }
            }
        }
        Ok(())
    }

    /// All stages of the point's iteration succeeded (found so on resume): apply the
    /// stopping rules. Normally the verdict is recorded with the last stage's success.
    async fn finish_iteration(&mut self, p: usize) -> Result<()> {
        self.ensure_history(p).await?;
        let v = self.judge(p)?;
        let point_id = self.points[p].spec.id.clone();
        let mut script = store::Script::new();
        record_verdict(&mut script, &point_id, &v)?;
        script.commit(&self.pool).await?;
        self.apply_verdict(p, v);
        Ok(())
    }

    /// The stopping rules on the point's history (which holds its current iteration).
    fn judge(&mut self, p: usize) -> Result<Verdict> {
        let pr = &mut self.points[p];
        let n = pr.iteration;
        let Some(history) = pr.history.as_mut() else {
            bail!("internal: metric history of {} not read", pr.spec.id);
        };
        history.entry(n).or_default();
        let decision = stop::decide(
            &self.campaign.rules,
            self.campaign.combine,
            self.campaign.max_iterations,
            history,
        );
        let summary = decision
            .rules
            .iter()
            .map(|r| {
                format!(
                    "{} Δ={}",
                    r.metric,
                    r.change
                        .map(|c| format!("{c:.3e}"))
                        .unwrap_or_else(|| "–".into())
                )
            })
            .collect::<Vec<_>>()
            .join(", ");
        let first_met = pr.first_met.or(decision.rules_met.then_some(n));
        let window = self.campaign.final_window;
        let fate = if let Some(why) = &decision.diverged {
            Some((PointState::Failed, format!("diverging: {why}")))
        } else if let Some(f) = first_met {
            if n >= f + window {
                Some((
                    PointState::Converged,
                    if window > 0 {
                        format!(
                            "stopping rules met at iteration {f}; averaged over iterations {}..{n}",
                            f + 1
                        )
                    } else {
                        format!("stopping rules met at iteration {n}")
                    },
                ))
            } else if decision.at_cap {
                Some((
                    PointState::Converged,
                    format!("stopping rules met at iteration {f}; final window cut short by max-iterations at {n}"),
                ))
            } else {
                None
            }
        } else if decision.at_cap && self.campaign.rules.is_empty() {
            Some((
                PointState::Capped,
                format!(
                    "ran all {n} iterations of max-iterations: the campaign has no stopping rule"
                ),
            ))
        } else if decision.at_cap {
            Some((
                PointState::Capped,
                format!("reached max-iterations ({n}) without meeting the stopping rules"),
            ))
        } else {
            None
        };
        Ok(Verdict {
            iteration: n,
            decision,
            fate,
            summary,
            first_met,
        })
    }

    /// After the verdict is committed: move the point on in memory and log it.
    fn apply_verdict(&mut self, p: usize, v: Verdict) {
        let nstages = self.campaign.stages.len();
        let pr = &mut self.points[p];
        let point_id = pr.spec.id.clone();
        let n = v.iteration;
        pr.first_met = v.first_met;
        let rules = if v.summary.is_empty() {
            String::new()
        } else {
            format!(" ({})", v.summary)
        };
        if let Some((state, reason)) = &v.fate {
            pr.phase = PointPhase::Done;
            let why = if v.summary.is_empty() {
                format!(": {reason}")
            } else {
                rules
            };
            self.progress
                .line(format!("{point_id} {state} at iteration {n}{why}"));
        } else {
            pr.iteration = n + 1;
            pr.next_stage = 0;
            pr.attempts = vec![0; nstages];
            if let Some(h) = pr.history.as_mut() {
                h.entry(n + 1).or_default();
            }
            let note = if v.first_met.is_some() {
                " [final window]"
            } else {
                ""
            };
            self.progress
                .line(format!("{point_id} iteration {n} good{rules}{note}"));
        }
    }

    /// Write the launches of local attempts still running (see [`UnrecordedLaunch`]).
    async fn record_launches(&mut self) -> Result<()> {
        if self.unrecorded.is_empty() && self.planned.is_empty() && self.batch.is_empty() {
            return Ok(());
        }
        let (mut script, _) = self.held_back();
        for (id, l) in self.unrecorded.drain() {
            script
                .stmt(
                    "UPDATE attempts SET state = ?, handle_id = ?, host = ?, \
                     started_at = coalesce(started_at, ?) WHERE id = ? AND state = ?",
                )
                .bind(AttemptState::Running)
                .bind(l.handle_id)
                .bind(l.host)
                .bind(l.started_at)
                .bind(id)
                .bind(AttemptState::Planned);
        }
        script.commit(&self.pool).await
    }

    /// Commit what is held back: grouped successes and planned rows not yet written. Called
    /// before the engine reads the store, so it always reads what it has decided.
    async fn flush(&mut self) -> Result<()> {
        let (script, _) = self.held_back();
        script.commit(&self.pool).await
    }

    /// Take what is held back as the start of a new script: the grouped successes (and how
    /// many), then the planned rows not yet written. The caller commits it or holds it again.
    fn held_back(&mut self) -> (store::Script, usize) {
        let mut script = std::mem::take(&mut self.batch);
        push_planned(&mut script, std::mem::take(&mut self.planned));
        (script, std::mem::take(&mut self.batched))
    }

    /// Local children of this workspace left by an earlier orchestrator that no recorded
    /// attempt accounts for (started, then the orchestrator died before the row was
    /// written): end them before anything starts. Recorded attempts were reconciled already.
    async fn end_untracked_children(&mut self) -> Result<()> {
        if self.opts.executor.kind() != "local" {
            return Ok(());
        }
        let orphans: Vec<(i64, i32)> = rondo_adapters::local::find_orphans(&self.workspace_id)
            .into_iter()
            .filter(|(attempt, _)| !self.inflight.contains_key(attempt))
            .collect();
        if orphans.is_empty() {
            return Ok(());
        }
        let n = rondo_adapters::local::kill_orphans(&self.workspace_id, &orphans, self.opts.grace)
            .await;
        let ids: Vec<String> = orphans.iter().map(|(a, _)| a.to_string()).collect();
        store::event(
            &self.pool,
            "orphans-ended",
            None,
            None,
            None,
            &format!(
                "{n} unrecorded attempt(s) of an earlier orchestrator still running, ended: ids {}",
                ids.join(", ")
            ),
        )
        .await?;
        Ok(())
    }

    /// Stop on a signal or a cancel request: end or detach from outstanding attempts and
    /// record what happened.
    async fn stop_everything(
        &mut self,
        rx: &mut mpsc::UnboundedReceiver<Completion>,
        request: Option<&CancelRequest>,
    ) -> Result<()> {
        let cancelled = request.is_some();
        let why_text = match request {
            Some(r) => format!("cancelled: {}", r.reason),
            None => "signal received".to_string(),
        };
        let why = why_text.as_str();
        self.record_launches().await?;
        self.progress
            .line(format!("stopping: {why}; ending outstanding attempts"));
        let detail = match request {
            Some(r) => format!("rondo cancel: {} (asked by {} at {})", r.reason, r.by, r.at),
            None => why.to_string(),
        };
        store::event(
            &self.pool,
            if cancelled {
                "cancel"
            } else {
                "run-interrupted"
            },
            None,
            None,
            None,
            &detail,
        )
        .await?;
        let batch = self.opts.executor.kind() != "local";
        if cancelled && batch {
            let ids: Vec<i64> = self.inflight.keys().copied().collect();
            for id in ids {
                if let Err(e) = self.executor.cancel(id, why).await {
                    tracing::warn!(attempt = id, %e, "cancel failed");
                }
            }
        }
        let mode = if batch && !cancelled {
            Shutdown::Detach
        } else {
            Shutdown::Terminate {
                grace: self.opts.grace,
            }
        };
        self.executor
            .shutdown(mode)
            .await
            .map_err(|e| anyhow::anyhow!("shutting down the executor: {e}"))?;
        // Completions of the ended attempts (local: Cancelled by rondo).
        let deadline =
            tokio::time::Instant::now() + Duration::from_secs(if batch { 2 } else { 30 });
        while !self.inflight.is_empty() && (!batch || cancelled) {
            match tokio::time::timeout_at(deadline, rx.recv()).await {
                Ok(Some(c)) => {
                    let id = c.attempt_id;
                    let Some(fl) = self.inflight.get(&id).cloned() else {
                        continue;
                    };
                    let ended = Ended::Failed {
                        kind: "cancelled".into(),
                        message: why.to_string(),
                        exit_status: None,
                        started: c.started_at,
                        ended: c.ended_at,
                        host: c.host,
                        free: true,
                        state: AttemptState::Cancelled,
                    };
                    self.settle(id, Some(&fl), ended).await?;
                }
                _ => break,
            }
        }
        if cancelled {
            let mut tx = self.pool.begin().await?;
            for p in &self.points {
                if p.phase == PointPhase::Active {
                    sqlx::query("UPDATE points SET state = ?, reason = ? WHERE id = ?")
                        .bind(PointState::Cancelled)
                        .bind(why)
                        .bind(&p.spec.id)
                        .execute(&mut *tx)
                        .await?;
                }
            }
            tx.commit().await?;
            let _ = std::fs::remove_file(&self.paths.cancel_request);
        }
        Ok(())
    }
}

/// Start time, host and process group of an ended attempt, as its final row records them:
/// from its completion where it says, else from its launch not yet written.
fn launch_fields(
    started: Option<DateTime<Utc>>,
    host: Option<String>,
    launch: Option<UnrecordedLaunch>,
) -> (Option<String>, Option<String>, Option<String>) {
    let (l_started, l_host, l_handle) = match launch {
        Some(l) => (Some(l.started_at), Some(l.host), Some(l.handle_id)),
        None => (None, None, None),
    };
    (
        started.map(store::time_text).or(l_started),
        host.or(l_host),
        l_handle,
    )
}

/// Write a verdict: the iteration is good (with the rules' evaluation), and either the point
/// stops or its next iteration begins.
fn record_verdict(script: &mut store::Script, point_id: &str, v: &Verdict) -> Result<()> {
    let n = v.iteration;
    script
        .stmt("UPDATE iterations SET state = ?, ended_at = ?, stop_json = ? WHERE point = ? AND iteration = ?")
        .bind(IterationState::Good)
        .bind(store::now())
        .bind(serde_json::to_string(&v.decision)?)
        .bind(point_id.to_string())
        .bind(i64::from(n));
    if let Some((state, reason)) = &v.fate {
        script
            .stmt("UPDATE points SET state = ?, reason = ? WHERE id = ?")
            .bind(*state)
            .bind(reason.clone())
            .bind(point_id.to_string());
        store::event_stmt(
            script,
            &format!("point-{state}"),
            Some(point_id),
            Some(n),
            None,
            reason,
        );
    } else {
        script
            .stmt("INSERT INTO iterations(point, iteration, state, started_at) VALUES (?,?,?,?)")
            .bind(point_id.to_string())
            .bind(i64::from(n + 1))
            .bind(IterationState::Running)
            .bind(store::now());
    }
    Ok(())
}

fn first_line(s: &str) -> &str {
    s.lines().next().unwrap_or("")
}

/// The last lines of the attempt's stderr, for failure messages.
fn stderr_tail(workdir: &Path) -> String {
    let Ok(text) = std::fs::read_to_string(workdir.join("stderr.txt")) else {
        return String::new();
    };
    let lines: Vec<&str> = text.lines().filter(|l| !l.trim().is_empty()).collect();
    if lines.is_empty() {
        return String::new();
    }
    let tail = lines[lines.len().saturating_sub(5)..].join("\n");
    format!(
        "; stderr ends: {}",
        tail.chars().take(1500).collect::<String>()
    )
}
