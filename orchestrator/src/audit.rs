//! Audit of a workspace: resolving what a user points at (a file on disk, an artifact hash
//! prefix, or a metric of a point and iteration) to a recorded artifact, walking its upstream
//! lineage through the recorded attempts, and comparing two points side by side.
//!
//! The store is only read here; the single exception is the report's own provenance, which
//! [`crate::report`] records and [`lineage`] follows.

use std::collections::{BTreeMap, BTreeSet, HashSet, VecDeque};
use std::fmt::Write as _;
use std::fs::File;
use std::io::Read;
use std::path::Path;

use anyhow::{bail, Context, Result};
use serde::Serialize;
use serde_json::Value;
use sqlx::{Row, SqlitePool};

use crate::store::{AttemptState, IterationState, PointState};

/// Smallest accepted hash prefix, in hex digits.
pub const MIN_PREFIX: usize = 6;

/// Relative tolerance beyond which two metric values count as different.
pub const METRIC_RTOL: f64 = 1e-12;

/// The campaign a record belongs to.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct CampaignRef {
    /// Campaign name.
    pub name: String,
    /// Campaign file as given at the first run.
    pub spec_path: String,
    /// BLAKE3 of the exact campaign file text.
    pub spec_blake3: String,
}

/// A program as recorded for an attempt.
#[derive(Debug, Clone, PartialEq, Eq, PartialOrd, Ord, Serialize)]
pub struct ProgramRef {
    /// Path that was run.
    pub path: Option<String>,
    /// BLAKE3 of the program file.
    pub blake3: Option<String>,
    /// Output of its version flag, if declared.
    pub version: Option<String>,
}

/// One metric value.
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct MetricValue {
    /// The value.
    pub value: f64,
    /// Standard error, for noisy estimates.
    pub error: Option<f64>,
}

/// One attempt (or report generation) in a lineage.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct AttemptRecord {
    /// `attempt` for a stage attempt, `report` for a report generation.
    pub kind: String,
    /// Attempt id (RONDO_ATTEMPT_ID) or report id.
    pub id: i64,
    /// Point id; `None` for a report.
    pub point: Option<String>,
    /// Iteration (1-based); `None` for a report.
    pub iteration: Option<i64>,
    /// Stage name (`report` for a report).
    pub stage: String,
    /// Attempt number for this point/iteration/stage.
    pub attempt: i64,
    /// State (`succeeded`, ...).
    pub state: String,
    /// Rendered argument list.
    pub argv: Vec<String>,
    /// Scratch directory.
    pub workdir: Option<String>,
    /// `local`, `slurm`, `pbs`, `builtin`.
    pub executor: String,
    /// Process group id or batch job id.
    pub job_id: Option<String>,
    /// Host it ran on.
    pub host: Option<String>,
    /// Start (RFC 3339 UTC).
    pub started_at: Option<String>,
    /// End (RFC 3339 UTC).
    pub ended_at: Option<String>,
    /// Exit status.
    pub exit_status: Option<i64>,
    /// Failure kind, for failed attempts.
    pub failure_kind: Option<String>,
    /// Program run.
    pub program: ProgramRef,
    /// Why the program's hash is unknown (`program.blake3` is then null): the program file
    /// could not be read when the record was made.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub program_unknown: Option<String>,
    /// Resolved parameters.
    pub parameters: Value,
    /// `{{seed}}` value, if used.
    pub seed: Option<String>,
    /// rondo version that ran it.
    pub rondo_version: String,
    /// Input role → artifact hash.
    pub inputs: BTreeMap<String, String>,
    /// Output role → artifact hash.
    pub outputs: BTreeMap<String, String>,
    /// Metrics recorded, `stage.metric` → value.
    pub metrics: BTreeMap<String, MetricValue>,
    /// For a report: the attempts whose metrics it read.
    #[serde(skip_serializing_if = "Vec::is_empty")]
    pub sources: Vec<i64>,
}

/// A campaign start file reached by a lineage.
#[derive(Debug, Clone, PartialEq, Eq, PartialOrd, Ord, Serialize)]
pub struct StartFile {
    /// Key of `start:`.
    pub name: String,
    /// Artifact hash.
    pub hash: String,
}

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

