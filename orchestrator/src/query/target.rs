//! Resolving what a user points at (a file on disk, an artifact hash prefix, a metric or
//! an output of a point and iteration, a point by id or sweep values) to a recorded
//! artifact, metric or final value. Reads the store through [`crate::store::reads`] only.

use std::fs::File;
use std::io::Read;
use std::path::Path;

use anyhow::{bail, Context, Result};
use serde::Serialize;
use serde_json::Value;
use sqlx::SqlitePool;

use crate::store::reads::{artifacts, attempts, metrics, points};

/// Smallest accepted hash prefix, in hex digits.
pub const MIN_PREFIX: usize = 6;

/// A metric named by `POINT/ITERATION/stage.metric`.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct MetricTarget {
    /// Point id.
    pub point: String,
    /// Iteration.
    pub iteration: i64,
    /// `stage.metric`.
    pub name: String,
    /// Value recorded.
    pub value: f64,
    /// Error recorded.
    pub error: Option<f64>,
    /// Attempt that recorded it.
    pub attempt_id: i64,
}

/// A point's final value of a metric, `POINT/final/stage.metric`: the final-window average
/// (what `rondo status` and the equation of state report) or, without a window, the value of
/// the last good iteration.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct FinalTarget {
    /// Point id.
    pub point: String,
    /// `stage.metric`.
    pub name: String,
    /// The final value.
    pub value: f64,
    /// Its standard error, if known.
    pub error: Option<f64>,
    /// `window` (an average) or `last`.
    pub how: &'static str,
    /// Iterations it comes from.
    pub iterations: Vec<u32>,
    /// Attempts whose metrics it uses (the lineage starts at all of them).
    pub attempts: Vec<i64>,
}

/// What a user pointed at, resolved against the store.
#[derive(Debug, Clone, PartialEq, Serialize)]
#[serde(tag = "kind", rename_all = "kebab-case")]
pub enum Target {
    /// An artifact.
    Artifact {
        /// Its hash.
        hash: String,
    },
    /// A metric of one attempt.
    Metric(MetricTarget),
    /// A point's final value of a metric (several attempts when averaged).
    Final(FinalTarget),
}

/// BLAKE3 of a file, streamed, calling `progress(done, total)` as bytes are read.
pub fn hash_file_with_progress(path: &Path, progress: &mut dyn FnMut(u64, u64)) -> Result<String> {
    let mut f = File::open(path).with_context(|| format!("{}: cannot open", path.display()))?;
    let total = f.metadata().map(|m| m.len()).unwrap_or(0);
    let mut h = blake3::Hasher::new();
    let mut buf = vec![0u8; 1 << 20];
    let mut done = 0u64;
    loop {
        let n = f
            .read(&mut buf)
            .with_context(|| format!("{}: cannot read", path.display()))?;
        if n == 0 {
            break;
        }
        done += n as u64;
        h.update(&buf[..n]);
        progress(done, total);
    }
    Ok(h.finalize().to_hex().to_string())
}

fn is_hex(s: &str) -> bool {
    !s.is_empty() && s.bytes().all(|b| b.is_ascii_hexdigit())
}

/// Which iteration a metric reference names.
#[derive(Debug, Clone, Copy, PartialEq)]
enum Which {
    /// A number, or `None` for `last` (the last good iteration).
    Iteration(Option<i64>),
    /// `final`: the final value (window average or last good).
    Final,
}

/// Parse `POINT/ITERATION/stage.metric` (ITERATION a number, `last` or `final`).
fn parse_metric_ref(s: &str) -> Option<(String, Which, String)> {
    let mut it = s.splitn(3, '/');
    let point = it.next()?;
    let iter = it.next()?;
    let name = it.next()?;
    if point.is_empty() || !name.contains('.') || name.contains('/') {
        return None;
    }
    let which = match iter {
        "last" => Which::Iteration(None),
        "final" => Which::Final,
        n => Which::Iteration(Some(n.parse::<i64>().ok()?)),
    };
    Some((point.to_string(), which, name.to_string()))
}

