//! Reads of the `attempts` table and its `attempt_inputs`, `attempt_outputs` and `metrics`
//! rows.

use anyhow::{Context, Result};
use sqlx::{Row, SqlitePool};

use crate::store::AttemptState;

/// One `attempts` row, its JSON columns still as text.
#[derive(Debug, Clone, PartialEq)]
pub struct AttemptRow {
    /// Point id.
    pub point: String,
    /// Iteration.
    pub iteration: i64,
    /// Stage name.
    pub stage: String,
    /// Attempt number.
    pub attempt: i64,
    /// State.
    pub state: AttemptState,
    /// `argv_json`.
    pub argv_json: String,
    /// `parameters_json`.
    pub parameters_json: String,
    /// Scratch folder.
    pub workdir: String,
    /// Executor kind.
    pub executor: String,
    /// Process group or batch job id.
    pub handle_id: Option<String>,
    /// Host.
    pub host: Option<String>,
    /// Start time.
    pub started_at: Option<String>,
    /// End time.
    pub ended_at: Option<String>,
    /// Exit status.
    pub exit_status: Option<i64>,
    /// Failure kind.
    pub failure_kind: Option<String>,
    /// Program path.
    pub program_path: Option<String>,
    /// Program BLAKE3.
    pub program_blake3: Option<String>,
    /// Program version output.
    pub program_version: Option<String>,
    /// Why the program hash is unknown (absent from stores made before migration 4).
    pub program_unknown: Option<String>,
    /// Seed.
    pub seed: Option<String>,
    /// rondo version.
    pub rondo_version: String,
    /// The allow-listed environment, JSON (absent from stores made before migration 7).
    pub env_json: Option<String>,
    /// The campaign file's revision it ran under (1 in stores made before migration 11).
    pub revision: i64,
}

/// The row of attempt `id`; an error naming it when it is not recorded.
pub async fn attempt(pool: &SqlitePool, id: i64) -> Result<AttemptRow> {
    // Every column: `program_unknown` is absent from stores made before migration 4.
    let r = sqlx::query("SELECT * FROM attempts WHERE id = ?")
        .bind(id)
        .fetch_optional(pool)
        .await?
        .with_context(|| format!("attempt {id} is not recorded"))?;
    Ok(AttemptRow {
        point: r.try_get("point")?,
        iteration: r.try_get("iteration")?,
        stage: r.try_get("stage")?,
        attempt: r.try_get("attempt")?,
        state: r.try_get("state")?,
        argv_json: r.try_get("argv_json")?,
        parameters_json: r.try_get("parameters_json")?,
        workdir: r.try_get("workdir")?,
        executor: r.try_get("executor")?,
        handle_id: r.try_get("handle_id")?,
        host: r.try_get("host")?,
        started_at: r.try_get("started_at")?,
        ended_at: r.try_get("ended_at")?,
        exit_status: r.try_get("exit_status")?,
        failure_kind: r.try_get("failure_kind")?,
        program_path: r.try_get("program_path")?,
        program_blake3: r.try_get("program_blake3")?,
        program_version: r.try_get("program_version")?,
        program_unknown: r.try_get("program_unknown").ok().flatten(),
        seed: r.try_get("seed")?,
        rondo_version: r.try_get("rondo_version")?,
        env_json: r.try_get("env_json").ok().flatten(),
        revision: r.try_get("revision").unwrap_or(1),
    })
}

/// A hand-off to a resident program, as recorded (`handoffs`, docs/resident.md).
#[derive(Debug, Clone, PartialEq, Eq, serde::Serialize)]
pub struct HandoffRow {
    /// Its number for the process (1, 2, …).
    pub number: i64,
    /// The resident process.
    pub process_id: i64,
    /// The attempt that started the process.
    pub started_by: i64,
    /// When the process started.
    pub process_started_at: String,
}

