//! The `rondo` command line: the argument definitions (clap), the entry point, and a
//! dispatch table that hands each subcommand to its own module (`check`, `run`, `status`,
//! `cancel`, `analyze`, `builtin`, `trace`, `extract`, `diff`, `export`, `report`,
//! `submit`, `table`, `plan`). Output helpers are in `output`, the exit codes (0 every point converged; 3
//! finished but some point failed, was capped or cancelled; 4 interrupted by a signal; 2 bad
//! input; 1 other errors) in `exit`, finding the workspace in `workspace`.
//!
//! The command line knows no SQL: what it reads or writes in a workspace's database goes
//! through [`crate::store`] (its own queries are [`crate::store::overview`]'s) or through
//! the modules it drives (engine, audit, prov, report, analysis, builtins).

use std::path::PathBuf;
use std::process::ExitCode;

use anyhow::Result;
use clap::{Args, Parser, Subcommand, ValueEnum};

mod analyze;
mod builtin;
mod cancel;
mod check;
mod diff;
mod exit;
mod export;
mod extract;
mod output;
mod plan;
mod prune;
mod report;
mod run;
mod status;
mod submit;
mod table;
mod trace;
mod workspace;

pub use check::plan_text;
pub use exit::{BadInput, EXIT_BAD_INPUT, EXIT_ERROR, EXIT_INCOMPLETE, EXIT_INTERRUPTED, EXIT_OK};
pub use output::format_measurement;
pub use status::status;
pub use workspace::find_workspace;

#[derive(Parser, Debug)]
#[command(
    name = "rondo",
    version,
    about = "Runs charge self-consistent DFT+DMFT campaigns unattended, resumes them after any crash, and records where every number came from."
)]
struct Cli {
    /// More log output (repeat for more).
    #[arg(short, long, global = true, action = clap::ArgAction::Count)]
    verbose: u8,
    #[command(subcommand)]
    command: Command,
}

#[derive(Debug, Clone, Copy, ValueEnum)]
enum ExecutorArg {
    /// Local child processes.
    Local,
    /// Slurm batch jobs (sbatch, squeue, sacct, scancel).
    Slurm,
    /// PBS Professional / OpenPBS batch jobs (qsub, qstat, qdel). Not yet run against a
    /// real PBS server: tested only with recorded command output.
    Pbs,
}

#[derive(Subcommand, Debug)]
enum Command {
    /// Validate a campaign file and print the plan (points, stages, resources, rules).
    Check(CheckArgs),
    /// Run or continue a campaign until every point stops.
    Run(RunArgs),
    /// Per point: sweep values, iteration, state, latest metrics.
    Status(StatusArgs),
    /// Stop submitting, cancel outstanding attempts and record why. A running orchestrator
    /// (here or on another node) is asked through a file in the workspace, which it reads
    /// every half second; it then stops and exits 3.
    Cancel(CancelArgs),
    /// Run the campaign's analyses (the equation-of-state fits) again on a finished workspace
    /// and record the result; this is the command recorded with every analysis result.
    Analyze(AnalyzeArgs),
    /// Run a built-in stage (mix, filter) on files named on the command line; this is the
    /// command recorded with every built-in attempt (docs/provenance.md).
    Builtin {
        #[command(subcommand)]
        call: crate::builtins::BuiltinCommand,
    },
    /// Lineage of a file, an artifact hash prefix, POINT/ITERATION/stage.metric or
    /// POINT/ITERATION/stage.output: the record that made it in full (argv, program hash,
    /// parameters, inputs, outputs), then one line per attempt upstream.
    Trace(TraceArgs),
    /// Write an artifact, named as `rondo trace` accepts (file, hash prefix,
    /// POINT/ITERATION/stage.output, POINT/final/stage.output), to a file of your choice.
    Extract(ExtractArgs),
    /// Compare two points (of this workspace or of two workspaces): sweep values, parameters,
    /// program hashes, inputs, stopping rules, and where their metrics first diverge.
    Diff(DiffArgs),
    /// Export lineage as W3C PROV-JSON: of TARGET (file, hash prefix, metric), or of the
    /// whole campaign.
    Export(ExportArgs),
    /// Write a self-contained report folder: convergence, energy versus volume with the
    /// fitted equation of state, configuration probabilities, observables with error bars.
    Report(ReportArgs),
    /// Write (and submit, unless --print-only) a batch script that runs this campaign inside
    /// Slurm allocations, each job continuing the last at Slurm's warning before the limit.
    Submit(SubmitArgs),
    /// A tidy table for notebooks, as CSV or JSON Lines: every metric of every attempt
    /// (`metrics`), or each point's final values with their errors (`finals`); columns in
    /// docs/tables.md.
    Table(TableArgs),
    /// Estimate the remaining attempts and core-hours per stage from recorded durations
    /// (this workspace's, or another's with --durations-from), against the campaign's budget.
    Plan(PlanArgs),
    /// Apply the retention policies (the campaign's `keep:`, or --keep) to the workspace:
    /// remove stored content no policy keeps; the records and hashes stay.
    Prune(PruneArgs),
    /// Where the disk goes: bytes per stage and output role, kept and removed by retention.
    Du(DuArgs),
    /// Print the JSON Schema of the campaign file.
    Schema,
}

