//! Revisions of a campaign file: what an edited text changes against the recorded one, and
//! what that means for each point. A change is one of four kinds:
//!
//! - **sweep**: new sweep values make new points; removed ones retire their points (kept
//!   with their history, left out of analyses); a value that comes back brings its point back;
//! - **stopping**: `stop:` (rules, combination, cap, final window) applies to the points that
//!   have not stopped, and stopped points are judged again: a capped point below the new cap
//!   continues, a converged point whose rules no longer hold at its last good iteration
//!   continues from it (or is capped, at the cap);
//! - **physics**: anything that changes what a point computes (parameters, programs, start
//!   files, the cycle's stages, commands and inputs, defaults, seed, the campaign's name, the
//!   sweep's axes, schedules). A point's history must come from one physics, so these are
//!   refused unless accepted (`--accept-revision`), and then run only on points that have not
//!   started; a started point is retired and its sweep values run again as a new point;
//! - **other**: `about`, `analysis`, `hooks`, `budget`: recorded, changing no point.
//!
//! No SQL and no engine: the store's points and histories come in, the classification and
//! the revised list of points go out (`engine::workspace` records them).

use std::collections::{BTreeMap, HashMap};

use anyhow::{Context, Result};
use serde::Serialize;
use serde_json::Value;

use crate::engine::values_json;
use crate::spec::{Campaign, PointSpec};
use crate::stop::{self, Sample};
use crate::store::revisions::StoredPoint;
use crate::store::PointState;

/// Metric samples per good iteration of one point.
pub type History = BTreeMap<u32, BTreeMap<String, Sample>>;

/// Top-level keys whose changes change no point.
const OTHER_KEYS: [&str; 4] = ["about", "analysis", "hooks", "budget"];

/// What a stopped point becomes under the revised stopping rules.
#[derive(Debug, Clone, PartialEq, Eq, Serialize)]
pub struct Reopened {
    pub point: String,
    /// Its state before.
    pub was: String,
    /// Its last good iteration, where it continues from.
    pub iteration: u32,
    /// `running` (continues) or `capped` (its rules no longer hold, at the cap).
    #[serde(serialize_with = "state_text")]
    pub becomes: PointState,
    pub why: String,
}

/// A point state as its store text.
fn state_text<S: serde::Serializer>(s: &PointState, ser: S) -> Result<S::Ok, S::Error> {
    ser.serialize_str(s.as_str())
}

/// The classification of an edited campaign file against the recorded revision.
#[derive(Debug, Clone, Default, Serialize)]
pub struct Classification {
    /// The revision compared against (the latest recorded).
    pub from: i64,
    /// The number the edited text gets when accepted.
    pub number: i64,
    /// Changes of the physics (one readable line each).
    pub physics: Vec<String>,
    /// Changes of `stop:`.
    pub stopping: Vec<String>,
    /// Changes of `sweep:`.
    pub sweep: Vec<String>,
    /// Changes that change no point.
    pub other: Vec<String>,
    /// New points: (id, sweep values).
    pub added: Vec<(String, String)>,
    /// Retired points whose values are back: (id, sweep values).
    pub restored: Vec<(String, String)>,
    /// Points whose values left the sweep: (id, sweep values).
    pub retired: Vec<(String, String)>,
    /// Started points retired because accepted physics changes would mix into their
    /// history, and the new point that runs their values: (old id, new id, sweep values).
    pub rerun: Vec<(String, String, String)>,
    /// Stopped points judged again under the new stopping rules.
    pub reopened: Vec<Reopened>,
    /// Points whose final window starts again after their last good iteration (the rules
    /// changed while they ran): (id, first iteration that counts).
    pub window_from: Vec<(String, u32)>,
    /// Whether the rules (`when`, `combine`) changed, not only the cap or the window.
    pub rules_changed: bool,
    /// The revised campaign's points, with the store's ids.
    #[serde(skip)]
    pub points: Vec<PointSpec>,
}

