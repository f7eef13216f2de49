//! `rondo trace`: the lineage of a file, an artifact hash prefix or a metric or output of a
//! point's iteration, as text or `--json` (docs/provenance.md). Also the target resolution
//! (with a hashing progress bar) that `rondo export` shares.
//!
//! Owns the flags' meaning (depth, long, json) and the error class of a target that does
//! not resolve (bad input); the lineage itself is [`crate::query`]'s. No SQL.

use std::path::Path;

use anyhow::Result;
use sqlx::SqlitePool;

use super::output::{emit, emit_json};
use super::workspace::find_workspace;
use super::{BadInput, TraceArgs, EXIT_OK};
use crate::query::{self as audit, Target};
use crate::store;

/// `rondo trace TARGET`.
pub async fn run(a: TraceArgs) -> Result<u8> {
    let ws = find_workspace(None, a.workspace)?;
    let pool = store::open_existing(&ws).await?;
    let t = resolve(&pool, &ws, &a.target).await?;
    let mut lineage = audit::lineage_of(&pool, &t).await?;
    pool.close().await;
    if a.json {
        if let Some(d) = a.depth {
            lineage.limit(d);
        }
        emit_json(&lineage)?;
    } else {
        lineage.limit(a.depth.unwrap_or(audit::DEFAULT_DEPTH));
        emit(&lineage.render(&audit::TextView { long: a.long }));
    }
    Ok(EXIT_OK)
}

/// What `target` names in the workspace, hashing files named by path with a progress bar;
/// a target that names nothing is bad input.
pub async fn resolve(pool: &SqlitePool, ws: &Path, target: &str) -> Result<Target> {
    let mut bar = crate::progress::Bytes::new("hashing");
    let t = audit::resolve(pool, ws, target, &mut |done, total| bar.set(done, total))
        .await
        .map_err(|e| BadInput(format!("{e:#}")))?;
    bar.finish();
    Ok(t)
}
