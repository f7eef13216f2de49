//! `rondo status`: per point its sweep values, iteration, state and latest metrics (or, after
//! a final window, their averages), and the latest equation-of-state fit; as text or as the
//! `--json` document of docs/json-output.md.
//!
//! Owns the status document's shape and its text. The rows come from
//! [`crate::store::overview`] and the final values from [`crate::query::analysis`]; no SQL here.

use std::fmt::Write;
use std::path::Path;

use anyhow::{bail, Context, Result};
use serde_json::{json, Map, Value};
use sqlx::SqlitePool;

use super::output::{emit, emit_json, format_measurement};
use super::workspace::find_workspace;
use super::{StatusArgs, EXIT_OK};
use crate::store::{self, overview, PointState};

/// `rondo status [FILE] [--workspace DIR] [--json]`.
pub async fn run(a: StatusArgs) -> Result<u8> {
    let ws = find_workspace(a.file.as_deref(), a.workspace)?;
    let status = status(&ws).await?;
    if a.json {
        emit_json(&status)?;
    } else {
        emit(&status_text(&status));
    }
    Ok(EXIT_OK)
}

/// The `status --json` document.
pub async fn status(ws: &Path) -> Result<Value> {
    let pool = store::open_existing(ws).await?;
    let Some(camp) = store::campaign_row(&pool).await? else {
        bail!("{}: no campaign recorded", ws.display());
    };
    let mut points = Vec::new();
    let mut counts = Map::new();
    let costs = crate::query::usage::costs(&pool).await?;
    for row in overview::points(&pool, ws).await? {
        // A retired point counts as retired, whatever state it stopped in.
        let key = if row.retired.is_some() {
            "retired"
        } else {
            row.state.as_str()
        };
        let n = counts.entry(key).or_insert(json!(0));
        *n = json!(n.as_u64().unwrap_or(0) + 1);
        let usage = costs.point_json(&row.id);
        let mut doc = point_doc(&pool, row).await?;
        doc["usage"] = usage;
        points.push(doc);
    }
    let running = store::holder(ws);
    let artifacts = crate::artifacts::ArtifactStore::open(&ws.join("store"))
        .with_context(|| format!("{}: cannot open the artifact store", ws.display()))?;
    let eos = crate::query::analysis::latest_eos(&pool, &artifacts).await?;
    let revisions: Vec<Value> = store::revisions::list(&pool)
        .await?
        .into_iter()
        .map(|r| {
            json!({
                "number": r.number,
                "spec_blake3": r.spec_blake3,
                "created_at": r.created_at,
                "accepted_physics": r.accepted,
            })
        })
        .collect();
    pool.close().await;
    Ok(json!({
        "campaign": camp.name,
        "spec_blake3": camp.spec_blake3,
        "workspace": ws.display().to_string(),
        "created_at": camp.created_at,
        "rondo_version": camp.rondo_version,
        "orchestrator": running,
        "revision": revisions.last().map(|r| r["number"].clone()),
        "revisions": revisions,
        "counts": counts,
        "points": points,
        "eos": eos,
        "usage": costs.campaign_json(),
    }))
}

/// One point of the status document.
async fn point_doc(pool: &SqlitePool, row: overview::PointRow) -> Result<Value> {
    let id = row.id;
    let values: Value = serde_json::from_str(&row.values_json).unwrap_or_default();
    let good = overview::last_good_iteration(pool, &id).await?;
    let latest = overview::last_iteration(pool, &id).await?;
    let mut metrics = Map::new();
    let mut errors = Map::new();
    if let Some(it) = good {
        for m in overview::iteration_metrics(pool, &id, it).await? {
            metrics.insert(m.name.clone(), json!(m.value));
            if let Some(e) = m.error {
                errors.insert(m.name, json!(e));
            }
        }
    }
    let averages = averages(pool, &id, &metrics).await?;
    let attempts = overview::attempt_count(pool, &id).await?;
    let retired = row
        .retired
        .map(|(n, why)| json!({ "in_revision": n, "why": why }));
    Ok(json!({
        "id": id,
        "index": row.index,
        "values": values,
        "state": row.state.as_str(),
        "reason": row.reason,
        "iteration": good.unwrap_or(0),
        "last_iteration": latest.unwrap_or(0),
        "metrics": metrics,
        "errors": errors,
        "averages": averages,
        "attempts": attempts,
        "revision": row.revision,
        "retired": retired,
    }))
}

/// The final-window averages of the point's metrics, when it converged into a window of
/// more than one iteration (empty otherwise).
async fn averages(
    pool: &SqlitePool,
    id: &str,
    metrics: &Map<String, Value>,
) -> Result<Map<String, Value>> {
    let mut averages = Map::new();
    let (first, last) = crate::query::analysis::convergence_marks(pool, id).await?;
    if let (Some(f), Some(l)) = (first, last) {
        if f < l {
            for name in metrics.keys() {
                if let Some(v) = crate::query::analysis::final_value(pool, id, name).await? {
                    averages.insert(
                        name.clone(),
                        json!({
                        "value": v.value, "error": v.error, "iterations": v.iterations }),
                    );
                }
            }
        }
    }
    Ok(averages)
}

/// Metric names the text status shows (all are in `--json`).
const SHOWN_METRICS: &[&str] = &[
    ".n_f",
    ".energy",
    ".mu",
    ".docc",
    ".p0",
    ".p1",
    ".p2",
    ".residual_norm",
    ".x",
];

