//! Campaign reports: an overview of all points, convergence, equation-of-state and
//! configuration-probability figures
//! (SVG and PNG, text drawn with a shipped font so no system fonts are needed), a table of
//! converged observables with error bars, an `index.html` that shows them, every figure's
//! data as CSV, and the report's own provenance (the `reports`, `report_outputs` and
//! `report_sources` tables): every file of the folder is stored as an artifact and linked to
//! the attempts whose metrics it shows, so that a report CSV traces back to its inputs.
//!
//! The parts: `data` (the points and metrics a report reads), `style` (series looks),
//! `plot` and `draw` (the figures), `figures` and `eos` (each figure's data, CSV and files),
//! `html` (tables and `index.html`), `folder` (the report folder being built), `record`
//! (storing the files and recording the generation). Reads through [`crate::query`] and
//! [`crate::store::reads`]; knows no engine and no scheduler.

// first: its `marker!` and `swatch!` macros are used by the modules after it
#[macro_use]
mod style;

mod data;
mod draw;
mod eos;
mod figures;
mod folder;
mod html;
mod plot;
mod record;

use std::path::{Path, PathBuf};
use std::sync::OnceLock;

use anyhow::{bail, Context, Result};
use plotters::style::FontStyle;
use rondo_numerics::eos as eos_fit;
use serde::Serialize;
use sqlx::SqlitePool;

/// Schema of the report provenance tables (store migration 2).
pub use crate::store::reads::reports::REPORT_SCHEMA;

static FONT: &[u8] = include_bytes!("../../../assets/fonts/DejaVuSans.ttf");

/// Register the shipped font as `sans-serif` (once per process).
pub fn register_fonts() -> Result<()> {
    static DONE: OnceLock<bool> = OnceLock::new();
    let ok = *DONE.get_or_init(|| {
        plotters::style::register_font("sans-serif", FontStyle::Normal, FONT).is_ok()
            && plotters::style::register_font("sans-serif", FontStyle::Bold, FONT).is_ok()
    });
    if !ok {
        bail!("the shipped plot font (DejaVu Sans) could not be loaded");
    }
    Ok(())
}

/// Create the report provenance tables if the store does not have them yet.
pub async fn ensure_schema(pool: &SqlitePool) -> Result<()> {
    crate::store::reads::reports::ensure_tables(pool).await
}

// options, progress, summary

/// Which sweep axes and metrics the report uses.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct ReportOptions {
    /// Sweep axis of the volume (Å³).
    pub volume_axis: String,
    /// Sweep axis of the temperature (K).
    pub temperature_axis: String,
    /// Metric with the total energy (eV).
    pub energy_metric: String,
    /// Metrics with the configuration probabilities.
    pub probability_metrics: Vec<String>,
    /// Metrics of the convergence plots; empty: those of the campaign's stop rules (or the
    /// energy when there are none).
    pub convergence_metrics: Vec<String>,
    /// Command line to record as the report's argv.
    pub argv: Vec<String>,
    /// Include the points a revision retired, marked `retired in revision N`
    /// (`--with-retired`).
    pub with_retired: bool,
}

impl Default for ReportOptions {
    fn default() -> Self {
        Self {
            volume_axis: "volume".into(),
            temperature_axis: "temperature".into(),
            energy_metric: "update.energy".into(),
            probability_metrics: vec!["solve.p0".into(), "solve.p1".into(), "solve.p2".into()],
            convergence_metrics: Vec::new(),
            argv: vec!["rondo".into(), "report".into()],
            with_retired: false,
        }
    }
}

/// Progress of a report generation.
#[derive(Debug, Clone, PartialEq, Eq, Serialize)]
pub struct Progress {
    /// Steps done.
    pub done: usize,
    /// Steps in all.
    pub total: usize,
    /// What is being done now.
    pub step: String,
}

/// A figure of the report.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct FigureInfo {
    /// File stem: `<name>.svg`, `<name>.png`, `<name>.csv`.
    pub name: String,
    /// Title.
    pub title: String,
    /// SVG file name.
    pub svg: String,
    /// PNG file name.
    pub png: String,
    /// CSV file name.
    pub csv: String,
}

/// An equation-of-state fit of one temperature.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct EosRow {
    /// Temperature (K); `None` without a temperature axis.
    pub temperature: Option<f64>,
    /// The fit.
    pub fit: eos_fit::EosFit,
}

