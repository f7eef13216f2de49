//! The `rondo` command line: argument parsing, the subcommands, their human and `--json`
//! output, and the exit codes (0 every point converged; 3 finished but some point failed,
//! was capped or cancelled; 4 interrupted by a signal; 2 bad input; 1 other errors).

use std::path::{Path, PathBuf};
use std::process::ExitCode;
use std::time::Duration;

use anyhow::{bail, Context, Result};
use clap::{Parser, Subcommand, ValueEnum};
use sqlx::Row;

use crate::engine::{self, ExecutorChoice, Paths, RunOptions};
use crate::progress::Progress;
use crate::spec::{self, Campaign, Source, StageKind};
use crate::store::{self, AttemptState, IterationState, PointState};

/// Exit code: every point converged.
pub const EXIT_OK: u8 = 0;
/// Exit code: an error that is not the input's fault.
pub const EXIT_ERROR: u8 = 1;
/// Exit code: bad input (campaign file, arguments, workspace mismatch).
pub const EXIT_BAD_INPUT: u8 = 2;
/// Exit code: finished, but some point failed, hit its iteration cap or was cancelled.
pub const EXIT_INCOMPLETE: u8 = 3;
/// Exit code: stopped by SIGINT/SIGTERM; `rondo run` again continues.
pub const EXIT_INTERRUPTED: u8 = 4;

/// An error caused by the user's input (exit code 2).
#[derive(Debug, thiserror::Error)]
#[error("{0}")]
pub struct BadInput(pub String);

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
    Check {
        /// The campaign file.
        file: PathBuf,
    },
    /// Run or continue a campaign until every point stops.
    Run {
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
        /// No progress output.
        #[arg(short, long)]
        quiet: bool,
    },
    /// Per point: sweep values, iteration, state, latest metrics.
    Status {
        /// The campaign file (its default workspace is used).
        file: Option<PathBuf>,
        /// Workspace folder.
        #[arg(long)]
        workspace: Option<PathBuf>,
        /// Machine-readable output (documented in docs/json-output.md).
        #[arg(long)]
        json: bool,
    },
    /// Stop submitting, cancel outstanding attempts and record why. A running orchestrator
    /// (here or on another node) is asked through a file in the workspace, which it reads
    /// every half second; it then stops and exits 3.
    Cancel {
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
    },
    /// Run the campaign's analyses (the equation-of-state fits) again on a finished workspace
    /// and record the result; this is the command recorded with every analysis result.
    Analyze {
        /// The campaign file (its default workspace is used).
        file: Option<PathBuf>,
        /// Workspace folder.
        #[arg(long)]
        workspace: Option<PathBuf>,
    },
    /// Run a built-in stage (mix, filter) on files named on the command line; this is the
    /// command recorded with every built-in attempt (docs/provenance.md).
    Builtin {
        #[command(subcommand)]
        call: crate::builtins::BuiltinCommand,
    },
    /// Lineage of a file, an artifact hash prefix, POINT/ITERATION/stage.metric or
    /// POINT/ITERATION/stage.output: the record that made it in full (argv, program hash,
    /// parameters, inputs, outputs), then one line per attempt upstream.
    Trace {
        /// What to trace (ITERATION: a number, `last` or `final`).
        target: String,
        /// Workspace folder (default: the single *.rondo folder here).
        #[arg(long)]
        workspace: Option<PathBuf>,
        /// How many iterations back to show, counting the target's own: a number, or `all`
        /// (default 2; with --json, all).
        #[arg(long, value_name = "N|all")]
        depth: Option<crate::audit::Depth>,
        /// Every attempt in full, not one line each.
        #[arg(long)]
        long: bool,
        /// Machine-readable output (documented in docs/provenance.md).
        #[arg(long)]
        json: bool,
    },
    /// Write an artifact, named as `rondo trace` accepts (file, hash prefix,
    /// POINT/ITERATION/stage.output, POINT/final/stage.output), to a file of your choice.
    Extract {
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
    },
    /// Compare two points (of this workspace or of two workspaces): sweep values, parameters,
    /// program hashes, inputs, stopping rules, and where their metrics first diverge.
    Diff {
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
    },
    /// Export lineage as W3C PROV-JSON: of TARGET (file, hash prefix, metric), or of the
    /// whole campaign.
    Export {
        /// Output file of the PROV-JSON document.
        #[arg(long)]
        prov: PathBuf,
        /// What to export (default: everything).
        target: Option<String>,
        /// Workspace folder.
        #[arg(long)]
        workspace: Option<PathBuf>,
    },
    /// Write a self-contained report folder: convergence, energy versus volume with the
    /// fitted equation of state, configuration probabilities, observables with error bars.
    Report {
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
    },
    /// Write (and submit, unless --print-only) a batch script that runs this campaign inside
    /// Slurm allocations, each job continuing the last at Slurm's warning before the limit.
    Submit {
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
    },
    /// Print the JSON Schema of the campaign file.
    Schema,
}

/// Entry point of the binary.
pub fn main() -> ExitCode {
    let cli = match Cli::try_parse() {
        Ok(c) => c,
        Err(e) => {
            let _ = e.print();
            return ExitCode::from(if e.use_stderr() {
                EXIT_BAD_INPUT
            } else {
                EXIT_OK
            });
        }
    };
    let filter = match cli.verbose {
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
        Err(e) => {
            if let Some(s) = e.downcast_ref::<spec::SpecErrors>() {
                eprint!("{s}");
                return ExitCode::from(EXIT_BAD_INPUT);
            }
            eprintln!("rondo: {e:#}");
            if e.downcast_ref::<BadInput>().is_some() {
                ExitCode::from(EXIT_BAD_INPUT)
            } else {
                ExitCode::from(EXIT_ERROR)
            }
        }
    }
}

