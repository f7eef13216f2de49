//! Side-by-side comparison of two points (`rondo diff`), of one workspace or of two: sweep
//! values, parameters, environment, programs, stopping rules, first-iteration inputs, and where each
//! metric first diverges. Reads the store through [`crate::store::reads`] only.

use std::collections::{BTreeMap, BTreeSet};

use anyhow::{Context, Result};
use serde::Serialize;
use serde_json::Value;
use sqlx::SqlitePool;

use super::records::{opt_json, stop_section, ProgramRef};
use super::target::resolve_point;
use crate::store::reads::attempts::{self, Files};
use crate::store::reads::{metrics, points};
use crate::store::AttemptState;

/// Relative tolerance beyond which two metric values count as different.
pub const METRIC_RTOL: f64 = 1e-12;

/// One side of a point comparison.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct PointSide {
    /// Campaign name.
    pub campaign: String,
    /// BLAKE3 of its campaign file.
    pub spec_blake3: String,
    /// Point id.
    pub point: String,
    /// Sweep values.
    pub values: Value,
    /// Point state.
    pub state: String,
    /// The campaign file's revisions its succeeded attempts ran under.
    pub revisions: Vec<i64>,
}

/// A named value that differs (`None`: absent on that side).
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct ValueDiff {
    /// Name.
    pub name: String,
    /// Value in A.
    pub a: Option<Value>,
    /// Value in B.
    pub b: Option<Value>,
}

/// A stage whose succeeded attempts ran different programs in A and B at the same
/// iterations (compared by BLAKE3, or by path where a hash is missing).
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct ProgramDiff {
    /// Stage.
    pub stage: String,
    /// The iterations (both points have) at which A ran `a` and B ran `b`.
    pub iterations: Vec<i64>,
    /// A's program there.
    pub a: ProgramRef,
    /// B's program there.
    pub b: ProgramRef,
}

/// A program that changed between two iterations of one point (its iterations mix builds).
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct ProgramChange {
    /// `A` or `B`.
    pub side: String,
    /// Stage.
    pub stage: String,
    /// First iteration that ran `to`.
    pub iteration: i64,
    /// The program of the iterations before.
    pub from: ProgramRef,
    /// The program from `iteration` on.
    pub to: ProgramRef,
}

/// An input of the first iteration that differs.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct InputDiff {
    /// Stage.
    pub stage: String,
    /// Input role.
    pub role: String,
    /// Hash in A.
    pub a: Option<String>,
    /// Hash in B.
    pub b: Option<String>,
}

/// Where a metric's values first differ.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct MetricDivergence {
    /// `stage.metric`.
    pub name: String,
    /// First iteration where the values differ beyond [`METRIC_RTOL`] (or one is missing).
    pub first_iteration: i64,
    /// A's value there.
    pub a: Option<f64>,
    /// B's value there.
    pub b: Option<f64>,
}

/// Stop sections of both campaigns, when they differ.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct StopDiff {
    /// A's `stop:`.
    pub a: Value,
    /// B's `stop:`.
    pub b: Value,
}

/// Side-by-side comparison of two points.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct PointDiff {
    /// First point.
    pub a: PointSide,
    /// Second point.
    pub b: PointSide,
    /// Sweep values that differ.
    pub sweep_values: Vec<ValueDiff>,
    /// Resolved parameters (other than sweep values) that differ, as `stage.name`.
    pub parameters: Vec<ValueDiff>,
    /// Recorded environment variables that differ, as `stage.NAME`, from each stage's first
    /// succeeded attempt (attempts recorded without an environment compare as empty).
    pub environment: Vec<ValueDiff>,
    /// Stages whose programs differ, per run of iterations.
    pub programs: Vec<ProgramDiff>,
    /// Programs that changed within A or within B.
    pub program_changes: Vec<ProgramChange>,
    /// Stopping rules, when they differ.
    pub stop: Option<StopDiff>,
    /// Inputs of the first iteration that differ.
    pub inputs: Vec<InputDiff>,
    /// Metrics whose values differ somewhere, with the first such iteration.
    pub metrics: Vec<MetricDivergence>,
    /// Metrics equal at every iteration both points have.
    pub metrics_equal: Vec<String>,
}

struct PointData {
    side: PointSide,
    stop: Value,
    /// stage → first succeeded attempt's parameters.
    params: BTreeMap<String, Value>,
    /// stage → first succeeded attempt's recorded environment.
    env: BTreeMap<String, Value>,
    /// stage → iteration → program of the succeeded attempt.
    programs: BTreeMap<String, BTreeMap<i64, ProgramRef>>,
    first_inputs: BTreeMap<(String, String), String>,
    /// metric → iteration → value.
    metrics: BTreeMap<String, BTreeMap<i64, f64>>,
}

