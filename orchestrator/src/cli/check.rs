//! `rondo check` (validate a campaign file and print its plan) and `rondo schema` (the JSON
//! Schema of the campaign file).
//!
//! Owns the plan's text; reads the validated campaign and, when the campaign already has a
//! workspace, that workspace's revisions (read-only), to say what an edit would change
//! before anything runs.

use anyhow::Result;
use std::fmt::Write;

use super::output::{emit, emit_json};
use super::workspace::{absolute, load};
use super::{CheckArgs, EXIT_OK};
use crate::engine;
use crate::spec::{
    self, Campaign, Combine, Compare, PointSelection, PointsRead, RuleTest, Source, Stage,
    StageKind,
};
use crate::store;

/// `rondo check FILE`: the campaign file's warnings on stderr, its plan on stdout and, when
/// its workspace exists, how the file's text compares with the latest recorded revision.
pub async fn run(a: CheckArgs) -> Result<u8> {
    let c = load(&a.file)?;
    eprint!("{}", c.warnings_text());
    let ws = absolute(
        a.workspace
            .clone()
            .unwrap_or_else(|| engine::default_workspace(&a.file)),
    )?;
    let revision = if ws.join(store::DB_FILE).is_file() {
        let pool = store::open_existing(&ws).await?;
        let r = engine::revise::classify(&pool, &c, a.accept_revision).await?;
        pool.close().await;
        Some(r)
    } else {
        None
    };
    if a.json {
        let doc = serde_json::json!({
            "campaign": c.name,
            "file": c.file.display().to_string(),
            "points": c.points.len(),
            "workspace": revision.as_ref().map(|_| ws.display().to_string()),
            "unchanged": revision.as_ref().map(|(same, _)| *same),
            "revision": revision.as_ref().map(|(same, r)| {
                if *same { serde_json::json!({ "number": r.from }) } else { serde_json::json!(r) }
            }),
        });
        emit_json(&doc)?;
        return Ok(EXIT_OK);
    }
    let mut text = plan_text(&c);
    match &revision {
        Some((true, r)) => {
            let _ = writeln!(
                text,
                "  workspace {}: the file is its revision {}",
                ws.display(),
                r.from
            );
        }
        Some((false, r)) => {
            let _ = writeln!(text, "  workspace {}:", ws.display());
            for line in r.text().lines() {
                let _ = writeln!(text, "  {line}");
            }
            if r.needs_acceptance() && !a.accept_revision {
                let _ = writeln!(
                    text,
                    "  `rondo run` refuses this revision; `rondo run --accept-revision` accepts it"
                );
            }
        }
        None => {}
    }
    emit(&text);
    Ok(EXIT_OK)
}

/// `rondo schema`: the JSON Schema of the campaign file on stdout.
pub fn schema() -> Result<u8> {
    emit(&spec::json_schema());
    Ok(EXIT_OK)
}

/// The plan printed by `rondo check`.
pub fn plan_text(c: &Campaign) -> String {
    let mut s = String::new();
    let _ = writeln!(s, "campaign {} ({})", c.name, c.file.display());
    let _ = writeln!(s, "  {} point(s):", c.points.len());
    for p in &c.points {
        let vals = p
            .values
            .iter()
            .map(|(k, v)| format!("{k}={v}"))
            .collect::<Vec<_>>()
            .join(" ");
        let _ = writeln!(s, "    {}  {vals}", p.id);
    }
    let (b, e) = (c.cycle_start(), c.cycle_end());
    let sections = [
        ("before the cycle, once per point", &c.stages[..b]),
        ("cycle", &c.stages[b..e]),
        (
            "after a point stops, once, on its last good iteration",
            &c.stages[e..],
        ),
        ("after every point stopped", &c.after_campaign[..]),
    ];
    for (title, stages) in sections {
        if stages.is_empty() {
            continue;
        }
        let _ = writeln!(s, "  {title} ({} stages, in order):", stages.len());
        for st in stages {
            stage_lines(&mut s, c, st);
        }
    }
    stopping_lines(&mut s, c);
    s
}

/// The path of a named program, or nothing when the campaign has no such program.
fn program_path(c: &Campaign, name: &str) -> String {
    c.programs
        .get(name)
        .map(|p| p.path.display().to_string())
        .unwrap_or_default()
}

