//! Reads of the `metrics` table joined with the attempts (and iterations) that recorded them.

use anyhow::{Context, Result};
use sqlx::{Row, SqlitePool};

use crate::store::{AttemptState, IterationState};

/// A metric as recorded by one attempt.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct MetricRow {
    /// Attempt id.
    pub attempt: i64,
    /// Iteration.
    pub iteration: i64,
    /// Value.
    pub value: f64,
    /// Standard error.
    pub error: Option<f64>,
}

/// The newest succeeded attempt's value of metric `name` at one iteration of a point.
pub async fn at_iteration(
    pool: &SqlitePool,
    point: &str,
    iteration: i64,
    name: &str,
) -> Result<Option<MetricRow>> {
    let row = sqlx::query(
        "SELECT m.value, m.error, a.id FROM metrics m JOIN attempts a ON a.id = m.attempt_id
         WHERE a.point = ? AND a.iteration = ? AND m.name = ? AND a.state = ?
         ORDER BY a.id DESC LIMIT 1",
    )
    .bind(point)
    .bind(iteration)
    .bind(name)
    .bind(AttemptState::Succeeded)
    .fetch_optional(pool)
    .await?;
    let Some(row) = row else { return Ok(None) };
    Ok(Some(MetricRow {
        value: row.try_get(0)?,
        error: row.try_get(1)?,
        attempt: row.try_get(2)?,
        iteration,
    }))
}

/// Names of the metrics any attempt recorded at one iteration of a point, in order.
pub async fn names_at(pool: &SqlitePool, point: &str, iteration: i64) -> Result<Vec<String>> {
    Ok(sqlx::query_scalar(
        "SELECT DISTINCT m.name FROM metrics m JOIN attempts a ON a.id = m.attempt_id
             WHERE a.point = ? AND a.iteration = ? ORDER BY m.name",
    )
    .bind(point)
    .bind(iteration)
    .fetch_all(pool)
    .await?)
}

/// Metric `name` of a point's succeeded attempts in good iterations `from..=to`, by
/// iteration.
pub async fn good_between(
    pool: &SqlitePool,
    point: &str,
    name: &str,
    from: i64,
    to: i64,
) -> Result<Vec<MetricRow>> {
    let rows = sqlx::query(
        "SELECT a.id, a.iteration, m.value, m.error FROM metrics m JOIN attempts a ON a.id = m.attempt_id \
         JOIN iterations i ON i.point = a.point AND i.iteration = a.iteration AND i.state = ? \
         WHERE a.point = ? AND a.state = ? AND m.name = ? AND a.iteration BETWEEN ? AND ? \
         ORDER BY a.iteration",
    )
    .bind(IterationState::Good)
    .bind(point)
    .bind(AttemptState::Succeeded)
    .bind(name)
    .bind(from)
    .bind(to)
    .fetch_all(pool)
    .await?;
    let mut out = Vec::new();
    for r in rows {
        out.push(MetricRow {
            attempt: r.try_get("id")?,
            iteration: r.try_get("iteration")?,
            value: r.try_get("value")?,
            error: r.try_get("error")?,
        });
    }
    Ok(out)
}

/// Every metric of a point's succeeded attempts as (iteration, name, value), by iteration
/// and attempt.
pub async fn succeeded_of_point(pool: &SqlitePool, point: &str) -> Result<Vec<(i64, String, f64)>> {
    let rows = sqlx::query(
        "SELECT a.iteration, m.name, m.value FROM metrics m JOIN attempts a ON a.id = m.attempt_id
         WHERE a.point = ? AND a.state = ? ORDER BY a.iteration, a.id",
    )
    .bind(point)
    .bind(AttemptState::Succeeded)
    .fetch_all(pool)
    .await?;
    let mut out = Vec::new();
    for r in rows {
        out.push((r.try_get(0)?, r.try_get(1)?, r.try_get(2)?));
    }
    Ok(out)
}

/// Every metric of succeeded attempts in good iterations, as (point, name, row), by
/// point, iteration and attempt.
pub async fn good_everywhere(pool: &SqlitePool) -> Result<Vec<(String, String, MetricRow)>> {
    let rows = sqlx::query(
        "SELECT a.point, a.iteration, a.id, m.name, m.value, m.error
         FROM metrics m JOIN attempts a ON a.id = m.attempt_id
         JOIN iterations i ON i.point = a.point AND i.iteration = a.iteration
         WHERE a.state = ? AND i.state = ?
         ORDER BY a.point, a.iteration, a.id",
    )
    .bind(AttemptState::Succeeded)
    .bind(IterationState::Good)
    .fetch_all(pool)
    .await
    .context("cannot read the metrics")?;
    let mut out = Vec::new();
    for r in rows {
        let row = MetricRow {
            iteration: r.try_get(1)?,
            attempt: r.try_get(2)?,
            value: r.try_get(4)?,
            error: r.try_get(5)?,
        };
        out.push((r.try_get(0)?, r.try_get(3)?, row));
    }
    Ok(out)
}