async fn dispatch(cmd: Command) -> Result<u8> {
    match cmd {
        Command::Check { file } => {
            let c = load(&file)?;
            eprint!("{}", c.warnings_text());
            emit(&plan_text(&c));
            Ok(EXIT_OK)
        }
        Command::Run {
            file,
            workspace,
            executor,
            jobs,
            retry_failed,
            keep_scratch,
            grace,
            poll_interval,
            quiet,
        } => {
            let c = load(&file)?;
            if !quiet {
                eprint!("{}", c.warnings_text());
            }
            let workspace =
                absolute(workspace.unwrap_or_else(|| engine::default_workspace(&file)))?;
            let executor = match executor {
                ExecutorArg::Local => ExecutorChoice::Local,
                ExecutorArg::Slurm => {
                    ExecutorChoice::Slurm(Box::new(rondo_adapters::slurm::SlurmConfig {
                        poll_interval: Duration::from_secs(poll_interval.max(1)),
                        ..Default::default()
                    }))
                }
                ExecutorArg::Pbs => ExecutorChoice::Pbs(Box::new(rondo_adapters::pbs::PbsConfig {
                    poll_interval: Duration::from_secs(poll_interval.max(1)),
                    ..Default::default()
                })),
            };
            let jobs = jobs.unwrap_or(match executor {
                ExecutorChoice::Local => std::thread::available_parallelism()
                    .map(|n| n.get())
                    .unwrap_or(2),
                ExecutorChoice::Slurm(_) | ExecutorChoice::Pbs(_) => 20,
            });
            if jobs == 0 {
                bail!(BadInput("--max-running must be at least 1".into()));
            }
            let opts = RunOptions {
                workspace,
                executor,
                jobs,
                retry_failed,
                keep_scratch,
                grace: Duration::from_secs(grace),
                allocation: {
                    let env = rondo_adapters::slurm::allocation::AllocationEnv::from_env();
                    env.in_allocation().then_some(env)
                },
            };
            let summary = engine::run(&c, &opts, Progress::for_stderr(quiet)).await?;
            let counts = summary
                .by_text()
                .iter()
                .map(|(s, n)| format!("{n} {s}"))
                .collect::<Vec<_>>()
                .join(", ");
            if !quiet {
                eprintln!("rondo: {}: {counts}", c.name);
            }
            if let Some(id) = &summary.continued_as {
                eprintln!("rondo: the allocation ends; the campaign continues in job {id}");
                return Ok(EXIT_INTERRUPTED);
            }
            if summary.interrupted {
                eprintln!("rondo: interrupted; `rondo run` again continues where this stopped");
                return Ok(EXIT_INTERRUPTED);
            }
            if let Some(reason) = &summary.cancelled_because {
                eprintln!(
                    "rondo: cancelled ({reason}); `rondo run` again continues the cancelled points"
                );
            }
            Ok(if summary.all_converged() {
                EXIT_OK
            } else {
                EXIT_INCOMPLETE
            })
        }
        Command::Status {
            file,
            workspace,
            json,
        } => {
            let ws = find_workspace(file.as_deref(), workspace)?;
            let status = status(&ws).await?;
            if json {
                emit(&format!("{}\n", serde_json::to_string_pretty(&status)?));
            } else {
                emit(&status_text(&status));
            }
            Ok(EXIT_OK)
        }
        Command::Cancel {
            file,
            workspace,
            reason,
            wait,
        } => {
            let ws = find_workspace(file.as_deref(), workspace)?;
            cancel(&ws, &reason, Duration::from_secs(wait)).await
        }
        Command::Analyze { file, workspace } => {
            let ws = find_workspace(file.as_deref(), workspace)?;
            analyze(&ws).await
        }
        Command::Builtin { call } => builtin(&call),
        Command::Trace {
            target,
            workspace,
            depth,
            long,
            json,
        } => {
            let ws = find_workspace(None, workspace)?;
            let pool = store::open_existing(&ws).await?;
            let mut bar = crate::progress::Bytes::new("hashing");
            let t =
                crate::audit::resolve(&pool, &ws, &target, &mut |done, total| bar.set(done, total))
                    .await
                    .map_err(|e| BadInput(format!("{e:#}")))?;
            bar.finish();
            let mut lineage = crate::audit::lineage_of(&pool, &t).await?;
            pool.close().await;
            if json {
                if let Some(d) = depth {
                    lineage.limit(d);
                }
                emit(&format!("{}\n", serde_json::to_string_pretty(&lineage)?));
            } else {
                lineage.limit(depth.unwrap_or(crate::audit::DEFAULT_DEPTH));
                emit(&lineage.render(&crate::audit::TextView { long }));
            }
            Ok(EXIT_OK)
        }
        Command::Extract {
            target,
            output,
            force,
            workspace,
        } => {
            let ws = find_workspace(None, workspace)?;
            let pool = store::open_existing(&ws).await?;
            let out = absolute(output)?;
            let done = crate::audit::extract(&pool, &ws, &target, &out, force).await;
            pool.close().await;
            let done = done.map_err(|e| match e.downcast_ref::<crate::audit::Refused>() {
                Some(r) => anyhow::Error::new(BadInput(r.0.clone())),
                None => e,
            })?;
            eprintln!(
                "rondo: wrote {} ({} bytes, BLAKE3 {} verified)",
                done.path.display(),
                done.size,
                done.hash
            );
            Ok(EXIT_OK)
        }
        Command::Diff {
            a,
            b,
            workspace,
            other_workspace,
            json,
        } => {
            let ws_a = find_workspace(None, workspace)?;
            let ws_b = match other_workspace {
                Some(w) => absolute(w)?,
                None => ws_a.clone(),
            };
            let pa = store::open_existing(&ws_a).await?;
            let pb = store::open_existing(&ws_b).await?;
            let d = crate::audit::diff(&pa, &a, &pb, &b)
                .await
                .map_err(|e| BadInput(format!("{e:#}")))?;
            if json {
                emit(&format!("{}\n", serde_json::to_string_pretty(&d)?));
            } else {
                emit(&d.to_text());
            }
            Ok(EXIT_OK)
        }
        Command::Export {
            prov,
            target,
            workspace,
        } => {
            let ws = find_workspace(None, workspace)?;
            let pool = store::open_existing(&ws).await?;
            let t = match &target {
                Some(t) => {
                    let mut bar = crate::progress::Bytes::new("hashing");
                    let r = crate::audit::resolve(&pool, &ws, t, &mut |d, n| bar.set(d, n))
                        .await
                        .map_err(|e| BadInput(format!("{e:#}")))?;
                    bar.finish();
                    Some(r)
                }
                None => None,
            };
            let doc =
                crate::prov::export_target(&pool, t.as_ref(), &crate::prov::current_user()).await?;
            let mut text = serde_json::to_string_pretty(&doc)?;
            text.push('\n');
            crate::artifacts::write_new(&prov, text.as_bytes())
                .with_context(|| format!("{}: cannot write", prov.display()))?;
            let (e, a, g) = crate::prov::counts(&doc);
            eprintln!(
                "rondo: wrote {} ({e} entities, {a} activities, {g} agents)",
                prov.display()
            );
            Ok(EXIT_OK)
        }
        Command::Report {
            workspace,
            out,
            volume_axis,
            temperature_axis,
            energy,
        } => {
            let ws = find_workspace(None, workspace)?;
            // A report records its own provenance (argv, options, sources, outputs) in the
            // workspace, so it needs write access; the reading commands do not.
            let pool = store::open_existing_rw(
                &ws,
                "`rondo report` records the report's provenance in the workspace database",
            )
            .await?;
            let out = absolute(out.unwrap_or_else(|| ws.join("report")))?;
            let opts = crate::report::ReportOptions {
                volume_axis,
                temperature_axis,
                energy_metric: energy,
                argv: std::env::args().collect(),
                ..Default::default()
            };
            let bar = if std::io::IsTerminal::is_terminal(&std::io::stderr()) {
                Some(indicatif::ProgressBar::new(1))
            } else {
                None
            };
            let summary = crate::report::generate_with(&pool, &ws, &out, &opts, &mut |p| {
                if let Some(b) = &bar {
                    b.set_length(p.total as u64);
                    b.set_position(p.done as u64);
                    b.set_message(p.step.clone());
                }
            })
            .await?;
            if let Some(b) = &bar {
                b.finish_and_clear();
            }
            for n in &summary.notes {
                eprintln!("rondo: report: {n}");
            }
            eprintln!(
                "rondo: report in {} ({} figures, {} tables); open index.html",
                summary.out_dir.display(),
                summary.figures.len(),
                summary.tables.len()
            );
            Ok(EXIT_OK)
        }
        Command::Submit {
            file,
            workspace,
            time,
            nodes,
            ntasks,
            cpus_per_task,
            partition,
            account,
            qos,
            warning,
            max_continuations,
            jobs,
            print_only,
        } => {
            let c = load(&file)?;
            let file = absolute(file)?;
            let ws = absolute(workspace.unwrap_or_else(|| engine::default_workspace(&file)))?;
            let exe = std::env::current_exe().context("cannot find the rondo executable")?;
            let dir = file.parent().map(Path::to_path_buf).unwrap_or_default();
            let script = dir.join(format!("{}.allocation.sh", c.name));
            let spec = rondo_adapters::slurm::allocation::AllocationSpec {
                job_name: format!("{}.allocation", c.name),
                resources: rondo_adapters::executor::Resources {
                    nodes,
                    ntasks,
                    cpus_per_task,
                    time: Some(time),
                    partition,
                    account,
                    qos,
                    ..Default::default()
                },
                warning: Duration::from_secs(warning),
                workdir: dir.clone(),
                command: vec![
                    exe.display().to_string(),
                    "run".into(),
                    file.display().to_string(),
                    "--workspace".into(),
                    ws.display().to_string(),
                    "--max-running".into(),
                    jobs.to_string(),
                ],
                env: Default::default(),
                max_continuations,
            };
            let text = rondo_adapters::slurm::allocation::write_allocation_script(&spec, &script)
                .map_err(|e| BadInput(e.to_string()))?;
            emit(&text);
            eprintln!("rondo: wrote {}", script.display());
            if !print_only {
                let id = rondo_adapters::slurm::allocation::submit_continuation(
                    "sbatch",
                    &script,
                    None,
                    0,
                    Duration::from_secs(60),
                )
                .await
                .map_err(|e| anyhow::anyhow!("sbatch: {e}"))?;
                eprintln!("rondo: submitted job {id}");
                emit(&format!("{id}\n"));
            }
            Ok(EXIT_OK)
        }
        Command::Schema => {
            emit(&spec::json_schema());
            Ok(EXIT_OK)
        }
    }
}

