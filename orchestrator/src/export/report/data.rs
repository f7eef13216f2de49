//! What a report reads: every point with its sweep values and state, the metrics of its
//! good iterations (succeeded attempts), and its last good iteration; the metrics of the
//! convergence figures; the points grouped by temperature.

use std::collections::BTreeMap;

use anyhow::{bail, Result};
use serde_json::Value;
use sqlx::SqlitePool;

use super::ReportOptions;
use crate::store::reads::{metrics, points};
use crate::store::PointState;

/// One metric value of one iteration, with the attempt that recorded it.
#[derive(Debug, Clone, Copy)]
pub struct Sample {
    pub value: f64,
    pub error: Option<f64>,
    pub attempt: i64,
}

/// A point as the report reads it.
#[derive(Debug, Clone)]
pub struct PointData {
    pub id: String,
    pub values: serde_json::Map<String, Value>,
    pub state: PointState,
    /// metric → iteration → sample (good iterations, succeeded attempts).
    pub metrics: BTreeMap<String, BTreeMap<i64, Sample>>,
    pub last_good: Option<i64>,
    /// The revision that retired it (only with `--with-retired`; otherwise retired points
    /// are not read).
    pub retired_in: Option<i64>,
}

impl PointData {
    /// The point's value of sweep axis `name`, when it is a number.
    pub fn axis(&self, name: &str) -> Option<f64> {
        self.values.get(name).and_then(Value::as_f64)
    }

    /// The value of `metric` at the point's last good iteration.
    pub fn converged(&self, metric: &str) -> Option<Sample> {
        let last = self.last_good?;
        self.metrics.get(metric)?.get(&last).copied()
    }

    /// The point's id as the report shows it: marked when a revision retired it.
    pub fn label(&self) -> String {
        match self.retired_in {
            Some(n) => format!("{} (retired in revision {n})", self.id),
            None => self.id.clone(),
        }
    }

    /// Whether the point converged.
    pub fn is_converged(&self) -> bool {
        self.state == PointState::Converged
    }
}

/// Every point with its good metrics and last good iteration, in sweep order (retired
/// points only `with_retired`).
pub async fn load_points(pool: &SqlitePool, with_retired: bool) -> Result<Vec<PointData>> {
    let mut pts = Vec::new();
    for r in points::all_of(pool, with_retired).await? {
        let values = match serde_json::from_str::<Value>(&r.values_json) {
            Ok(Value::Object(m)) => m,
            _ => bail!("point {}: malformed values_json in the store", r.id),
        };
        pts.push(PointData {
            id: r.id,
            values,
            state: r.state,
            metrics: BTreeMap::new(),
            last_good: None,
            retired_in: r.retired_in,
        });
    }
    let index: BTreeMap<String, usize> = pts
        .iter()
        .enumerate()
        .map(|(i, p)| (p.id.clone(), i))
        .collect();
    for (point, name, m) in metrics::good_everywhere(pool).await? {
        let Some(&i) = index.get(&point) else {
            continue;
        };
        let s = Sample {
            attempt: m.attempt,
            value: m.value,
            error: m.error,
        };
        pts[i]
            .metrics
            .entry(name)
            .or_default()
            .insert(m.iteration, s);
    }
    for (point, last) in points::last_good_iterations(pool).await? {
        if let Some(&i) = index.get(&point) {
            pts[i].last_good = last;
        }
    }
    Ok(pts)
}

/// The metrics of the campaign's stop rules (`stop: when: - metric: ...`), each once.
pub fn stop_metrics(spec_text: &str) -> Vec<String> {
    let Ok(stop) = crate::query::stop_section(spec_text) else {
        return Vec::new();
    };
    let mut out = Vec::new();
    if let Some(rules) = stop.get("when").and_then(Value::as_array) {
        for r in rules {
            if let Some(m) = r.get("metric").and_then(Value::as_str) {
                if !out.iter().any(|x| x == m) {
                    out.push(m.to_string());
                }
            }
        }
    }
    out
}

/// The metrics of the convergence figures: those asked for, else those of the stop rules,
/// else the energy.
pub fn convergence_metrics(opts: &ReportOptions, spec_text: &str) -> Vec<String> {
    if opts.convergence_metrics.is_empty() {
        let m = stop_metrics(spec_text);
        if m.is_empty() {
            vec![opts.energy_metric.clone()]
        } else {
            m
        }
    } else {
        opts.convergence_metrics.clone()
    }
}

/// Points grouped by temperature: sort key → (temperature, points).
pub type Groups<'a> = BTreeMap<String, (Option<f64>, Vec<&'a PointData>)>;

/// `T = 300 K`, or `all points` without a temperature.
pub fn t_label(t: Option<f64>) -> String {
    match t {
        Some(t) => format!("T = {t} K"),
        None => "all points".to_string(),
    }
}

/// The points grouped by their value of the temperature axis.
pub fn by_temperature<'a>(points: &'a [PointData], opts: &ReportOptions) -> Groups<'a> {
    let mut groups: Groups<'_> = BTreeMap::new();
    for p in points {
        let t = p.axis(&opts.temperature_axis);
        let key = t.map(|t| format!("{:020.6}", t)).unwrap_or_default();
        groups.entry(key).or_insert((t, Vec::new())).1.push(p);
    }
    groups
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn stop_rule_metrics_come_from_the_campaign_text() {
        let t = "campaign: x\nstop:\n  when:\n    - { metric: update.n_f, change-below: 1e-6 }\n    - { metric: solve.p0, within-errors: 2 }\n  max-iterations: 9\n";
        assert_eq!(stop_metrics(t), vec!["update.n_f", "solve.p0"]);
    }
}

/// One output of an `after-campaign:` stage run, as the report shows it.
#[derive(Debug, Clone)]
pub struct StageOutput {
    /// The stage.
    pub stage: String,
    /// Its group (`group-by` axes and values; empty for one run per campaign).
    pub group: serde_json::Map<String, Value>,
    /// `STAGE.ROLE`.
    pub role: String,
    /// The artifact.
    pub artifact: String,
    /// Its file name.
    pub file: String,
    /// The attempts the run read.
    pub sources: Vec<i64>,
}

/// The outputs of every recorded `after-campaign:` stage run (not the built-in `eos`, which
/// has its own section), newest run of a stage and group last.
pub async fn load_stage_outputs(pool: &SqlitePool) -> Result<Vec<StageOutput>> {
    let mut out = Vec::new();
    for (id, options, role, artifact, file) in
        crate::store::reads::reports::campaign_stage_outputs(pool).await?
    {
        let o: Value = serde_json::from_str(&options)?;
        out.push(StageOutput {
            stage: o["stage"].as_str().unwrap_or_default().to_string(),
            group: o["group"].as_object().cloned().unwrap_or_default(),
            role,
            artifact,
            file,
            sources: crate::store::reads::reports::sources(pool, id, None).await?,
        });
    }
    Ok(out)
}
