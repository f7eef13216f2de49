//! The text view of a lineage (`rondo trace`): the target, the records that made it in
//! full, one line per upstream attempt (or every attempt in full), the start files. Pure
//! formatting of [`Lineage`]; reads nothing.

use std::fmt::Write as _;
use std::path::Path;

use super::analysis::EOS_ROLE;
use super::format::format_measurement;
use super::lineage::Lineage;
use super::records::AttemptRecord;

/// How `Lineage::render` shows a lineage.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct TextView {
    /// Every attempt in full (`--long`), instead of one line per upstream attempt.
    pub long: bool,
}

/// Campaign row of a workspace.
fn opt(s: &Option<String>) -> &str {
    s.as_deref().unwrap_or("-")
}

/// `BLAKE3 <hash>`, or `program hash unknown: <reason>` when the program could not be read
/// (recorded as a NULL hash and a reason; older stores wrote `unreadable: <reason>` for a
/// command stage's program).
fn program_hash_text(a: &AttemptRecord) -> String {
    match (&a.program.blake3, &a.program_unknown) {
        (Some(h), None) if h.is_empty() => "program hash unknown: not recorded".into(),
        (Some(h), _) => match h.strip_prefix("unreadable: ") {
            Some(why) => format!("program hash unknown: {why}"),
            None => format!("BLAKE3 {h}"),
        },
        (None, Some(why)) => format!("program hash unknown: {why}"),
        (None, None) => "program hash unknown: not recorded".into(),
    }
}

impl Lineage {
    /// Human-readable rendering of everything: every attempt in full (`rondo trace --long
    /// --depth all`).
    pub fn to_text(&self) -> String {
        self.render(&TextView { long: true })
    }

    /// Human-readable rendering: the target, then the records that produced it in full, then
    /// one line per upstream attempt (every attempt in full with `long`).
    pub fn render(&self, view: &TextView) -> String {
        let fmt = format_measurement;
        let mut s = String::new();
        let _ = writeln!(s, "target   {}", self.target);
        if let Some(r) = self.removed.iter().find(|r| r.hash == self.target) {
            let _ = writeln!(
                s,
                "content  removed by retention (policy {}, at {}); the records stay",
                r.policy, r.at
            );
        }
        let upstream = self
            .removed
            .iter()
            .filter(|r| r.hash != self.target)
            .count();
        if upstream > 0 {
            let _ = writeln!(
                s,
                "note     the content of {upstream} upstream artifact(s) was removed by retention"
            );
        }
        if let Some(m) = &self.metric {
            let _ = writeln!(
                s,
                "value    {} (attempt {})",
                fmt(m.value, m.error),
                m.attempt_id
            );
        }
        if let Some(f) = &self.final_value {
            let from = match (f.how, f.iterations.first(), f.iterations.last()) {
                ("window", Some(a), Some(b)) => {
                    format!("mean of the final window, iterations {a}-{b}")
                }
                (_, _, Some(b)) => format!("last good iteration {b}"),
                _ => "no iteration".to_string(),
            };
            let ids: Vec<String> = f.attempts.iter().map(|a| a.to_string()).collect();
            let _ = writeln!(
                s,
                "value    {} ({from}; attempts {})",
                fmt(f.value, f.error),
                ids.join(", ")
            );
        }
        let _ = writeln!(
            s,
            "campaign {} ({}, BLAKE3 {})",
            self.campaign.name, self.campaign.spec_path, self.campaign.spec_blake3
        );
        let shown = self.attempts.len();
        let omitted = self.omitted_attempts.unwrap_or(0);
        let _ = writeln!(
            s,
            "{} attempts upstream{}, nearest first{}",
            shown + omitted,
            if omitted > 0 {
                format!(" ({shown} shown: the target's iteration and those just before it)")
            } else {
                String::new()
            },
            if view.long {
                ":"
            } else {
                "; the records that made the target in full, the others one line each:"
            }
        );
        // The record shown in full in the compact view: the newest that made the target.
        let detailed: Option<(String, i64)> = if view.long {
            None
        } else {
            self.attempts
                .iter()
                .filter(|a| self.direct.contains(&(a.kind.clone(), a.id)))
                .max_by_key(|a| (a.iteration.unwrap_or(i64::MAX), a.id))
                .map(|a| (a.kind.clone(), a.id))
        };
        if let Some(key) = &detailed {
            if let Some(a) = self
                .attempts
                .iter()
                .find(|a| (a.kind.clone(), a.id) == *key)
            {
                let _ = writeln!(s);
                self.details(&mut s, a);
            }
            let _ = writeln!(s);
        }
        for a in &self.attempts {
            if view.long {
                let _ = writeln!(s);
                self.details(&mut s, a);
            } else if detailed.as_ref() != Some(&(a.kind.clone(), a.id)) {
                let _ = writeln!(s, "{}", one_line(a));
            }
        }
        if omitted > 0 {
            let _ = writeln!(
                s,
                "  ... and {omitted} attempts of earlier iterations (`--depth N` for N iterations, `--depth all` for every one)"
            );
        }
        if !self.sources.is_empty() {
            let _ = writeln!(s);
            let _ = writeln!(s, "start files:");
            for f in &self.sources {
                let _ = writeln!(s, "  {:<10} {}", f.name, f.hash);
            }
        }
        if !self.blends.is_empty() {
            let _ = writeln!(s);
            let _ = writeln!(s, "warm starts interpolated between converged points:");
            for b in &self.blends {
                let _ = writeln!(
                    s,
                    "  {} first {}.{} of {} = A + {}·(B − A) along {}\n    A {} ({} iteration {})\n    B {} ({} iteration {})",
                    b.artifact,
                    b.stage,
                    b.role,
                    b.point,
                    b.weight,
                    b.axis,
                    b.first.artifact,
                    b.first.point,
                    b.first.iteration,
                    b.second.artifact,
                    b.second.point,
                    b.second.iteration
                );
            }
        }
        s
    }