// The flags of `rondo prune` (its help text is the variant's).
#[derive(Args, Debug)]
struct PruneArgs {
    /// The campaign file or workspace folder (default: the single *.rondo folder here).
    file: Option<PathBuf>,
    /// Workspace folder.
    #[arg(long)]
    workspace: Option<PathBuf>,
    /// A policy for one output role, over the campaign's: STAGE.ROLE=last:N,every:K.
    #[arg(long, value_name = "STAGE.ROLE=POLICY")]
    keep: Vec<String>,
    /// Print what was removed as JSON.
    #[arg(long)]
    json: bool,
}

// The flags of `rondo du` (its help text is the variant's).
#[derive(Args, Debug)]
struct DuArgs {
    /// The campaign file or workspace folder (default: the single *.rondo folder here).
    file: Option<PathBuf>,
    /// Workspace folder.
    #[arg(long)]
    workspace: Option<PathBuf>,
    /// JSON output.
    #[arg(long)]
    json: bool,
}

/// Which table `rondo table` writes.
#[derive(Debug, Clone, Copy, ValueEnum)]
enum TableKind {
    /// One row per point, iteration, stage, attempt and metric.
    Metrics,
    /// One row per point and metric: the final value, its error and how it was computed.
    Finals,
}

/// The format of `rondo table`.
#[derive(Debug, Clone, Copy, ValueEnum)]
enum TableFormatArg {
    /// Comma-separated values with a header line.
    Csv,
    /// One JSON object per line.
    Jsonl,
}

// The flags of `rondo table` (its help text is the variant's).
#[derive(Args, Debug)]
struct TableArgs {
    /// Which table.
    #[arg(value_enum)]
    table: TableKind,
    /// The campaign file (its default workspace is used).
    file: Option<PathBuf>,
    /// Workspace folder.
    #[arg(long)]
    workspace: Option<PathBuf>,
    /// Output format.
    #[arg(long, value_enum, default_value = "csv")]
    format: TableFormatArg,
    /// Write to this file instead of stdout.
    #[arg(long, value_name = "FILE")]
    out: Option<PathBuf>,
    /// Include the points a revision of the campaign file retired in `finals` (marked in
    /// its column `retired_in`); `metrics` always holds their rows.
    #[arg(long)]
    with_retired: bool,
    /// Metrics read from the store per query (the table is written as it is read).
    #[arg(long, value_name = "N", default_value_t = 4096, value_parser = clap::value_parser!(u32).range(1..))]
    page: u32,
}