/// The upstream lineage of a target.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct Lineage {
    /// Artifact hash; for a metric target, the `POINT/ITERATION/stage.metric` reference.
    pub target: String,
    /// The metric, when the target is one.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub metric: Option<MetricTarget>,
    /// The final value, when the target is `POINT/final/stage.metric`.
    #[serde(rename = "final", skip_serializing_if = "Option::is_none")]
    pub final_value: Option<FinalTarget>,
    /// Campaign of the workspace.
    pub campaign: CampaignRef,
    /// Attempts, nearest first (breadth-first, each once).
    pub attempts: Vec<AttemptRecord>,
    /// Campaign start files reached.
    pub sources: Vec<StartFile>,
    /// Attempts left out by a depth limit ([`Lineage::limit`]); only then present.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub omitted_attempts: Option<usize>,
    /// The records that produced the target itself, as (kind, id): the attempt of a metric,
    /// the attempts of a final value, the producers of an artifact (attempts, or report and
    /// analysis generations).
    #[serde(skip)]
    pub direct: Vec<(String, i64)>,
    /// Attempts the depth limit counts iterations back from: the direct attempts, and for a
    /// generation the attempts whose metrics it read.
    #[serde(skip)]
    pub anchors: Vec<i64>,
}

/// How far `rondo trace` looks upstream, in iterations.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Depth {
    /// The target's own iteration and N − 1 before it, per point.
    Iterations(u32),
    /// Everything upstream.
    All,
}

impl std::str::FromStr for Depth {
    type Err = String;
    fn from_str(s: &str) -> std::result::Result<Depth, String> {
        if s == "all" {
            return Ok(Depth::All);
        }
        match s.parse::<u32>() {
            Ok(n) if n >= 1 => Ok(Depth::Iterations(n)),
            _ => Err(format!(
                "`{s}` is not a depth: give a number of iterations (1 or more) or `all`"
            )),
        }
    }
}

/// The default depth of the text view: the target's iteration and the one before.
pub const DEFAULT_DEPTH: Depth = Depth::Iterations(2);

/// How `Lineage::render` shows a lineage.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct TextView {
    /// Every attempt in full (`--long`), instead of one line per upstream attempt.
    pub long: bool,
}

/// Campaign row of a workspace.
pub async fn campaign(pool: &SqlitePool) -> Result<CampaignRef> {
    let row = sqlx::query("SELECT name, spec_path, spec_blake3 FROM campaign WHERE id = 1")
        .fetch_optional(pool)
        .await
        .context("cannot read the campaign record")?;
    let Some(row) = row else {
        bail!("this workspace has no campaign recorded yet; run `rondo run CAMPAIGN.yaml` first");
    };
    Ok(CampaignRef {
        name: row.try_get("name")?,
        spec_path: row.try_get("spec_path")?,
        spec_blake3: row.try_get("spec_blake3")?,
    })
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
            let hash: Option<String> = sqlx::query_scalar(
                "SELECT artifact FROM attempt_outputs WHERE attempt_id = ? AND role = 'metrics'",
            )
            .bind(m.attempt_id)
            .fetch_optional(pool)
            .await?;
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
        let known: Option<String> = sqlx::query_scalar("SELECT hash FROM artifacts WHERE hash = ?")
            .bind(&hash)
            .fetch_optional(pool)
            .await?;
        if known.is_none() {
            bail!(
                "file {} was never produced or used by this campaign (BLAKE3 {}); \
                 check that it belongs to this workspace and was not edited",
                path.display(),
                hash
            );
        }
        return Ok(Target::Artifact { hash });
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
        let rows: Vec<String> = sqlx::query_scalar(
            "SELECT hash FROM artifacts WHERE hash LIKE ? || '%' ORDER BY hash LIMIT 11",
        )
        .bind(&t)
        .fetch_all(pool)
        .await?;
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

async fn known_points(pool: &SqlitePool) -> Result<Vec<String>> {
    Ok(sqlx::query_scalar("SELECT id FROM points ORDER BY idx")
        .fetch_all(pool)
        .await?)
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
        None => {
            sqlx::query_scalar(
                "SELECT MAX(iteration) FROM iterations WHERE point = ? AND state = ?",
            )
            .bind(&point)
            .bind(IterationState::Good)
            .fetch_one(pool)
            .await?
        }
    };
    let Some(iteration) = iteration else {
        return Ok(Err(Vec::new()));
    };
    let rows = sqlx::query(
        "SELECT a.stage, o.role, o.artifact FROM attempt_outputs o JOIN attempts a ON a.id = o.attempt_id
         WHERE a.point = ? AND a.iteration = ? AND a.state = ? ORDER BY a.stage, o.role, a.id DESC",
    )
    .bind(&point)
    .bind(iteration)
    .bind(AttemptState::Succeeded)
    .fetch_all(pool)
    .await?;
    let mut names = Vec::new();
    for r in rows {
        let full = format!(
            "{}.{}",
            r.try_get::<String, _>(0)?,
            r.try_get::<String, _>(1)?
        );
        if full == name {
            return Ok(Ok(r.try_get(2)?));
        }
        if names.last() != Some(&full) {
            names.push(full);
        }
    }
    Ok(Err(names))
}

