//! Reads of the `points` and `iterations` tables.

use anyhow::{Context, Result};
use sqlx::{Row, SqlitePool};

use crate::store::{IterationState, PointState};

/// Point ids, in sweep order.
pub async fn ids(pool: &SqlitePool) -> Result<Vec<String>> {
    Ok(sqlx::query_scalar("SELECT id FROM points ORDER BY idx")
        .fetch_all(pool)
        .await?)
}

/// One `points` row, its sweep values still as JSON text.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct PointRow {
    /// Point id.
    pub id: String,
    /// `values_json`.
    pub values_json: String,
    /// State.
    pub state: PointState,
    /// The revision that retired it (only ever set in [`all_of`]`(pool, true)`).
    pub retired_in: Option<i64>,
}

/// Every point of the campaign, in sweep order: retired points (revisions removed their
/// values, or changed their physics) are left out of analyses, reports and tables.
pub async fn all(pool: &SqlitePool) -> Result<Vec<PointRow>> {
    all_of(pool, false).await
}

/// Every point, in sweep order; retired points too when `with_retired` (`--with-retired`
/// of report, analyze and table), with the revision that retired them.
pub async fn all_of(pool: &SqlitePool, with_retired: bool) -> Result<Vec<PointRow>> {
    let rows = sqlx::query(
        "SELECT id, values_json, state, retired_in FROM points \
         WHERE retired_in IS NULL OR ? ORDER BY idx",
    )
    .bind(with_retired)
    .fetch_all(pool)
    .await
    .context("cannot read the points")?;
    let mut out = Vec::new();
    for r in rows {
        let id: String = r.try_get(0)?;
        let state = r
            .try_get::<PointState, _>(2)
            .with_context(|| format!("point {id}"))?;
        out.push(PointRow {
            values_json: r.try_get(1)?,
            state,
            retired_in: r.try_get(3)?,
            id,
        });
    }
    Ok(out)
}

/// Every point of the campaign as (id, values_json), in sweep order (the state not
/// decoded; retired points left out, as in [`all`]: a sweep-value selector names the
/// point that runs those values now).
pub async fn values(pool: &SqlitePool) -> Result<Vec<(String, String)>> {
    let rows =
        sqlx::query("SELECT id, values_json FROM points WHERE retired_in IS NULL ORDER BY idx")
            .fetch_all(pool)
            .await?;
    let mut out = Vec::new();
    for r in rows {
        out.push((r.try_get(0)?, r.try_get(1)?));
    }
    Ok(out)
}

/// Every point as (id, values_json, the revision that retired it), retired ones too, in
/// sweep order (for the records of every attempt, which name retired points as well).
pub async fn values_with_retired(pool: &SqlitePool) -> Result<Vec<(String, String, Option<i64>)>> {
    let rows = sqlx::query("SELECT id, values_json, retired_in FROM points ORDER BY idx")
        .fetch_all(pool)
        .await?;
    let mut out = Vec::new();
    for r in rows {
        out.push((r.try_get(0)?, r.try_get(1)?, r.try_get(2)?));
    }
    Ok(out)
}

/// One point's (values_json, state).
pub async fn point(pool: &SqlitePool, id: &str) -> Result<(String, PointState)> {
    let r = sqlx::query("SELECT values_json, state FROM points WHERE id = ?")
        .bind(id)
        .fetch_one(pool)
        .await?;
    Ok((r.try_get(0)?, r.try_get(1)?))
}

/// A point's last good iteration, if it has one.
pub async fn last_good_iteration(pool: &SqlitePool, point: &str) -> Result<Option<i64>> {
    Ok(
        sqlx::query_scalar("SELECT MAX(iteration) FROM iterations WHERE point = ? AND state = ?")
            .bind(point)
            .bind(IterationState::Good)
            .fetch_one(pool)
            .await?,
    )
}

/// Every point's last good iteration, as (point, iteration).
pub async fn last_good_iterations(pool: &SqlitePool) -> Result<Vec<(String, Option<i64>)>> {
    let rows =
        sqlx::query("SELECT point, MAX(iteration) FROM iterations WHERE state = ? GROUP BY point")
            .bind(IterationState::Good)
            .fetch_all(pool)
            .await?;
    let mut out = Vec::new();
    for r in rows {
        out.push((r.try_get(0)?, r.try_get(1)?));
    }
    Ok(out)
}

/// A point's good iterations with their `stop_json`, in order.
/// A point's first iteration whose stopping rules were met (through the partial index
/// `iterations_rules_met`: one look-up, whatever the length of the history).
pub(crate) const FIRST_RULES_MET: &str = "SELECT min(iteration) FROM iterations \
     WHERE point = ? AND json_extract(stop_json, '$.rules_met') = 1 \
     AND iteration >= (SELECT coalesce(window_from, 0) FROM points WHERE id = ?)";

/// A point's last good iteration (reading back from its last one).
pub(crate) const LAST_GOOD: &str =
    "SELECT iteration FROM iterations WHERE point = ? AND state = ? ORDER BY iteration DESC LIMIT 1";

/// A point's first good iteration with its stopping rules met, and its last good iteration.
pub async fn convergence_marks(
    pool: &SqlitePool,
    point: &str,
) -> Result<(Option<i64>, Option<i64>)> {
    let first: Option<i64> = sqlx::query_scalar(FIRST_RULES_MET)
        .bind(point)
        .bind(point)
        .fetch_one(pool)
        .await?;
    let last: Option<i64> = sqlx::query_scalar(LAST_GOOD)
        .bind(point)
        .bind(IterationState::Good)
        .fetch_optional(pool)
        .await?;
    Ok((first, last))
}