    /// Every recorded detail of one attempt or generation.
    fn details(&self, s: &mut String, a: &AttemptRecord) {
        let fmt = format_measurement;
        let _ = writeln!(s, "{}", heading(a));
        let _ = writeln!(s, "  argv      {}", a.argv.join(" "));
        let _ = writeln!(
            s,
            "  program   {} {}{}",
            opt(&a.program.path),
            program_hash_text(a),
            a.program
                .version
                .as_ref()
                .map(|v| format!(" version {}", v.trim()))
                .unwrap_or_default()
        );
        let _ = writeln!(s, "  ran       {}", where_it_ran(a));
        if let Some(h) = &a.handoff {
            let _ = writeln!(
                s,
                "  handoff   {} to resident process {} (started by attempt {} at {})",
                h.number, h.process_id, h.started_by, h.process_started_at
            );
        }
        let _ = writeln!(
            s,
            "  times     {} .. {} exit {}",
            opt(&a.started_at),
            opt(&a.ended_at),
            a.exit_status
                .map(|e| e.to_string())
                .unwrap_or_else(|| "-".into())
        );
        if let Some(seed) = &a.seed {
            let _ = writeln!(s, "  seed      {seed}");
        }
        if let Some(r) = &a.revision {
            let _ = writeln!(
                s,
                "  revision  {} of the campaign file (BLAKE3 {})",
                r.number,
                r.spec_blake3
                    .as_deref()
                    .map(|h| h.get(..12).unwrap_or(h))
                    .unwrap_or("unknown")
            );
        }
        let _ = writeln!(s, "  params    {}", a.parameters);
        if !a.environment.is_empty() {
            let env: Vec<String> = a
                .environment
                .iter()
                .map(|(k, v)| format!("{k}={v}"))
                .collect();
            let _ = writeln!(s, "  env       {}", env.join(" "));
        }
        for (r, h) in &a.inputs {
            let _ = writeln!(s, "  in  {r:<10} {h}");
        }
        // a report wrote many files: show the traced one(s) only
        let mut hidden = 0;
        for (r, h) in &a.outputs {
            if a.kind == "report" && *h != self.target {
                hidden += 1;
                continue;
            }
            let _ = writeln!(s, "  out {r:<10} {h}");
        }
        if hidden > 0 {
            let _ = writeln!(s, "  out        ... and {hidden} other report files");
        }
        for (n, m) in &a.metrics {
            let _ = writeln!(s, "  metric    {n} = {}", fmt(m.value, m.error));
        }
        if !a.sources.is_empty() {
            let _ = writeln!(s, "  read metrics of {} attempts", a.sources.len());
        }
    }
}

