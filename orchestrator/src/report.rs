//! Campaign reports: convergence, equation-of-state and configuration-probability figures
//! (SVG and PNG), tables of converged observables, an `index.html` that shows them, every
//! figure's data as CSV stored as an artifact, and the report's own provenance (the
//! `reports`, `report_sources` and `report_outputs` tables) so that a report CSV traces back
//! to the attempts whose metrics it holds.

use anyhow::{Context, Result};
use sqlx::{Row, SqlitePool};

use crate::audit::{AttemptRecord, ProgramRef};

/// Schema of the report provenance tables (store migration 2).
pub const REPORT_SCHEMA: &str = include_str!("../migrations/0002_report_provenance.sql");

/// Create the report provenance tables if the store does not have them yet.
pub async fn ensure_schema(pool: &SqlitePool) -> Result<()> {
    let have: Option<String> = sqlx::query_scalar(
        "SELECT name FROM sqlite_master WHERE type = 'table' AND name = 'reports'",
    )
    .fetch_optional(pool)
    .await
    .context("cannot read the workspace schema")?;
    if have.is_none() {
        sqlx::raw_sql(REPORT_SCHEMA)
            .execute(pool)
            .await
            .context("cannot create the report provenance tables")?;
    }
    Ok(())
}

async fn has_report_tables(pool: &SqlitePool) -> Result<bool> {
    let have: Option<String> = sqlx::query_scalar(
        "SELECT name FROM sqlite_master WHERE type = 'table' AND name = 'reports'",
    )
    .fetch_optional(pool)
    .await?;
    Ok(have.is_some())
}

/// Report generations that wrote the artifact `hash`, as lineage records (kind `report`,
/// stage `report`, `sources` = the attempts whose metrics were read).
pub async fn producing_reports(pool: &SqlitePool, hash: &str) -> Result<Vec<AttemptRecord>> {
    if !has_report_tables(pool).await? {
        return Ok(Vec::new());
    }
    let ids: Vec<i64> = sqlx::query_scalar(
        "SELECT DISTINCT report_id FROM report_outputs WHERE artifact = ? ORDER BY report_id",
    )
    .bind(hash)
    .fetch_all(pool)
    .await?;
    let mut out = Vec::new();
    for id in ids {
        out.push(load_report(pool, id).await?);
    }
    Ok(out)
}

/// One report generation as a lineage record.
pub async fn load_report(pool: &SqlitePool, id: i64) -> Result<AttemptRecord> {
    let r = sqlx::query(
        "SELECT argv_json, out_dir, options_json, program_path, program_blake3, host,
                started_at, ended_at, rondo_version FROM reports WHERE id = ?",
    )
    .bind(id)
    .fetch_optional(pool)
    .await?
    .with_context(|| format!("report {id} is not recorded"))?;
    let argv_json: String = r.try_get("argv_json")?;
    let options_json: String = r.try_get("options_json")?;
    let ended_at: Option<String> = r.try_get("ended_at")?;
    let mut rec = AttemptRecord {
        kind: "report".into(),
        id,
        point: None,
        iteration: None,
        stage: "report".into(),
        attempt: 1,
        state: if ended_at.is_some() {
            "succeeded"
        } else {
            "running"
        }
        .into(),
        argv: serde_json::from_str(&argv_json)
            .with_context(|| format!("report {id}: malformed argv_json"))?,
        workdir: Some(r.try_get("out_dir")?),
        executor: "builtin".into(),
        job_id: None,
        host: r.try_get("host")?,
        started_at: r.try_get("started_at")?,
        ended_at,
        exit_status: None,
        failure_kind: None,
        program: ProgramRef {
            path: r.try_get("program_path")?,
            blake3: r.try_get("program_blake3")?,
            version: Some(r.try_get("rondo_version")?),
        },
        parameters: serde_json::from_str(&options_json)
            .with_context(|| format!("report {id}: malformed options_json"))?,
        seed: None,
        rondo_version: r.try_get("rondo_version")?,
        inputs: Default::default(),
        outputs: Default::default(),
        metrics: Default::default(),
        sources: Vec::new(),
    };
    let rows =
        sqlx::query("SELECT role, artifact FROM report_outputs WHERE report_id = ? ORDER BY role")
            .bind(id)
            .fetch_all(pool)
            .await?;
    for row in rows {
        rec.outputs.insert(row.try_get(0)?, row.try_get(1)?);
    }
    rec.sources = sqlx::query_scalar(
        "SELECT attempt_id FROM report_sources WHERE report_id = ? ORDER BY attempt_id",
    )
    .bind(id)
    .fetch_all(pool)
    .await?;
    Ok(rec)
}
