//! The report provenance tables (`reports`, `report_outputs`, `report_sources`, store
//! migration 2): reads of recorded generations (reports and analyses), and the writes of a
//! new generation, which the read side records about itself.

use anyhow::{Context, Result};
use sqlx::{Row, SqliteConnection, SqlitePool};

/// Schema of the report provenance tables (store migration 2).
pub const REPORT_SCHEMA: &str = include_str!("../../../migrations/0002_report_provenance.sql");

/// Whether the store has the report provenance tables (a store made before migration 2,
/// opened read-only, may not).
pub async fn has_tables(pool: &SqlitePool) -> Result<bool> {
    let n: i64 = sqlx::query_scalar(
        "SELECT COUNT(*) FROM sqlite_master WHERE type = 'table'
         AND name IN ('reports', 'report_outputs', 'report_sources')",
    )
    .fetch_one(pool)
    .await
    .context("cannot read the workspace schema")?;
    Ok(n == 3)
}

/// Create the report provenance tables if the store does not have them yet.
pub async fn ensure_tables(pool: &SqlitePool) -> Result<()> {
    if !has_tables(pool).await? {
        sqlx::raw_sql(REPORT_SCHEMA)
            .execute(pool)
            .await
            .context("cannot create the report provenance tables")?;
    }
    Ok(())
}

/// Ids of all recorded generations, in order.
pub async fn ids(pool: &SqlitePool) -> Result<Vec<i64>> {
    Ok(sqlx::query_scalar("SELECT id FROM reports ORDER BY id")
        .fetch_all(pool)
        .await?)
}

/// Ids of the generations that wrote artifact `hash`, in order.
pub async fn writers_of(pool: &SqlitePool, hash: &str) -> Result<Vec<i64>> {
    Ok(sqlx::query_scalar(
        "SELECT DISTINCT report_id FROM report_outputs WHERE artifact = ? ORDER BY report_id",
    )
    .bind(hash)
    .fetch_all(pool)
    .await?)
}

/// One `reports` row, its JSON columns still as text.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct ReportRow {
    /// `argv_json`.
    pub argv_json: String,
    /// `options_json`.
    pub options_json: String,
    /// Output folder.
    pub out_dir: String,
    /// Host.
    pub host: Option<String>,
    /// Start time.
    pub started_at: Option<String>,
    /// End time (`None` while it runs).
    pub ended_at: Option<String>,
    /// The rondo executable.
    pub program_path: Option<String>,
    /// Its BLAKE3.
    pub program_blake3: Option<String>,
    /// Why its hash is unknown (absent from stores made before migration 4).
    pub program_unknown: Option<String>,
    /// rondo version.
    pub rondo_version: String,
}

/// The row of generation `id`; an error naming it when it is not recorded.
pub async fn report(pool: &SqlitePool, id: i64) -> Result<ReportRow> {
    // Every column: `program_unknown` is absent from stores made before migration 4.
    let r = sqlx::query("SELECT * FROM reports WHERE id = ?")
        .bind(id)
        .fetch_optional(pool)
        .await?
        .with_context(|| format!("report {id} is not recorded"))?;
    Ok(ReportRow {
        argv_json: r.try_get("argv_json")?,
        options_json: r.try_get("options_json")?,
        out_dir: r.try_get("out_dir")?,
        host: r.try_get("host")?,
        started_at: r.try_get("started_at")?,
        ended_at: r.try_get("ended_at")?,
        program_path: r.try_get("program_path")?,
        program_blake3: r.try_get("program_blake3")?,
        program_unknown: r.try_get("program_unknown").ok().flatten(),
        rondo_version: r.try_get("rondo_version")?,
    })
}

/// A generation's outputs as (role, artifact), by role.
pub async fn outputs(pool: &SqlitePool, id: i64) -> Result<Vec<(String, String)>> {
    let rows =
        sqlx::query("SELECT role, artifact FROM report_outputs WHERE report_id = ? ORDER BY role")
            .bind(id)
            .fetch_all(pool)
            .await?;
    let mut out = Vec::new();
    for r in rows {
        out.push((r.try_get(0)?, r.try_get(1)?));
    }
    Ok(out)
}

/// The attempts behind a generation's outputs with hash `for_hash` (every output with
/// `None`), in order.
pub async fn sources(pool: &SqlitePool, id: i64, for_hash: Option<&str>) -> Result<Vec<i64>> {
    Ok(match for_hash {
        Some(h) => {
            sqlx::query_scalar(
                "SELECT DISTINCT s.attempt_id FROM report_sources s
             JOIN report_outputs o ON o.report_id = s.report_id AND o.role = s.role
             WHERE s.report_id = ? AND o.artifact = ? ORDER BY s.attempt_id",
            )
            .bind(id)
            .bind(h)
            .fetch_all(pool)
            .await?
        }
        None => {
            sqlx::query_scalar(
                "SELECT DISTINCT attempt_id FROM report_sources WHERE report_id = ?
             ORDER BY attempt_id",
            )
            .bind(id)
            .fetch_all(pool)
            .await?
        }
    })
}

