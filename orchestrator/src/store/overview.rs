//! The queries the command line runs itself, as typed functions: the per-point overview of
//! `rondo status`, the "has every point stopped" test of `rondo analyze`, and the outstanding
//! attempts `rondo cancel` ends when no orchestrator runs (with the rows it then writes).
//!
//! This module owns SQL text and row decoding only: no output formatting, no decisions about
//! what a command prints or exits with (that is `crate::cli`), and no engine state. Every
//! state is bound through the enums of [`super::states`].

use std::path::Path;

use anyhow::{Context, Result};
use sqlx::sqlite::SqlitePool;
use sqlx::Row;

use super::{AttemptState, IterationState, PointState};

/// One row of `points`, in sweep order.
#[derive(Debug, Clone)]
pub struct PointRow {
    /// Point id (`p003`).
    pub id: String,
    /// Position in the sweep.
    pub index: i64,
    /// The sweep values as recorded (a JSON object's text).
    pub values_json: String,
    /// The point's state.
    pub state: PointState,
    /// Why it stopped (or failed), when recorded.
    pub reason: Option<String>,
    /// The campaign file's revision that made it.
    pub revision: i64,
    /// The revision that retired it, and why (`removed`, `physics`), if retired.
    pub retired: Option<(i64, String)>,
}

/// Every point, in sweep order. `ws` names the workspace in the error of a row whose state
/// does not decode.
pub async fn points(pool: &SqlitePool, ws: &Path) -> Result<Vec<PointRow>> {
    let rows = sqlx::query(
        "SELECT id, idx, values_json, state, reason, revision, retired_in, retired_why \
         FROM points ORDER BY idx",
    )
    .fetch_all(pool)
    .await?;
    let mut points = Vec::with_capacity(rows.len());
    for r in rows {
        let id: String = r.get("id");
        let state: PointState = r
            .try_get("state")
            .with_context(|| format!("{}: point {id}", ws.display()))?;
        points.push(PointRow {
            index: r.get("idx"),
            values_json: r.get("values_json"),
            reason: r.get("reason"),
            revision: r.get("revision"),
            retired: r.get::<Option<i64>, _>("retired_in").map(|n| {
                (
                    n,
                    r.get::<Option<String>, _>("retired_why")
                        .unwrap_or_default(),
                )
            }),
            id,
            state,
        });
    }
    Ok(points)
}

/// The point's last good iteration, if it has one.
pub async fn last_good_iteration(pool: &SqlitePool, point: &str) -> Result<Option<i64>> {
    Ok(
        sqlx::query_scalar("SELECT max(iteration) FROM iterations WHERE point = ? AND state = ?")
            .bind(point)
            .bind(IterationState::Good)
            .fetch_one(pool)
            .await?,
    )
}

/// The point's latest iteration in any state, if it has begun one.
pub async fn last_iteration(pool: &SqlitePool, point: &str) -> Result<Option<i64>> {
    Ok(
        sqlx::query_scalar("SELECT max(iteration) FROM iterations WHERE point = ?")
            .bind(point)
            .fetch_one(pool)
            .await?,
    )
}

/// One metric of a succeeded attempt.
#[derive(Debug, Clone, PartialEq)]
pub struct MetricRow {
    /// `stage.name`.
    pub name: String,
    /// The value.
    pub value: f64,
    /// Its standard error, when the stage gave one.
    pub error: Option<f64>,
}

/// The metrics of the succeeded attempts of one iteration of a point, sorted by name.
pub async fn iteration_metrics(
    pool: &SqlitePool,
    point: &str,
    iteration: i64,
) -> Result<Vec<MetricRow>> {
    let rows = sqlx::query(
        "SELECT m.name, m.value, m.error FROM metrics m JOIN attempts a ON a.id = m.attempt_id \
         WHERE a.point = ? AND a.iteration = ? AND a.state = ? ORDER BY m.name",
    )
    .bind(point)
    .bind(iteration)
    .bind(AttemptState::Succeeded)
    .fetch_all(pool)
    .await?;
    Ok(rows
        .iter()
        .map(|m| MetricRow {
            name: m.get("name"),
            value: m.get("value"),
            error: m.get("error"),
        })
        .collect())
}

/// How many attempts the point has had, in any state.
pub async fn attempt_count(pool: &SqlitePool, point: &str) -> Result<i64> {
    Ok(
        sqlx::query_scalar("SELECT count(*) FROM attempts WHERE point = ?")
            .bind(point)
            .fetch_one(pool)
            .await?,
    )
}

/// How many points have not stopped (planned or running).
pub async fn open_point_count(pool: &SqlitePool) -> Result<i64> {
    Ok(sqlx::query_scalar(
        "SELECT count(*) FROM points WHERE state IN (?, ?) AND retired_in IS NULL",
    )
    .bind(PointState::Planned)
    .bind(PointState::Running)
    .fetch_one(pool)
    .await?)
}

/// An attempt an orchestrator left outstanding, with what it takes to end it.
#[derive(Debug, Clone)]
pub struct OutstandingAttempt {
    /// Attempt id.
    pub id: i64,
    /// The executor that launched it (`local`, `slurm`, `pbs`).
    pub executor: String,
    /// The executor's handle (pid, job id), when recorded.
    pub handle_id: Option<String>,
    /// The host it was launched from, when recorded.
    pub host: Option<String>,
}

/// Every attempt in one of the [`AttemptState::OUTSTANDING`] states.
pub async fn outstanding_attempts(pool: &SqlitePool) -> Result<Vec<OutstandingAttempt>> {
    let sql = format!(
        "SELECT id, executor, handle_id, host FROM attempts WHERE state IN {}",
        super::rows(1, AttemptState::OUTSTANDING.len())
    );
    let mut query = sqlx::query(&sql);
    for s in AttemptState::OUTSTANDING {
        query = query.bind(s);
    }
    let rows = query.fetch_all(pool).await?;
    Ok(rows
        .iter()
        .map(|r| OutstandingAttempt {
            id: r.get("id"),
            executor: r.get("executor"),
            handle_id: r.get("handle_id"),
            host: r.get("host"),
        })
        .collect())
}

impl super::Script {
    /// Record one attempt as cancelled, ended now, with the reason as its failure message.
    pub fn attempt_cancelled(&mut self, id: i64, reason: &str) {
        self.stmt(
            "UPDATE attempts SET state = ?, failure_kind = ?, failure_message = ?, ended_at = ? \
             WHERE id = ?",
        )
        .bind(AttemptState::Cancelled)
        .bind("cancelled") // the failure kind
        .bind(format!("cancelled: {reason}"))
        .bind(super::now())
        .bind(id);
    }

    /// Record every point that has not stopped (planned or running) as cancelled.
    pub fn open_points_cancelled(&mut self, reason: &str) {
        self.stmt("UPDATE points SET state = ?, reason = ? WHERE state IN (?, ?)")
            .bind(PointState::Cancelled)
            .bind(format!("cancelled: {reason}"))
            .bind(PointState::Planned)
            .bind(PointState::Running);
    }
}