impl Classification {
    /// Whether the text changed nothing (same text, or only formatting and comments).
    pub fn is_empty(&self) -> bool {
        self.physics.is_empty()
            && self.stopping.is_empty()
            && self.sweep.is_empty()
            && self.other.is_empty()
    }

    /// Whether it needs `--accept-revision`.
    pub fn needs_acceptance(&self) -> bool {
        !self.physics.is_empty()
    }

    /// The classification as text (what `rondo check` prints and a refusal shows).
    pub fn text(&self) -> String {
        let mut s = format!(
            "revision {} against revision {} of this workspace:\n",
            self.number, self.from
        );
        if self.is_empty() {
            s.push_str("  no change that matters (formatting or comments only)\n");
        }
        let section = |s: &mut String, title: &str, lines: &[String]| {
            if !lines.is_empty() {
                s.push_str(&format!("  {title}:\n"));
                for l in lines {
                    s.push_str(&format!("    {l}\n"));
                }
            }
        };
        section(
            &mut s,
            "physics (refused unless --accept-revision: it would mix two physics in one point's history)",
            &self.physics,
        );
        section(&mut s, "stopping rules", &self.stopping);
        section(&mut s, "sweep", &self.sweep);
        section(&mut s, "other (changes no point)", &self.other);
        let pts = |v: &[(String, String)]| {
            v.iter()
                .map(|(id, vals)| format!("{id} ({vals})"))
                .collect::<Vec<_>>()
        };
        section(&mut s, "new points", &pts(&self.added));
        section(&mut s, "points back in the sweep", &pts(&self.restored));
        section(
            &mut s,
            "points retired (kept with their history)",
            &pts(&self.retired),
        );
        let rerun: Vec<String> = self
            .rerun
            .iter()
            .map(|(old, new, vals)| {
                format!("{old} ({vals}) retired, its values run again as {new}")
            })
            .collect();
        section(&mut s, "started points under the new physics", &rerun);
        let reopened: Vec<String> = self
            .reopened
            .iter()
            .map(|r| {
                format!(
                    "{} ({} at iteration {}) → {}: {}",
                    r.point, r.was, r.iteration, r.becomes, r.why
                )
            })
            .collect();
        section(&mut s, "stopped points judged again", &reopened);
        let windows: Vec<String> = self
            .window_from
            .iter()
            .map(|(p, it)| format!("{p}: from iteration {it}"))
            .collect();
        section(&mut s, "final windows started again", &windows);
        s
    }
}

/// A point's sweep values in words: `volume=27.5 temperature=300`.
pub fn label(p: &PointSpec) -> String {
    p.values
        .iter()
        .map(|(k, v)| format!("{k}={v}"))
        .collect::<Vec<_>>()
        .join(" ")
}

/// Classify `new` against the recorded text `old` (revision `from`) and the store's points.
/// `histories` holds the good iterations of the stopped points (converged, capped) that
/// stay in the campaign; `accept` accepts physics changes.
pub fn classify(
    from: i64,
    old: &str,
    new: &Campaign,
    stored: &[StoredPoint],
    histories: &HashMap<String, History>,
    accept: bool,
) -> Result<Classification> {
    let old_v: Value = serde_saphyr::from_str(old)
        .context("the recorded campaign text does not parse (a damaged workspace?)")?;
    let new_v: Value = serde_saphyr::from_str(&new.text)
        .with_context(|| format!("{}: does not parse", new.file.display()))?;
    let mut c = Classification {
        from,
        number: from + 1,
        ..Default::default()
    };
    for key in keys(&old_v, &new_v) {
        let (a, b) = (old_v.get(&key), new_v.get(&key));
        if a == b {
            continue;
        }
        let mut lines = Vec::new();
        diff(&key, a, b, &mut lines);
        match key.as_str() {
            "stop" => {
                let rules = |v: Option<&Value>| {
                    v.map(|s| (s.get("when").cloned(), s.get("combine").cloned()))
                };
                c.rules_changed = rules(a) != rules(b);
                c.stopping = lines;
            }
            "sweep" => c.sweep = lines,
            k if OTHER_KEYS.contains(&k) => c.other.extend(lines),
            _ => c.physics.extend(lines),
        }
    }
    let old_axes = stored
        .first()
        .map(|p| axes(&p.values_json))
        .unwrap_or_default();
    let new_axes: Vec<String> = new
        .points
        .first()
        .map(|p| p.values.iter().map(|(k, _)| k.clone()).collect())
        .unwrap_or_default();
    let mut sorted = new_axes.clone();
    sorted.sort();
    if !stored.is_empty() && old_axes != sorted {
        c.physics.push(format!(
            "the sweep's axes: [{}] → [{}] (a point is named by its values on the same axes)",
            old_axes.join(", "),
            sorted.join(", ")
        ));
    }
    let physics = c.needs_acceptance();
    map_points(&mut c, new, stored, physics && accept);
    if !physics || accept {
        judge_stopped(&mut c, new, stored, histories);
    }
    Ok(c)
}