/// What a stage does, in a few words.
fn stage_summary(c: &Campaign, kind: &StageKind) -> String {
    match kind {
        StageKind::Command { program, .. } => {
            format!("runs {program} ({})", program_path(c, program))
        }
        StageKind::Shell { programs, .. } => {
            let named = programs
                .iter()
                .map(|n| format!("{n} ({})", program_path(c, n)))
                .collect::<Vec<_>>();
            format!(
                "runs a /bin/sh script{}",
                if named.is_empty() {
                    String::new()
                } else {
                    format!(" using {}", named.join(", "))
                }
            )
        }
        StageKind::Filter(w) => format!(
            "built-in filter ({} Legendre coefficients, {} Matsubara frequencies)",
            w.legendre, w.matsubara
        ),
        StageKind::Eos(e) => format!(
            "built-in equation-of-state fit of {} over the sweep axis {}",
            e.energy, e.volume
        ),
        StageKind::Mix(w) => {
            format!("built-in mix ({:?}, alpha {})", w.method, w.alpha).to_lowercase()
        }
    }
}

/// A point selection as the campaign file writes it.
fn points_text(p: PointSelection) -> &'static str {
    match p {
        PointSelection::All => "all",
        PointSelection::Converged => "converged",
        PointSelection::Group => "group",
    }
}

/// Where an input comes from.
fn source_text(src: &Source) -> String {
    match src {
        Source::Same { stage, role } => format!("{stage}.{role}"),
        Source::Start(n) => format!("start.{n}"),
        Source::Before { stage, role } => format!("{stage}.{role} (before the cycle)"),
        Source::Points { read, points } => {
            let what = match read {
                PointsRead::Output { stage, role } => format!("{stage}.{role}"),
                PointsRead::Finals(m) => format!("final values of {}", m.join(", ")),
            };
            format!(
                "{what} of the points selected by `points: {}`",
                points_text(*points)
            )
        }
        Source::Previous {
            stage,
            role,
            initially,
        } => format!(
            "{stage}.{role} of the previous iteration{}",
            initially
                .as_ref()
                .map(|i| format!(" (iteration 1: {i})"))
                .unwrap_or_default()
        ),
    }
}

/// A stage's lines: what it does, its inputs and outputs, resources, time limit, retries.
fn stage_lines(s: &mut String, c: &Campaign, st: &Stage) {
    let _ = writeln!(s, "    {}: {}", st.name, stage_summary(c, &st.kind));
    for (role, src) in &st.inputs {
        let _ = writeln!(s, "      in  {role} ← {}", source_text(src));
    }
    for (role, f) in &st.outputs {
        let _ = writeln!(s, "      out {role} → {f}");
    }
    let res = serde_json::to_string(&st.resources).unwrap_or_default();
    let _ = writeln!(
        s,
        "      resources {res}; time limit {}; retries {}",
        st.time_limit
            .map(|d| format!("{} s", d.as_secs()))
            .unwrap_or_else(|| "none".into()),
        st.retries
    );
}

/// A rule's or schedule's test, in words.
fn describe(t: &RuleTest) -> String {
    match *t {
        RuleTest::Abs(t) => format!("|change| < {t}"),
        RuleTest::Rel(t) => format!("|change| < {t} × |value|"),
        RuleTest::Errors(k) => format!("|change| ≤ {k} combined standard errors"),
    }
}

/// The stopping rules, the iteration cap, the final window and the schedules.
fn stopping_lines(s: &mut String, c: &Campaign) {
    let _ = writeln!(
        s,
        "  stop when {} of:",
        match c.combine {
            Combine::All => "all",
            Combine::Any => "any",
        }
    );
    for r in &c.rules {
        let _ = writeln!(
            s,
            "    {} {}, {} iteration{} in a row{}{}",
            r.metric,
            describe(&r.test),
            r.for_,
            if r.for_ == 1 { "" } else { "s" },
            if r.compare == Compare::Window {
                " (every pair of the window)"
            } else {
                ""
            },
            r.diverge_above
                .map(|d| format!("; diverging if |change| > {d}"))
                .unwrap_or_default()
        );
    }
    let _ = writeln!(s, "    at most {} iterations", c.max_iterations);
    if c.final_window > 0 {
        let _ = writeln!(
            s,
            "    then a final window of {} iterations, averaged",
            c.final_window
        );
    }
    for sc in &c.schedules {
        let _ = writeln!(
            s,
            "  schedule {}: {} at iteration 1, × {} (at most {}) after each iteration where {} {}",
            sc.name,
            sc.start,
            sc.factor,
            sc.max,
            sc.metric,
            describe(&sc.test)
        );
    }
}