/// Write to stdout; a closed pipe (`rondo trace ... | head`) ends the output quietly.
fn emit(text: &str) {
    use std::io::Write;
    let mut out = std::io::stdout().lock();
    if out
        .write_all(text.as_bytes())
        .and_then(|()| out.flush())
        .is_err()
    {
        // The reader went away; nothing more to say.
    }
}

fn load(file: &Path) -> Result<Campaign> {
    if !file.is_file() {
        bail!(BadInput(format!(
            "{}: no such campaign file",
            file.display()
        )));
    }
    Ok(spec::load(file)?)
}

fn absolute(p: PathBuf) -> Result<PathBuf> {
    if p.is_absolute() {
        return Ok(p);
    }
    Ok(std::env::current_dir()
        .context("cannot read the current directory")?
        .join(p))
}

/// Workspaces (`*.rondo` folders holding a database) directly in `dir`, sorted.
fn workspaces_in(dir: &Path) -> Vec<PathBuf> {
    let mut found: Vec<PathBuf> = std::fs::read_dir(dir)
        .map(|entries| {
            entries
                .filter_map(|e| e.ok().map(|e| e.path()))
                .filter(|p| {
                    p.extension().is_some_and(|e| e == "rondo") && p.join(store::DB_FILE).is_file()
                })
                .collect()
        })
        .unwrap_or_default();
    found.sort();
    found
}