/// The top-level keys of both texts, the recorded text's order first.
fn keys(a: &Value, b: &Value) -> Vec<String> {
    let mut out: Vec<String> = Vec::new();
    for v in [a, b] {
        if let Value::Object(m) = v {
            for k in m.keys() {
                if !out.contains(k) {
                    out.push(k.clone());
                }
            }
        }
    }
    out
}

/// The sorted axis names of a point's `values_json`.
fn axes(values_json: &str) -> Vec<String> {
    match serde_json::from_str::<Value>(values_json) {
        Ok(Value::Object(m)) => m.keys().cloned().collect(),
        _ => Vec::new(),
    }
}

/// A value in one line.
fn short(v: &Value) -> String {
    let s = v.to_string();
    if s.chars().count() > 120 {
        format!("{}…", s.chars().take(119).collect::<String>())
    } else {
        s
    }
}

/// The differences between two values as lines `path: old → new`, `+ path: new`,
/// `- path: old`, descending into objects (and arrays of equal length).
fn diff(path: &str, a: Option<&Value>, b: Option<&Value>, out: &mut Vec<String>) {
    match (a, b) {
        (None, None) => {}
        (Some(a), None) => out.push(format!("- {path}: {}", short(a))),
        (None, Some(b)) => out.push(format!("+ {path}: {}", short(b))),
        (Some(a), Some(b)) if a == b => {}
        (Some(Value::Object(x)), Some(Value::Object(y))) => {
            for k in keys(&Value::Object(x.clone()), &Value::Object(y.clone())) {
                diff(&format!("{path}.{k}"), x.get(&k), y.get(&k), out);
            }
        }
        (Some(Value::Array(x)), Some(Value::Array(y))) if x.len() == y.len() => {
            for (i, (p, q)) in x.iter().zip(y).enumerate() {
                diff(&format!("{path}[{i}]"), Some(p), Some(q), out);
            }
        }
        (Some(a), Some(b)) => out.push(format!("{path}: {} → {}", short(a), short(b))),
    }
}