// The flags of `rondo plan` (its help text is the variant's).
#[derive(Args, Debug)]
struct PlanArgs {
    /// The campaign file.
    file: PathBuf,
    /// Workspace folder (default: <campaign>.rondo beside the file; need not exist yet).
    #[arg(long)]
    workspace: Option<PathBuf>,
    /// Take the recorded durations from this workspace instead (e.g. an earlier, similar
    /// campaign).
    #[arg(long, value_name = "WS")]
    durations_from: Option<PathBuf>,
    /// Count an edited campaign file as `rondo run --accept-revision` would apply it
    /// (physics changes accepted).
    #[arg(long)]
    accept_revision: bool,
    /// Machine-readable output.
    #[arg(long)]
    json: bool,
}

// The flags of `rondo check` (its help text is the variant's).
#[derive(Args, Debug)]
struct CheckArgs {
    /// The campaign file.
    file: PathBuf,
    /// Workspace to classify an edited campaign file against (default: <campaign>.rondo
    /// beside the file, when it exists).
    #[arg(long)]
    workspace: Option<PathBuf>,
    /// Classify as `rondo run --accept-revision` would (physics changes accepted).
    #[arg(long)]
    accept_revision: bool,
    /// Machine-readable output: the revision's classification (docs/json-output.md).
    #[arg(long)]
    json: bool,
}

// The flags of `rondo run` (its help text is the variant's).
#[derive(Args, Debug)]
struct RunArgs {
    /// The campaign file.
    file: PathBuf,
    /// Workspace folder (default: <campaign>.rondo beside the file).
    #[arg(long)]
    workspace: Option<PathBuf>,
    /// Where command stages run: as local child processes, as Slurm batch jobs, or as PBS
    /// batch jobs. The PBS executor has not been run against a real PBS server (its tests
    /// use recorded qsub/qstat output): try it on a test queue first.
    #[arg(long = "on", value_name = "PLACE", value_enum, default_value = "local")]
    executor: ExecutorArg,
    /// Most attempts outstanding at once (default: number of CPUs for local, 20 for
    /// slurm and pbs).
    #[arg(long = "max-running", value_name = "N")]
    jobs: Option<usize>,
    /// Give points that failed in an earlier run a fresh set of retries.
    #[arg(long)]
    retry_failed: bool,
    /// Keep the scratch directories of succeeded attempts.
    #[arg(long)]
    keep_scratch: bool,
    /// Seconds between SIGTERM and SIGKILL when rondo ends a local attempt.
    #[arg(long, default_value_t = 10)]
    grace: u64,
    /// Seconds between two scheduler polls (slurm, pbs; be kind to the controller).
    #[arg(long, default_value_t = 30)]
    poll_interval: u64,
    /// Accept an edited campaign file that changes what its points compute (parameters,
    /// programs, commands, inputs, the cycle): points that have not started run the new
    /// text, the values of started points run again as new points.
    #[arg(long)]
    accept_revision: bool,
    /// No progress output.
    #[arg(short, long)]
    quiet: bool,
}

// The flags of `rondo status` (its help text is the variant's).
#[derive(Args, Debug)]
struct StatusArgs {
    /// The campaign file (its default workspace is used).
    file: Option<PathBuf>,
    /// Workspace folder.
    #[arg(long)]
    workspace: Option<PathBuf>,
    /// Machine-readable output (documented in docs/json-output.md).
    #[arg(long)]
    json: bool,
}

// The flags of `rondo cancel` (its help text is the variant's).
#[derive(Args, Debug)]
struct CancelArgs {
    /// The campaign file (its default workspace is used).
    file: Option<PathBuf>,
    /// Workspace folder (default: the single workspace here, or the one below).
    #[arg(long)]
    workspace: Option<PathBuf>,
    /// Why: recorded with the cancelled points and attempts and in the event log.
    #[arg(long, default_value = "rondo cancel")]
    reason: String,
    /// Seconds to wait for a running orchestrator to stop (0: do not wait).
    #[arg(long, default_value_t = 60)]
    wait: u64,
}