/// Resolve a target to an artifact hash (see [`resolve`] for the accepted forms). A metric
/// resolves to its attempt's recorded `metrics` output.
pub async fn resolve_target(pool: &SqlitePool, ws: &Path, target: &str) -> Result<String> {
    match resolve(pool, ws, target, &mut |_, _| {}).await? {
        Target::Artifact { hash } => Ok(hash),
        Target::Metric(m) => {
            let hash = attempts::output(pool, m.attempt_id, "metrics").await?;
            hash.with_context(|| {
                format!(
                    "metric {target} was recorded by attempt {} without a metrics file; trace the metric itself",
                    m.attempt_id
                )
            })
        }
        Target::Final(f) => bail!(
            "{target} is computed from {} attempts' metrics, not one file; trace it \
             (`rondo trace {target}`) or name one iteration",
            f.attempts.len()
        ),
    }
}

/// Resolve what a user pointed at:
/// * an existing file (absolute, relative to the current directory, or else relative to the
///   workspace): hashed with BLAKE3 (`progress(bytes done, bytes total)`) and looked up among
///   the recorded artifacts;
/// * a hash prefix of at least [`MIN_PREFIX`] hex digits;
/// * `POINT/ITERATION/stage.metric`, e.g. `p003/4/update.energy` or `p003/last/update.energy`
///   (`last`: the last good iteration; `final`: the point's final value, the final-window
///   mean when the campaign has a window).
pub async fn resolve(
    pool: &SqlitePool,
    ws: &Path,
    target: &str,
    progress: &mut dyn FnMut(u64, u64),
) -> Result<Target> {
    let given = Path::new(target);
    let in_ws = ws.join(target);
    let path = if !given.is_file() && given.is_relative() && in_ws.is_file() {
        in_ws.as_path()
    } else {
        given
    };
    if path.is_file() {
        let hash = hash_file_with_progress(path, progress)?;
        if !artifacts::is_recorded(pool, &hash).await? {
            // A file inside a folder artifact: traced through the first folder that held
            // this content (its producer made it; later snapshots only carried it along).
            if let Some((folder, _)) = artifacts::first_folder_holding(pool, &hash).await? {
                return Ok(Target::Artifact { hash: folder });
            }
            bail!(
                "file {} was never produced or used by this campaign (BLAKE3 {}); \
                 check that it belongs to this workspace and was not edited",
                path.display(),
                hash
            );
        }
        return Ok(Target::Artifact { hash });
    }
    if path.is_dir() {
        return resolve_folder(pool, path).await;
    }
    if let Some((head, inner)) = split_member_ref(target) {
        return resolve_member(pool, head, inner).await;
    }
    if let Some((point, which, name)) = parse_metric_ref(target) {
        // A metric of that name first; else an output role of the stage.
        let (metric, iteration) = match which {
            Which::Iteration(i) => (
                resolve_metric(pool, &point, i, &name)
                    .await
                    .map(Target::Metric),
                i,
            ),
            Which::Final => (
                resolve_final(pool, &point, &name).await.map(Target::Final),
                None,
            ),
        };
        return match metric {
            Ok(t) => Ok(t),
            Err(e) => match resolve_output(pool, &point, iteration, &name).await? {
                Ok(hash) => Ok(Target::Artifact { hash }),
                Err(outputs) if outputs.is_empty() => Err(e),
                Err(outputs) => Err(anyhow::anyhow!(
                    "{e:#}; nor is `{name}` an output of that iteration (outputs: {})",
                    outputs.join(", ")
                )),
            },
        };
    }
    let t = target.to_ascii_lowercase();
    if is_hex(&t) {
        if t.len() < MIN_PREFIX {
            bail!("hash prefix `{target}` is too short: give at least {MIN_PREFIX} hex digits");
        }
        let rows = artifacts::with_prefix(pool, &t, 11).await?;
        return match rows.len() {
            0 => bail!("no artifact of this campaign has a hash starting with `{target}`"),
            1 => Ok(Target::Artifact {
                hash: rows[0].clone(),
            }),
            n => bail!(
                "hash prefix `{target}` is ambiguous: it matches {}{}; give more digits",
                rows.iter().take(10).cloned().collect::<Vec<_>>().join(", "),
                if n > 10 { " and more" } else { "" }
            ),
        };
    }
    if target.contains('/') && !path.exists() && target.split('/').count() != 3 {
        bail!("file {target} does not exist");
    }
    bail!(
        "cannot understand target `{target}`: give an existing file, an artifact hash \
         (at least {MIN_PREFIX} hex digits) or POINT/ITERATION/stage.metric (e.g. p001/3/update.energy)"
    )
}