async fn load_point(pool: &SqlitePool, spec: &str) -> Result<PointData> {
    let point = resolve_point(pool, spec).await?;
    let c = crate::store::campaign_row(pool)
        .await?
        .context("this workspace has no campaign recorded")?;
    let (vj, state) = points::point(pool, &point).await?;
    let side = PointSide {
        campaign: c.name,
        spec_blake3: c.spec_blake3,
        values: serde_json::from_str(&vj)
            .with_context(|| format!("point {point}: malformed values_json"))?,
        state: state.to_string(),
        point: point.clone(),
        revisions: Vec::new(),
    };
    let mut d = PointData {
        side,
        stop: stop_section(&c.spec_text)?,
        params: BTreeMap::new(),
        env: BTreeMap::new(),
        programs: BTreeMap::new(),
        first_inputs: BTreeMap::new(),
        metrics: BTreeMap::new(),
    };
    let mut first_iter: BTreeMap<String, i64> = BTreeMap::new();
    for r in attempts::of_point(pool, &point).await? {
        if r.state != AttemptState::Succeeded {
            continue;
        }
        if !d.side.revisions.contains(&r.revision) {
            d.side.revisions.push(r.revision);
        }
        d.programs.entry(r.stage.clone()).or_default().insert(
            r.iteration,
            ProgramRef {
                path: r.program_path,
                blake3: r.program_blake3,
                version: r.program_version,
            },
        );
        if !d.params.contains_key(&r.stage) {
            d.params.insert(
                r.stage.clone(),
                opt_json(&r.parameters_json, "parameters_json", r.id)?,
            );
            let env = match &r.env_json {
                Some(e) => opt_json(e, "env_json", r.id)?,
                None => Value::Object(Default::default()),
            };
            d.env.insert(r.stage.clone(), env);
        }
        let fi = *first_iter.entry(r.stage.clone()).or_insert(r.iteration);
        if fi == r.iteration {
            for (role, artifact) in attempts::files(pool, r.id, Files::Inputs).await? {
                d.first_inputs.insert((r.stage.clone(), role), artifact);
            }
        }
    }
    for (it, name, v) in metrics::succeeded_of_point(pool, &point).await? {
        d.metrics.entry(name).or_default().insert(it, v);
    }
    Ok(d)
}

fn values_differ(a: f64, b: f64) -> bool {
    if a == b {
        return false;
    }
    if !a.is_finite() || !b.is_finite() {
        return true;
    }
    (a - b).abs() > METRIC_RTOL * a.abs().max(b.abs())
}

fn map_diff(
    prefix: &str,
    a: Option<&Value>,
    b: Option<&Value>,
    skip: &BTreeSet<String>,
    out: &mut Vec<ValueDiff>,
) {
    let empty = serde_json::Map::new();
    let ma = a.and_then(Value::as_object).unwrap_or(&empty);
    let mb = b.and_then(Value::as_object).unwrap_or(&empty);
    let keys: BTreeSet<&String> = ma.keys().chain(mb.keys()).collect();
    for k in keys {
        if skip.contains(k) {
            continue;
        }
        let (va, vb) = (ma.get(k), mb.get(k));
        if va != vb {
            out.push(ValueDiff {
                name: format!("{prefix}{k}"),
                a: va.cloned(),
                b: vb.cloned(),
            });
        }
    }
}

/// Compare point `point_a` of the workspace behind `pool_a` with `point_b` of `pool_b` (the
/// same pool for two points of one campaign). Points are ids (`p003`) or sweep-value
/// selectors (`volume=27,temperature=600`).
pub async fn diff(
    pool_a: &SqlitePool,
    point_a: &str,
    pool_b: &SqlitePool,
    point_b: &str,
) -> Result<PointDiff> {
    let a = load_point(pool_a, point_a)
        .await
        .with_context(|| format!("point A ({point_a})"))?;
    let b = load_point(pool_b, point_b)
        .await
        .with_context(|| format!("point B ({point_b})"))?;
    let mut sweep_values = Vec::new();
    map_diff(
        "",
        Some(&a.side.values),
        Some(&b.side.values),
        &BTreeSet::new(),
        &mut sweep_values,
    );
    let axes: BTreeSet<String> = a
        .side
        .values
        .as_object()
        .into_iter()
        .chain(b.side.values.as_object())
        .flat_map(|m| m.keys().cloned())
        .collect();
    let mut parameters = Vec::new();
    let stages: BTreeSet<&String> = a.params.keys().chain(b.params.keys()).collect();
    for s in &stages {
        map_diff(
            &format!("{s}."),
            a.params.get(*s),
            b.params.get(*s),
            &axes,
            &mut parameters,
        );
    }
    let mut environment = Vec::new();
    let env_stages: BTreeSet<&String> = a.env.keys().chain(b.env.keys()).collect();
    for s in &env_stages {
        map_diff(
            &format!("{s}."),
            a.env.get(*s),
            b.env.get(*s),
            &BTreeSet::new(),
            &mut environment,
        );
    }
    let (programs, program_changes) = program_diffs(&a.programs, &b.programs);
    let stop = (a.stop != b.stop).then(|| StopDiff {
        a: a.stop.clone(),
        b: b.stop.clone(),
    });
    let inputs = input_diffs(&a.first_inputs, &b.first_inputs);
    let (metrics, metrics_equal) = metric_divergences(&a.metrics, &b.metrics);
    Ok(PointDiff {
        a: a.side,
        b: b.side,
        sweep_values,
        parameters,
        environment,
        programs,
        program_changes,
        stop,
        inputs,
        metrics,
        metrics_equal,
    })
}

