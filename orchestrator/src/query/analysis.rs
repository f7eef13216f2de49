//! Campaign-level results: each point's final value of a metric (the last good iteration, or
//! the average over the final window with a binning error bar), and the equation-of-state
//! fits of energy versus volume per group of the other sweep axes. The fits are written as an
//! artifact (`analysis/eos.json`) and recorded like a report generation, with the attempts
//! behind every energy as sources, so `rondo trace analysis/eos.json` reaches the programs.
//! The command recorded with the result, `rondo analyze --workspace W`, computes it again.
//!
//! [`record_eos`] is the one function here that writes: the engine calls it at the end of a
//! campaign (and `rondo analyze` on demand) to record the result with its provenance; its
//! SQL is in [`crate::store::reads::reports`]. This module knows no engine and no scheduler.

use std::collections::BTreeMap;
use std::path::{Path, PathBuf};

use anyhow::{Context, Result};
use rondo_numerics::binning;
use rondo_numerics::eos::{self, EosModel};
use serde::Serialize;
use sqlx::SqlitePool;

use crate::artifacts::ArtifactStore;
use crate::spec::{EosAnalysis, EosModelName};
use crate::store::reads::{metrics, points, reports};
use crate::store::{self, PointState};

/// Role (and file name) of the equation-of-state result among a generation's outputs.
pub const EOS_ROLE: &str = "eos.json";

/// The command that computes the equation-of-state result of workspace `ws` again, as
/// recorded with the result: `<rondo executable> analyze --workspace <ws>` (and
/// `--with-retired` when the fit includes retired points).
pub fn eos_argv(program: &Path, ws: &Path, with_retired: bool) -> Vec<String> {
    let mut argv = vec![
        program.display().to_string(),
        "analyze".into(),
        "--workspace".into(),
        ws.display().to_string(),
    ];
    if with_retired {
        argv.push("--with-retired".into());
    }
    argv
}

/// rondo's own executable as recorded for built-in stages, analyses and reports: its path and
/// either its BLAKE3 hash or the reason the hash is unknown (the file could not be read).
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct OwnProgram {
    /// Path of the running executable (as the kernel names it; a deleted file ends in
    /// ` (deleted)`).
    pub path: PathBuf,
    /// Its BLAKE3 hash, or why it is unknown.
    pub blake3: Result<String, String>,
}

impl OwnProgram {
    /// Find and hash the running executable.
    pub fn current() -> OwnProgram {
        match std::env::current_exe() {
            Ok(path) => {
                let blake3 = crate::artifacts::hash_file(&path)
                    .map(|(h, _)| h)
                    .map_err(|e| format!("cannot read {}: {e}", path.display()));
                OwnProgram { path, blake3 }
            }
            Err(e) => OwnProgram {
                path: PathBuf::from("rondo"),
                blake3: Err(format!("cannot find rondo's own executable: {e}")),
            },
        }
    }

    /// The hash, when known.
    pub fn hash(&self) -> Option<String> {
        self.blake3.clone().ok()
    }

    /// Why the hash is unknown, when it is.
    pub fn unknown(&self) -> Option<String> {
        self.blake3.clone().err()
    }
}

/// The equation-of-state analysis of a campaign file text as recorded in a workspace (its
/// `analysis: eos:` section with the defaults of docs/campaign-file.md), or `None` when the
/// campaign has none. Only that section is read: the recorded campaign was validated when it
/// first ran, and its start files or programs need not exist any more.
pub fn recorded_eos(spec_text: &str) -> Result<Option<EosAnalysis>> {
    let v: serde_json::Value = serde_saphyr::from_str(spec_text)
        .map_err(|e| anyhow::anyhow!("{e}"))
        .context("the campaign file recorded in the workspace does not parse")?;
    let Some(e) = v.get("analysis").and_then(|a| a.get("eos")) else {
        return Ok(None);
    };
    if e.is_null() {
        return Ok(None);
    }
    let energy = e["energy"]
        .as_str()
        .context("the recorded campaign's `analysis: eos:` has no `energy`")?
        .to_string();
    let volume = e["volume"].as_str().unwrap_or("volume").to_string();
    let models = match e.get("models").filter(|m| !m.is_null()) {
        Some(m) => serde_json::from_value::<Vec<EosModelName>>(m.clone())
            .context("the recorded campaign's `analysis: eos: models:` is not a list of models")?,
        None => vec![EosModelName::BirchMurnaghan, EosModelName::Vinet],
    };
    Ok(Some(EosAnalysis {
        energy,
        volume,
        models,
    }))
}

/// How a group of the other sweep axes reads: `temperature 300`, `temperature 300, u 6`
/// (names and values; the campaign file gives sweep axes no units). Empty for a campaign
/// whose only axis is the volume.
pub fn group_text(group: &serde_json::Map<String, serde_json::Value>) -> String {
    group
        .iter()
        .map(|(k, v)| match v {
            serde_json::Value::String(s) => format!("{k} {s}"),
            v => format!("{k} {v}"),
        })
        .collect::<Vec<_>>()
        .join(", ")
}