/// A recorded report file.
#[derive(Debug, Clone, PartialEq, Eq, Serialize)]
pub struct ReportFile {
    /// File name in the report folder.
    pub name: String,
    /// Its BLAKE3 (artifact hash).
    pub blake3: String,
}

/// What [`generate`] made.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct ReportSummary {
    /// Report id in the store.
    pub report_id: i64,
    /// The report folder.
    pub out_dir: PathBuf,
    /// Figures.
    pub figures: Vec<FigureInfo>,
    /// Tables (CSV file names).
    pub tables: Vec<String>,
    /// Equation-of-state fits made.
    pub eos: Vec<EosRow>,
    /// Things the report could not do, and why.
    pub notes: Vec<String>,
    /// Every file written, with its artifact hash.
    pub files: Vec<ReportFile>,
}

// ---------------------------------------------------------------------------------------
// data

/// Generate the report with the default options (see [`generate_with`]).
pub async fn generate(
    pool: &SqlitePool,
    ws: &Path,
    out_dir: &Path,
    progress: &mut dyn FnMut(&Progress),
) -> Result<ReportSummary> {
    generate_with(pool, ws, out_dir, &ReportOptions::default(), progress).await
}

/// Generate the report folder `out_dir` of the workspace `ws`: figures (SVG + PNG + CSV),
/// tables (CSV), `index.html`; the folder is built beside `out_dir` and moved into place
/// when complete (a previous report there is replaced). Every file is stored as an artifact
/// and recorded as an output of a new report generation, with the attempts behind it.
pub async fn generate_with(
    pool: &SqlitePool,
    ws: &Path,
    out_dir: &Path,
    opts: &ReportOptions,
    progress: &mut dyn FnMut(&Progress),
) -> Result<ReportSummary> {
    register_fonts()?;
    let started_at = chrono::Utc::now().to_rfc3339_opts(chrono::SecondsFormat::Secs, true);
    let camp = crate::query::campaign(pool).await?;
    let spec_text = crate::store::campaign_row(pool)
        .await?
        .map(|c| c.spec_text)
        .unwrap_or_default();
    let points = data::load_points(pool, opts.with_retired).await?;
    if points.is_empty() {
        bail!(
            "campaign {} has no points recorded; nothing to report",
            camp.name
        );
    }
    let conv_metrics = data::convergence_metrics(opts, &spec_text);
    let costs = crate::query::usage::costs(pool).await?;
    let stage_outputs = data::load_stage_outputs(pool).await?;
    let artifacts = crate::artifacts::ArtifactStore::open(&ws.join("store"))
        .with_context(|| format!("{}: cannot open the artifact store", ws.display()))?;
    let heading = html::Heading {
        name: camp.name.clone(),
        revisions: crate::store::revisions::list(pool)
            .await?
            .into_iter()
            .map(|r| (r.number, r.spec_blake3, r.created_at, r.accepted))
            .collect(),
        retired: crate::store::revisions::stored_points(pool)
            .await?
            .iter()
            .filter(|p| p.retired_in.is_some())
            .count(),
        retired_included: opts.with_retired,
    };
    let place = record::Placement::prepare(out_dir)?;
    let built = folder::build(
        &place.tmp,
        &points,
        opts,
        &conv_metrics,
        &heading,
        folder::Sections {
            costs: &costs,
            stage_outputs: &stage_outputs,
            artifacts: &artifacts,
        },
        progress,
    );
    let mut built = match built {
        Ok(x) => x,
        Err(e) => {
            place.abandon();
            return Err(e);
        }
    };
    let html_sources = built.all_sources.clone();
    built.out.add("index.html", &html_sources);
    let total = built.figures.len() + 3;
    progress(&Progress {
        done: total - 1,
        total,
        step: "recording the report's provenance".into(),
    });
    let files = record::store_files(ws, &place.tmp, &built.out)?;
    let report_id =
        record::record(pool, opts, &place.out_dir, &started_at, &built.out, &files).await?;
    place.finish()?;
    progress(&Progress {
        done: total,
        total,
        step: "done".into(),
    });
    Ok(ReportSummary {
        report_id,
        out_dir: place.out_dir,
        figures: built.figures,
        tables: built.tables,
        eos: built.eos_rows,
        notes: built.notes,
        files: files
            .into_iter()
            .map(|(name, blake3, _)| ReportFile { name, blake3 })
            .collect(),
    })
}
