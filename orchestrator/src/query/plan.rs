//! The estimate of what is left of a campaign (`rondo plan`): remaining iterations, attempts
//! and core-hours per stage, from the durations recorded in a workspace (this campaign's or
//! another's), and the comparison with the campaign's budget.
//!
//! Honest by construction: every number says what it rests on (how many recorded attempts
//! per stage, how many converged points), a stage with nothing recorded is `unknown` (and so
//! is every total it enters), and the iterations to go come as a typical estimate (the
//! recorded median iterations-to-converge of converged points) and an upper bound (the
//! iterations left to max-iterations). An edited campaign file is counted as `rondo run`
//! would apply it (its classification, [`crate::revision::Classification`], comes in):
//! its new points are estimated as unstarted ones, its retired points drop out, its
//! reopened points continue up to the new cap; an edit `rondo run` would refuse leaves the
//! recorded points. Reads only through [`crate::store::reads::tables`]; no SQL, no engine.

use std::collections::{BTreeMap, HashMap};

use anyhow::Result;
use serde::Serialize;
use sqlx::SqlitePool;

use crate::revision::Classification;
use crate::spec::{Campaign, Stage};
use crate::store::reads::tables;
use crate::store::PointState;

/// Typical and upper values of one quantity.
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct Range {
    /// From the median iterations-to-converge and the median wall time.
    pub typical: f64,
    /// From the iterations left to max-iterations and the longest recorded wall time.
    pub upper: f64,
}

/// Recorded wall times of one stage, in seconds.
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct Walls {
    /// Median.
    pub median: f64,
    /// Shortest.
    pub min: f64,
    /// Longest.
    pub max: f64,
}

/// The estimate for one stage.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct StagePlan {
    /// Stage name.
    pub stage: String,
    /// CPUs of one attempt (`ntasks × cpus-per-task`; 1 for built-ins and unset resources).
    pub cpus: u32,
    /// Ended attempts (succeeded or failed) the durations come from.
    pub recorded_attempts: usize,
    /// Recorded attempts per succeeded one (1 when none succeeded yet).
    pub attempts_per_success: f64,
    /// Their wall times, `None` when nothing is recorded.
    pub wall_seconds: Option<Walls>,
    /// Attempts still to run.
    pub attempts: Range,
    /// Core-hours still to spend, `None` (unknown) when nothing is recorded.
    pub core_hours: Option<Range>,
}

/// The estimate for a campaign.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct Plan {
    /// Points that have not stopped (failed points stay failed on a rerun).
    pub points_to_go: usize,
    /// Points of the campaign.
    pub points: usize,
    /// Iterations to go, summed over the points to go.
    pub iterations: Range,
    /// Median iterations to converge of the converged points of the durations' workspace.
    pub median_to_converge: Option<f64>,
    /// How many converged points that median comes from.
    pub converged_points: usize,
    /// Per stage, in cycle order.
    pub stages: Vec<StagePlan>,
    /// Sum over the stages; `None` when any stage is unknown.
    pub total_core_hours: Option<Range>,
    /// The campaign's budget.
    pub budget_core_hours: Option<f64>,
    /// Whether the upper bound exceeds the budget (`None`: no budget, or unknown total).
    pub over_budget: Option<bool>,
    /// What an edited campaign file changes in the count (`None`: the file is the
    /// workspace's latest revision, or there is no workspace).
    pub edit: Option<PlanEdit>,
}

/// An edited campaign file in the plan: what it would add, retire and reopen.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct PlanEdit {
    /// The recorded revision it is compared with.
    pub from: i64,
    /// The number it would be recorded as.
    pub number: i64,
    /// `rondo run` would refuse it (it changes what the points compute, not accepted):
    /// the plan then counts the recorded points only.
    pub refused: bool,
    /// The physics changes (one readable line each).
    pub physics: Vec<String>,
    /// Points it adds (new sweep values, and new points for the values of started points
    /// under accepted physics changes).
    pub new_points: Vec<String>,
    /// Points it retires.
    pub retired_points: Vec<String>,
    /// Retired points whose values come back.
    pub restored_points: Vec<String>,
    /// Stopped points that continue (a capped point under a higher cap, a converged one
    /// whose rules no longer hold).
    pub reopened_points: Vec<String>,
    /// Iterations of one new point: typical (the median iterations to converge of the
    /// recorded converged points; the cap when none) and upper (the cap).
    pub new_point_iterations: Range,
}