/// The hand-off attempt `id` is, if it is one (none in stores made before migration 10).
pub async fn handoff(pool: &SqlitePool, id: i64) -> Result<Option<HandoffRow>> {
    let row = sqlx::query(
        "SELECT number, process_id, started_by, process_started_at FROM handoffs \
         WHERE attempt_id = ?",
    )
    .bind(id)
    .fetch_optional(pool)
    .await?;
    row.map(|r| {
        Ok(HandoffRow {
            number: r.try_get(0)?,
            process_id: r.try_get(1)?,
            started_by: r.try_get(2)?,
            process_started_at: r.try_get(3)?,
        })
    })
    .transpose()
}

/// Which side of an attempt's files.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Files {
    /// `attempt_inputs`.
    Inputs,
    /// `attempt_outputs`.
    Outputs,
}

/// An attempt's inputs or outputs as (role, artifact), by role.
pub async fn files(pool: &SqlitePool, id: i64, which: Files) -> Result<Vec<(String, String)>> {
    let sql = match which {
        Files::Inputs => {
            "SELECT role, artifact FROM attempt_inputs WHERE attempt_id = ? ORDER BY role"
        }
        Files::Outputs => {
            "SELECT role, artifact FROM attempt_outputs WHERE attempt_id = ? ORDER BY role"
        }
    };
    let rows = sqlx::query(sql).bind(id).fetch_all(pool).await?;
    let mut out = Vec::new();
    for r in rows {
        out.push((r.try_get(0)?, r.try_get(1)?));
    }
    Ok(out)
}

/// An attempt's metrics as (name, value, error), by name.
pub async fn metrics(pool: &SqlitePool, id: i64) -> Result<Vec<(String, f64, Option<f64>)>> {
    let rows =
        sqlx::query("SELECT name, value, error FROM metrics WHERE attempt_id = ? ORDER BY name")
            .bind(id)
            .fetch_all(pool)
            .await?;
    let mut out = Vec::new();
    for r in rows {
        out.push((r.try_get(0)?, r.try_get(1)?, r.try_get(2)?));
    }
    Ok(out)
}

/// The artifact an attempt recorded under `role`, if any.
pub async fn output(pool: &SqlitePool, id: i64, role: &str) -> Result<Option<String>> {
    Ok(
        sqlx::query_scalar(
            "SELECT artifact FROM attempt_outputs WHERE attempt_id = ? AND role = ?",
        )
        .bind(id)
        .bind(role)
        .fetch_optional(pool)
        .await?,
    )
}

/// Every attempt that wrote artifact `hash`, as (id, point, state), by id.
pub async fn writers_of(pool: &SqlitePool, hash: &str) -> Result<Vec<(i64, String, AttemptState)>> {
    let rows = sqlx::query(
        "SELECT a.id, a.point, a.state FROM attempt_outputs o JOIN attempts a ON a.id = o.attempt_id
         WHERE o.artifact = ? ORDER BY a.id",
    )
    .bind(hash)
    .fetch_all(pool)
    .await?;
    let mut out = Vec::new();
    for r in rows {
        out.push((r.try_get(0)?, r.try_get(1)?, r.try_get(2)?));
    }
    Ok(out)
}

/// Ids of every attempt that got past planning, in order.
pub async fn started_ids(pool: &SqlitePool) -> Result<Vec<i64>> {
    Ok(
        sqlx::query_scalar("SELECT id FROM attempts WHERE state <> ? ORDER BY id")
            .bind(AttemptState::Planned)
            .fetch_all(pool)
            .await?,
    )
}

/// The outputs of a point's succeeded attempts at one iteration, as (stage, role, artifact),
/// by stage and role, newest attempt first.
pub async fn succeeded_outputs_at(
    pool: &SqlitePool,
    point: &str,
    iteration: i64,
) -> Result<Vec<(String, String, String)>> {
    let rows = sqlx::query(
        "SELECT a.stage, o.role, o.artifact FROM attempt_outputs o JOIN attempts a ON a.id = o.attempt_id
         WHERE a.point = ? AND a.iteration = ? AND a.state = ? ORDER BY a.stage, o.role, a.id DESC",
    )
    .bind(point)
    .bind(iteration)
    .bind(AttemptState::Succeeded)
    .fetch_all(pool)
    .await?;
    let mut out = Vec::new();
    for r in rows {
        out.push((r.try_get(0)?, r.try_get(1)?, r.try_get(2)?));
    }
    Ok(out)
}

