//! Campaign-level results: each point's final value of a metric (the last good iteration, or
//! the average over the final window with a binning error bar), and the equation-of-state
//! fits of energy versus volume per group of the other sweep axes. The fits are written as an
//! artifact (`analysis/eos.json`) and recorded like a report generation, with the attempts
//! behind every energy as sources, so `rondo trace analysis/eos.json` reaches the programs.

use std::collections::BTreeMap;
use std::path::Path;

use anyhow::{Context, Result};
use rondo_numerics::binning;
use rondo_numerics::eos::{self, EosModel};
use serde::Serialize;
use sqlx::{Row, SqlitePool};

use crate::artifacts::ArtifactStore;
use crate::spec::{EosAnalysis, EosModelName};
use crate::store;

/// argv recorded for the equation-of-state analysis.
pub const EOS_ARGV: [&str; 3] = ["rondo", "analysis", "eos"];

/// A point's final value of one metric.
#[derive(Debug, Clone, Serialize, PartialEq)]
pub struct FinalValue {
    /// Value (window mean, or the last good iteration's value).
    pub value: f64,
    /// Standard error, if known.
    pub error: Option<f64>,
    /// Iterations it comes from.
    pub iterations: Vec<u32>,
    /// How: `last` or `window`.
    pub how: &'static str,
    /// Attempts whose metrics it uses.
    #[serde(skip)]
    pub attempts: Vec<i64>,
}

/// The first good iteration at which the stopping rules held, and the last good iteration.
pub async fn convergence_marks(
    pool: &SqlitePool,
    point: &str,
) -> Result<(Option<u32>, Option<u32>)> {
    let rows = sqlx::query(
        "SELECT iteration, stop_json FROM iterations WHERE point = ? AND state = 'good' ORDER BY iteration",
    )
    .bind(point)
    .fetch_all(pool)
    .await?;
    let mut first = None;
    let mut last = None;
    for r in rows {
        let it = r.get::<i64, _>("iteration") as u32;
        last = Some(it);
        if first.is_none() {
            let j: Option<String> = r.get("stop_json");
            let met = j
                .and_then(|t| serde_json::from_str::<serde_json::Value>(&t).ok())
                .is_some_and(|v| v["rules_met"].as_bool().unwrap_or(false));
            if met {
                first = Some(it);
            }
        }
    }
    Ok((first, last))
}

/// Final value of `metric` (`stage.metric`) for a point: the mean over the iterations after
/// the rules were first met (the final window) when there are any, else the last good
/// iteration's value with its reported error.
pub async fn final_value(
    pool: &SqlitePool,
    point: &str,
    metric: &str,
) -> Result<Option<FinalValue>> {
    let (first, last) = convergence_marks(pool, point).await?;
    let Some(last) = last else { return Ok(None) };
    let from = match first {
        Some(f) if f < last => f + 1,
        _ => last,
    };
    let rows = sqlx::query(
        "SELECT a.id, a.iteration, m.value, m.error FROM metrics m JOIN attempts a ON a.id = m.attempt_id \
         JOIN iterations i ON i.point = a.point AND i.iteration = a.iteration AND i.state = 'good' \
         WHERE a.point = ? AND a.state = 'succeeded' AND m.name = ? AND a.iteration BETWEEN ? AND ? \
         ORDER BY a.iteration",
    )
    .bind(point)
    .bind(metric)
    .bind(i64::from(from))
    .bind(i64::from(last))
    .fetch_all(pool)
    .await?;
    if rows.is_empty() {
        return Ok(None);
    }
    let values: Vec<f64> = rows.iter().map(|r| r.get::<f64, _>("value")).collect();
    let errors: Vec<Option<f64>> = rows
        .iter()
        .map(|r| r.get::<Option<f64>, _>("error"))
        .collect();
    let iterations = rows
        .iter()
        .map(|r| r.get::<i64, _>("iteration") as u32)
        .collect();
    let attempts = rows.iter().map(|r| r.get::<i64, _>("id")).collect();
    if values.len() == 1 {
        return Ok(Some(FinalValue {
            value: values[0],
            error: errors[0],
            iterations,
            how: "last",
            attempts,
        }));
    }
    let errs: Vec<f64> = errors.iter().map(|e| e.unwrap_or(0.0)).collect();
    let w = binning::window_average(&values, &errs)
        .map_err(|e| anyhow::anyhow!("{point}: averaging {metric} over the final window: {e}"))?;
    Ok(Some(FinalValue {
        value: w.mean,
        error: Some(w.std_error),
        iterations,
        how: "window",
        attempts,
    }))
}

