//! `rondo run`: the run options from the command line, the engine run, and its summary as a
//! line on stderr and an exit code.
//!
//! Owns the translation of flags into [`RunOptions`] and of the engine's summary into an
//! exit code; the running itself is the engine's. No SQL.

use std::time::Duration;

use anyhow::{bail, Result};

use super::workspace::{absolute, load};
use super::{BadInput, ExecutorArg, RunArgs, EXIT_INCOMPLETE, EXIT_INTERRUPTED, EXIT_OK};
use crate::engine::{self, ExecutorChoice, RunOptions, RunSummary};
use crate::progress::Progress;

/// `rondo run FILE`.
pub async fn run(a: RunArgs) -> Result<u8> {
    let c = load(&a.file)?;
    if !a.quiet {
        eprint!("{}", c.warnings_text());
    }
    let workspace = absolute(
        a.workspace
            .clone()
            .unwrap_or_else(|| engine::default_workspace(&a.file)),
    )?;
    let executor = executor(a.executor, a.poll_interval);
    let jobs = a.jobs.unwrap_or(match executor {
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
        retry_failed: a.retry_failed,
        keep_scratch: a.keep_scratch,
        grace: Duration::from_secs(a.grace),
        allocation: {
            let env = rondo_adapters::slurm::allocation::AllocationEnv::from_env();
            env.in_allocation().then_some(env)
        },
        accept_revision: a.accept_revision,
    };
    let summary = match engine::run(&c, &opts, Progress::for_stderr(a.quiet)).await {
        Ok(summary) => summary,
        Err(e) => return Err(said_read_only(e, &opts.workspace)),
    };
    if !a.quiet {
        let counts = summary
            .by_text()
            .iter()
            .map(|(s, n)| format!("{n} {s}"))
            .collect::<Vec<_>>()
            .join(", ");
        eprintln!("rondo: {}: {counts}", c.name);
    }
    Ok(exit_code(&summary))
}

/// A run that failed because its workspace's file system turned read-only under it (a disk
/// error, an administrator's remount) says so first: the store holds what was committed
/// before, and the same `rondo run` continues once the file system is writable again.
fn said_read_only(e: anyhow::Error, workspace: &std::path::Path) -> anyhow::Error {
    let Some(why) = crate::fsinfo::unwritable_now(workspace) else {
        return e;
    };
    e.context(format!(
        "{}: the workspace became read-only during the run ({why}); nothing after the last \
         committed record was written and the running attempts were ended; when it is \
         writable again (ask your administrators if it failed after a disk error), the same \
         `rondo run` continues",
        workspace.display()
    ))
}

/// The executor `--on` names, polling the scheduler every `poll_interval` seconds.
fn executor(arg: ExecutorArg, poll_interval: u64) -> ExecutorChoice {
    let poll_interval = Duration::from_secs(poll_interval.max(1));
    match arg {
        ExecutorArg::Local => ExecutorChoice::Local,
        ExecutorArg::Slurm => ExecutorChoice::Slurm(Box::new(rondo_adapters::slurm::SlurmConfig {
            poll_interval,
            ..Default::default()
        })),
        ExecutorArg::Pbs => ExecutorChoice::Pbs(Box::new(rondo_adapters::pbs::PbsConfig {
            poll_interval,
            ..Default::default()
        })),
    }
}

/// How the run ended, said on stderr, as an exit code.
fn exit_code(summary: &RunSummary) -> u8 {
    if let Some(id) = &summary.continued_as {
        eprintln!("rondo: the allocation ends; the campaign continues in job {id}");
        return EXIT_INTERRUPTED;
    }
    if summary.interrupted {
        eprintln!("rondo: interrupted; `rondo run` again continues where this stopped");
        return EXIT_INTERRUPTED;
    }
    if let Some(reason) = &summary.cancelled_because {
        eprintln!("rondo: cancelled ({reason}); `rondo run` again continues the cancelled points");
    }
    if summary.after_failed > 0 {
        eprintln!(
            "rondo: {} stage run(s) outside the loop failed (events `after-point-failed`, \
             `campaign-stage-failed`); `rondo run` again runs them",
            summary.after_failed
        );
        return EXIT_INCOMPLETE;
    }
    if summary.all_converged() {
        EXIT_OK
    } else {
        EXIT_INCOMPLETE
    }
}