/// The workspace named by `--workspace`, by a campaign file (its default workspace beside
/// it), or else found the way a user expects: the only workspace in the current folder; if
/// there is none, the only one in its subfolders (the project root after `bash scripts/demo`
/// finds `examples/model-sweep.rondo`), named on stderr. Several candidates are listed and
/// the user is asked to choose.
pub fn find_workspace(file: Option<&Path>, workspace: Option<PathBuf>) -> Result<PathBuf> {
    if let Some(ws) = workspace {
        return absolute(ws);
    }
    if let Some(f) = file {
        if f.is_dir() {
            return absolute(f.to_path_buf());
        }
        return absolute(engine::default_workspace(f));
    }
    let here = std::env::current_dir().context("cannot read the current directory")?;
    let rel = |p: &Path| p.strip_prefix(&here).unwrap_or(p).display().to_string();
    let choose = |found: &[PathBuf], where_: &str| -> anyhow::Error {
        BadInput(format!(
            "several workspaces {where_}: {}; choose one with --workspace DIR",
            found.iter().map(|p| rel(p)).collect::<Vec<_>>().join(", ")
        ))
        .into()
    };
    let found = workspaces_in(&here);
    match found.as_slice() {
        [one] => return Ok(one.clone()),
        [] => {}
        _ => return Err(choose(&found, "here")),
    }
    let mut subdirs: Vec<PathBuf> = std::fs::read_dir(&here)
        .with_context(|| format!("{}: cannot list", here.display()))?
        .filter_map(|e| e.ok().map(|e| e.path()))
        .filter(|p| {
            p.is_dir()
                && !p
                    .file_name()
                    .is_some_and(|n| n.to_string_lossy().starts_with('.'))
        })
        .collect();
    subdirs.sort();
    let below: Vec<PathBuf> = subdirs.iter().flat_map(|d| workspaces_in(d)).collect();
    match below.as_slice() {
        [one] => {
            eprintln!(
                "rondo: workspace {} (the only one below this folder; --workspace names another)",
                rel(one)
            );
            Ok(one.clone())
        }
        [] => bail!(BadInput(
            "no workspace given, and none (*.rondo with a rondo.db) in the current folder or \
             its subfolders; pass the campaign file, or --workspace DIR"
                .into()
        )),
        _ => Err(choose(&below, "below this folder")),
    }
}

