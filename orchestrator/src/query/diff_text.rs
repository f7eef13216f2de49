//! The text view of a point comparison (`rondo diff`). Pure formatting of [`PointDiff`];
//! reads nothing.

use std::fmt::Write as _;

use serde_json::Value;

use super::diff::PointDiff;
use super::records::ProgramRef;

fn opt(s: &Option<String>) -> &str {
    s.as_deref().unwrap_or("-")
}

/// `2-3, 5, 7-9`.
fn iteration_runs(its: &[i64]) -> String {
    let mut out: Vec<String> = Vec::new();
    let mut i = 0;
    while i < its.len() {
        let mut j = i;
        while j + 1 < its.len() && its[j + 1] == its[j] + 1 {
            j += 1;
        }
        out.push(if i == j {
            its[i].to_string()
        } else {
            format!("{}-{}", its[i], its[j])
        });
        i = j + 1;
    }
    out.join(", ")
}

fn show(v: &Option<Value>) -> String {
    v.as_ref()
        .map(|x| x.to_string())
        .unwrap_or_else(|| "(absent)".into())
}

fn show_f(v: Option<f64>) -> String {
    v.map(|x| format!("{x:.12e}"))
        .unwrap_or_else(|| "(absent)".into())
}

fn show_prog(x: &ProgramRef) -> String {
    format!("{} {}", opt(&x.path), opt(&x.blake3))
}

impl PointDiff {
    /// Human-readable rendering.
    pub fn to_text(&self) -> String {
        let mut s = String::new();
        let _ = writeln!(
            s,
            "A: {} of {} ({}) {}\nB: {} of {} ({}) {}",
            self.a.point,
            self.a.campaign,
            self.a.state,
            self.a.values,
            self.b.point,
            self.b.campaign,
            self.b.state,
            self.b.values
        );
        let section = |s: &mut String, title: &str, empty: bool| {
            let _ = writeln!(s, "\n{title}{}", if empty { ": same" } else { ":" });
        };
        let revs = |r: &[i64]| {
            r.iter()
                .map(|n| n.to_string())
                .collect::<Vec<_>>()
                .join(", ")
        };
        let _ = writeln!(
            s,
            "\ncampaign file revisions: A ran under {}, B under {}",
            revs(&self.a.revisions),
            revs(&self.b.revisions)
        );
        section(&mut s, "sweep values", self.sweep_values.is_empty());
        for d in &self.sweep_values {
            let _ = writeln!(s, "  {:<24} A {:<16} B {}", d.name, show(&d.a), show(&d.b));
        }
        section(&mut s, "parameters", self.parameters.is_empty());
        for d in &self.parameters {
            let _ = writeln!(s, "  {:<24} A {:<16} B {}", d.name, show(&d.a), show(&d.b));
        }
        section(&mut s, "environment", self.environment.is_empty());
        for d in &self.environment {
            let _ = writeln!(s, "  {:<24} A {:<16} B {}", d.name, show(&d.a), show(&d.b));
        }
        section(
            &mut s,
            "programs",
            self.programs.is_empty() && self.program_changes.is_empty(),
        );
        for d in &self.programs {
            let _ = writeln!(
                s,
                "  {} at iteration{} {}\n    A {}\n    B {}",
                d.stage,
                if d.iterations.len() == 1 { "" } else { "s" },
                iteration_runs(&d.iterations),
                show_prog(&d.a),
                show_prog(&d.b)
            );
        }
        for c in &self.program_changes {
            let _ = writeln!(
                s,
                "  {} changed at iteration {}: stage {}\n    from {}\n    to   {}",
                c.side,
                c.iteration,
                c.stage,
                show_prog(&c.from),
                show_prog(&c.to)
            );
        }
        section(&mut s, "stopping rules", self.stop.is_none());
        if let Some(d) = &self.stop {
            let _ = writeln!(s, "  A {}\n  B {}", d.a, d.b);
        }
        section(&mut s, "first-iteration inputs", self.inputs.is_empty());
        for d in &self.inputs {
            let _ = writeln!(
                s,
                "  {:<24} A {} B {}",
                format!("{}.{}", d.stage, d.role),
                d.a.as_deref().unwrap_or("(absent)"),
                d.b.as_deref().unwrap_or("(absent)")
            );
        }
        section(&mut s, "metrics", self.metrics.is_empty());
        for d in &self.metrics {
            let _ = writeln!(
                s,
                "  {:<24} first differ at iteration {}: A {} B {}",
                d.name,
                d.first_iteration,
                show_f(d.a),
                show_f(d.b)
            );
        }
        if !self.metrics_equal.is_empty() {
            let _ = writeln!(s, "  equal throughout: {}", self.metrics_equal.join(", "));
        }
        s
    }
}
