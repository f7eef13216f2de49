//! `rondo plan FILE [--workspace W] [--durations-from WS] [--json]`: what is left of a
//! campaign, in attempts and core-hours per stage, from recorded durations, and whether it
//! fits the campaign's budget.
//!
//! Owns the plan's text and which workspaces are read (both read-only); an edited campaign
//! file is classified against its workspace as `rondo check` does
//! ([`crate::engine::revise::classify`], nothing written); the estimate is
//! [`crate::query::plan`]'s. No SQL.

use std::fmt::Write;
use std::path::Path;

use anyhow::Result;

use super::output::{emit, emit_json};
use super::workspace::load;
use super::{BadInput, PlanArgs, EXIT_OK};
use crate::engine::{self, default_workspace};
use crate::query::plan::{estimate, Plan, PlanEdit, Range};
use crate::store;

/// `rondo plan`.
pub async fn run(a: PlanArgs) -> Result<u8> {
    let c = load(&a.file)?;
    let ws = a.workspace.unwrap_or_else(|| default_workspace(&a.file));
    let progress = if ws.join(store::DB_FILE).is_file() {
        Some(store::open_existing(&ws).await?)
    } else {
        None
    };
    let from = match &a.durations_from {
        Some(d) if !d.join(store::DB_FILE).is_file() => {
            anyhow::bail!(BadInput(format!(
                "{}: no workspace (no {} in it) to take durations from",
                d.display(),
                store::DB_FILE
            )))
        }
        Some(d) => Some(store::open_existing(d).await?),
        None => None,
    };
    let durations = from.as_ref().or(progress.as_ref());
    let classified = match &progress {
        Some(pool) => Some(engine::revise::classify(pool, &c, a.accept_revision).await?),
        None => None,
    };
    let edit = match &classified {
        Some((false, r)) => Some((r, a.accept_revision)),
        _ => None,
    };
    let plan = estimate(&c, progress.as_ref(), durations, edit).await?;
    let source = a
        .durations_from
        .as_deref()
        .or(progress.as_ref().map(|_| ws.as_path()));
    if let Some(w) = budget_warning(&plan) {
        eprintln!("{}: warning: {w}", a.file.display());
    }
    if a.json {
        let mut doc = serde_json::to_value(&plan)?;
        doc["campaign"] = c.name.clone().into();
        doc["workspace"] = ws.display().to_string().into();
        doc["workspace_exists"] = progress.is_some().into();
        doc["durations_from"] = source.map(|p| p.display().to_string()).into();
        emit_json(&doc)?;
    } else {
        emit(&plan_text(&c.name, &ws, progress.is_some(), source, &plan));
    }
    for p in [progress, from].into_iter().flatten() {
        p.close().await;
    }
    Ok(EXIT_OK)
}

/// The warning when the upper bound exceeds the budget.
fn budget_warning(p: &Plan) -> Option<String> {
    let (Some(b), Some(t)) = (p.budget_core_hours, p.total_core_hours) else {
        return None;
    };
    (t.upper > b).then(|| {
        format!(
            "the estimate's upper bound, {} core-hours, exceeds the budget of {} core-hours (typical estimate {})",
            hours(t.upper),
            hours(b),
            hours(t.typical)
        )
    })
}

/// Core-hours for people: whole above 100, else to about three significant digits.
fn hours(h: f64) -> String {
    if h >= 100.0 {
        format!("{h:.0}")
    } else {
        crate::query::format_measurement(h, None)
    }
}

fn range_text(r: Option<Range>) -> String {
    match r {
        Some(r) => format!("{} (at most {})", hours(r.typical), hours(r.upper)),
        None => "unknown".into(),
    }
}