/// The plan printed by `rondo check`.
pub fn plan_text(c: &Campaign) -> String {
    use std::fmt::Write;
    let mut s = String::new();
    let _ = writeln!(s, "campaign {} ({})", c.name, c.file.display());
    let _ = writeln!(s, "  {} point(s):", c.points.len());
    for p in &c.points {
        let vals = p
            .values
            .iter()
            .map(|(k, v)| format!("{k}={v}"))
            .collect::<Vec<_>>()
            .join(" ");
        let _ = writeln!(s, "    {}  {vals}", p.id);
    }
    let _ = writeln!(s, "  cycle ({} stages, in order):", c.stages.len());
    for st in &c.stages {
        let what = match &st.kind {
            StageKind::Command { program, .. } => {
                let path = c
                    .programs
                    .get(program)
                    .map(|p| p.path.display().to_string())
                    .unwrap_or_default();
                format!("runs {program} ({path})")
            }
            StageKind::Shell { programs, .. } => {
                let named = programs
                    .iter()
                    .map(|n| {
                        let path = c
                            .programs
                            .get(n)
                            .map(|p| p.path.display().to_string())
                            .unwrap_or_default();
                        format!("{n} ({path})")
                    })
                    .collect::<Vec<_>>();
                format!(
                    "runs a /bin/sh script{}",
                    if named.is_empty() {
                        String::new()
                    } else {
                        format!(" using {}", named.join(", "))
                    }
                )
            }
            StageKind::Filter(w) => format!(
                "built-in filter ({} Legendre coefficients, {} Matsubara frequencies)",
                w.legendre, w.matsubara
            ),
            StageKind::Mix(w) => {
                format!("built-in mix ({:?}, alpha {})", w.method, w.alpha).to_lowercase()
            }
        };
        let _ = writeln!(s, "    {}: {what}", st.name);
        for (role, src) in &st.inputs {
            let from = match src {
                Source::Same { stage, role } => format!("{stage}.{role}"),
                Source::Start(n) => format!("start.{n}"),
                Source::Previous {
                    stage,
                    role,
                    initially,
                } => format!(
                    "{stage}.{role} of the previous iteration{}",
                    initially
                        .as_ref()
                        .map(|i| format!(" (iteration 1: start.{i})"))
                        .unwrap_or_default()
                ),
            };
            let _ = writeln!(s, "      in  {role} ← {from}");
        }
        for (role, f) in &st.outputs {
            let _ = writeln!(s, "      out {role} → {f}");
        }
        let res = serde_json::to_string(&st.resources).unwrap_or_default();
        let _ = writeln!(
            s,
            "      resources {res}; time limit {}; retries {}",
            st.time_limit
                .map(|d| format!("{} s", d.as_secs()))
                .unwrap_or_else(|| "none".into()),
            st.retries
        );
    }
    let _ = writeln!(
        s,
        "  stop when {} of:",
        match c.combine {
            crate::spec::Combine::All => "all",
            crate::spec::Combine::Any => "any",
        }
    );
    let describe = |t: &crate::spec::RuleTest| match *t {
        crate::spec::RuleTest::Abs(t) => format!("|change| < {t}"),
        crate::spec::RuleTest::Rel(t) => format!("|change| < {t} × |value|"),
        crate::spec::RuleTest::Errors(k) => format!("|change| ≤ {k} combined standard errors"),
    };
    for r in &c.rules {
        let test = describe(&r.test);
        let _ = writeln!(
            s,
            "    {} {test}, {} iteration{} in a row{}{}",
            r.metric,
            r.for_,
            if r.for_ == 1 { "" } else { "s" },
            if r.compare == crate::spec::Compare::Window {
                " (every pair of the window)"
            } else {
                ""
            },
            r.diverge_above
                .map(|d| format!("; diverging if |change| > {d}"))
                .unwrap_or_default()
        );
    }
    let _ = writeln!(s, "    at most {} iterations", c.max_iterations);
    if c.final_window > 0 {
        let _ = writeln!(
            s,
            "    then a final window of {} iterations, averaged",
            c.final_window
        );
    }
    for sc in &c.schedules {
        let _ = writeln!(
            s,
            "  schedule {}: {} at iteration 1, × {} (at most {}) after each iteration where {} {}",
            sc.name,
            sc.start,
            sc.factor,
            sc.max,
            sc.metric,
            describe(&sc.test)
        );
    }
    s
}

/// The `status --json` document.
pub async fn status(ws: &Path) -> Result<serde_json::Value> {
    let pool = store::open_existing(ws).await?;
    let Some(camp) = store::campaign_row(&pool).await? else {
        bail!("{}: no campaign recorded", ws.display());
    };
    let rows = sqlx::query("SELECT id, idx, values_json, state, reason FROM points ORDER BY idx")
        .fetch_all(&pool)
        .await?;
    let mut points = Vec::new();
    let mut counts = serde_json::Map::new();
    for r in rows {
        let id: String = r.get("id");
        let state: PointState = r
            .try_get("state")
            .with_context(|| format!("{}: point {id}", ws.display()))?;
        let values: serde_json::Value =
            serde_json::from_str(&r.get::<String, _>("values_json")).unwrap_or_default();
        let good: Option<i64> = sqlx::query_scalar(
            "SELECT max(iteration) FROM iterations WHERE point = ? AND state = ?",
        )
        .bind(&id)
        .bind(IterationState::Good)
        .fetch_one(&pool)
        .await?;
        let latest: Option<i64> =
            sqlx::query_scalar("SELECT max(iteration) FROM iterations WHERE point = ?")
                .bind(&id)
                .fetch_one(&pool)
                .await?;
        let mut metrics = serde_json::Map::new();
        let mut errors = serde_json::Map::new();
        if let Some(it) = good {
            for m in sqlx::query(
                "SELECT m.name, m.value, m.error FROM metrics m JOIN attempts a ON a.id = m.attempt_id \
                 WHERE a.point = ? AND a.iteration = ? AND a.state = ? ORDER BY m.name",
            )
            .bind(&id)
            .bind(it)
            .bind(AttemptState::Succeeded)
            .fetch_all(&pool)
            .await?
            {
                let name: String = m.get("name");
                metrics.insert(name.clone(), serde_json::json!(m.get::<f64, _>("value")));
                if let Some(e) = m.get::<Option<f64>, _>("error") {
                    errors.insert(name, serde_json::json!(e));
                }
            }
        }
        let mut averages = serde_json::Map::new();
        let (first, last) = crate::analysis::convergence_marks(&pool, &id).await?;
        if let (Some(f), Some(l)) = (first, last) {
            if f < l {
                for name in metrics.keys() {
                    if let Some(v) = crate::analysis::final_value(&pool, &id, name).await? {
                        averages.insert(
                            name.clone(),
                            serde_json::json!({
                            "value": v.value, "error": v.error, "iterations": v.iterations }),
                        );
                    }
                }
            }
        }
        let attempts: i64 = sqlx::query_scalar("SELECT count(*) FROM attempts WHERE point = ?")
            .bind(&id)
            .fetch_one(&pool)
            .await?;
        let n = counts.entry(state.as_str()).or_insert(serde_json::json!(0));
        *n = serde_json::json!(n.as_u64().unwrap_or(0) + 1);
        points.push(serde_json::json!({
            "id": id,
            "index": r.get::<i64, _>("idx"),
            "values": values,
            "state": state.as_str(),
            "reason": r.get::<Option<String>, _>("reason"),
            "iteration": good.unwrap_or(0),
            "last_iteration": latest.unwrap_or(0),
            "metrics": metrics,
            "errors": errors,
            "averages": averages,
            "attempts": attempts,
        }));
    }
    let running = store::holder(ws);
    let artifacts = crate::artifacts::ArtifactStore::open(&ws.join("store"))
        .with_context(|| format!("{}: cannot open the artifact store", ws.display()))?;
    let eos = crate::analysis::latest_eos(&pool, &artifacts).await?;
    pool.close().await;
    Ok(serde_json::json!({
        "campaign": camp.name,
        "spec_blake3": camp.spec_blake3,
        "workspace": ws.display().to_string(),
        "created_at": camp.created_at,
        "rondo_version": camp.rondo_version,
        "orchestrator": running,
        "counts": counts,
        "points": points,
        "eos": eos,
    }))
}

