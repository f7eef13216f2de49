//! Reads behind the tidy tables (`rondo table`) and the cost estimate (`rondo plan`): every
//! recorded metric with its attempt and iteration, one page at a time (keyset on the
//! `metrics` primary key, so a page costs the same wherever it starts and no caller holds the
//! whole table), and the recorded durations of ended attempts per stage.
//!
//! Plain rows only: no formatting, no final values (those are `query::analysis`'s).

use anyhow::{Context, Result};
use sqlx::{Row, SqlitePool};

use crate::store::{AttemptState, IterationState, PointState};

/// One recorded metric with the attempt that recorded it.
#[derive(Debug, Clone, PartialEq)]
pub struct MetricRecord {
    /// Attempt id (`attempts.id`).
    pub attempt_id: i64,
    /// Point id.
    pub point: String,
    /// Iteration.
    pub iteration: i64,
    /// Stage.
    pub stage: String,
    /// Attempt number within point, iteration and stage (1-based).
    pub attempt: i64,
    /// Metric name, `stage.metric`.
    pub name: String,
    /// Value.
    pub value: f64,
    /// Standard error, if recorded.
    pub error: Option<f64>,
    /// The attempt's state.
    pub attempt_state: AttemptState,
    /// The iteration's state (absent only in a damaged store).
    pub iteration_state: Option<IterationState>,
    /// The attempt's start (RFC 3339), if it started.
    pub started_at: Option<String>,
    /// The attempt's end (RFC 3339), if it ended.
    pub ended_at: Option<String>,
}

/// Where a page of metrics starts: after this (attempt id, metric name).
pub type MetricCursor = (i64, String);

/// Up to `limit` metrics after `after` (from the first when `None`), ordered by attempt id
/// and metric name (attempt ids grow in the order attempts were planned).
pub async fn metrics_page(
    pool: &SqlitePool,
    after: Option<&MetricCursor>,
    limit: u32,
) -> Result<Vec<MetricRecord>> {
    let (id, name) = match after {
        Some((id, name)) => (*id, name.as_str()),
        None => (i64::MIN, ""),
    };
    let rows = sqlx::query(
        "SELECT m.attempt_id, a.point, a.iteration, a.stage, a.attempt, m.name, m.value, m.error, \
                a.state, i.state, a.started_at, a.ended_at \
         FROM metrics m JOIN attempts a ON a.id = m.attempt_id \
         LEFT JOIN iterations i ON i.point = a.point AND i.iteration = a.iteration \
         WHERE (m.attempt_id, m.name) > (?, ?) \
         ORDER BY m.attempt_id, m.name LIMIT ?",
    )
    .bind(id)
    .bind(name)
    .bind(i64::from(limit))
    .fetch_all(pool)
    .await
    .context("cannot read the metrics")?;
    let mut out = Vec::with_capacity(rows.len());
    for r in rows {
        let attempt_id: i64 = r.try_get(0)?;
        out.push(MetricRecord {
            attempt_id,
            point: r.try_get(1)?,
            iteration: r.try_get(2)?,
            stage: r.try_get(3)?,
            attempt: r.try_get(4)?,
            name: r.try_get(5)?,
            value: r.try_get(6)?,
            error: r.try_get(7)?,
            attempt_state: r
                .try_get(8)
                .with_context(|| format!("state of attempt {attempt_id}"))?,
            iteration_state: r
                .try_get(9)
                .with_context(|| format!("iteration state of attempt {attempt_id}"))?,
            started_at: r.try_get(10)?,
            ended_at: r.try_get(11)?,
        });
    }
    Ok(out)
}

/// Number of recorded metrics.
pub async fn metric_count(pool: &SqlitePool) -> Result<i64> {
    Ok(sqlx::query_scalar("SELECT count(*) FROM metrics")
        .fetch_one(pool)
        .await?)
}

/// The wall time of one ended attempt, in seconds, as recorded.
#[derive(Debug, Clone, PartialEq)]
pub struct Duration {
    /// Stage.
    pub stage: String,
    /// Point.
    pub point: String,
    /// Whether it succeeded.
    pub succeeded: bool,
    /// `ended_at - started_at`, in seconds.
    pub seconds: f64,
}

/// Wall times of every attempt that started and ended (succeeded or failed; lost and
/// cancelled ones have no honest end), by stage.
pub async fn durations(pool: &SqlitePool) -> Result<Vec<Duration>> {
    let rows = sqlx::query(
        "SELECT stage, point, state, \
                (julianday(ended_at) - julianday(started_at)) * 86400.0 \
         FROM attempts WHERE started_at IS NOT NULL AND ended_at IS NOT NULL \
           AND state IN (?, ?) ORDER BY stage, id",
    )
    .bind(AttemptState::Succeeded)
    .bind(AttemptState::Failed)
    .fetch_all(pool)
    .await
    .context("cannot read the attempts' durations")?;
    let mut out = Vec::with_capacity(rows.len());
    for r in rows {
        let state: AttemptState = r.try_get(2)?;
        let seconds: Option<f64> = r.try_get(3)?;
        out.push(Duration {
            stage: r.try_get(0)?,
            point: r.try_get(1)?,
            succeeded: state == AttemptState::Succeeded,
            seconds: seconds.unwrap_or(0.0).max(0.0),
        });
    }
    Ok(out)
}

/// Per point of the campaign (retired points left out): (point, state, number of good
/// iterations, last iteration begun).
pub async fn point_progress(pool: &SqlitePool) -> Result<Vec<(String, PointState, i64, i64)>> {
    point_progress_of(pool, false).await
}

/// [`point_progress`], of retired points too when `with_retired` (an edit may bring them
/// back).
pub async fn point_progress_of(
    pool: &SqlitePool,
    with_retired: bool,
) -> Result<Vec<(String, PointState, i64, i64)>> {
    let rows = sqlx::query(
        "SELECT p.id, p.state, \
                (SELECT count(*) FROM iterations i WHERE i.point = p.id AND i.state = ?), \
                (SELECT coalesce(max(iteration), 0) FROM iterations i WHERE i.point = p.id) \
         FROM points p WHERE p.retired_in IS NULL OR ? ORDER BY p.idx",
    )
    .bind(IterationState::Good)
    .bind(with_retired)
    .fetch_all(pool)
    .await
    .context("cannot read the points' progress")?;
    let mut out = Vec::with_capacity(rows.len());
    for r in rows {
        out.push((r.try_get(0)?, r.try_get(1)?, r.try_get(2)?, r.try_get(3)?));
    }
    Ok(out)
}
