//! Iteration rows and points' states as the loop moves them: an iteration begins, is judged
//! good (with the stopping rules' evaluation), fails or is opened again; a point runs, stops
//! or is cancelled. Reads: each point's state and last iteration, and a point's metric
//! history (good iterations and the current one) with the start of its final window. Knows
//! no campaign rules: the verdicts arrive decided.

use std::collections::HashMap;

use anyhow::{Context, Result};
use sqlx::Row;

use super::{now, rows, AttemptState, Flushed, IterationState, PointState, Script};

impl Script {
    /// Iterations begin (`(point, iteration)` pairs), in multi-row inserts.
    pub fn iterations_begun(&mut self, list: &[(String, u32)]) {
        let at = now();
        for chunk in list.chunks(300) {
            self.stmt(&format!(
                "INSERT INTO iterations(point, iteration, state, started_at) VALUES {}",
                rows(chunk.len(), 4)
            ));
            for (point, it) in chunk {
                self.bind(point.clone())
                    .bind(i64::from(*it))
                    .bind(IterationState::Running)
                    .bind(at.clone());
            }
        }
    }

    /// A failed or cancelled iteration runs again.
    pub fn iteration_reopened(&mut self, point: &str, iteration: u32) {
        self.stmt(
            "UPDATE iterations SET state = ?, ended_at = NULL WHERE point = ? AND iteration = ?",
        )
        .bind(IterationState::Running)
        .bind(point.to_string())
        .bind(i64::from(iteration));
    }

    /// An iteration ended in a state other than good.
    pub fn iteration_ended(&mut self, point: &str, iteration: u32, state: IterationState) {
        self.stmt(
            "UPDATE iterations SET state = ?, ended_at = ? WHERE point = ? AND iteration = ?",
        )
        .bind(state)
        .bind(now())
        .bind(point.to_string())
        .bind(i64::from(iteration));
    }

    /// An iteration is good; `stop_json` is the stopping rules' evaluation.
    pub fn iteration_good(&mut self, point: &str, iteration: u32, stop_json: String) {
        self.stmt(
            "UPDATE iterations SET state = ?, ended_at = ?, stop_json = ? \
             WHERE point = ? AND iteration = ?",
        )
        .bind(IterationState::Good)
        .bind(now())
        .bind(stop_json)
        .bind(point.to_string())
        .bind(i64::from(iteration));
    }

    /// A point's state changes (`reason` NULL clears it).
    pub fn point_state(&mut self, point: &str, state: PointState, reason: Option<&str>) {
        self.stmt("UPDATE points SET state = ?, reason = ? WHERE id = ?")
            .bind(state)
            .bind(reason.map(str::to_string))
            .bind(point.to_string());
    }

    /// Append an event to the log.
    pub fn event(
        &mut self,
        kind: &str,
        point: Option<&str>,
        iteration: Option<u32>,
        attempt_id: Option<i64>,
        detail: &str,
    ) {
        super::event_stmt(self, kind, point, iteration, attempt_id, detail);
    }
}

/// Each point's last iteration (see [`Flushed::last_iterations`]). `CROSS JOIN` keeps `points`
/// the outer loop (SQLite does not reorder it), so the plan never depends on statistics.
pub(crate) const LAST_ITERATIONS: &str = "SELECT i.point, i.iteration, i.state FROM points p \
     CROSS JOIN iterations i ON i.point = p.id \
     AND i.iteration = (SELECT max(iteration) FROM iterations WHERE point = p.id)";

/// A metric sample of a point's history: (iteration, full name, value, error).
pub type HistoryRow = (u32, String, f64, Option<f64>);

impl Flushed<'_> {
    /// Every point's state.
    pub async fn point_states(&self) -> Result<HashMap<String, PointState>> {
        Ok(
            sqlx::query_as::<_, (String, PointState)>("SELECT id, state FROM points")
                .fetch_all(self.pool)
                .await
                .context("reading the points' states")?
                .into_iter()
                .collect(),
        )
    }

    /// How many points are in each state.
    pub async fn point_state_counts(&self) -> Result<Vec<(PointState, usize)>> {
        Ok(sqlx::query_as::<_, (PointState, i64)>(
            "SELECT state, count(*) AS n FROM points WHERE retired_in IS NULL GROUP BY state",
        )
        .fetch_all(self.pool)
        .await
        .context("reading the points' states")?
        .into_iter()
        .map(|(s, n)| (s, n as usize))
        .collect())
    }

    /// Each point's last iteration and its state: one index look-up per point, whatever
    /// the length of the histories.
    pub async fn last_iterations(&self) -> Result<HashMap<String, (u32, IterationState)>> {
        Ok(
            sqlx::query_as::<_, (String, i64, IterationState)>(LAST_ITERATIONS)
                .fetch_all(self.pool)
                .await
                .context("reading the iterations' states")?
                .into_iter()
                .map(|(p, it, st)| (p, (it as u32, st)))
                .collect(),
        )
    }

    /// The metrics of a point's good iterations and of iteration `current`.
    pub async fn metric_history(&self, point: &str, current: u32) -> Result<Vec<HistoryRow>> {
        let rows = sqlx::query(
            "SELECT a.iteration AS it, m.name AS name, m.value AS value, m.error AS error \
             FROM metrics m JOIN attempts a ON a.id = m.attempt_id \
             LEFT JOIN iterations i ON i.point = a.point AND i.iteration = a.iteration \
             WHERE a.point = ? AND a.state = ? AND (i.state = ? OR a.iteration = ?)",
        )
        .bind(point)
        .bind(AttemptState::Succeeded)
        .bind(IterationState::Good)
        .bind(i64::from(current))
        .fetch_all(self.pool)
        .await?;
        Ok(rows
            .into_iter()
            .map(|r| {
                (
                    r.get::<i64, _>("it") as u32,
                    r.get("name"),
                    r.get("value"),
                    r.get("error"),
                )
            })
            .collect())
    }

    /// The first good iteration of a point whose stopping rules were met.
    pub async fn first_rules_met(&self, point: &str) -> Result<Option<u32>> {
        let first: Option<i64> = sqlx::query_scalar(super::reads::points::FIRST_RULES_MET)
            .bind(point)
            .bind(point)
            .fetch_one(self.pool)
            .await?;
        Ok(first.map(|i| i as u32))
    }

    /// The point and iteration a warm-started point begins from (`warm_starts`).
    pub async fn warm_source(&self, point: &str) -> Result<Option<(String, u32)>> {
        let row: Option<(String, i64)> = sqlx::query_as(
            "SELECT source_point, source_iteration FROM warm_starts WHERE point = ?",
        )
        .bind(point)
        .fetch_optional(self.pool)
        .await?;
        Ok(row.map(|(p, i)| (p, u32::try_from(i).unwrap_or(0))))
    }

    /// The blended first input `stage.role` of a warm-started point (`warm_blends`).
    pub async fn warm_blend(&self, point: &str, stage: &str, role: &str) -> Result<Option<String>> {
        Ok(sqlx::query_scalar(
            "SELECT artifact FROM warm_blends WHERE point = ? AND stage = ? AND role = ?",
        )
        .bind(point)
        .bind(stage)
        .bind(role)
        .fetch_optional(self.pool)
        .await?)
    }

    /// The artifact of a start file.
    pub async fn start_artifact(&self, name: &str) -> Result<Option<String>> {
        Ok(
            sqlx::query_scalar("SELECT artifact FROM start_files WHERE name = ?")
                .bind(name)
                .fetch_optional(self.pool)
                .await?,
        )
    }
}