/// Metric names the text status shows (all are in `--json`).
const SHOWN_METRICS: &[&str] = &[
    ".n_f",
    ".energy",
    ".mu",
    ".docc",
    ".p0",
    ".p1",
    ".p2",
    ".residual_norm",
    ".x",
];

fn status_text(s: &serde_json::Value) -> String {
    use std::fmt::Write;
    let mut out = String::new();
    let _ = writeln!(
        out,
        "campaign {} ({})",
        s["campaign"].as_str().unwrap_or(""),
        s["workspace"].as_str().unwrap_or("")
    );
    if let Some(o) = s["orchestrator"].as_str() {
        let _ = writeln!(out, "  running now: {o}");
    }
    let empty = Vec::new();
    for p in s["points"].as_array().unwrap_or(&empty) {
        let values = p["values"]
            .as_object()
            .map(|m| {
                m.iter()
                    .map(|(k, v)| format!("{k}={v}"))
                    .collect::<Vec<_>>()
                    .join(" ")
            })
            .unwrap_or_default();
        // After a final window the averages are the point's result; otherwise the metrics
        // of the last good iteration.
        let averaged = p["averages"].as_object().filter(|a| !a.is_empty());
        let empty_map = serde_json::Map::new();
        let values_and_errors: Vec<(&String, f64, Option<f64>)> = match averaged {
            Some(a) => a
                .iter()
                .map(|(k, v)| {
                    (
                        k,
                        v["value"].as_f64().unwrap_or(f64::NAN),
                        v["error"].as_f64(),
                    )
                })
                .collect(),
            None => p["metrics"]
                .as_object()
                .unwrap_or(&empty_map)
                .iter()
                .map(|(k, v)| {
                    let e = p["errors"][k.as_str()].as_f64();
                    (k, v.as_f64().unwrap_or(f64::NAN), e)
                })
                .collect(),
        };
        let metrics = values_and_errors
            .into_iter()
            .filter(|(k, _, _)| SHOWN_METRICS.iter().any(|m| k.ends_with(m)))
            .map(|(k, v, e)| format!("{k}={}", format_measurement(v, e)))
            .collect::<Vec<_>>()
            .join(" ");
        let window = averaged
            .and_then(|a| a.values().next())
            .and_then(|v| v["iterations"].as_array())
            .and_then(|its| Some((its.first()?.as_i64()?, its.last()?.as_i64()?)))
            .map(|(a, b)| format!(", averaged over iterations {a}-{b}"))
            .unwrap_or_default();
        // The iteration the point is at or stopped in (a point that failed in iteration 1
        // has no good iteration yet).
        let at = match p["last_iteration"].as_i64().unwrap_or(0) {
            0 => "before its first iteration".to_string(),
            n => format!("at iteration {n}"),
        };
        let _ = writeln!(
            out,
            "  {} {values}: {} {at}{window}{}",
            p["id"].as_str().unwrap_or(""),
            p["state"].as_str().unwrap_or(""),
            p["reason"]
                .as_str()
                .filter(|_| p["state"] != PointState::Converged.as_str())
                .map(|r| format!(" ({r})"))
                .unwrap_or_default()
        );
        if !metrics.is_empty() {
            let _ = writeln!(out, "      {metrics}");
        }
    }
    for line in crate::analysis::eos_lines(&s["eos"]) {
        let _ = writeln!(out, "  {line}");
    }
    out
}