/// `POINT/ITERATION/stage.role/relative/path` → (`POINT/ITERATION/stage.role`, the path).
fn split_member_ref(s: &str) -> Option<(&str, &str)> {
    let mut cut = s.match_indices('/').map(|(i, _)| i);
    let (_, second, third) = (cut.next()?, cut.next()?, cut.next()?);
    let (head, inner) = (&s[..third], &s[third + 1..]);
    (head[second + 1..].contains('.') && !inner.is_empty()).then_some((head, inner))
}

/// A folder on disk (a scratch or extracted folder): its manifest is computed without
/// storing anything and looked up among the recorded folder artifacts.
async fn resolve_folder(pool: &SqlitePool, dir: &Path) -> Result<Target> {
    let d = dir.to_path_buf();
    let hash = tokio::task::spawn_blocking(move || crate::artifacts::folder::folder_hash(&d))
        .await
        .context("internal: the folder hashing task panicked")?
        .map_err(|e| anyhow::anyhow!("{}: {e}", dir.display()))?;
    if !artifacts::is_recorded(pool, &hash).await? {
        bail!(
            "folder {} is no folder artifact of this campaign (manifest BLAKE3 {hash}); a \
             folder matches only when every file, name and mode is as recorded",
            dir.display()
        );
    }
    Ok(Target::Artifact { hash })
}

/// A file inside a folder output, `POINT/ITERATION/stage.role/relative/path`: traced
/// through its folder (the file's content is one of the folder's members).
async fn resolve_member(pool: &SqlitePool, head: &str, inner: &str) -> Result<Target> {
    let Some((point, which, name)) = parse_metric_ref(head) else {
        bail!("cannot understand `{head}`: give POINT/ITERATION/stage.role/relative/path");
    };
    let iteration = match which {
        Which::Iteration(i) => i,
        Which::Final => None,
    };
    let folder = match resolve_output(pool, &point, iteration, &name).await? {
        Ok(h) => h,
        Err(outputs) => bail!(
            "`{name}` is no output of {point} at that iteration (outputs: {})",
            list_short(&outputs)
        ),
    };
    if artifacts::folder_member(pool, &folder, inner)
        .await?
        .is_none()
    {
        let members = artifacts::folder_members(pool, &folder).await?;
        if members.is_empty() {
            bail!("`{head}` is a file, not a folder: trace it without `/{inner}`");
        }
        let paths: Vec<String> = members.into_iter().map(|m| m.0).collect();
        bail!(
            "the folder `{head}` has no file `{inner}` (files: {})",
            list_short(&paths)
        );
    }
    Ok(Target::Artifact { hash: folder })
}

fn list_short(items: &[String]) -> String {
    if items.len() <= 12 {
        items.join(", ")
    } else {
        format!(
            "{}, ..., {}",
            items[..6].join(", "),
            items[items.len() - 3..].join(", ")
        )
    }
}

/// The artifact of output `stage.role` of a point's succeeded attempt at an iteration (`None`:
/// the last good iteration, which is also what `final` names for an output), or the outputs
/// that iteration has (`stage.role`) when there is no such one.
async fn resolve_output(
    pool: &SqlitePool,
    point: &str,
    iteration: Option<i64>,
    name: &str,
) -> Result<std::result::Result<String, Vec<String>>> {
    let Ok(point) = resolve_point(pool, point).await else {
        return Ok(Err(Vec::new()));
    };
    let iteration = match iteration {
        Some(i) => Some(i),
        None => points::last_good_iteration(pool, &point).await?,
    };
    let Some(iteration) = iteration else {
        return Ok(Err(Vec::new()));
    };
    let mut names = Vec::new();
    for (stage, role, artifact) in attempts::succeeded_outputs_at(pool, &point, iteration).await? {
        let full = format!("{stage}.{role}");
        if full == name {
            return Ok(Ok(artifact));
        }
        if names.last() != Some(&full) {
            names.push(full);
        }
    }
    Ok(Err(names))
}

