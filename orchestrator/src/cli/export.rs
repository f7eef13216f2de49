//! `rondo export --prov FILE [TARGET]`: lineage as a W3C PROV-JSON document, of one target or
//! of the whole campaign.
//!
//! Owns where the document goes and what is said about it; the document is
//! [`crate::export::prov`]'s. No SQL.

use anyhow::{Context, Result};

use super::workspace::find_workspace;
use super::{trace, ExportArgs, EXIT_OK};
use crate::export::prov;
use crate::store;

/// `rondo export`.
pub async fn run(a: ExportArgs) -> Result<u8> {
    let ws = find_workspace(None, a.workspace)?;
    let pool = store::open_existing(&ws).await?;
    let t = match &a.target {
        Some(t) => Some(trace::resolve(&pool, &ws, t).await?),
        None => None,
    };
    let doc = prov::export_target(&pool, t.as_ref(), &prov::current_user()).await?;
    let mut text = serde_json::to_string_pretty(&doc)?;
    text.push('\n');
    crate::artifacts::write_new(&a.prov, text.as_bytes())
        .with_context(|| format!("{}: cannot write", a.prov.display()))?;
    let (e, acts, g) = prov::counts(&doc);
    eprintln!(
        "rondo: wrote {} ({e} entities, {acts} activities, {g} agents)",
        a.prov.display()
    );
    Ok(EXIT_OK)
}