async fn resolve_final(pool: &SqlitePool, point: &str, name: &str) -> Result<FinalTarget> {
    let point = resolve_point(pool, point).await?;
    match crate::analysis::final_value(pool, &point, name).await? {
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
            let last: Option<i64> = sqlx::query_scalar(
                "SELECT MAX(iteration) FROM iterations WHERE point = ? AND state = ?",
            )
            .bind(&point)
            .bind(IterationState::Good)
            .fetch_one(pool)
            .await?;
            last.with_context(|| format!("point {point} has no good iteration yet"))?
        }
    };
    let row = sqlx::query(
        "SELECT m.value, m.error, a.id FROM metrics m JOIN attempts a ON a.id = m.attempt_id
         WHERE a.point = ? AND a.iteration = ? AND m.name = ? AND a.state = ?
         ORDER BY a.id DESC LIMIT 1",
    )
    .bind(&point)
    .bind(iteration)
    .bind(name)
    .bind(AttemptState::Succeeded)
    .fetch_optional(pool)
    .await?;
    let Some(row) = row else {
        let names: Vec<String> = sqlx::query_scalar(
            "SELECT DISTINCT m.name FROM metrics m JOIN attempts a ON a.id = m.attempt_id
             WHERE a.point = ? AND a.iteration = ? ORDER BY m.name",
        )
        .bind(&point)
        .bind(iteration)
        .fetch_all(pool)
        .await?;
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
        value: row.try_get(0)?,
        error: row.try_get(1)?,
        attempt_id: row.try_get(2)?,
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
    let points = known_points(pool).await?;
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
    let rows = sqlx::query("SELECT id, values_json FROM points ORDER BY idx")
        .fetch_all(pool)
        .await?;
    let mut hits = Vec::new();
    for r in rows {
        let id: String = r.try_get(0)?;
        let vj: String = r.try_get(1)?;
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

fn opt_json<T: serde::de::DeserializeOwned>(s: &str, what: &str, id: i64) -> Result<T> {
    serde_json::from_str(s).with_context(|| format!("attempt {id}: malformed {what} in the store"))
}

/// Load one attempt with its inputs, outputs and metrics.
pub async fn load_attempt(pool: &SqlitePool, id: i64) -> Result<AttemptRecord> {
    // Every column: `program_unknown` is absent from stores made before migration 4.
    let r = sqlx::query("SELECT * FROM attempts WHERE id = ?")
        .bind(id)
        .fetch_optional(pool)
        .await?
        .with_context(|| format!("attempt {id} is not recorded"))?;
    let argv_json: String = r.try_get("argv_json")?;
    let params_json: String = r.try_get("parameters_json")?;
    let mut rec = AttemptRecord {
        kind: "attempt".into(),
        id,
        point: Some(r.try_get("point")?),
        iteration: Some(r.try_get("iteration")?),
        stage: r.try_get("stage")?,
        attempt: r.try_get("attempt")?,
        state: r.try_get::<AttemptState, _>("state")?.to_string(),
        argv: opt_json(&argv_json, "argv_json", id)?,
        workdir: Some(r.try_get("workdir")?),
        executor: r.try_get("executor")?,
        job_id: r.try_get("handle_id")?,
        host: r.try_get("host")?,
        started_at: r.try_get("started_at")?,
        ended_at: r.try_get("ended_at")?,
        exit_status: r.try_get("exit_status")?,
        failure_kind: r.try_get("failure_kind")?,
        program: ProgramRef {
            path: r.try_get("program_path")?,
            blake3: r.try_get("program_blake3")?,
            version: r.try_get("program_version")?,
        },
        program_unknown: r.try_get("program_unknown").ok().flatten(),
        parameters: opt_json(&params_json, "parameters_json", id)?,
        seed: r.try_get("seed")?,
        rondo_version: r.try_get("rondo_version")?,
        inputs: BTreeMap::new(),
        outputs: BTreeMap::new(),
        metrics: BTreeMap::new(),
        sources: Vec::new(),
    };
    for (table, map) in [
        ("attempt_inputs", &mut rec.inputs),
        ("attempt_outputs", &mut rec.outputs),
    ] {
        let rows = sqlx::query(&format!(
            "SELECT role, artifact FROM {table} WHERE attempt_id = ? ORDER BY role"
        ))
        .bind(id)
        .fetch_all(pool)
        .await?;
        for row in rows {
            map.insert(row.try_get(0)?, row.try_get(1)?);
        }
    }
    let rows =
        sqlx::query("SELECT name, value, error FROM metrics WHERE attempt_id = ? ORDER BY name")
            .bind(id)
            .fetch_all(pool)
            .await?;
    for row in rows {
        rec.metrics.insert(
            row.try_get(0)?,
            MetricValue {
                value: row.try_get(1)?,
                error: row.try_get(2)?,
            },
        );
    }
    Ok(rec)
}

/// Attempts that produced `hash`, preferring succeeded ones and those of `point`.
async fn producers(pool: &SqlitePool, hash: &str, point: Option<&str>) -> Result<Vec<i64>> {
    let rows = sqlx::query(
        "SELECT a.id, a.point, a.state FROM attempt_outputs o JOIN attempts a ON a.id = o.attempt_id
         WHERE o.artifact = ? ORDER BY a.id",
    )
    .bind(hash)
    .fetch_all(pool)
    .await?;
    let mut all: Vec<(i64, String, AttemptState)> = Vec::new();
    for r in rows {
        all.push((r.try_get(0)?, r.try_get(1)?, r.try_get(2)?));
    }
    if all.iter().any(|a| a.2 == AttemptState::Succeeded) {
        all.retain(|a| a.2 == AttemptState::Succeeded);
    }
    if let Some(p) = point {
        if all.iter().any(|a| a.1 == p) {
            all.retain(|a| a.1 == p);
        }
    }
    Ok(all.into_iter().map(|a| a.0).collect())
}

async fn start_file_names(pool: &SqlitePool, hash: &str) -> Result<Vec<String>> {
    Ok(
        sqlx::query_scalar("SELECT name FROM start_files WHERE artifact = ? ORDER BY name")
            .bind(hash)
            .fetch_all(pool)
            .await?,
    )
}

/// Lineage of an artifact (see [`lineage_of`]).
pub async fn lineage(pool: &SqlitePool, hash: &str) -> Result<Lineage> {
    lineage_of(
        pool,
        &Target::Artifact {
            hash: hash.to_string(),
        },
    )
    .await
}

/// Upstream lineage of a target: the attempts (or report generation) that produced it, the
/// attempts that produced their inputs, and so on, breadth-first, each attempt once, nearest
/// first; inputs that are campaign start files end the walk and are listed as sources.
pub async fn lineage_of(pool: &SqlitePool, target: &Target) -> Result<Lineage> {
    let campaign = campaign(pool).await?;
    let mut queue: VecDeque<i64> = VecDeque::new();
    let mut attempts = Vec::new();
    let mut sources = BTreeSet::new();
    let mut direct: Vec<(String, i64)> = Vec::new();
    let mut anchors: Vec<i64> = Vec::new();
    let (target_str, metric, final_value) = match target {
        Target::Artifact { hash } => {
            let known: Option<String> =
                sqlx::query_scalar("SELECT hash FROM artifacts WHERE hash = ?")
                    .bind(hash)
                    .fetch_optional(pool)
                    .await?;
            if known.is_none() {
                bail!("artifact {hash} is not recorded in this workspace");
            }
            let producing = producers(pool, hash, None).await?;
            queue.extend(producing.iter().copied());
            direct.extend(producing.iter().map(|id| ("attempt".to_string(), *id)));
            anchors.extend(producing.iter().copied());
            if producing.is_empty() {
                for rep in crate::report::producing_reports(pool, hash).await? {
                    queue.extend(rep.sources.iter().copied());
                    anchors.extend(rep.sources.iter().copied());
                    direct.push((rep.kind.clone(), rep.id));
                    attempts.push(rep);
                }
            }
            for name in start_file_names(pool, hash).await? {
                sources.insert(StartFile {
                    name,
                    hash: hash.clone(),
                });
            }
            if queue.is_empty() && attempts.is_empty() && sources.is_empty() {
                bail!(
                    "artifact {hash} is recorded but no attempt produced it and it is not a start file; \
                     the store may have been edited by hand"
                );
            }
            (hash.clone(), None, None)
        }
        Target::Metric(m) => {
            queue.push_back(m.attempt_id);
            direct.push(("attempt".into(), m.attempt_id));
            anchors.push(m.attempt_id);
            (
                format!("{}/{}/{}", m.point, m.iteration, m.name),
                Some(m.clone()),
                None,
            )
        }
        Target::Final(f) => {
            queue.extend(f.attempts.iter().copied());
            direct.extend(f.attempts.iter().map(|id| ("attempt".to_string(), *id)));
            anchors.extend(f.attempts.iter().copied());
            (
                format!("{}/final/{}", f.point, f.name),
                None,
                Some(f.clone()),
            )
        }
    };
    let mut seen: HashSet<i64> = HashSet::new();
    while let Some(id) = queue.pop_front() {
        if !seen.insert(id) {
            continue;
        }
        let rec = load_attempt(pool, id).await?;
        for hash in rec.inputs.values() {
            let names = start_file_names(pool, hash).await?;
            let prods = producers(pool, hash, rec.point.as_deref()).await?;
            for name in names {
                sources.insert(StartFile {
                    name,
                    hash: hash.clone(),
                });
            }
            for p in prods {
                if !seen.contains(&p) {
                    queue.push_back(p);
                }
            }
        }
        attempts.push(rec);
    }
    Ok(Lineage {
        target: target_str,
        metric,
        final_value,
        campaign,
        attempts,
        sources: sources.into_iter().collect(),
        omitted_attempts: None,
        direct,
        anchors,
    })
}

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
    /// Keep the attempts within `depth` iterations of the target, per point: an attempt
    /// stays when it produced the target, or when its iteration is at most `N − 1` below the
    /// lowest iteration of that point's anchors (the attempts behind the target; for a point
    /// with none, its highest iteration in the lineage). Generations (reports, analyses)
    /// always stay. The number left out is kept in `omitted_attempts`.
    pub fn limit(&mut self, depth: Depth) {
        let Depth::Iterations(n) = depth else { return };
        let mut reference: BTreeMap<String, i64> = BTreeMap::new();
        for a in &self.attempts {
            if let (Some(p), Some(i)) = (&a.point, a.iteration) {
                if self.anchors.contains(&a.id) && a.kind == "attempt" {
                    let r = reference.entry(p.clone()).or_insert(i);
                    *r = (*r).min(i);
                }
            }
        }
        let mut highest: BTreeMap<String, i64> = BTreeMap::new();
        for a in &self.attempts {
            if let (Some(p), Some(i)) = (&a.point, a.iteration) {
                if !reference.contains_key(p) {
                    let h = highest.entry(p.clone()).or_insert(i);
                    *h = (*h).max(i);
                }
            }
        }
        reference.extend(highest);
        let before = self.attempts.len();
        let direct = self.direct.clone();
        self.attempts.retain(|a| {
            let (Some(p), Some(i)) = (&a.point, a.iteration) else {
                return true;
            };
            direct.contains(&(a.kind.clone(), a.id))
                || reference.get(p).is_none_or(|r| i > r - i64::from(n))
        });
        self.omitted_attempts = Some(before - self.attempts.len());
    }

    /// Human-readable rendering of everything: every attempt in full (`rondo trace --long
    /// --depth all`).
    pub fn to_text(&self) -> String {
        self.render(&TextView { long: true })
    }

    /// Human-readable rendering: the target, then the records that produced it in full, then
    /// one line per upstream attempt (every attempt in full with `long`).
    pub fn render(&self, view: &TextView) -> String {
        let fmt = crate::cli::format_measurement;
        let mut s = String::new();
        let _ = writeln!(s, "target   {}", self.target);
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
        s
    }

    /// Every recorded detail of one attempt or generation.
    fn details(&self, s: &mut String, a: &AttemptRecord) {
        let fmt = crate::cli::format_measurement;
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
        let _ = writeln!(s, "  params    {}", a.parameters);
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

/// A refusal of `rondo extract` caused by what the user asked (an unknown target, a file in
/// the way): the command line reports it as bad input.
#[derive(Debug, thiserror::Error)]
#[error("{0}")]
pub struct Refused(pub String);

/// An artifact written out by [`extract`].
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct Extracted {
    /// Where it was written.
    pub path: std::path::PathBuf,
    /// Its BLAKE3 hash, checked on the written file.
    pub hash: String,
    /// Its size in bytes.
    pub size: u64,
}

/// Write the artifact named by `target` (any form [`resolve`] accepts; a metric names its
/// attempt's metrics file) to `out`, or into `out` under its recorded name when `out` is a
/// folder. An existing file is refused unless `force`. The bytes go to a temporary file in
/// the same folder, are synced and hashed, and only a file whose BLAKE3 matches the record
/// is moved into place (no other process ever sees a partial file).
pub async fn extract(
    pool: &SqlitePool,
    ws: &Path,
    target: &str,
    out: &Path,
    force: bool,
) -> Result<Extracted> {
    let refused = |m: String| anyhow::Error::new(Refused(m));
    let hash = match resolve(pool, ws, target, &mut |_, _| {}).await {
        Err(e) => return Err(refused(format!("{e:#}"))),
        Ok(Target::Final(f)) if f.attempts.len() == 1 => resolve_target(
            pool,
            ws,
            &format!(
                "{}/{}/{}",
                f.point,
                f.iterations.first().copied().unwrap_or_default(),
                f.name
            ),
        )
        .await
        .map_err(|e| refused(format!("{e:#}")))?,
        Ok(Target::Final(f)) => {
            return Err(refused(format!(
                "{target} is the mean of {} iterations' values, not a file; extract one \
                 iteration's metrics file (e.g. {}/{}/{}) or an output (POINT/final/stage.output)",
                f.attempts.len(),
                f.point,
                f.iterations.last().copied().unwrap_or(1),
                f.name
            )))
        }
        Ok(_) => resolve_target(pool, ws, target)
            .await
            .map_err(|e| refused(format!("{e:#}")))?,
    };
    let name: String = sqlx::query_scalar("SELECT original_name FROM artifacts WHERE hash = ?")
        .bind(&hash)
        .fetch_one(pool)
        .await?;
    let dest = if out.is_dir() {
        out.join(
            Path::new(&name)
                .file_name()
                .map(|n| n.to_os_string())
                .unwrap_or_else(|| hash.clone().into()),
        )
    } else {
        out.to_path_buf()
    };
    if !force && dest.symlink_metadata().is_ok() {
        return Err(refused(format!(
            "{} exists; pass --force to replace it",
            dest.display()
        )));
    }
    let src = ws.join("store").join(&hash[..2]).join(&hash[2..]);
    let dir = match dest.parent() {
        Some(d) if !d.as_os_str().is_empty() => d.to_path_buf(),
        _ => std::path::PathBuf::from("."),
    };
    if !dir.is_dir() {
        return Err(refused(format!(
            "{}: no such folder to write into",
            dir.display()
        )));
    }
    let file_name = dest
        .file_name()
        .map(|n| n.to_string_lossy().into_owned())
        .unwrap_or_default();
    let tmp = dir.join(format!(".{file_name}.rondo-{}.tmp", std::process::id()));
    let written = (|| -> Result<(String, u64)> {
        let mut from = File::open(&src).with_context(|| {
            format!(
                "{}: artifact {hash} is recorded but missing from the store",
                src.display()
            )
        })?;
        let mut to =
            File::create(&tmp).with_context(|| format!("{}: cannot create", tmp.display()))?;
        std::io::copy(&mut from, &mut to)
            .with_context(|| format!("{}: cannot write", tmp.display()))?;
        to.sync_all()
            .with_context(|| format!("{}: cannot sync", tmp.display()))?;
        let size = to.metadata()?.len();
        drop(to);
        Ok((hash_file_with_progress(&tmp, &mut |_, _| {})?, size))
    })();
    let (got, size) = match written {
        Ok(w) => w,
        Err(e) => {
            let _ = std::fs::remove_file(&tmp);
            return Err(e);
        }
    };
    if got != hash {
        let _ = std::fs::remove_file(&tmp);
        bail!(
            "the copy of artifact {hash} has BLAKE3 {got}: the store's file is damaged \
             ({}); nothing was written to {}",
            src.display(),
            dest.display()
        );
    }
    // Without --force, a hard link never replaces a file that appeared meanwhile.
    let placed = if force {
        std::fs::rename(&tmp, &dest)
    } else {
        std::fs::hard_link(&tmp, &dest).and_then(|()| std::fs::remove_file(&tmp))
    };
    if let Err(e) = placed {
        let _ = std::fs::remove_file(&tmp);
        if e.kind() == std::io::ErrorKind::AlreadyExists {
            return Err(refused(format!(
                "{} exists; pass --force to replace it",
                dest.display()
            )));
        }
        return Err(e).with_context(|| format!("{}: cannot write", dest.display()));
    }
    if let Ok(d) = File::open(&dir) {
        let _ = d.sync_all();
    }
    Ok(Extracted {
        path: dest,
        hash,
        size,
    })
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
    if a.outputs.contains_key(crate::analysis::EOS_ROLE) {
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

// ---------------------------------------------------------------------------------------
// diff

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
    /// stage → iteration → program of the succeeded attempt.
    programs: BTreeMap<String, BTreeMap<i64, ProgramRef>>,
    first_inputs: BTreeMap<(String, String), String>,
    /// metric → iteration → value.
    metrics: BTreeMap<String, BTreeMap<i64, f64>>,
}

/// The `stop:` section of a campaign file text, as JSON (`null` if absent).
pub fn stop_section(spec_text: &str) -> Result<Value> {
    let v: Value = serde_saphyr::from_str(spec_text)
        .map_err(|e| anyhow::anyhow!("{e}"))
        .context("the campaign file stored in the workspace does not parse")?;
    Ok(v.get("stop").cloned().unwrap_or(Value::Null))
}

async fn load_point(pool: &SqlitePool, spec: &str) -> Result<PointData> {
    let point = resolve_point(pool, spec).await?;
    let c = sqlx::query("SELECT name, spec_text, spec_blake3 FROM campaign WHERE id = 1")
        .fetch_optional(pool)
        .await?
        .context("this workspace has no campaign recorded")?;
    let spec_text: String = c.try_get("spec_text")?;
    let pr = sqlx::query("SELECT values_json, state FROM points WHERE id = ?")
        .bind(&point)
        .fetch_one(pool)
        .await?;
    let vj: String = pr.try_get(0)?;
    let side = PointSide {
        campaign: c.try_get("name")?,
        spec_blake3: c.try_get("spec_blake3")?,
        values: serde_json::from_str(&vj)
            .with_context(|| format!("point {point}: malformed values_json"))?,
        state: pr.try_get::<PointState, _>(1)?.to_string(),
        point: point.clone(),
    };
    let mut d = PointData {
        side,
        stop: stop_section(&spec_text)?,
        params: BTreeMap::new(),
        programs: BTreeMap::new(),
        first_inputs: BTreeMap::new(),
        metrics: BTreeMap::new(),
    };
    let rows = sqlx::query(
        "SELECT id, iteration, stage, program_path, program_blake3, program_version, parameters_json, state
         FROM attempts WHERE point = ? ORDER BY iteration, id",
    )
    .bind(&point)
    .fetch_all(pool)
    .await?;
    let mut first_iter: BTreeMap<String, i64> = BTreeMap::new();
    for r in rows {
        let id: i64 = r.try_get(0)?;
        let iteration: i64 = r.try_get(1)?;
        let stage: String = r.try_get(2)?;
        let state: AttemptState = r.try_get(7)?;
        if state != AttemptState::Succeeded {
            continue;
        }
        d.programs.entry(stage.clone()).or_default().insert(
            iteration,
            ProgramRef {
                path: r.try_get(3)?,
                blake3: r.try_get(4)?,
                version: r.try_get(5)?,
            },
        );
        if !d.params.contains_key(&stage) {
            let pj: String = r.try_get(6)?;
            d.params
                .insert(stage.clone(), opt_json(&pj, "parameters_json", id)?);
        }
        let fi = *first_iter.entry(stage.clone()).or_insert(iteration);
        if fi == iteration {
            let ins = sqlx::query("SELECT role, artifact FROM attempt_inputs WHERE attempt_id = ?")
                .bind(id)
                .fetch_all(pool)
                .await?;
            for i in ins {
                d.first_inputs
                    .insert((stage.clone(), i.try_get(0)?), i.try_get(1)?);
            }
        }
    }
    let rows = sqlx::query(
        "SELECT a.iteration, m.name, m.value FROM metrics m JOIN attempts a ON a.id = m.attempt_id
         WHERE a.point = ? AND a.state = ? ORDER BY a.iteration, a.id",
    )
    .bind(&point)
    .bind(AttemptState::Succeeded)
    .fetch_all(pool)
    .await?;
    for r in rows {
        let it: i64 = r.try_get(0)?;
        let name: String = r.try_get(1)?;
        let v: f64 = r.try_get(2)?;
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
    let (programs, program_changes) = program_diffs(&a.programs, &b.programs);
    let stop = (a.stop != b.stop).then(|| StopDiff {
        a: a.stop.clone(),
        b: b.stop.clone(),
    });
    let mut inputs = Vec::new();
    let ikeys: BTreeSet<&(String, String)> =
        a.first_inputs.keys().chain(b.first_inputs.keys()).collect();
    for k in ikeys {
        let (ha, hb) = (a.first_inputs.get(k), b.first_inputs.get(k));
        if ha != hb {
            inputs.push(InputDiff {
                stage: k.0.clone(),
                role: k.1.clone(),
                a: ha.cloned(),
                b: hb.cloned(),
            });
        }
    }
    let mut metrics = Vec::new();
    let mut metrics_equal = Vec::new();
    let names: BTreeSet<&String> = a.metrics.keys().chain(b.metrics.keys()).collect();
    let empty = BTreeMap::new();
    for n in names {
        let sa = a.metrics.get(n).unwrap_or(&empty);
        let sb = b.metrics.get(n).unwrap_or(&empty);
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
    Ok(PointDiff {
        a: a.side,
        b: b.side,
        sweep_values,
        parameters,
        programs,
        program_changes,
        stop,
        inputs,
        metrics,
        metrics_equal,
    })
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
        section(&mut s, "sweep values", self.sweep_values.is_empty());
        for d in &self.sweep_values {
            let _ = writeln!(s, "  {:<24} A {:<16} B {}", d.name, show(&d.a), show(&d.b));
        }
        section(&mut s, "parameters", self.parameters.is_empty());
        for d in &self.parameters {
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
