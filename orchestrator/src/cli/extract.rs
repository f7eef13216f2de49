//! `rondo extract`: write an artifact, named as `rondo trace` accepts, to a file of the
//! user's choice, its hash verified.
//!
//! Owns the message and the error class of a refusal (bad input); the writing is
//! [`crate::query`]'s. No SQL.

use anyhow::Result;

use super::workspace::{absolute, find_workspace};
use super::{BadInput, ExtractArgs, EXIT_OK};
use crate::export::extract as audit;
use crate::store;

/// `rondo extract TARGET --output PATH`.
pub async fn run(a: ExtractArgs) -> Result<u8> {
    let ws = find_workspace(None, a.workspace)?;
    let pool = store::open_existing(&ws).await?;
    let out = absolute(a.output)?;
    let done = audit::extract(&pool, &ws, &a.target, &out, a.force).await;
    pool.close().await;
    let done = done.map_err(|e| match e.downcast_ref::<audit::Refused>() {
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