/// The text of `rondo status`.
fn status_text(s: &Value) -> String {
    let mut out = String::new();
    let _ = writeln!(
        out,
        "campaign {} ({})",
        s["campaign"].as_str().unwrap_or(""),
        s["workspace"].as_str().unwrap_or("")
    );
    if let Some(o) = s["orchestrator"].as_str() {
        let _ = writeln!(out, "  running now: {o}");
    }
    let revisions = s["revisions"].as_array().map_or(0, Vec::len);
    if revisions > 1 {
        let _ = writeln!(
            out,
            "  campaign file at revision {} ({revisions} revisions recorded)",
            s["revision"]
        );
    }
    let empty = Vec::new();
    for p in s["points"].as_array().unwrap_or(&empty) {
        point_lines(&mut out, p);
    }
    for line in crate::query::analysis::eos_lines(&s["eos"]) {
        let _ = writeln!(out, "  {line}");
    }
    if let Some(line) = usage_line(&s["usage"]) {
        let _ = writeln!(out, "  {line}");
    }
    out
}

/// `cost: 0.0123 core-hours (stage a 0.0100, b 0.0023), peak RSS 210.0 MiB`, or nothing
/// when no attempt was measured.
fn usage_line(u: &Value) -> Option<String> {
    let total = &u["total"];
    if total["attempts"].as_i64().unwrap_or(0) == 0 {
        return None;
    }
    let hours = |v: &Value| v["core_hours"].as_f64().unwrap_or(0.0);
    let stages: Vec<String> = u["by_stage"]
        .as_object()
        .map(|m| {
            m.iter()
                .map(|(s, c)| format!("{s} {:.4}", hours(c)))
                .collect()
        })
        .unwrap_or_default();
    let rss = total["max_rss_kib"]
        .as_f64()
        .map(|k| format!(", peak RSS {:.1} MiB", k / 1024.0))
        .unwrap_or_default();
    Some(format!(
        "cost: {} (per stage: {}){rss}",
        crate::query::usage::core_hours_text(hours(total)),
        stages.join(", ")
    ))
}

/// A point's line (id, values, state, iteration, why it stopped) and its metrics' line.
fn point_lines(out: &mut String, p: &Value) {
    let values = p["values"]
        .as_object()
        .map(|m| {
            m.iter()
                .map(|(k, v)| format!("{k}={v}"))
                .collect::<Vec<_>>()
                .join(" ")
        })
        .unwrap_or_default();
    // After a final window the averages are the point's result; otherwise the metrics
    // of the last good iteration.
    let averaged = p["averages"].as_object().filter(|a| !a.is_empty());
    let metrics = shown_metrics(p, averaged);
    let window = averaged
        .and_then(|a| a.values().next())
        .and_then(|v| v["iterations"].as_array())
        .and_then(|its| Some((its.first()?.as_i64()?, its.last()?.as_i64()?)))
        .map(|(a, b)| format!(", averaged over iterations {a}-{b}"))
        .unwrap_or_default();
    // The iteration the point is at or stopped in (a point that failed in iteration 1
    // has no good iteration yet).
    let at = match p["last_iteration"].as_i64().unwrap_or(0) {
        0 => "before its first iteration".to_string(),
        n => format!("at iteration {n}"),
    };
    let retired = match &p["retired"] {
        Value::Null => String::new(),
        r => format!(
            "retired in revision {} ({}), ",
            r["in_revision"],
            match r["why"].as_str() {
                Some("physics") => "its physics changed; its values run again as a new point",
                _ => "its values left the sweep",
            }
        ),
    };
    let _ = writeln!(
        out,
        "  {} {values}: {retired}{} {at}{window}{}",
        p["id"].as_str().unwrap_or(""),
        p["state"].as_str().unwrap_or(""),
        p["reason"]
            .as_str()
            .filter(|_| p["state"] != PointState::Converged.as_str())
            .map(|r| format!(" ({r})"))
            .unwrap_or_default()
    );
    if !metrics.is_empty() {
        let _ = writeln!(out, "      {metrics}");
    }
    let total = &p["usage"]["total"];
    if total["attempts"].as_i64().unwrap_or(0) > 0 {
        let _ = writeln!(
            out,
            "      cost: {} over {} attempts, {:.1} s wall",
            crate::query::usage::core_hours_text(total["core_hours"].as_f64().unwrap_or(0.0)),
            total["attempts"],
            total["wall_s"].as_f64().unwrap_or(0.0)
        );
    }
}

/// The metrics the text shows (see [`SHOWN_METRICS`]), `name=value ± error`, from the
/// averages when there are any, else from the last good iteration.
fn shown_metrics(p: &Value, averaged: Option<&Map<String, Value>>) -> String {
    let empty_map = Map::new();
    let values_and_errors: Vec<(&String, f64, Option<f64>)> = match averaged {
        Some(a) => a
            .iter()
            .map(|(k, v)| {
                (
                    k,
                    v["value"].as_f64().unwrap_or(f64::NAN),
                    v["error"].as_f64(),
                )
            })
            .collect(),
        None => p["metrics"]
            .as_object()
            .unwrap_or(&empty_map)
            .iter()
            .map(|(k, v)| {
                let e = p["errors"][k.as_str()].as_f64();
                (k, v.as_f64().unwrap_or(f64::NAN), e)
            })
            .collect(),
    };
    values_and_errors
        .into_iter()
        .filter(|(k, _, _)| SHOWN_METRICS.iter().any(|m| k.ends_with(m)))
        .map(|(k, v, e)| format!("{k}={}", format_measurement(v, e)))
        .collect::<Vec<_>>()
        .join(" ")
}