async fn resolve_final(pool: &SqlitePool, point: &str, name: &str) -> Result<FinalTarget> {
    let point = resolve_point(pool, point).await?;
    match super::analysis::final_value(pool, &point, name).await? {
        Some(v) => Ok(FinalTarget {
            point,
            name: name.to_string(),
            value: v.value,
            error: v.error,
            how: v.how,
            iterations: v.iterations,
            attempts: v.attempts,
        }),
        // No value: let the per-iteration lookup say what is recorded instead.
        None => resolve_metric(pool, &point, None, name)
            .await
            .and_then(|_| bail!("point {point} has no final value of `{name}` yet")),
    }
}

async fn resolve_metric(
    pool: &SqlitePool,
    point: &str,
    iteration: Option<i64>,
    name: &str,
) -> Result<MetricTarget> {
    let point = resolve_point(pool, point).await?;
    let iteration = match iteration {
        Some(i) => i,
        None => {
            let last = points::last_good_iteration(pool, &point).await?;
            last.with_context(|| format!("point {point} has no good iteration yet"))?
        }
    };
    let row = metrics::at_iteration(pool, &point, iteration, name).await?;
    let Some(row) = row else {
        let names = metrics::names_at(pool, &point, iteration).await?;
        if names.is_empty() {
            bail!("point {point} has no metrics recorded at iteration {iteration}");
        }
        bail!(
            "point {point} iteration {iteration} has no metric `{name}`; recorded: {}",
            names.join(", ")
        );
    };
    Ok(MetricTarget {
        point,
        iteration,
        name: name.to_string(),
        value: row.value,
        error: row.error,
        attempt_id: row.attempt,
    })
}

fn value_matches(v: &Value, want: &str) -> bool {
    match v {
        Value::Number(n) => match (n.as_f64(), want.parse::<f64>()) {
            (Some(a), Ok(b)) => a == b,
            _ => false,
        },
        Value::String(s) => s == want,
        Value::Bool(b) => want.parse::<bool>().ok() == Some(*b),
        _ => false,
    }
}

/// Resolve a point given as its id (`p003`) or by sweep values (`volume=27,temperature=600`).
pub async fn resolve_point(pool: &SqlitePool, spec: &str) -> Result<String> {
    let points = points::ids(pool).await?;
    if points.is_empty() {
        bail!("this workspace has no points recorded yet; run the campaign first");
    }
    if !spec.contains('=') {
        if points.iter().any(|p| p == spec) {
            return Ok(spec.to_string());
        }
        bail!(
            "unknown point `{spec}`; this campaign has {} points: {}",
            points.len(),
            list_short(&points)
        );
    }
    let mut wants = Vec::new();
    for part in spec.split(',') {
        let Some((k, v)) = part.split_once('=') else {
            bail!("point selector `{spec}`: `{part}` is not NAME=VALUE");
        };
        wants.push((k.trim().to_string(), v.trim().to_string()));
    }
    let mut hits = Vec::new();
    for (id, vj) in points::values(pool).await? {
        let values: Value = serde_json::from_str(&vj)
            .with_context(|| format!("point {id}: malformed values_json in the store"))?;
        if wants
            .iter()
            .all(|(k, v)| values.get(k).is_some_and(|x| value_matches(x, v)))
        {
            hits.push(id);
        }
    }
    match hits.len() {
        0 => bail!("no point has sweep values {spec}; see `rondo status` for the points"),
        1 => Ok(hits.remove(0)),
        _ => bail!(
            "point selector {spec} matches several points ({}); add the other sweep values",
            hits.join(", ")
        ),
    }
}