/// One group's fits.
#[derive(Debug, Clone, Serialize)]
pub struct EosGroup {
    /// Values of the non-volume axes.
    pub group: serde_json::Map<String, serde_json::Value>,
    /// Points used, with volume and energy (± error).
    pub points: Vec<(String, f64, f64, Option<f64>)>,
    /// Fits by model name, or the reason a fit was refused.
    pub fits: BTreeMap<String, Result<eos::EosFit, String>>,
}

/// Fit energy versus volume per group of the other sweep axes over the converged points.
pub async fn eos_groups(
    pool: &SqlitePool,
    spec: &EosAnalysis,
) -> Result<(Vec<EosGroup>, Vec<i64>)> {
    let rows = sqlx::query("SELECT id, values_json, state FROM points ORDER BY idx")
        .fetch_all(pool)
        .await?;
    let mut groups: Vec<EosGroup> = Vec::new();
    let mut sources = Vec::new();
    for r in rows {
        let id: String = r.get("id");
        if r.get::<String, _>("state") != "converged" {
            continue;
        }
        let values: serde_json::Map<String, serde_json::Value> =
            serde_json::from_str(&r.get::<String, _>("values_json")).unwrap_or_default();
        let Some(v) = values.get(&spec.volume).and_then(|v| v.as_f64()) else {
            continue;
        };
        let Some(e) = final_value(pool, &id, &spec.energy).await? else {
            continue;
        };
        sources.extend(e.attempts.iter().copied());
        let mut key = values.clone();
        key.remove(&spec.volume);
        match groups.iter_mut().find(|g| g.group == key) {
            Some(g) => g.points.push((id, v, e.value, e.error)),
            None => groups.push(EosGroup {
                group: key,
                points: vec![(id, v, e.value, e.error)],
                fits: BTreeMap::new(),
            }),
        }
    }
    for g in &mut groups {
        let vols: Vec<f64> = g.points.iter().map(|p| p.1).collect();
        let ens: Vec<f64> = g.points.iter().map(|p| p.2).collect();
        let sig: Option<Vec<f64>> = g.points.iter().map(|p| p.3.filter(|e| *e > 0.0)).collect();
        for m in &spec.models {
            let (name, model) = match m {
                EosModelName::BirchMurnaghan => ("birch-murnaghan", EosModel::BirchMurnaghan3),
                EosModelName::Vinet => ("vinet", EosModel::Vinet),
            };
            let fit = eos::fit(model, &vols, &ens, sig.as_deref()).map_err(|e| e.to_string());
            g.fits.insert(name.to_string(), fit);
        }
    }
    sources.sort_unstable();
    sources.dedup();
    Ok((groups, sources))
}

/// JSON of the groups (fits as objects, refusals as `{"refused": reason}`).
pub fn eos_json(groups: &[EosGroup], spec: &EosAnalysis) -> serde_json::Value {
    let gs: Vec<serde_json::Value> = groups
        .iter()
        .map(|g| {
            let fits: serde_json::Map<String, serde_json::Value> = g
                .fits
                .iter()
                .map(|(k, f)| {
                    let v = match f {
                        Ok(fit) => serde_json::json!({
                            "e0": fit.e0, "v0": fit.v0, "b0": fit.b0, "b0_gpa": fit.b0_gpa,
                            "b0_prime": fit.b0_prime,
                            "stderr": {"e0": fit.stderr[0], "v0": fit.stderr[1], "b0": fit.stderr[2],
                                       "b0_prime": fit.stderr[3], "b0_gpa": fit.b0_gpa_stderr},
                            "residuals": fit.residuals, "rss": fit.rss,
                        }),
                        Err(reason) => serde_json::json!({ "refused": reason }),
                    };
                    (k.clone(), v)
                })
                .collect();
            serde_json::json!({
                "group": g.group,
                "points": g.points.iter().map(|p| serde_json::json!({
                    "id": p.0, "volume": p.1, "energy": p.2, "error": p.3 })).collect::<Vec<_>>(),
                "fits": fits,
            })
        })
        .collect();
    serde_json::json!({
        "energy": spec.energy,
        "volume": spec.volume,
        "units": {"energy": "eV", "volume": "Å³", "b0": "eV/Å³", "b0_gpa": "GPa"},
        "groups": gs,
    })
}