/// `[57] p003 iteration 4 stage update attempt 1 (succeeded)`, or `[report 3] ...`.
fn heading(a: &AttemptRecord) -> String {
    match (&a.point, a.iteration) {
        (Some(p), Some(i)) => format!(
            "[{}] {} iteration {} stage {} attempt {} ({})",
            a.id, p, i, a.stage, a.attempt, a.state
        ),
        _ => format!("[{}] ({})", generation(a), a.state),
    }
}

/// `report 3`, or `analysis 2 (equation of state)` for the generation of `eos.json`.
fn generation(a: &AttemptRecord) -> String {
    if a.executor == super::generations::CAMPAIGN_STAGE {
        format!("after-campaign stage {} (generation {})", a.stage, a.id)
    } else if a.outputs.contains_key(EOS_ROLE) {
        format!("analysis {} (equation of state)", a.id)
    } else {
        format!("report {}", a.id)
    }
}

/// One line of the compact view: who, what ran, where, how long.
fn one_line(a: &AttemptRecord) -> String {
    let who = match (&a.point, a.iteration) {
        (Some(p), Some(i)) => format!(
            "[{}] {p} iteration {i} {} #{} {}",
            a.id, a.stage, a.attempt, a.state
        ),
        _ => format!("[{}] {}", generation(a), a.state),
    };
    let program = a
        .program
        .path
        .as_deref()
        .map(|p| {
            Path::new(p)
                .file_name()
                .map(|n| n.to_string_lossy().into_owned())
                .unwrap_or_else(|| p.to_string())
        })
        .unwrap_or_else(|| "-".into());
    let hash = match program_hash_text(a).strip_prefix("BLAKE3 ") {
        Some(h) => format!("BLAKE3 {}", h.get(..12).unwrap_or(h)),
        None => "program hash unknown".into(),
    };
    let took = match (&a.started_at, &a.ended_at) {
        (Some(t0), Some(t1)) => match (
            chrono::DateTime::parse_from_rfc3339(t0),
            chrono::DateTime::parse_from_rfc3339(t1),
        ) {
            (Ok(t0), Ok(t1)) => format!(
                ", {:.1} s",
                (t1 - t0).num_milliseconds().max(0) as f64 / 1000.0
            ),
            _ => String::new(),
        },
        _ => String::new(),
    };
    format!("  {who} · {program} {hash} · {}{took}", process_label(a))
}

/// What ran it, labelled by what the id is: `local, pid 4242 on node1`, `Slurm job 4711 on
/// node07`, `batch job 12.server (PBS)`, `inside rondo on node1`.
fn process_label(a: &AttemptRecord) -> String {
    let on = a
        .host
        .as_deref()
        .map(|h| format!(" on {h}"))
        .unwrap_or_default();
    match (a.executor.as_str(), &a.job_id) {
        ("local", Some(id)) => format!("local, pid {id}{on}"),
        ("slurm", Some(id)) => format!("Slurm job {id}{on}"),
        ("pbs", Some(id)) => format!("batch job {id} (PBS){on}"),
        ("builtin", _) => format!("inside rondo{on}"),
        (super::generations::CAMPAIGN_STAGE, _) => format!("a child process of rondo{on}"),
        (kind, Some(id)) => format!("{kind}, batch job {id}{on}"),
        (kind, None) => format!("{kind}, not started{on}"),
    }
}

/// `local, pid 4242 on node1; scratch folder /…/p003.i0004.update.a1 was removed`.
fn where_it_ran(a: &AttemptRecord) -> String {
    let folder = if a.kind == "report" {
        "output folder"
    } else {
        "scratch folder"
    };
    let dir = match a.workdir.as_deref() {
        Some(w) if Path::new(w).is_dir() => format!("; {folder} {w}"),
        Some(w) => format!("; {folder} {w} was removed"),
        None => String::new(),
    };
    format!("{}{dir}", process_label(a))
}
