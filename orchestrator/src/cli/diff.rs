//! `rondo diff`: compare two points (of one workspace or of two), as text or `--json`.
//!
//! Owns which workspaces are opened and the error class of a point that does not resolve
//! (bad input); the comparison is [`crate::query`]'s. No SQL.

use anyhow::Result;

use super::output::{emit, emit_json};
use super::workspace::{absolute, find_workspace};
use super::{BadInput, DiffArgs, EXIT_OK};
use crate::query as audit;
use crate::store;

/// `rondo diff A B`.
pub async fn run(a: DiffArgs) -> Result<u8> {
    let ws_a = find_workspace(None, a.workspace)?;
    let ws_b = match a.other_workspace {
        Some(w) => absolute(w)?,
        None => ws_a.clone(),
    };
    let pa = store::open_existing(&ws_a).await?;
    let pb = store::open_existing(&ws_b).await?;
    let d = audit::diff(&pa, &a.a, &pb, &a.b)
        .await
        .map_err(|e| BadInput(format!("{e:#}")))?;
    if a.json {
        emit_json(&d)?;
    } else {
        emit(&d.to_text());
    }
    Ok(EXIT_OK)
}