// The flags of `rondo analyze` (its help text is the variant's).
#[derive(Args, Debug)]
struct AnalyzeArgs {
    /// The campaign file (its default workspace is used).
    file: Option<PathBuf>,
    /// Workspace folder.
    #[arg(long)]
    workspace: Option<PathBuf>,
    /// Fit the points a revision of the campaign file retired too (each marked with the
    /// revision that retired it). The result is printed and recorded with this flag in its
    /// command and options.
    #[arg(long)]
    with_retired: bool,
}

// The flags of `rondo trace` (its help text is the variant's).
#[derive(Args, Debug)]
struct TraceArgs {
    /// What to trace (ITERATION: a number, `last` or `final`).
    target: String,
    /// Workspace folder (default: the single *.rondo folder here).
    #[arg(long)]
    workspace: Option<PathBuf>,
    /// How many iterations back to show, counting the target's own: a number, or `all`
    /// (default 2; with --json, all).
    #[arg(long, value_name = "N|all")]
    depth: Option<crate::query::Depth>,
    /// Every attempt in full, not one line each.
    #[arg(long)]
    long: bool,
    /// Machine-readable output (documented in docs/provenance.md).
    #[arg(long)]
    json: bool,
}

// The flags of `rondo extract` (its help text is the variant's).
#[derive(Args, Debug)]
struct ExtractArgs {
    /// What to write out, e.g. p003/final/solve.sigma.
    target: String,
    /// Where to write it (an existing folder: the file keeps its recorded name).
    #[arg(short, long, value_name = "PATH")]
    output: PathBuf,
    /// Replace an existing file.
    #[arg(long)]
    force: bool,
    /// Workspace folder (default: the single *.rondo folder here).
    #[arg(long)]
    workspace: Option<PathBuf>,
}

// The flags of `rondo diff` (its help text is the variant's).
#[derive(Args, Debug)]
struct DiffArgs {
    /// First point: an id (p003) or sweep values (volume=27,temperature=300).
    a: String,
    /// Second point.
    b: String,
    /// Workspace of the first point (default: the single *.rondo folder here).
    #[arg(long)]
    workspace: Option<PathBuf>,
    /// Workspace of the second point (default: the same).
    #[arg(long)]
    other_workspace: Option<PathBuf>,
    /// Machine-readable output.
    #[arg(long)]
    json: bool,
}

// The flags of `rondo export` (its help text is the variant's).
#[derive(Args, Debug)]
struct ExportArgs {
    /// Output file of the PROV-JSON document.
    #[arg(long)]
    prov: PathBuf,
    /// What to export (default: everything).
    target: Option<String>,
    /// Workspace folder.
    #[arg(long)]
    workspace: Option<PathBuf>,
}

// The flags of `rondo report` (its help text is the variant's).
#[derive(Args, Debug)]
struct ReportArgs {
    /// Workspace folder.
    #[arg(long)]
    workspace: Option<PathBuf>,
    /// Report folder (default: <workspace>/report).
    #[arg(long)]
    out: Option<PathBuf>,
    /// Sweep axis holding the volume.
    #[arg(long, default_value = "volume")]
    volume_axis: String,
    /// Sweep axis holding the temperature.
    #[arg(long, default_value = "temperature")]
    temperature_axis: String,
    /// Metric with the total energy per site.
    #[arg(long, default_value = "update.energy")]
    energy: String,
    /// Include the points a revision of the campaign file retired (in the tables, figures
    /// and fits), each marked `retired in revision N`.
    #[arg(long)]
    with_retired: bool,
}

