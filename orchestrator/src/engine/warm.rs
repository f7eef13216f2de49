//! Where a point added by a revision starts (`warm-start:`): the converged points of the
//! workspace along the named axes, equal to it on every other axis; the nearest one, and,
//! with `estimate: linear`, the two that enclose it along one axis, whose last good outputs
//! of each `previous:` source are blended into the point's first inputs.
//!
//! Owns the choice and the blended artifacts (written to the artifact store before the
//! revision's transaction, which records them); the blend itself is `builtins::blend`'s,
//! the records `store::revisions`'. Runs once, when the revision is recorded; a crash
//! before its transaction commits leaves only unreferenced content in the store.

use serde_json::Value;

use super::*;
use crate::spec::{WarmEstimate, WarmStart};
use crate::store::revisions::{StoredPoint, WarmBlend};

/// A converged point a warm start reads: its id and last good iteration.
#[derive(Debug, Clone, PartialEq)]
pub struct Neighbour {
    pub point: String,
    pub iteration: u32,
}

/// The start of one new point.
#[derive(Debug, Clone)]
pub struct WarmChoice {
    /// The nearest converged point and its distance (the sum over the axes).
    pub nearest: Neighbour,
    pub distance: f64,
    /// The blended inputs, when two converged points enclose the point.
    pub blends: Vec<WarmBlend>,
    /// Why inputs were not blended, if some were not (for the event).
    pub not_blended: Vec<String>,
}

/// Two converged points enclosing a new one along `axis`, at `t` of the way from `lo` to
/// `hi`.
#[derive(Debug, Clone, PartialEq)]
struct Enclosing {
    axis: String,
    lo: Neighbour,
    hi: Neighbour,
    t: f64,
}

/// What choosing needs besides the points: the workspace's records and store.
pub struct WarmContext<'a> {
    pub campaign: &'a Campaign,
    pub warm: &'a WarmStart,
    pub stored: &'a [StoredPoint],
    /// Points leaving the campaign with this revision (never a source).
    pub leaving: &'a [&'a str],
    pub artifacts: &'a ArtifactStore,
    pub scratch: &'a Path,
}

/// The start of the new point `p`, if any converged point qualifies.
pub async fn choose(
    cx: &WarmContext<'_>,
    reads: &store::Flushed<'_>,
    p: &PointSpec,
) -> Result<Option<WarmChoice>> {
    let Some((nearest, distance)) = nearest_converged(cx, p) else {
        return Ok(None);
    };
    let mut choice = WarmChoice {
        nearest,
        distance,
        blends: Vec::new(),
        not_blended: Vec::new(),
    };
    if cx.warm.estimate == WarmEstimate::Linear {
        if let Some(e) = enclosing(cx, p) {
            blend_inputs(cx, reads, p, &e, &mut choice).await?;
        }
    }
    Ok(Some(choice))
}

