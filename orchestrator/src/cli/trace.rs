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
    if a.json {
        if let Some(d) = a.depth {
            lineage.limit(d);
        }
        emit_json(&lineage)?;
    } else {
        lineage.limit(a.depth.unwrap_or(audit::DEFAULT_DEPTH));
        emit(&lineage.render(&audit::TextView { long: a.long }));
    }
    for warning in damaged_artifacts(&pool, &ws, &lineage).await? {
        eprintln!("rondo: warning: {warning}");
    }
    pool.close().await;
    Ok(EXIT_OK)
}

/// The artifacts the shown lineage names that are missing from the store or whose size
/// is not the recorded one, as warnings with what to do. Only presence and size are
/// checked here (a `stat` each); `rondo extract` and the placing of an input check the
/// full hash.
async fn damaged_artifacts(
    pool: &SqlitePool,
    ws: &Path,
    lineage: &audit::Lineage,
) -> Result<Vec<String>> {
    let mut named = std::collections::BTreeMap::new();
    for a in &lineage.attempts {
        for (side, files) in [("input", &a.inputs), ("output", &a.outputs)] {
            for (role, h) in files {
                named
                    .entry(h.clone())
                    .or_insert_with(|| format!("{side} `{role}` of {} {}", a.kind, a.id));
            }
        }
    }
    for s in &lineage.sources {
        named
            .entry(s.hash.clone())
            .or_insert_with(|| format!("start file `{}`", s.name));
    }
    let mut out = Vec::new();
    for (hash, what) in named {
        let Ok(row) = store::reads::artifacts::artifact(pool, &hash).await else {
            continue;
        };
        let Some((a, b)) = hash.split_at_checked(2) else {
            continue;
        };
        let path = ws.join("store").join(a).join(b);
        let problem = match std::fs::symlink_metadata(&path) {
            Err(_) => "is missing from the store".to_string(),
            Ok(m) if !m.is_file() => "is not a regular file in the store".to_string(),
            Ok(m) if m.len() as i64 != row.size => {
                format!("is {} bytes in the store, recorded {}", m.len(), row.size)
            }
            Ok(_) => continue,
        };
        out.push(format!(
            "artifact {hash} ({what}; {}) {problem}: the store is damaged and a run that \
             needs it will stop; put the file back from a backup or a copy of the workspace",
            path.display()
        ));
    }
    Ok(out)
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