/// The artifact of the newest generation output with role `role`, if any.
pub async fn latest_output(pool: &SqlitePool, role: &str) -> Result<Option<String>> {
    Ok(sqlx::query_scalar(
        "SELECT o.artifact FROM report_outputs o WHERE o.role = ? ORDER BY o.report_id DESC LIMIT 1",
    )
    .bind(role)
    .fetch_optional(pool)
    .await?)
}

/// The newest finished generation recorded with exactly these options, if any (an
/// `after-campaign:` stage and group that ran already).
pub async fn generation_with_options(pool: &SqlitePool, options_json: &str) -> Result<Option<i64>> {
    Ok(sqlx::query_scalar(
        "SELECT id FROM reports WHERE options_json = ? AND ended_at IS NOT NULL \
         ORDER BY id DESC LIMIT 1",
    )
    .bind(options_json)
    .fetch_optional(pool)
    .await?)
}

/// The outputs of the recorded `after-campaign:` stage runs (their options name a stage
/// and a group): (generation id, options_json, role, artifact, first recorded file name),
/// by id and role.
pub async fn campaign_stage_outputs(
    pool: &SqlitePool,
) -> Result<Vec<(i64, String, String, String, String)>> {
    Ok(sqlx::query_as(
        "SELECT r.id, r.options_json, o.role, o.artifact, a.original_name FROM reports r \
         JOIN report_outputs o ON o.report_id = r.id JOIN artifacts a ON a.hash = o.artifact \
         WHERE r.ended_at IS NOT NULL AND json_valid(r.options_json) \
         AND json_type(r.options_json, '$.stage') = 'text' \
         AND json_type(r.options_json, '$.group') = 'object' ORDER BY r.id, o.role",
    )
    .fetch_all(pool)
    .await?)
}

/// A new generation's `reports` row.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct NewGeneration<'a> {
    /// `argv_json`.
    pub argv_json: &'a str,
    /// Output folder.
    pub out_dir: &'a str,
    /// `options_json`.
    pub options_json: &'a str,
    /// The rondo executable.
    pub program_path: &'a str,
    /// Its BLAKE3, when known.
    pub program_blake3: Option<&'a str>,
    /// Why its hash is unknown.
    pub program_unknown: Option<&'a str>,
    /// Host.
    pub host: &'a str,
    /// Start time.
    pub started_at: &'a str,
    /// End time.
    pub ended_at: &'a str,
    /// rondo version.
    pub rondo_version: &'a str,
}

/// Insert a generation's row; returns its id.
pub async fn insert_generation(tx: &mut SqliteConnection, g: &NewGeneration<'_>) -> Result<i64> {
    Ok(sqlx::query_scalar(
        "INSERT INTO reports(argv_json, out_dir, options_json, program_path, program_blake3, \
         program_unknown, host, started_at, ended_at, rondo_version) VALUES (?,?,?,?,?,?,?,?,?,?) \
         RETURNING id",
    )
    .bind(g.argv_json)
    .bind(g.out_dir)
    .bind(g.options_json)
    .bind(g.program_path)
    .bind(g.program_blake3)
    .bind(g.program_unknown)
    .bind(g.host)
    .bind(g.started_at)
    .bind(g.ended_at)
    .bind(g.rondo_version)
    .fetch_one(tx)
    .await?)
}

/// Record a file a generation wrote as an artifact (kept as first recorded when the hash
/// is known), with `created_at` the generation's time.
pub async fn insert_artifact(
    tx: &mut SqliteConnection,
    hash: &str,
    size: u64,
    name: &str,
    created_at: &str,
) -> Result<()> {
    sqlx::query(
        "INSERT OR IGNORE INTO artifacts(hash, size, original_name, created_at) VALUES (?,?,?,?)",
    )
    .bind(hash)
    .bind(size as i64)
    .bind(name)
    .bind(created_at)
    .execute(tx)
    .await?;
    Ok(())
}

/// Record that generation `id` wrote `artifact` as `role`.
pub async fn insert_output(
    tx: &mut SqliteConnection,
    id: i64,
    role: &str,
    artifact: &str,
) -> Result<()> {
    sqlx::query("INSERT INTO report_outputs(report_id, role, artifact) VALUES (?,?,?)")
        .bind(id)
        .bind(role)
        .bind(artifact)
        .execute(tx)
        .await?;
    Ok(())
}

/// Record that output `role` of generation `id` shows metrics of attempt `attempt`.
pub async fn insert_source(
    tx: &mut SqliteConnection,
    id: i64,
    role: &str,
    attempt: i64,
) -> Result<()> {
    sqlx::query("INSERT INTO report_sources(report_id, role, attempt_id) VALUES (?,?,?)")
        .bind(id)
        .bind(role)
        .bind(attempt)
        .execute(tx)
        .await?;
    Ok(())
}
