//! What the campaign cost: the recorded CPU time, wall time and peak memory of the attempts,
//! summed to core-hours per stage, per point and in all, for `rondo status` and the report.
//!
//! A core-hour here is 3600 s of CPU time, user plus system, as the executor measured it
//! (`wait4` of a local program, the batch job script's `times`, or `sacct`): the cores the
//! programs kept busy, not the cores an allocation reserved.

use std::collections::BTreeMap;

use anyhow::Result;
use serde_json::{json, Map, Value};
use sqlx::SqlitePool;

use crate::store::reads::attempts::{usage_totals, UsageTotal};

/// Sums of some attempts' figures.
#[derive(Debug, Clone, Copy, Default, PartialEq)]
pub struct Cost {
    /// Attempts with figures.
    pub attempts: i64,
    /// CPU seconds, user mode.
    pub cpu_user_s: f64,
    /// CPU seconds, kernel.
    pub cpu_system_s: f64,
    /// Wall seconds.
    pub wall_s: f64,
    /// Largest resident set, KiB.
    pub max_rss_kib: Option<i64>,
}

impl Cost {
    fn add(&mut self, t: &UsageTotal) {
        self.attempts += t.attempts;
        self.cpu_user_s += t.cpu_user_s;
        self.cpu_system_s += t.cpu_system_s;
        self.wall_s += t.wall_s;
        self.max_rss_kib = match (self.max_rss_kib, t.max_rss_kib) {
            (Some(a), Some(b)) => Some(a.max(b)),
            (a, b) => a.or(b),
        };
    }

    /// CPU time (user + system) in hours.
    pub fn core_hours(&self) -> f64 {
        (self.cpu_user_s + self.cpu_system_s) / 3600.0
    }

    /// The JSON form (docs/json-output.md, "usage").
    pub fn to_json(&self) -> Value {
        json!({
            "attempts": self.attempts,
            "core_hours": self.core_hours(),
            "cpu_user_s": self.cpu_user_s,
            "cpu_system_s": self.cpu_system_s,
            "wall_s": self.wall_s,
            "max_rss_kib": self.max_rss_kib,
        })
    }
}

/// The costs: in all, per stage, per point, and per point and stage.
#[derive(Debug, Clone, Default)]
pub struct Costs {
    pub total: Cost,
    pub by_stage: BTreeMap<String, Cost>,
    pub by_point: BTreeMap<String, Cost>,
    pub by_point_stage: BTreeMap<(String, String), Cost>,
}

impl Costs {
    /// The campaign-wide JSON: `{ total, by_stage: { STAGE: cost } }`.
    pub fn campaign_json(&self) -> Value {
        let stages: Map<String, Value> = self
            .by_stage
            .iter()
            .map(|(s, c)| (s.clone(), c.to_json()))
            .collect();
        json!({ "total": self.total.to_json(), "by_stage": stages })
    }

    /// One point's JSON: `{ total, by_stage }` (zeros when nothing was measured).
    pub fn point_json(&self, point: &str) -> Value {
        let stages: Map<String, Value> = self
            .by_point_stage
            .iter()
            .filter(|((p, _), _)| p == point)
            .map(|((_, s), c)| (s.clone(), c.to_json()))
            .collect();
        let total = self.by_point.get(point).copied().unwrap_or_default();
        json!({ "total": total.to_json(), "by_stage": stages })
    }
}

/// Read and sum the recorded figures.
pub async fn costs(pool: &SqlitePool) -> Result<Costs> {
    let mut c = Costs::default();
    for t in usage_totals(pool).await? {
        c.total.add(&t);
        c.by_stage.entry(t.stage.clone()).or_default().add(&t);
        c.by_point.entry(t.point.clone()).or_default().add(&t);
        c.by_point_stage
            .entry((t.point.clone(), t.stage.clone()))
            .or_default()
            .add(&t);
    }
    Ok(c)
}

/// `0.0123 core-hours (44.28 s CPU)`: the CPU seconds too, which short test campaigns need.
pub fn core_hours_text(h: f64) -> String {
    format!("{h:.4} core-hours ({:.2} s CPU)", h * 3600.0)
}