/// Give the revised campaign's points the store's ids: a point whose values are recorded
/// keeps its id (unless `rerun` retires it for accepted physics changes, if it started),
/// a retired one whose values are back rejoins, every other point is new; recorded points
/// left out of the sweep retire.
fn map_points(c: &mut Classification, new: &Campaign, stored: &[StoredPoint], rerun: bool) {
    let by_values: HashMap<&str, &StoredPoint> = stored
        .iter()
        .filter(|p| p.retired_why.as_deref() != Some("physics"))
        .map(|p| (p.values_json.as_str(), p))
        .collect();
    let mut next = stored.iter().map(|p| p.idx).max().unwrap_or(0) + 1;
    let width = stored.iter().map(|p| p.id.len() - 1).max().unwrap_or(3);
    let mut kept: Vec<&str> = Vec::new();
    for p in &new.points {
        let vj = values_json(p).to_string();
        let mut fresh = |c: &mut Classification| {
            let id = format!("p{next:0width$}");
            let spec = PointSpec {
                id: id.clone(),
                index: next as usize,
                values: p.values.clone(),
            };
            next += 1;
            c.points.push(spec);
            id
        };
        match by_values.get(vj.as_str()) {
            Some(s) if rerun && s.started => {
                kept.push(&s.id);
                let id = fresh(c);
                c.rerun.push((s.id.clone(), id, label(p)));
            }
            Some(s) => {
                kept.push(&s.id);
                if s.retired_in.is_some() {
                    c.restored.push((s.id.clone(), label(p)));
                }
                c.points.push(PointSpec {
                    id: s.id.clone(),
                    index: s.idx as usize,
                    values: p.values.clone(),
                });
            }
            None => {
                let id = fresh(c);
                c.added.push((id, label(p)));
            }
        }
    }
    let order: Vec<String> = new
        .points
        .first()
        .map(|p| p.values.iter().map(|(k, _)| k.clone()).collect())
        .unwrap_or_default();
    for s in stored {
        if s.retired_in.is_none() && !kept.contains(&s.id.as_str()) {
            c.retired
                .push((s.id.clone(), values_text(&s.values_json, &order)));
        }
    }
}

/// `values_json` in words, as [`label`] says it, its axes in `order` (the edited sweep's)
/// where they are there.
fn values_text(values_json: &str, order: &[String]) -> String {
    let Ok(Value::Object(m)) = serde_json::from_str::<Value>(values_json) else {
        return values_json.to_string();
    };
    let mut keys: Vec<&String> = m.keys().collect();
    keys.sort_by_key(|k| order.iter().position(|o| o == *k).unwrap_or(usize::MAX));
    keys.iter()
        .map(|k| format!("{k}={}", m[k.as_str()].to_string().trim_matches('"')))
        .collect::<Vec<_>>()
        .join(" ")
}

/// Judge the stopped points that stay again under the new `stop:`, and start the final
/// window again for the running ones when the rules changed.
fn judge_stopped(
    c: &mut Classification,
    new: &Campaign,
    stored: &[StoredPoint],
    histories: &HashMap<String, History>,
) {
    if c.stopping.is_empty() {
        return;
    }
    let stays: HashMap<&str, &StoredPoint> = stored.iter().map(|s| (s.id.as_str(), s)).collect();
    let cap = new.max_iterations;
    let ids: Vec<String> = c.points.iter().map(|p| p.id.clone()).collect();
    for id in ids {
        let Some(s) = stays.get(id.as_str()) else {
            continue;
        };
        let Some(n) = s.last_good else {
            continue;
        };
        let reopen = |becomes: PointState, why: String| Reopened {
            point: id.clone(),
            was: s.state.to_string(),
            iteration: n,
            becomes,
            why,
        };
        match s.state {
            PointState::Capped if n < cap => c.reopened.push(reopen(
                PointState::Running,
                format!("max-iterations rose to {cap}"),
            )),
            PointState::Converged if c.rules_changed => {
                let empty = History::new();
                let h = histories.get(&id).unwrap_or(&empty);
                let d = stop::decide(&new.rules, new.combine, cap, h);
                if d.rules_met {
                    continue;
                }
                let why = "its stopping rules no longer hold at its last good iteration";
                c.reopened.push(if n < cap {
                    reopen(PointState::Running, why.into())
                } else {
                    reopen(
                        PointState::Capped,
                        format!("{why}, at max-iterations ({cap})"),
                    )
                });
            }
            PointState::Planned | PointState::Running | PointState::Cancelled
                if c.rules_changed =>
            {
                c.window_from.push((id.clone(), n + 1));
            }
            _ => {}
        }
    }
    for r in &c.reopened {
        if r.becomes == PointState::Running {
            c.window_from.push((r.point.clone(), r.iteration + 1));
        }
    }
}
