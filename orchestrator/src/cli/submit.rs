//! `rondo submit`: write (and submit, unless `--print-only`) the batch script that runs the
//! campaign inside Slurm allocations, each job continuing the last.
//!
//! Owns the script's command line (this rondo, `run`, the workspace, `--max-running`,
//! `--accept-revision`) and its resources from the flags; the script itself is
//! `rondo_adapters::slurm::allocation`'s. An edited campaign file whose physics change is
//! not accepted is refused before anything is written or submitted (the classification is
//! [`crate::engine::revise`]'s, read-only). No SQL.

use std::path::Path;
use std::time::Duration;

use anyhow::{Context, Result};
use rondo_adapters::slurm::allocation::{self, AllocationSpec};

use super::output::emit;
use super::workspace::{absolute, load};
use super::{BadInput, SubmitArgs, EXIT_OK};
use crate::engine;
use crate::spec::Campaign;
use crate::store;

/// `rondo submit FILE --time T ...`.
pub async fn run(a: SubmitArgs) -> Result<u8> {
    let c = load(&a.file)?;
    let file = absolute(a.file.clone())?;
    let ws = absolute(
        a.workspace
            .clone()
            .unwrap_or_else(|| engine::default_workspace(&file)),
    )?;
    refuse_early(&c, &ws, a.accept_revision).await?;
    let exe = std::env::current_exe().context("cannot find the rondo executable")?;
    let dir = file.parent().map(Path::to_path_buf).unwrap_or_default();
    let script = dir.join(format!("{}.allocation.sh", c.name));
    let spec = AllocationSpec {
        job_name: format!("{}.allocation", c.name),
        resources: rondo_adapters::executor::Resources {
            nodes: a.nodes,
            ntasks: a.ntasks,
            cpus_per_task: a.cpus_per_task,
            time: Some(a.time),
            partition: a.partition,
            account: a.account,
            qos: a.qos,
            ..Default::default()
        },
        warning: Duration::from_secs(a.warning),
        workdir: dir.clone(),
        command: vec![
            exe.display().to_string(),
            "run".into(),
            file.display().to_string(),
            "--workspace".into(),
            ws.display().to_string(),
            "--max-running".into(),
            a.jobs.to_string(),
        ]
        .into_iter()
        .chain(a.accept_revision.then(|| "--accept-revision".to_string()))
        .collect(),
        env: Default::default(),
        max_continuations: a.max_continuations,
    };
    let text =
        allocation::write_allocation_script(&spec, &script).map_err(|e| BadInput(e.to_string()))?;
    emit(&text);
    eprintln!("rondo: wrote {}", script.display());
    if !a.print_only {
        let id =
            allocation::submit_continuation("sbatch", &script, None, 0, Duration::from_secs(60))
                .await
                .map_err(|e| anyhow::anyhow!("sbatch: {e}"))?;
        eprintln!("rondo: submitted job {id}");
        emit(&format!("{id}\n"));
    }
    Ok(EXIT_OK)
}

/// An edited campaign file that changes what its points compute, not accepted: refused
/// here with the diff `rondo check` prints, as `rondo run` would refuse it inside the
/// allocation (after the wait in the queue). Read-only; nothing when the workspace does not
/// exist yet or the file is its latest revision.
async fn refuse_early(c: &Campaign, ws: &Path, accept: bool) -> Result<()> {
    if !ws.join(store::DB_FILE).is_file() {
        return Ok(());
    }
    let pool = store::open_existing(ws).await?;
    let classified = engine::revise::classify(&pool, c, accept).await;
    pool.close().await;
    let (same, r) = classified?;
    if !same && r.needs_acceptance() && !accept {
        return Err(engine::revise::refusal(c, &r));
    }
    Ok(())
}