impl PlanEdit {
    /// The edit's part of the plan, from its classification (`accept`: as `rondo run
    /// --accept-revision`).
    fn of(c: &Classification, accept: bool, new_point_iterations: Range) -> PlanEdit {
        let ids = |v: &[(String, String)]| v.iter().map(|(id, _)| id.clone()).collect();
        let mut new_points: Vec<String> = ids(&c.added);
        let mut retired_points: Vec<String> = ids(&c.retired);
        for (old, new, _) in &c.rerun {
            new_points.push(new.clone());
            retired_points.push(old.clone());
        }
        PlanEdit {
            from: c.from,
            number: c.number,
            refused: c.needs_acceptance() && !accept,
            physics: c.physics.clone(),
            new_points,
            retired_points,
            restored_points: ids(&c.restored),
            reopened_points: c
                .reopened
                .iter()
                .filter(|r| r.becomes == PointState::Running)
                .map(|r| r.point.clone())
                .collect(),
            new_point_iterations,
        }
    }
}

/// Good iterations done per point still to go once the edit `c` is applied: the revised
/// campaign's points (retired ones are not among them) that have not stopped, the stopped
/// ones it reopens, and its new points (none done). `progress` is every recorded point's,
/// retired ones too (a restored point keeps its history).
fn to_go_after(progress: &[(String, PointState, i64, i64)], c: &Classification) -> Vec<i64> {
    let recorded: HashMap<&str, (PointState, i64)> = progress
        .iter()
        .map(|(id, s, good, _)| (id.as_str(), (*s, *good)))
        .collect();
    c.points
        .iter()
        .filter_map(|p| {
            let known = recorded.get(p.id.as_str()).copied();
            if let Some(r) = c.reopened.iter().find(|r| r.point == p.id) {
                let good = known.map_or(i64::from(r.iteration), |(_, g)| g);
                return (r.becomes == PointState::Running).then_some(good);
            }
            match known {
                Some((s, good)) => (!s.stopped() || s == PointState::Cancelled).then_some(good),
                None => Some(0),
            }
        })
        .collect()
}

/// One stage's estimate from its recorded wall times (`secs`), how many of those attempts
/// succeeded (`ok`), and the iterations to go.
fn stage_plan(st: &Stage, (mut secs, ok): (Vec<f64>, usize), iterations: Range) -> StagePlan {
    let cpus = if st.kind.is_builtin() {
        1
    } else {
        st.resources.cpus().max(1)
    };
    let n = secs.len();
    let per_success = if ok > 0 { n as f64 / ok as f64 } else { 1.0 };
    let attempts = Range {
        typical: iterations.typical * per_success,
        upper: iterations.upper * per_success,
    };
    let walls = median(&mut secs).map(|median| Walls {
        median,
        min: secs.first().copied().unwrap_or(median),
        max: secs.last().copied().unwrap_or(median),
    });
    let core_hours = walls.map(|w| Range {
        typical: attempts.typical * w.median * f64::from(cpus) / 3600.0,
        upper: attempts.upper * w.max * f64::from(cpus) / 3600.0,
    });
    StagePlan {
        stage: st.name.clone(),
        cpus,
        recorded_attempts: n,
        attempts_per_success: per_success,
        wall_seconds: walls,
        attempts,
        core_hours,
    }
}

/// The median of `v` (sorted in place), `None` when empty.
fn median(v: &mut [f64]) -> Option<f64> {
    if v.is_empty() {
        return None;
    }
    v.sort_by(f64::total_cmp);
    let m = v.len() / 2;
    Some(if v.len() % 2 == 1 {
        v[m]
    } else {
        0.5 * (v[m - 1] + v[m])
    })
}

