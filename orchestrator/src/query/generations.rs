//! Recorded generations (report and equation-of-state analysis runs) as lineage records:
//! read from the report provenance tables through [`crate::store::reads::reports`].

use anyhow::{Context, Result};
use sqlx::SqlitePool;

use super::records::{AttemptRecord, ProgramRef};
use crate::store::reads::reports;
use crate::store::AttemptState;

/// Ids of all recorded report generations.
pub async fn report_ids(pool: &SqlitePool) -> Result<Vec<i64>> {
    if !reports::has_tables(pool).await? {
        return Ok(Vec::new());
    }
    reports::ids(pool).await
}

/// Report generations that wrote the artifact `hash`, as lineage records whose `sources`
/// are the attempts behind that file.
pub async fn producing_reports(pool: &SqlitePool, hash: &str) -> Result<Vec<AttemptRecord>> {
    if !reports::has_tables(pool).await? {
        return Ok(Vec::new());
    }
    let mut out = Vec::new();
    for id in reports::writers_of(pool, hash).await? {
        out.push(load_report(pool, id, Some(hash)).await?);
    }
    Ok(out)
}

/// The executor of an `after-campaign:` stage's generation (its options name the stage).
pub const CAMPAIGN_STAGE: &str = "after-campaign";

/// One report generation as a lineage record (kind and stage `report`, executor `builtin`,
/// program = the rondo executable, parameters = the report options). `sources` lists the
/// attempts behind the outputs with hash `for_hash`, or behind every output with `None`.
pub async fn load_report(
    pool: &SqlitePool,
    id: i64,
    for_hash: Option<&str>,
) -> Result<AttemptRecord> {
    let r = reports::report(pool, id).await?;
    let state = if r.ended_at.is_some() {
        AttemptState::Succeeded
    } else {
        AttemptState::Running
    };
    let mut rec = AttemptRecord {
        kind: "report".into(),
        id,
        point: None,
        iteration: None,
        stage: "report".into(),
        attempt: 1,
        state: state.to_string(),
        argv: serde_json::from_str(&r.argv_json)
            .with_context(|| format!("report {id}: malformed argv_json"))?,
        workdir: Some(r.out_dir),
        executor: "builtin".into(),
        job_id: None,
        host: r.host,
        started_at: r.started_at,
        ended_at: r.ended_at,
        exit_status: None,
        failure_kind: None,
        program: ProgramRef {
            path: r.program_path,
            blake3: r.program_blake3,
            version: Some(r.rondo_version.clone()),
        },
        program_unknown: r.program_unknown,
        parameters: serde_json::from_str(&r.options_json)
            .with_context(|| format!("report {id}: malformed options_json"))?,
        seed: None,
        rondo_version: r.rondo_version,
        revision: None,
        environment: Default::default(),
        handoff: None,
        inputs: Default::default(),
        outputs: Default::default(),
        metrics: Default::default(),
        sources: Vec::new(),
    };
    if let Some(stage) = rec.parameters.get("stage").and_then(|s| s.as_str()) {
        // An `after-campaign:` stage: its own program, run as a child of rondo.
        rec.stage = stage.to_string();
        rec.executor = CAMPAIGN_STAGE.into();
        rec.program.version = None;
    }
    rec.outputs = reports::outputs(pool, id).await?.into_iter().collect();
    rec.sources = reports::sources(pool, id, for_hash).await?;
    Ok(rec)
}