/// Run the equation-of-state analysis and record its result as an artifact with provenance.
/// Returns the JSON written.
pub async fn record_eos(
    pool: &SqlitePool,
    ws: &Path,
    artifacts: &ArtifactStore,
    spec: &EosAnalysis,
) -> Result<serde_json::Value> {
    let started = store::now();
    let (groups, sources) = eos_groups(pool, spec).await?;
    let doc = eos_json(&groups, spec);
    let mut text = serde_json::to_string_pretty(&doc)?;
    text.push('\n');
    let dir = ws.join("analysis");
    std::fs::create_dir_all(&dir).with_context(|| format!("{}: cannot create", dir.display()))?;
    let file = dir.join("eos.json");
    crate::artifacts::write_new(&file, text.as_bytes())
        .with_context(|| format!("{}: cannot write", file.display()))?;
    let (hash, size) = artifacts
        .put_bytes(text.as_bytes())
        .context("cannot store the equation-of-state result")?;
    let exe = std::env::current_exe().unwrap_or_default();
    let exe_hash = crate::artifacts::hash_file(&exe).map(|h| h.0).ok();
    let mut tx = pool.begin().await?;
    store::artifact(&mut *tx, &hash, size, "eos.json").await?;
    let id: i64 = sqlx::query_scalar(
        "INSERT INTO reports(argv_json, out_dir, options_json, program_path, program_blake3, host, \
         started_at, ended_at, rondo_version) VALUES (?,?,?,?,?,?,?,?,?) RETURNING id",
    )
    .bind(serde_json::to_string(&EOS_ARGV)?)
    .bind(dir.display().to_string())
    .bind(serde_json::json!({"energy": spec.energy, "volume": spec.volume, "models": spec.models}).to_string())
    .bind(exe.display().to_string())
    .bind(exe_hash)
    .bind(store::hostname())
    .bind(&started)
    .bind(store::now())
    .bind(crate::engine::RONDO_VERSION)
    .fetch_one(&mut *tx)
    .await?;
    sqlx::query("INSERT INTO report_outputs(report_id, role, artifact) VALUES (?, 'eos.json', ?)")
        .bind(id)
        .bind(&hash)
        .execute(&mut *tx)
        .await?;
    for a in &sources {
        sqlx::query(
            "INSERT INTO report_sources(report_id, role, attempt_id) VALUES (?, 'eos.json', ?)",
        )
        .bind(id)
        .bind(a)
        .execute(&mut *tx)
        .await?;
    }
    store::event(
        &mut *tx,
        "analysis-eos",
        None,
        None,
        None,
        &format!("{} group(s); artifact {}", groups.len(), &hash[..12]),
    )
    .await?;
    tx.commit().await?;
    Ok(doc)
}

/// The latest recorded equation-of-state result, if any.
pub async fn latest_eos(
    pool: &SqlitePool,
    artifacts: &ArtifactStore,
) -> Result<Option<serde_json::Value>> {
    let argv = serde_json::to_string(&EOS_ARGV)?;
    let hash: Option<String> = sqlx::query_scalar(
        "SELECT o.artifact FROM reports r JOIN report_outputs o ON o.report_id = r.id \
         WHERE r.argv_json = ? ORDER BY r.id DESC LIMIT 1",
    )
    .bind(argv)
    .fetch_optional(pool)
    .await?;
    let Some(hash) = hash else { return Ok(None) };
    let path = artifacts.path_of(&hash);
    let text = std::fs::read_to_string(&path).with_context(|| {
        format!(
            "{}: the recorded result is missing from the store",
            path.display()
        )
    })?;
    Ok(Some(serde_json::from_str(&text)?))
}
