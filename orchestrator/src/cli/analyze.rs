//! `rondo analyze`: compute the recorded campaign's analyses again from the workspace's
//! records and record the result (the same artifact when nothing changed).
//!
//! Owns the refusals (no `analysis:` section, points still open) and what is printed; the
//! analysis is [`crate::query::analysis`]'s, the count of open points [`crate::store::overview`]'s.

use std::path::Path;

use anyhow::{bail, Context, Result};

use super::output::emit;
use super::workspace::find_workspace;
use super::{AnalyzeArgs, BadInput, EXIT_OK};
use crate::store::{self, overview};

/// `rondo analyze [FILE] [--workspace DIR]`.
pub async fn run(a: AnalyzeArgs) -> Result<u8> {
    analyze(
        &find_workspace(a.file.as_deref(), a.workspace)?,
        a.with_retired,
    )
    .await
}

/// Analyze the campaign of the workspace `ws` again (over its retired points too when
/// `with_retired`).
async fn analyze(ws: &Path, with_retired: bool) -> Result<u8> {
    let _lock = store::lock(ws)?;
    let pool = store::open_existing_rw(ws, "analyze records the analysis result").await?;
    let Some(camp) = store::campaign_row(&pool).await? else {
        bail!("{}: no campaign recorded", ws.display());
    };
    let Some(eos) = crate::query::analysis::recorded_eos(&camp.spec_text)
        .with_context(|| format!("{}: campaign {}", ws.display(), camp.name))?
    else {
        bail!(BadInput(format!(
            "campaign {} has no `analysis:` section; there is nothing to analyze",
            camp.name
        )));
    };
    let open = overview::open_point_count(&pool).await?;
    if open > 0 {
        bail!(BadInput(format!(
            "campaign {}: {open} point(s) have not stopped yet; `rondo run` the campaign to its end first",
            camp.name
        )));
    }
    let artifacts = crate::artifacts::ArtifactStore::open(&ws.join("store"))
        .with_context(|| format!("{}: cannot open the artifact store", ws.display()))?;
    let doc = crate::query::analysis::record_eos(&pool, ws, &artifacts, &eos, with_retired).await?;
    let hash = crate::query::analysis::latest_eos_hash(&pool)
        .await?
        .unwrap_or_default();
    pool.close().await;
    let mut text = String::new();
    for line in crate::query::analysis::eos_lines(&doc) {
        text.push_str(&line);
        text.push('\n');
    }
    emit(&text);
    eprintln!(
        "rondo: wrote {} (artifact {})",
        ws.join("analysis")
            .join(crate::query::analysis::EOS_ROLE)
            .display(),
        hash.get(..12).unwrap_or(&hash)
    );
    Ok(EXIT_OK)
}