/// The first-iteration inputs that differ, by (stage, role).
fn input_diffs(
    a: &BTreeMap<(String, String), String>,
    b: &BTreeMap<(String, String), String>,
) -> Vec<InputDiff> {
    let mut inputs = Vec::new();
    let ikeys: BTreeSet<&(String, String)> = a.keys().chain(b.keys()).collect();
    for k in ikeys {
        let (ha, hb) = (a.get(k), b.get(k));
        if ha != hb {
            inputs.push(InputDiff {
                stage: k.0.clone(),
                role: k.1.clone(),
                a: ha.cloned(),
                b: hb.cloned(),
            });
        }
    }
    inputs
}

type MetricsByIteration = BTreeMap<String, BTreeMap<i64, f64>>;

/// Per metric: where its values first differ beyond [`METRIC_RTOL`], or that it is equal at
/// every iteration both points have.
fn metric_divergences(
    a: &MetricsByIteration,
    b: &MetricsByIteration,
) -> (Vec<MetricDivergence>, Vec<String>) {
    let mut metrics = Vec::new();
    let mut metrics_equal = Vec::new();
    let names: BTreeSet<&String> = a.keys().chain(b.keys()).collect();
    let empty = BTreeMap::new();
    for n in names {
        let sa = a.get(n).unwrap_or(&empty);
        let sb = b.get(n).unwrap_or(&empty);
        let last = sa
            .keys()
            .max()
            .copied()
            .unwrap_or(0)
            .min(sb.keys().max().copied().unwrap_or(0));
        let its: BTreeSet<i64> = sa.keys().chain(sb.keys()).copied().collect();
        let mut found = None;
        for it in its {
            let (va, vb) = (sa.get(&it).copied(), sb.get(&it).copied());
            let differ = match (va, vb) {
                (Some(x), Some(y)) => values_differ(x, y),
                // one point stopped earlier: that is not a divergence of values
                _ => it <= last,
            };
            if differ {
                found = Some(MetricDivergence {
                    name: n.clone(),
                    first_iteration: it,
                    a: va,
                    b: vb,
                });
                break;
            }
        }
        match found {
            Some(m) => metrics.push(m),
            None => metrics_equal.push(n.clone()),
        }
    }
    (metrics, metrics_equal)
}

/// Whether two recorded programs are the same build: by BLAKE3 where both have one, else
/// by path.
fn same_program(x: &ProgramRef, y: &ProgramRef) -> bool {
    match (x.blake3.as_deref(), y.blake3.as_deref()) {
        (Some(a), Some(b)) if !a.is_empty() && !b.is_empty() => a == b,
        _ => x.path == y.path && x.blake3 == y.blake3,
    }
}

type ProgramsByIteration = BTreeMap<String, BTreeMap<i64, ProgramRef>>;

/// Per stage and iteration: where A's and B's programs differ (consecutive iterations with
/// the same pair of programs grouped), and where a program changed within one point.
fn program_diffs(
    a: &ProgramsByIteration,
    b: &ProgramsByIteration,
) -> (Vec<ProgramDiff>, Vec<ProgramChange>) {
    let mut diffs: Vec<ProgramDiff> = Vec::new();
    let empty = BTreeMap::new();
    let stages: BTreeSet<&String> = a.keys().chain(b.keys()).collect();
    for s in &stages {
        let pa = a.get(*s).unwrap_or(&empty);
        let pb = b.get(*s).unwrap_or(&empty);
        for (it, x) in pa {
            let Some(y) = pb.get(it) else { continue };
            if same_program(x, y) {
                continue;
            }
            match diffs.last_mut() {
                Some(d) if d.stage == **s && same_program(&d.a, x) && same_program(&d.b, y) => {
                    d.iterations.push(*it)
                }
                _ => diffs.push(ProgramDiff {
                    stage: (*s).clone(),
                    iterations: vec![*it],
                    a: x.clone(),
                    b: y.clone(),
                }),
            }
        }
    }
    let mut changes = Vec::new();
    for (side, progs) in [("A", a), ("B", b)] {
        for (s, by_it) in progs {
            let mut prev: Option<&ProgramRef> = None;
            for (it, p) in by_it {
                if let Some(q) = prev.filter(|q| !same_program(q, p)) {
                    changes.push(ProgramChange {
                        side: side.into(),
                        stage: s.clone(),
                        iteration: *it,
                        from: q.clone(),
                        to: p.clone(),
                    });
                }
                prev = Some(p);
            }
        }
    }
    (diffs, changes)
}