// The flags of `rondo submit` (its help text is the variant's).
#[derive(Args, Debug)]
struct SubmitArgs {
    /// The campaign file.
    file: PathBuf,
    /// Workspace folder (default: <campaign>.rondo beside the file).
    #[arg(long)]
    workspace: Option<PathBuf>,
    /// Wall time of each job (`--time`), e.g. 24:00:00.
    #[arg(long)]
    time: String,
    /// Nodes of each job (`--nodes`).
    #[arg(long)]
    nodes: Option<u32>,
    /// Tasks of each job (`--ntasks`).
    #[arg(long)]
    ntasks: Option<u32>,
    /// CPUs per task (`--cpus-per-task`).
    #[arg(long)]
    cpus_per_task: Option<u32>,
    /// Partition (`--partition`).
    #[arg(long)]
    partition: Option<String>,
    /// Account (`--account`).
    #[arg(long)]
    account: Option<String>,
    /// Quality of service (`--qos`).
    #[arg(long)]
    qos: Option<String>,
    /// Seconds before the limit at which Slurm warns rondo (`--signal=B:USR1@N`).
    #[arg(long, default_value_t = 300)]
    warning: u64,
    /// Most continuation jobs after the first (a guard against endless chains).
    #[arg(long, default_value_t = 20)]
    max_continuations: u32,
    /// Attempts running at once inside the allocation.
    #[arg(long = "max-running", value_name = "N", default_value_t = 1)]
    jobs: usize,
    /// Only write and print the script.
    #[arg(long)]
    print_only: bool,
    /// Accept an edited campaign file that changes what its points compute (passed on to
    /// `rondo run --accept-revision` in the script). Without it, such an edit is refused
    /// here, before any allocation is asked for.
    #[arg(long)]
    accept_revision: bool,
}

/// Entry point of the binary.
pub fn main() -> ExitCode {
    let cli = match Cli::try_parse() {
        Ok(c) => c,
        Err(e) => {
            let _ = e.print();
            return ExitCode::from(exit::of_parse_error(&e));
        }
    };
    init_logging(cli.verbose);
    let runtime = match tokio::runtime::Builder::new_current_thread()
        .enable_all()
        .build()
    {
        Ok(r) => r,
        Err(e) => {
            eprintln!("rondo: cannot start the runtime: {e}");
            return ExitCode::from(EXIT_ERROR);
        }
    };
    match runtime.block_on(dispatch(cli.command)) {
        Ok(code) => ExitCode::from(code),
        Err(e) => ExitCode::from(exit::report_error(&e)),
    }
}

/// Log to stderr: warnings, `-v` info, `-vv` debug (`RONDO_LOG` overrides).
fn init_logging(verbose: u8) {
    let filter = match verbose {
        0 => "warn",
        1 => "info",
        _ => "debug",
    };
    let _ = tracing_subscriber::fmt()
        .with_env_filter(
            tracing_subscriber::EnvFilter::try_from_env("RONDO_LOG")
                .unwrap_or_else(|_| tracing_subscriber::EnvFilter::new(filter)),
        )
        .with_writer(std::io::stderr)
        .try_init();
}

/// One function per subcommand; each returns its exit code.
async fn dispatch(cmd: Command) -> Result<u8> {
    match cmd {
        Command::Check(a) => check::run(a).await,
        Command::Run(a) => run::run(a).await,
        Command::Status(a) => status::run(a).await,
        Command::Cancel(a) => cancel::run(a).await,
        Command::Analyze(a) => analyze::run(a).await,
        Command::Builtin { call } => builtin::run(&call),
        Command::Trace(a) => trace::run(a).await,
        Command::Extract(a) => extract::run(a).await,
        Command::Diff(a) => diff::run(a).await,
        Command::Export(a) => export::run(a).await,
        Command::Report(a) => report::run(a).await,
        Command::Submit(a) => submit::run(a).await,
        Command::Table(a) => table::run(a).await,
        Command::Plan(a) => plan::run(a).await,
        Command::Prune(a) => prune::prune(a).await,
        Command::Du(a) => prune::du(a).await,
        Command::Schema => check::schema(),
    }
}