/// A value for people: with an error bar, the value to the error's second significant digit
/// and the error to two digits (`0.92603 ± 0.00025`); without, six decimals, in scientific
/// notation when it is very small or very large.
pub fn format_measurement(value: f64, error: Option<f64>) -> String {
    fn plain(v: f64) -> String {
        if v == 0.0 {
            "0".into()
        } else if (1e-3..1e6).contains(&v.abs()) {
            format!("{v:.6}")
        } else if v.is_finite() {
            format!("{v:.3e}")
        } else {
            format!("{v}")
        }
    }
    match error {
        Some(e) if e.is_finite() && e > 0.0 && value.is_finite() => {
            let decimals = (1 - e.log10().floor() as i32).max(0) as usize;
            if decimals > 10 || value.abs() >= 1e6 {
                format!("{value:.5e} ± {e:.1e}")
            } else {
                format!("{value:.decimals$} ± {e:.decimals$}")
            }
        }
        _ => plain(value),
    }
}

/// `rondo builtin mix|filter`: run the built-in on the files given, relative paths from the
/// current folder; prints the metrics (`name value`, each number the shortest text of its
/// double) and any event (a history reset) on stderr.
fn builtin(call: &crate::builtins::BuiltinCommand) -> Result<u8> {
    let report = call
        .run(Path::new(""))
        .map_err(|m| BadInput(format!("builtin {}: {m}", call.name())))?;
    if let Some(e) = &report.event {
        eprintln!("rondo: builtin {}: {e}", call.name());
    }
    let mut text = String::new();
    for m in &report.metrics {
        text.push_str(&format!("{} {:?}\n", m.name, m.value));
    }
    emit(&text);
    Ok(EXIT_OK)
}

/// `rondo analyze`: compute the recorded campaign's analyses again from the workspace's
/// records and record the result (the same artifact when nothing changed).
async fn analyze(ws: &Path) -> Result<u8> {
    let _lock = store::lock(ws)?;
    let pool = store::open_existing_rw(ws, "analyze records the analysis result").await?;
    let Some(camp) = store::campaign_row(&pool).await? else {
        bail!("{}: no campaign recorded", ws.display());
    };
    let Some(eos) = crate::analysis::recorded_eos(&camp.spec_text)
        .with_context(|| format!("{}: campaign {}", ws.display(), camp.name))?
    else {
        bail!(BadInput(format!(
            "campaign {} has no `analysis:` section; there is nothing to analyze",
            camp.name
        )));
    };
    let open: i64 = sqlx::query_scalar("SELECT count(*) FROM points WHERE state IN (?, ?)")
        .bind(PointState::Planned)
        .bind(PointState::Running)
        .fetch_one(&pool)
        .await?;
    if open > 0 {
        bail!(BadInput(format!(
            "campaign {}: {open} point(s) have not stopped yet; `rondo run` the campaign to its end first",
            camp.name
        )));
    }
    let artifacts = crate::artifacts::ArtifactStore::open(&ws.join("store"))
        .with_context(|| format!("{}: cannot open the artifact store", ws.display()))?;
    let doc = crate::analysis::record_eos(&pool, ws, &artifacts, &eos).await?;
    let hash = crate::analysis::latest_eos_hash(&pool)
        .await?
        .unwrap_or_default();
    pool.close().await;
    let mut text = String::new();
    for line in crate::analysis::eos_lines(&doc) {
        text.push_str(&line);
        text.push('\n');
    }
    emit(&text);
    eprintln!(
        "rondo: wrote {} (artifact {})",
        ws.join("analysis")
            .join(crate::analysis::EOS_ROLE)
            .display(),
        hash.get(..12).unwrap_or(&hash)
    );
    Ok(EXIT_OK)
}

/// `rondo cancel`: ask a running orchestrator to stop (through the workspace's cancel
/// request, which it reads at every tick, wherever it runs), or, when none runs, cancel
/// what an earlier one left outstanding. The reason is recorded either way.
async fn cancel(ws: &Path, reason: &str, wait: Duration) -> Result<u8> {
    if !ws.join(store::DB_FILE).is_file() {
        bail!(BadInput(format!(
            "{}: no rondo workspace here (no {}); give --workspace or the campaign file",
            ws.display(),
            store::DB_FILE
        )));
    }
    let paths = Paths::of(ws);
    let running = match store::holder(ws) {
        Some(h) => Some(h),
        None => match store::lock(ws) {
            Ok(lock) => return cancel_offline(ws, lock, reason).await,
            // A run started just now, or the lock cannot be taken here.
            Err(e) => Some(store::holder(ws).ok_or(e)?),
        },
    };
    let holder = running.unwrap_or_default();
    let request = engine::CancelRequest {
        reason: reason.to_string(),
        by: format!(
            "{} on host {} (pid {})",
            crate::prov::current_user(),
            store::hostname(),
            std::process::id()
        ),
        at: store::now(),
    };
    let text = serde_json::to_string(&request)? + "\n";
    crate::artifacts::write_new(&paths.cancel_request, text.as_bytes()).with_context(|| {
        format!(
            "{}: cannot write the cancel request (only a user who may write the workspace can \
             cancel its run)",
            paths.cancel_request.display()
        )
    })?;
    eprintln!("rondo: asked the running orchestrator ({holder}) to cancel: {reason}");
    if wait.is_zero() {
        return Ok(EXIT_OK);
    }
    let t0 = std::time::Instant::now();
    while t0.elapsed() < wait {
        if store::holder(ws).is_none() {
            eprintln!("rondo: the orchestrator stopped");
            return Ok(EXIT_OK);
        }
        tokio::time::sleep(Duration::from_millis(200)).await;
    }
    eprintln!(
        "rondo: the orchestrator has not stopped within {} s; the request stands and it stops \
         at its next check (`rondo status` shows when)",
        wait.as_secs()
    );
    Ok(EXIT_OK)
}