/// The plan for people.
fn plan_text(name: &str, ws: &Path, exists: bool, source: Option<&Path>, p: &Plan) -> String {
    let mut s = String::new();
    let _ = writeln!(
        s,
        "plan for campaign {name} ({}{})",
        ws.display(),
        if exists { "" } else { ", not started" }
    );
    let _ = writeln!(
        s,
        "  durations from: {}",
        source
            .map(|p| p.display().to_string())
            .unwrap_or_else(|| "nothing recorded (name a workspace with --durations-from)".into())
    );
    if let Some(e) = &p.edit {
        edit_lines(&mut s, e, p, source);
    }
    let _ = writeln!(s, "  points to go: {} of {}", p.points_to_go, p.points);
    let typical = match p.median_to_converge {
        Some(m) => format!(
            "typical {:.0} (median {m} iterations to converge, over {} converged point(s))",
            p.iterations.typical, p.converged_points
        ),
        None => "typical unknown (no converged point recorded: the upper bound is used)".into(),
    };
    let _ = writeln!(
        s,
        "  iterations to go: {typical}; at most {:.0} (up to max-iterations)",
        p.iterations.upper
    );
    for st in &p.stages {
        let wall = match st.wall_seconds {
            Some(w) => format!(
                "wall median {:.3} s [{:.3}..{:.3}] over {} recorded attempt(s)",
                w.median, w.min, w.max, st.recorded_attempts
            ),
            None => "wall unknown: no recorded attempt".into(),
        };
        let _ = writeln!(
            s,
            "  stage {} ({} cpu(s)): {wall}; attempts {:.0} (at most {:.0}, {:.2} per success); core-hours {}",
            st.stage,
            st.cpus,
            st.attempts.typical,
            st.attempts.upper,
            st.attempts_per_success,
            range_text(st.core_hours)
        );
    }
    let _ = writeln!(s, "  core-hours to go: {}", range_text(p.total_core_hours));
    if let Some(b) = p.budget_core_hours {
        let verdict = match p.over_budget {
            Some(true) => "the upper bound exceeds it",
            Some(false) => "within it",
            None => "cannot compare: some stage has no recorded duration",
        };
        let _ = writeln!(s, "  budget: {} core-hours: {verdict}", hours(b));
    }
    s
}

/// What the edited campaign file changes in the count, and what a new point's estimate rests
/// on.
fn edit_lines(s: &mut String, e: &PlanEdit, p: &Plan, source: Option<&Path>) {
    let _ = writeln!(
        s,
        "  the campaign file is edited (revision {} against revision {} of the workspace):",
        e.number, e.from
    );
    if e.refused {
        let _ = writeln!(
            s,
            "    `rondo run` would refuse it: it changes what the points compute ({}); \
             counted below are the recorded points only (`rondo plan --accept-revision` \
             counts it as `rondo run --accept-revision` would run it)",
            e.physics.join("; ")
        );
        return;
    }
    let list = |ids: &[String]| {
        if ids.is_empty() {
            String::new()
        } else {
            format!(" ({})", ids.join(", "))
        }
    };
    let _ = writeln!(
        s,
        "    {} new point(s){}, {} retired{} (not counted), {} back in the sweep{}, {} stopped \
         point(s) continuing{}",
        e.new_points.len(),
        list(&e.new_points),
        e.retired_points.len(),
        list(&e.retired_points),
        e.restored_points.len(),
        list(&e.restored_points),
        e.reopened_points.len(),
        list(&e.reopened_points),
    );
    if e.new_points.is_empty() {
        return;
    }
    let basis = match p.median_to_converge {
        Some(m) => format!(
            "typical {:.0} iterations (the median {m} iterations to converge of {} converged \
             point(s))",
            e.new_point_iterations.typical, p.converged_points
        ),
        None => format!(
            "typical unknown (no converged point recorded: the cap, {:.0}, is used)",
            e.new_point_iterations.typical
        ),
    };
    let _ = writeln!(
        s,
        "    a new point is estimated as an unstarted one: {basis}, at most {:.0} \
         (max-iterations); each stage at its recorded wall times in {}",
        e.new_point_iterations.upper,
        source
            .map(|p| p.display().to_string())
            .unwrap_or_else(|| "no workspace".into())
    );
}