/// The artifact of output `role` of the succeeded attempt of `stage` at a point's
/// iteration, with the attempt's id.
pub async fn succeeded_output_with_attempt(
    pool: &SqlitePool,
    point: &str,
    iteration: i64,
    stage: &str,
    role: &str,
) -> Result<Option<(String, i64)>> {
    Ok(sqlx::query_as(
        "SELECT o.artifact, a.id FROM attempt_outputs o JOIN attempts a ON a.id = o.attempt_id \
         WHERE a.point = ? AND a.iteration = ? AND a.stage = ? AND a.state = ? AND o.role = ?",
    )
    .bind(point)
    .bind(iteration)
    .bind(stage)
    .bind(AttemptState::Succeeded)
    .bind(role)
    .fetch_optional(pool)
    .await?)
}

/// One attempt of a point as a comparison of two points reads it.
#[derive(Debug, Clone, PartialEq)]
pub struct PointAttemptRow {
    /// Attempt id.
    pub id: i64,
    /// Iteration.
    pub iteration: i64,
    /// Stage.
    pub stage: String,
    /// Program path.
    pub program_path: Option<String>,
    /// Program BLAKE3.
    pub program_blake3: Option<String>,
    /// Program version output.
    pub program_version: Option<String>,
    /// `parameters_json`.
    pub parameters_json: String,
    /// State.
    pub state: AttemptState,
    /// The recorded environment (`env_json`), if any.
    pub env_json: Option<String>,
    /// The campaign file's revision it ran under.
    pub revision: i64,
}

/// Every attempt of a point, by iteration and id.
pub async fn of_point(pool: &SqlitePool, point: &str) -> Result<Vec<PointAttemptRow>> {
    let rows = sqlx::query(
        "SELECT id, iteration, stage, program_path, program_blake3, program_version, parameters_json, state,
                env_json, revision
         FROM attempts WHERE point = ? ORDER BY iteration, id",
    )
    .bind(point)
    .fetch_all(pool)
    .await?;
    let mut out = Vec::new();
    for r in rows {
        out.push(PointAttemptRow {
            id: r.try_get(0)?,
            iteration: r.try_get(1)?,
            stage: r.try_get(2)?,
            program_path: r.try_get(3)?,
            program_blake3: r.try_get(4)?,
            program_version: r.try_get(5)?,
            parameters_json: r.try_get(6)?,
            state: r.try_get(7)?,
            env_json: r.try_get(8)?,
            revision: r.try_get(9)?,
        });
    }
    Ok(out)
}

/// What one stage's attempts at one point cost in all (the `usage_totals` row).
#[derive(Debug, Clone, PartialEq)]
pub struct UsageTotal {
    /// Point id.
    pub point: String,
    /// Stage name.
    pub stage: String,
    /// Attempts with figures.
    pub attempts: i64,
    /// CPU seconds in user mode.
    pub cpu_user_s: f64,
    /// CPU seconds in the kernel.
    pub cpu_system_s: f64,
    /// Wall seconds.
    pub wall_s: f64,
    /// Largest resident set of any of them, KiB.
    pub max_rss_kib: Option<i64>,
}

/// Every point's and stage's usage totals, in point and stage order: one row per point and
/// stage, whatever the length of the history.
pub async fn usage_totals(pool: &SqlitePool) -> Result<Vec<UsageTotal>> {
    let rows = sqlx::query(
        "SELECT point, stage, attempts, cpu_user_s, cpu_system_s, wall_s, max_rss_kib \
         FROM usage_totals ORDER BY point, stage",
    )
    .fetch_all(pool)
    .await
    .context("reading the usage totals")?;
    rows.iter()
        .map(|r| {
            Ok(UsageTotal {
                point: r.try_get(0)?,
                stage: r.try_get(1)?,
                attempts: r.try_get(2)?,
                cpu_user_s: r.try_get(3)?,
                cpu_system_s: r.try_get(4)?,
                wall_s: r.try_get(5)?,
                max_rss_kib: r.try_get(6)?,
            })
        })
        .collect()
}
