//! `rondo cancel`: ask a running orchestrator to stop (through the workspace's cancel
//! request, which it reads at every tick, wherever it runs), or, when none runs, cancel
//! what an earlier one left outstanding. The reason is recorded either way.
//!
//! Owns the choice between the two and what the user is told; the rows it writes offline
//! are [`crate::store::overview`]'s, the cancel request's format is the engine's. No SQL.

use std::path::Path;
use std::time::Duration;

use anyhow::{bail, Context, Result};
use rondo_adapters::executor::{Completion, ExecError, Executor, Handle};
use tokio::sync::mpsc::UnboundedSender;

use super::workspace::find_workspace;
use super::{BadInput, CancelArgs, EXIT_OK};
use crate::engine::{self, Paths};
use crate::store::{self, overview};

/// `rondo cancel [FILE] [--workspace DIR] [--reason TEXT] [--wait S]`.
pub async fn run(a: CancelArgs) -> Result<u8> {
    let ws = find_workspace(a.file.as_deref(), a.workspace)?;
    cancel(&ws, &a.reason, Duration::from_secs(a.wait)).await
}

/// Cancel the campaign of the workspace `ws`, waiting up to `wait` for a running
/// orchestrator to stop.
async fn cancel(ws: &Path, reason: &str, wait: Duration) -> Result<u8> {
    if !ws.join(store::DB_FILE).is_file() {
        bail!(BadInput(format!(
            "{}: no rondo workspace here (no {}); give --workspace or the campaign file",
            ws.display(),
            store::DB_FILE
        )));
    }
    let holder = match store::holder(ws) {
        Some(h) => h,
        None => match store::lock(ws) {
            Ok(lock) => return cancel_offline(ws, lock, reason).await,
            // A run started just now, or the lock cannot be taken here.
            Err(e) => store::holder(ws).ok_or(e)?,
        },
    };
    request_cancel(ws, &holder, reason)?;
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

/// Write the cancel request the running orchestrator (`holder`) reads.
fn request_cancel(ws: &Path, holder: &str, reason: &str) -> Result<()> {
    let paths = Paths::of(ws);
    let request = engine::CancelRequest {
        reason: reason.to_string(),
        by: format!(
            "{} on host {} (pid {})",
            crate::export::prov::current_user(),
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
    Ok(())
}

/// Cancel with no orchestrator running: end what an earlier one left outstanding and mark
/// the unfinished points cancelled.
async fn cancel_offline(ws: &Path, _lock: store::WorkspaceLock, reason: &str) -> Result<u8> {
    let pool = store::open_existing_rw(ws, "cancelling records the cancelled points").await?;
    let camp = store::campaign_row(&pool).await?;
    let ws_id = camp.map(|c| c.workspace_id).unwrap_or_default();
    let outstanding = overview::outstanding_attempts(&pool).await?;
    // The executors' completions are not read: no orchestrator runs to settle them.
    let (tx, _rx) = tokio::sync::mpsc::unbounded_channel();
    // Every outstanding attempt is ended first, then all is recorded in one transaction: a
    // crash in between leaves them outstanding, and the next `rondo cancel` (or run) finds
    // them ended.
    let mut script = store::Script::new();
    let n = outstanding.len();
    for a in outstanding {
        if let Err(e) = end_attempt(&a, &ws_id, reason, &tx).await {
            eprintln!("rondo: attempt {}: {e}", a.id);
        }
        script.attempt_cancelled(a.id, reason);
    }
    script.open_points_cancelled(reason);
    script.event(
        "cancel",
        None,
        None,
        None,
        &format!("rondo cancel: {reason}; {n} outstanding attempt(s) cancelled"),
    );
    script
        .commit(&pool, crate::failpoint::Failpoint::CancelRecorded)
        .await?;
    pool.close().await;
    eprintln!("rondo: no orchestrator was running; cancelled {n} outstanding attempt(s)");
    Ok(EXIT_OK)
}

/// End one recorded attempt through the executor that launched it (an executor this rondo
/// does not know is left alone).
async fn end_attempt(
    a: &overview::OutstandingAttempt,
    ws_id: &str,
    reason: &str,
    tx: &UnboundedSender<Completion>,
) -> Result<(), ExecError> {
    let handle = Handle {
        executor: a.executor.clone(),
        id: a.handle_id.clone().unwrap_or_default(),
        host: a.host.clone().unwrap_or_else(store::hostname),
    };
    match a.executor.as_str() {
        "slurm" => {
            rondo_adapters::slurm::SlurmExecutor::new(
                Default::default(),
                ws_id.to_string(),
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
            rondo_adapters::local::LocalExecutor::new(1, ws_id.to_string(), tx.clone())
                .cancel_recorded(&handle, reason)
                .await
        }
        _ => Ok(()),
    }
}