/// Estimate what is left of `campaign` in the workspace behind `progress` (`None`: not
/// started, every point to go) from the durations recorded behind `durations`. `edit`: the
/// campaign file's classification against that workspace when it differs from the latest
/// revision, and whether physics changes are accepted.
pub async fn estimate(
    campaign: &Campaign,
    progress: Option<&SqlitePool>,
    durations: Option<&SqlitePool>,
    edit: Option<(&Classification, bool)>,
) -> Result<Plan> {
    // Iterations-to-converge of the converged points of the durations' workspace.
    let mut converged: Vec<f64> = Vec::new();
    if let Some(pool) = durations {
        for (_, state, good, _) in tables::point_progress(pool).await? {
            if state == PointState::Converged {
                converged.push(good as f64);
            }
        }
    }
    let converged_points = converged.len();
    let median_to_converge = median(&mut converged);
    let cap = f64::from(campaign.max_iterations);
    let plan_edit = edit.map(|(c, accept)| {
        let typical = median_to_converge.map_or(cap, |m| m.ceil().clamp(1.0, cap));
        PlanEdit::of(
            c,
            accept,
            Range {
                typical,
                upper: cap,
            },
        )
    });
    // Good iterations done per point still to go, and the campaign's points.
    let (done, points): (Vec<i64>, usize) = match (progress, edit) {
        (Some(pool), Some((c, accept))) if accept || !c.needs_acceptance() => {
            let all = tables::point_progress_of(pool, true).await?;
            (to_go_after(&all, c), c.points.len())
        }
        (Some(pool), _) => {
            let live = tables::point_progress(pool).await?;
            let n = live.len();
            let done = live
                .into_iter()
                .filter(|(_, s, _, _)| !s.stopped() || *s == PointState::Cancelled)
                .map(|(_, _, good, _)| good)
                .collect();
            (
                done,
                if edit.is_some() {
                    n
                } else {
                    campaign.points.len()
                },
            )
        }
        (None, _) => (vec![0; campaign.points.len()], campaign.points.len()),
    };
    let mut iterations = Range {
        typical: 0.0,
        upper: 0.0,
    };
    for good in &done {
        let upper = (cap - *good as f64).max(0.0);
        let typical = match median_to_converge {
            Some(m) => (m.ceil() - *good as f64).max(1.0).min(upper),
            None => upper,
        };
        iterations.typical += typical;
        iterations.upper += upper;
    }
    let mut by_stage: BTreeMap<&str, (Vec<f64>, usize)> = BTreeMap::new();
    let recorded = match durations {
        Some(pool) => tables::durations(pool).await?,
        None => Vec::new(),
    };
    for d in &recorded {
        let e = by_stage.entry(d.stage.as_str()).or_default();
        e.0.push(d.seconds);
        e.1 += usize::from(d.succeeded);
    }
    let mut stages = Vec::new();
    let mut total = Some(Range {
        typical: 0.0,
        upper: 0.0,
    });
    // A `before:` stage runs once per point that has not started, an `after-point:` stage
    // once per point still to go; cycle stages once per iteration.
    let once = |n: usize| Range {
        typical: n as f64,
        upper: n as f64,
    };
    let unstarted = done.iter().filter(|g| **g == 0).count();
    for st in &campaign.stages {
        let recorded = by_stage.remove(st.name.as_str()).unwrap_or_default();
        let runs = match st.section {
            crate::spec::Section::Cycle => iterations,
            crate::spec::Section::Before => once(unstarted),
            crate::spec::Section::AfterPoint | crate::spec::Section::AfterCampaign => {
                once(done.len())
            }
        };
        let sp = stage_plan(st, recorded, runs);
        total = match (total, sp.core_hours) {
            (Some(t), Some(c)) => Some(Range {
                typical: t.typical + c.typical,
                upper: t.upper + c.upper,
            }),
            _ => None,
        };
        stages.push(sp);
    }
    let over_budget = match (campaign.budget_core_hours, total) {
        (Some(b), Some(t)) => Some(t.upper > b),
        _ => None,
    };
    Ok(Plan {
        points_to_go: done.len(),
        points,
        iterations,
        median_to_converge,
        converged_points,
        stages,
        total_core_hours: total,
        budget_core_hours: campaign.budget_core_hours,
        over_budget,
        edit: plan_edit,
    })
}

#[cfg(test)]
mod tests {
    use super::median;

    #[test]
    fn the_median_of_an_even_count_is_the_mean_of_the_middle_two() {
        assert_eq!(median(&mut [3.0, 1.0, 2.0]), Some(2.0));
        assert_eq!(median(&mut [4.0, 1.0, 3.0, 2.0]), Some(2.5));
        assert_eq!(median(&mut []), None);
    }
}