/// One line per group and model of an equation-of-state result (`eos.json`), as `rondo run`,
/// `rondo analyze` and `rondo status` print them.
pub fn eos_lines(doc: &serde_json::Value) -> Vec<String> {
    let num = |v: &serde_json::Value| v.as_f64().unwrap_or(f64::NAN);
    let mut out = Vec::new();
    for g in doc["groups"].as_array().into_iter().flatten() {
        let group = g["group"]
            .as_object()
            .map(group_text)
            .filter(|t| !t.is_empty())
            .map(|t| format!(" at {t}"))
            .unwrap_or_default();
        for (model, f) in g["fits"].as_object().into_iter().flatten() {
            let text = match f["refused"].as_str() {
                Some(r) => format!("refused: {r}"),
                None => format!(
                    "E0 = {:.6} eV, V0 = {:.4} ± {:.4} Å³, B0 = {:.2} ± {:.2} GPa, B0' = {:.2} ± {:.2}",
                    num(&f["e0"]),
                    num(&f["v0"]),
                    num(&f["stderr"]["v0"]),
                    num(&f["b0_gpa"]),
                    num(&f["stderr"]["b0_gpa"]),
                    num(&f["b0_prime"]),
                    num(&f["stderr"]["b0_prime"]),
                ),
            };
            out.push(format!("eos{group}, {model}: {text}{}", retired_text(g)));
        }
    }
    out
}

/// The mark of a fit over retired points (`--with-retired`): which, and retired when.
fn retired_text(group: &serde_json::Value) -> String {
    let retired: Vec<String> = group["points"]
        .as_array()
        .into_iter()
        .flatten()
        .filter_map(|p| {
            let n = p["retired_in"].as_i64()?;
            Some(format!(
                "{} (retired in revision {n})",
                p["id"].as_str().unwrap_or("?")
            ))
        })
        .collect();
    if retired.is_empty() {
        String::new()
    } else {
        format!("; includes retired {}", retired.join(", "))
    }
}

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
    let (first, last) = points::convergence_marks(pool, point).await?;
    Ok((first.map(|i| i as u32), last.map(|i| i as u32)))
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
    let rows = metrics::good_between(pool, point, metric, i64::from(from), i64::from(last)).await?;
    if rows.is_empty() {
        return Ok(None);
    }
    let values: Vec<f64> = rows.iter().map(|r| r.value).collect();
    let errors: Vec<Option<f64>> = rows.iter().map(|r| r.error).collect();
    let iterations = rows.iter().map(|r| r.iteration as u32).collect();
    let attempts = rows.iter().map(|r| r.attempt).collect();
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
    /// The retired points among `points` (only with `--with-retired`): (id, the revision
    /// that retired it).
    pub retired: Vec<(String, i64)>,
}

/// Fit energy versus volume per group of the other sweep axes over the converged points
/// (retired ones too when `with_retired`).
pub async fn eos_groups(
    pool: &SqlitePool,
    spec: &EosAnalysis,
    with_retired: bool,
) -> Result<(Vec<EosGroup>, Vec<i64>)> {
    let mut groups: Vec<EosGroup> = Vec::new();
    let mut sources = Vec::new();
    for r in points::all_of(pool, with_retired).await? {
        let id = r.id;
        if r.state != PointState::Converged {
            continue;
        }
        let values: serde_json::Map<String, serde_json::Value> =
            serde_json::from_str(&r.values_json).unwrap_or_default();
        let Some(v) = values.get(&spec.volume).and_then(|v| v.as_f64()) else {
            continue;
        };
        let Some(e) = final_value(pool, &id, &spec.energy).await? else {
            continue;
        };
        sources.extend(e.attempts.iter().copied());
        let mut key = values.clone();
        key.remove(&spec.volume);
        let g = match groups.iter().position(|g| g.group == key) {
            Some(i) => &mut groups[i],
            None => {
                groups.push(EosGroup {
                    group: key,
                    points: Vec::new(),
                    fits: BTreeMap::new(),
                    retired: Vec::new(),
                });
                let last = groups.len() - 1;
                &mut groups[last]
            }
        };
        if let Some(n) = r.retired_in {
            g.retired.push((id.clone(), n));
        }
        g.points.push((id, v, e.value, e.error));
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
pub fn eos_json(groups: &[EosGroup], spec: &EosAnalysis, with_retired: bool) -> serde_json::Value {
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
            let points: Vec<serde_json::Value> = g
                .points
                .iter()
                .map(|p| {
                    let mut o = serde_json::json!({
                        "id": p.0, "volume": p.1, "energy": p.2, "error": p.3 });
                    // Only retired points carry the key: the default result stays the same
                    // document (and artifact) as before `--with-retired` existed.
                    if let Some((_, n)) = g.retired.iter().find(|(id, _)| *id == p.0) {
                        o["retired_in"] = (*n).into();
                    }
                    o
                })
                .collect();
            serde_json::json!({
                "group": g.group,
                "points": points,
                "fits": fits,
            })
        })
        .collect();
    let mut doc = serde_json::json!({
        "energy": spec.energy,
        "volume": spec.volume,
        "units": {"energy": "eV", "volume": "Å³", "b0": "eV/Å³", "b0_gpa": "GPa"},
        "groups": gs,
    });
    if with_retired {
        doc["with_retired"] = true.into();
    }
    doc
}