/// The sweep values of a stored point that may serve `p`: converged, staying, another
/// point, with a last good iteration.
fn candidates<'a>(
    cx: &'a WarmContext<'_>,
    p: &'a PointSpec,
) -> impl Iterator<Item = (&'a StoredPoint, u32, serde_json::Map<String, Value>)> + 'a {
    cx.stored.iter().filter_map(move |s| {
        let (PointState::Converged, Some(it), None) = (s.state, s.last_good, s.retired_in) else {
            return None;
        };
        if cx.leaving.contains(&s.id.as_str()) || s.id == p.id {
            return None;
        }
        match serde_json::from_str::<Value>(&s.values_json) {
            Ok(Value::Object(m)) => Some((s, it, m)),
            _ => None,
        }
    })
}

/// Whether `theirs` equals `mine` on every axis outside `free`.
fn same_elsewhere(
    mine: &serde_json::Map<String, Value>,
    theirs: &serde_json::Map<String, Value>,
    free: &[String],
) -> bool {
    mine.len() == theirs.len()
        && mine
            .iter()
            .filter(|(k, _)| !free.contains(k))
            .all(|(k, v)| theirs.get(k) == Some(v))
}

/// The converged point nearest to `p` along the axes (the sum of the distances along
/// each), among those equal to it on every other axis; ties go to the first in sweep order.
fn nearest_converged(cx: &WarmContext<'_>, p: &PointSpec) -> Option<(Neighbour, f64)> {
    let mine = object(p);
    let along = &cx.warm.along;
    let mut best: Option<(f64, i64, Neighbour)> = None;
    for (s, it, theirs) in candidates(cx, p) {
        if !same_elsewhere(&mine, &theirs, along) {
            continue;
        }
        let Some(d) = along
            .iter()
            .map(|axis| Some((number(&mine, axis)? - number(&theirs, axis)?).abs()))
            .sum::<Option<f64>>()
            .filter(|d| d.is_finite())
        else {
            continue;
        };
        if best
            .as_ref()
            .is_none_or(|(bd, bidx, _)| d < *bd || (d == *bd && s.idx < *bidx))
        {
            let n = Neighbour {
                point: s.id.clone(),
                iteration: it,
            };
            best = Some((d, s.idx, n));
        }
    }
    best.map(|(d, _, n)| (n, d))
}

/// The two converged points closest to `p` on either side along one of the axes (the
/// first axis, in the order named, that has both), equal to it on every other axis.
fn enclosing(cx: &WarmContext<'_>, p: &PointSpec) -> Option<Enclosing> {
    let mine = object(p);
    for axis in &cx.warm.along {
        let x = number(&mine, axis)?;
        let free = std::slice::from_ref(axis);
        // (value, sweep index, neighbour) of the closest below and above.
        let mut lo: Option<(f64, i64, Neighbour)> = None;
        let mut hi: Option<(f64, i64, Neighbour)> = None;
        for (s, it, theirs) in candidates(cx, p) {
            let Some(y) = number(&theirs, axis) else {
                continue;
            };
            if !same_elsewhere(&mine, &theirs, free) || !y.is_finite() || y == x {
                continue;
            }
            let n = Neighbour {
                point: s.id.clone(),
                iteration: it,
            };
            let side = if y < x { &mut lo } else { &mut hi };
            let closer = side.as_ref().is_none_or(|(v, idx, _)| {
                (y - x).abs() < (v - x).abs() || ((y - x).abs() == (v - x).abs() && s.idx < *idx)
            });
            if closer {
                *side = Some((y, s.idx, n));
            }
        }
        if let (Some((a, _, lo)), Some((b, _, hi))) = (lo, hi) {
            return Some(Enclosing {
                axis: axis.clone(),
                lo,
                hi,
                t: (x - a) / (b - a),
            });
        }
    }
    None
}

/// The distinct `previous:` sources of the cycle's inputs, in stage order.
fn previous_sources(campaign: &Campaign) -> Vec<(String, String)> {
    let mut out: Vec<(String, String)> = Vec::new();
    for st in campaign
        .stages
        .iter()
        .filter(|s| s.section == Section::Cycle)
    {
        for (_, src) in &st.inputs {
            if let Source::Previous { stage, role, .. } = src {
                let key = (stage.clone(), role.clone());
                if !out.contains(&key) {
                    out.push(key);
                }
            }
        }
    }
    out
}

/// Blend each `previous:` source's outputs of the two enclosing points into the store; a
/// source that cannot be blended (no output, a folder, a format rondo does not read as
/// numbers, two files that differ in kind) is left to the nearest point, with the reason.
async fn blend_inputs(
    cx: &WarmContext<'_>,
    reads: &store::Flushed<'_>,
    p: &PointSpec,
    e: &Enclosing,
    choice: &mut WarmChoice,
) -> Result<()> {
    std::fs::create_dir_all(cx.scratch)
        .with_context(|| format!("{}: cannot create the folder", cx.scratch.display()))?;
    for (stage, role) in previous_sources(cx.campaign) {
        let first = reads
            .output_artifact(&e.lo.point, e.lo.iteration, &stage, &role)
            .await?;
        let second = reads
            .output_artifact(&e.hi.point, e.hi.iteration, &stage, &role)
            .await?;
        let (Some(first), Some(second)) = (first, second) else {
            choice
                .not_blended
                .push(format!("{stage}.{role}: not an output of both points"));
            continue;
        };
        let name = reads.artifact_name(&first).await?;
        let datasets = datasets_of(cx.campaign, &stage, &role);
        let out = cx.scratch.join(format!(".warm-{}-{stage}-{role}", p.id));
        let (a, b) = (cx.artifacts.path_of(&first), cx.artifacts.path_of(&second));
        let made = if name.ends_with('/') {
            Err("a folder is not interpolated".to_string())
        } else {
            builtins::blend(&role, &a, &b, e.t, datasets.as_deref(), &out)
        };
        let stored = made.and_then(|()| {
            cx.artifacts
                .put_file(&out)
                .map_err(|err| format!("cannot store the blend: {err}"))
        });
        let _ = std::fs::remove_file(&out);
        match stored {
            Ok((artifact, size)) => choice.blends.push(WarmBlend {
                stage,
                role,
                artifact,
                size,
                name,
                axis: e.axis.clone(),
                first: (e.lo.point.clone(), e.lo.iteration, first),
                second: (e.hi.point.clone(), e.hi.iteration, second),
                weight: e.t,
            }),
            Err(why) => choice.not_blended.push(format!("{stage}.{role}: {why}")),
        }
    }
    Ok(())
}

/// The HDF5 datasets the built-in mix stage `stage` mixes for `role`, if it names any.
fn datasets_of(campaign: &Campaign, stage: &str, role: &str) -> Option<Vec<String>> {
    campaign
        .stages
        .iter()
        .find(|s| s.name == stage)
        .and_then(|s| match &s.kind {
            StageKind::Mix(m) => m.datasets.as_ref().and_then(|d| d.get(role).cloned()),
            _ => None,
        })
}

fn object(p: &PointSpec) -> serde_json::Map<String, Value> {
    match values_json(p) {
        Value::Object(m) => m,
        _ => serde_json::Map::new(),
    }
}

fn number(m: &serde_json::Map<String, Value>, axis: &str) -> Option<f64> {
    m.get(axis).and_then(Value::as_f64)
}

/// One line for the event log: where the point starts.
pub fn describe(choice: &WarmChoice, warm: &WarmStart) -> String {
    let n = &choice.nearest;
    let mut text = match choice.blends.first() {
        Some(b) => format!(
            "interpolated along {} between {} iteration {} and {} iteration {} (t = {}): {}",
            b.axis,
            b.first.0,
            b.first.1,
            b.second.0,
            b.second.1,
            b.weight,
            choice
                .blends
                .iter()
                .map(|b| format!("{}.{}", b.stage, b.role))
                .collect::<Vec<_>>()
                .join(", ")
        ),
        None => format!(
            "starts from {} iteration {} (distance {} along {})",
            n.point,
            n.iteration,
            choice.distance,
            warm.along.join(", ")
        ),
    };
    if !choice.not_blended.is_empty() {
        if choice.blends.is_empty() {
            text.push_str("; not interpolated:");
        } else {
            text.push_str(&format!(
                "; from the nearest, {} iteration {}:",
                n.point, n.iteration
            ));
        }
        for why in &choice.not_blended {
            text.push_str(&format!(" {why};"));
        }
    }
    text.trim_end_matches(';').to_string()
}