/// Cancel with no orchestrator running: end what an earlier one left outstanding and mark
/// the unfinished points cancelled.
async fn cancel_offline(ws: &Path, _lock: store::WorkspaceLock, reason: &str) -> Result<u8> {
    let pool = store::open_existing_rw(ws, "cancelling records the cancelled points").await?;
    let camp = store::campaign_row(&pool).await?;
    let ws_id = camp.map(|c| c.workspace_id).unwrap_or_default();
    let sql = format!(
        "SELECT id, executor, handle_id, host FROM attempts WHERE state IN {}",
        store::rows(1, AttemptState::OUTSTANDING.len())
    );
    let mut query = sqlx::query(&sql);
    for s in AttemptState::OUTSTANDING {
        query = query.bind(s);
    }
    let rows = query.fetch_all(&pool).await?;
    let (tx, _rx) = tokio::sync::mpsc::unbounded_channel();
    let mut n = 0;
    for r in rows {
        let id: i64 = r.get("id");
        let kind: String = r.get("executor");
        let handle = rondo_adapters::executor::Handle {
            executor: kind.clone(),
            id: r.get::<Option<String>, _>("handle_id").unwrap_or_default(),
            host: r
                .get::<Option<String>, _>("host")
                .unwrap_or_else(store::hostname),
        };
        use rondo_adapters::executor::Executor;
        let res = match kind.as_str() {
            "slurm" => {
                rondo_adapters::slurm::SlurmExecutor::new(
                    Default::default(),
                    ws_id.clone(),
                    tx.clone(),
                )
                .cancel_recorded(&handle, reason)
                .await
            }
            "pbs" => {
                rondo_adapters::pbs::PbsExecutor::new(Default::default(), tx.clone())
                    .cancel_recorded(&handle, reason)
                    .await
            }
            "local" => {
                rondo_adapters::local::LocalExecutor::new(1, ws_id.clone(), tx.clone())
                    .cancel_recorded(&handle, reason)
                    .await
            }
            _ => Ok(()),
        };
        if let Err(e) = res {
            eprintln!("rondo: attempt {id}: {e}");
        }
        sqlx::query("UPDATE attempts SET state = ?, failure_kind = ?, failure_message = ?, ended_at = ? WHERE id = ?")
            .bind(AttemptState::Cancelled)
            .bind("cancelled") // the failure kind
            .bind(format!("cancelled: {reason}"))
            .bind(store::now())
            .bind(id)
            .execute(&pool)
            .await?;
        n += 1;
    }
    sqlx::query("UPDATE points SET state = ?, reason = ? WHERE state IN (?, ?)")
        .bind(PointState::Cancelled)
        .bind(format!("cancelled: {reason}"))
        .bind(PointState::Planned)
        .bind(PointState::Running)
        .execute(&pool)
        .await?;
    store::event(
        &pool,
        "cancel",
        None,
        None,
        None,
        &format!("rondo cancel: {reason}; {n} outstanding attempt(s) cancelled"),
    )
    .await?;
    pool.close().await;
    eprintln!("rondo: no orchestrator was running; cancelled {n} outstanding attempt(s)");
    Ok(EXIT_OK)
}

#[cfg(test)]
mod tests {
    use super::format_measurement;

    #[test]
    fn measurements_are_shown_to_the_precision_of_their_errors() {
        assert_eq!(
            format_measurement(0.926026511, Some(2.544e-4)),
            "0.92603 ± 0.00025"
        );
        assert_eq!(
            format_measurement(-1.7122489, Some(0.0138)),
            "-1.712 ± 0.014"
        );
        assert_eq!(format_measurement(27.89, Some(0.3)), "27.89 ± 0.30");
        assert_eq!(format_measurement(1234.5, Some(25.0)), "1234 ± 25");
        assert_eq!(format_measurement(0.4, Some(0.0)), "0.400000");
        assert_eq!(format_measurement(-1.719533505, None), "-1.719534");
        assert_eq!(format_measurement(3.2e-7, None), "3.200e-7");
        assert_eq!(format_measurement(0.0, None), "0");
        assert_eq!(format_measurement(f64::NAN, None), "NaN");
    }

    /// Numbers that serde_json's default (fast, inexact) float parser reads one unit in the
    /// last place off: found by a search over the doubles next to a Birch–Murnaghan curve
    /// with serde_json 1.0.154 without `float_roundtrip` (the same values drive the end-to-end
    /// test `published_numbers_come_out_bit_for_bit_...`). Each is the shortest text of its
    /// double, so Rust's own correctly rounded parser gives the reference.
    #[test]
    fn json_numbers_are_read_exactly() {
        for text in [
            "-11.959089291369073",
            "-11.990455887023707",
            "-12.000000000000005",
            "-11.991627802281503",
            "-11.968529824472133",
        ] {
            let exact: f64 = text.parse().unwrap_or(f64::NAN);
            let read: f64 = serde_json::from_str(text).unwrap_or(f64::NAN);
            assert_eq!(read.to_bits(), exact.to_bits(), "{text} read as {read:?}");
            let value: serde_json::Value = serde_json::from_str(text).unwrap_or_default();
            assert_eq!(value.as_f64().map(f64::to_bits), Some(exact.to_bits()));
            assert_eq!(serde_json::to_string(&exact).unwrap_or_default(), text);
        }
    }
}