/// Run the equation-of-state analysis and record its result as an artifact with provenance:
/// the command that computes it again ([`eos_argv`]), rondo's executable with its hash (or
/// why the hash is unknown), and the attempts behind every energy. Returns the JSON written.
pub async fn record_eos(
    pool: &SqlitePool,
    ws: &Path,
    artifacts: &ArtifactStore,
    spec: &EosAnalysis,
    with_retired: bool,
) -> Result<serde_json::Value> {
    let started = store::now();
    let (groups, sources) = eos_groups(pool, spec, with_retired).await?;
    let doc = eos_json(&groups, spec, with_retired);
    let mut text = serde_json::to_string_pretty(&doc)?;
    text.push('\n');
    let dir = ws.join("analysis");
    std::fs::create_dir_all(&dir).with_context(|| format!("{}: cannot create", dir.display()))?;
    let file = dir.join(EOS_ROLE);
    crate::artifacts::write_new(&file, text.as_bytes())
        .with_context(|| format!("{}: cannot write", file.display()))?;
    let (hash, size) = artifacts
        .put_bytes(text.as_bytes())
        .context("cannot store the equation-of-state result")?;
    let exe = OwnProgram::current();
    let argv_json = serde_json::to_string(&eos_argv(&exe.path, ws, with_retired))?;
    let mut options =
        serde_json::json!({"energy": spec.energy, "volume": spec.volume, "models": spec.models});
    if with_retired {
        options["with_retired"] = true.into();
    }
    let options_json = options.to_string();
    let (out_dir, program_path) = (dir.display().to_string(), exe.path.display().to_string());
    let (blake3, unknown) = (exe.hash(), exe.unknown());
    let (host, ended) = (store::hostname(), store::now());
    let mut tx = pool.begin().await?;
    store::artifact(&mut *tx, &hash, size, EOS_ROLE).await?;
    let generation = reports::NewGeneration {
        argv_json: &argv_json,
        out_dir: &out_dir,
        options_json: &options_json,
        program_path: &program_path,
        program_blake3: blake3.as_deref(),
        program_unknown: unknown.as_deref(),
        host: &host,
        started_at: &started,
        ended_at: &ended,
        rondo_version: env!("CARGO_PKG_VERSION"),
    };
    let id = reports::insert_generation(&mut tx, &generation).await?;
    reports::insert_output(&mut tx, id, EOS_ROLE, &hash).await?;
    for a in &sources {
        reports::insert_source(&mut tx, id, EOS_ROLE, *a).await?;
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
    crate::failpoint::hit(crate::failpoint::Failpoint::AnalysisRecorded);
    Ok(doc)
}

/// The hash of the latest recorded equation-of-state result, if any.
pub async fn latest_eos_hash(pool: &SqlitePool) -> Result<Option<String>> {
    reports::latest_output(pool, EOS_ROLE).await
}

/// The latest recorded equation-of-state result, if any.
pub async fn latest_eos(
    pool: &SqlitePool,
    artifacts: &ArtifactStore,
) -> Result<Option<serde_json::Value>> {
    let Some(hash) = latest_eos_hash(pool).await? else {
        return Ok(None);
    };
    let path = artifacts.path_of(&hash);
    let text = std::fs::read_to_string(&path).with_context(|| {
        format!(
            "{}: the recorded result is missing from the store",
            path.display()
        )
    })?;
    Ok(Some(serde_json::from_str(&text)?))
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn the_recorded_analysis_section_is_read_with_its_defaults() -> Result<()> {
        let text = "campaign: c\ncycle: {}\nanalysis:\n  eos: { energy: update.energy }\n";
        let e = recorded_eos(text)?.context("an eos analysis")?;
        assert_eq!(e.energy, "update.energy");
        assert_eq!(e.volume, "volume");
        assert_eq!(
            e.models,
            vec![EosModelName::BirchMurnaghan, EosModelName::Vinet]
        );
        let text = "campaign: c\nanalysis:\n  eos: { energy: u.e, volume: v, models: [vinet] }\n";
        let e = recorded_eos(text)?.context("an eos analysis")?;
        assert_eq!(
            (e.volume.as_str(), e.models),
            ("v", vec![EosModelName::Vinet])
        );
        assert!(recorded_eos("campaign: c\n")?.is_none());
        Ok(())
    }

    #[test]
    fn groups_read_as_names_and_values() {
        let g: serde_json::Map<String, serde_json::Value> =
            serde_json::from_str(r#"{"temperature": 300, "phase": "alpha", "u": 6.5}"#)
                .unwrap_or_default();
        assert_eq!(group_text(&g), "phase alpha, temperature 300, u 6.5");
        let doc = serde_json::json!({"groups": [{"group": {"temperature": 300},
            "fits": {"vinet": {"refused": "too few points"}}}]});
        assert_eq!(
            eos_lines(&doc),
            vec!["eos at temperature 300, vinet: refused: too few points".to_string()]
        );
    }
}
