//! Campaign reports: an overview of all points, convergence, equation-of-state and
//! configuration-probability figures
//! (SVG and PNG, text drawn with a shipped font so no system fonts are needed), a table of
//! converged observables with error bars, an `index.html` that shows them, every figure's
//! data as CSV, and the report's own provenance (the `reports`, `report_outputs` and
//! `report_sources` tables): every file of the folder is stored as an artifact and linked to
//! the attempts whose metrics it shows, so that a report CSV traces back to its inputs.

use std::collections::{BTreeMap, BTreeSet};
use std::fmt::Write as _;
use std::fs;
use std::path::{Path, PathBuf};
use std::sync::OnceLock;

use anyhow::{anyhow, bail, Context, Result};
use plotters::coord::Shift;
use plotters::element::DashedPathElement;
use plotters::prelude::*;
use rondo_numerics::eos::{self, EosModel, MIN_VOLUMES};
use serde::Serialize;
use serde_json::Value;
use sqlx::{Row, SqlitePool};

use crate::artifacts::ArtifactStore;
use crate::audit::{AttemptRecord, ProgramRef};

/// Schema of the report provenance tables (store migration 2).
pub const REPORT_SCHEMA: &str = include_str!("../migrations/0002_report_provenance.sql");

static FONT: &[u8] = include_bytes!("../assets/fonts/DejaVuSans.ttf");

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
    if !has_report_tables(pool).await? {
        sqlx::raw_sql(REPORT_SCHEMA)
            .execute(pool)
            .await
            .context("cannot create the report provenance tables")?;
    }
    Ok(())
}

async fn has_report_tables(pool: &SqlitePool) -> Result<bool> {
    let n: i64 = sqlx::query_scalar(
        "SELECT COUNT(*) FROM sqlite_master WHERE type = 'table'
         AND name IN ('reports', 'report_outputs', 'report_sources')",
    )
    .fetch_one(pool)
    .await
    .context("cannot read the workspace schema")?;
    Ok(n == 3)
}

/// Ids of all recorded report generations.
pub async fn report_ids(pool: &SqlitePool) -> Result<Vec<i64>> {
    if !has_report_tables(pool).await? {
        return Ok(Vec::new());
    }
    Ok(sqlx::query_scalar("SELECT id FROM reports ORDER BY id")
        .fetch_all(pool)
        .await?)
}

/// Report generations that wrote the artifact `hash`, as lineage records whose `sources`
/// are the attempts behind that file.
pub async fn producing_reports(pool: &SqlitePool, hash: &str) -> Result<Vec<AttemptRecord>> {
    if !has_report_tables(pool).await? {
        return Ok(Vec::new());
    }
    let ids: Vec<i64> = sqlx::query_scalar(
        "SELECT DISTINCT report_id FROM report_outputs WHERE artifact = ? ORDER BY report_id",
    )
    .bind(hash)
    .fetch_all(pool)
    .await?;
    let mut out = Vec::new();
    for id in ids {
        out.push(load_report(pool, id, Some(hash)).await?);
    }
    Ok(out)
}

/// One report generation as a lineage record (kind and stage `report`, executor `builtin`,
/// program = the rondo executable, parameters = the report options). `sources` lists the
/// attempts behind the outputs with hash `for_hash`, or behind every output with `None`.
pub async fn load_report(
    pool: &SqlitePool,
    id: i64,
    for_hash: Option<&str>,
) -> Result<AttemptRecord> {
    // Every column: `program_unknown` is absent from stores made before migration 4.
    let r = sqlx::query("SELECT * FROM reports WHERE id = ?")
        .bind(id)
        .fetch_optional(pool)
        .await?
        .with_context(|| format!("report {id} is not recorded"))?;
    let argv_json: String = r.try_get("argv_json")?;
    let options_json: String = r.try_get("options_json")?;
    let ended_at: Option<String> = r.try_get("ended_at")?;
    let rondo_version: String = r.try_get("rondo_version")?;
    let mut rec = AttemptRecord {
        kind: "report".into(),
        id,
        point: None,
        iteration: None,
        stage: "report".into(),
        attempt: 1,
        state: if ended_at.is_some() {
            "succeeded"
        } else {
            "running"
        }
        .into(),
        argv: serde_json::from_str(&argv_json)
            .with_context(|| format!("report {id}: malformed argv_json"))?,
        workdir: Some(r.try_get("out_dir")?),
        executor: "builtin".into(),
        job_id: None,
        host: r.try_get("host")?,
        started_at: r.try_get("started_at")?,
        ended_at,
        exit_status: None,
        failure_kind: None,
        program: ProgramRef {
            path: r.try_get("program_path")?,
            blake3: r.try_get("program_blake3")?,
            version: Some(rondo_version.clone()),
        },
        program_unknown: r.try_get("program_unknown").ok().flatten(),
        parameters: serde_json::from_str(&options_json)
            .with_context(|| format!("report {id}: malformed options_json"))?,
        seed: None,
        rondo_version,
        inputs: Default::default(),
        outputs: Default::default(),
        metrics: Default::default(),
        sources: Vec::new(),
    };
    let rows =
        sqlx::query("SELECT role, artifact FROM report_outputs WHERE report_id = ? ORDER BY role")
            .bind(id)
            .fetch_all(pool)
            .await?;
    for row in rows {
        rec.outputs.insert(row.try_get(0)?, row.try_get(1)?);
    }
    rec.sources = match for_hash {
        Some(h) => {
            sqlx::query_scalar(
                "SELECT DISTINCT s.attempt_id FROM report_sources s
             JOIN report_outputs o ON o.report_id = s.report_id AND o.role = s.role
             WHERE s.report_id = ? AND o.artifact = ? ORDER BY s.attempt_id",
            )
            .bind(id)
            .bind(h)
            .fetch_all(pool)
            .await?
        }
        None => {
            sqlx::query_scalar(
                "SELECT DISTINCT attempt_id FROM report_sources WHERE report_id = ?
             ORDER BY attempt_id",
            )
            .bind(id)
            .fetch_all(pool)
            .await?
        }
    };
    Ok(rec)
}

// ---------------------------------------------------------------------------------------
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
    pub fit: eos::EosFit,
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

#[derive(Debug, Clone, Copy)]
struct Sample {
    value: f64,
    error: Option<f64>,
    attempt: i64,
}

#[derive(Debug, Clone)]
struct PointData {
    id: String,
    values: serde_json::Map<String, Value>,
    state: String,
    /// metric → iteration → sample (good iterations, succeeded attempts).
    metrics: BTreeMap<String, BTreeMap<i64, Sample>>,
    last_good: Option<i64>,
}

impl PointData {
    fn axis(&self, name: &str) -> Option<f64> {
        self.values.get(name).and_then(Value::as_f64)
    }

    fn converged(&self, metric: &str) -> Option<Sample> {
        let last = self.last_good?;
        self.metrics.get(metric)?.get(&last).copied()
    }
}

async fn load_points(pool: &SqlitePool) -> Result<Vec<PointData>> {
    let rows = sqlx::query("SELECT id, values_json, state FROM points ORDER BY idx")
        .fetch_all(pool)
        .await
        .context("cannot read the points")?;
    let mut pts = Vec::new();
    for r in rows {
        let id: String = r.try_get(0)?;
        let vj: String = r.try_get(1)?;
        let values = match serde_json::from_str::<Value>(&vj) {
            Ok(Value::Object(m)) => m,
            _ => bail!("point {id}: malformed values_json in the store"),
        };
        pts.push(PointData {
            id,
            values,
            state: r.try_get(2)?,
            metrics: BTreeMap::new(),
            last_good: None,
        });
    }
    let rows = sqlx::query(
        "SELECT a.point, a.iteration, a.id, m.name, m.value, m.error
         FROM metrics m JOIN attempts a ON a.id = m.attempt_id
         JOIN iterations i ON i.point = a.point AND i.iteration = a.iteration
         WHERE a.state = 'succeeded' AND i.state = 'good'
         ORDER BY a.point, a.iteration, a.id",
    )
    .fetch_all(pool)
    .await
    .context("cannot read the metrics")?;
    let index: BTreeMap<String, usize> = pts
        .iter()
        .enumerate()
        .map(|(i, p)| (p.id.clone(), i))
        .collect();
    for r in rows {
        let point: String = r.try_get(0)?;
        let Some(&i) = index.get(&point) else {
            continue;
        };
        let it: i64 = r.try_get(1)?;
        let s = Sample {
            attempt: r.try_get(2)?,
            value: r.try_get(4)?,
            error: r.try_get(5)?,
        };
        let name: String = r.try_get(3)?;
        pts[i].metrics.entry(name).or_default().insert(it, s);
    }
    let rows = sqlx::query(
        "SELECT point, MAX(iteration) FROM iterations WHERE state = 'good' GROUP BY point",
    )
    .fetch_all(pool)
    .await?;
    for r in rows {
        let point: String = r.try_get(0)?;
        if let Some(&i) = index.get(&point) {
            pts[i].last_good = r.try_get(1)?;
        }
    }
    Ok(pts)
}

fn stop_metrics(spec_text: &str) -> Vec<String> {
    let Ok(stop) = crate::audit::stop_section(spec_text) else {
        return Vec::new();
    };
    let mut out = Vec::new();
    if let Some(rules) = stop.get("when").and_then(Value::as_array) {
        for r in rules {
            if let Some(m) = r.get("metric").and_then(Value::as_str) {
                if !out.iter().any(|x| x == m) {
                    out.push(m.to_string());
                }
            }
        }
    }
    out
}

// ---------------------------------------------------------------------------------------
// plots

/// The report's series colours: the qualitative palette of M. Okabe and K. Ito, "Color
/// Universal Design (CUD): how to make figures and presentations that are friendly to
/// colorblind people" (2008), as published there: #0072B2 blue, #D55E00 vermillion, #009E73
/// bluish green, #CC79A7 reddish purple, #E69F00 orange, #56B4E9 sky blue. Its yellow
/// (#F0E442) is left out because thin lines in it vanish on white, and its black is the
/// colour of the axes and text.
const PALETTE: [RGBColor; 6] = [
    RGBColor(0x00, 0x72, 0xB2),
    RGBColor(0xD5, 0x5E, 0x00),
    RGBColor(0x00, 0x9E, 0x73),
    RGBColor(0xCC, 0x79, 0xA7),
    RGBColor(0xE6, 0x9F, 0x00),
    RGBColor(0x56, 0xB4, 0xE9),
];

/// Line pattern of a series.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
enum Dash {
    Solid,
    Dashed,
    Dotted,
}

impl Dash {
    /// (drawn, gap) lengths in pixels; `None` for a solid line.
    fn pattern(self) -> Option<(u32, u32)> {
        match self {
            Dash::Solid => None,
            Dash::Dashed => Some((9, 5)),
            Dash::Dotted => Some((3, 4)),
        }
    }
}

/// Marker shape of a series. Only the disc is filled, so a hollow marker drawn on the same
/// spot leaves the one below it visible.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
enum Shape {
    Disc,
    Triangle,
    Square,
    Diamond,
    Cross,
    Ring,
}

/// How one series is drawn.
#[derive(Debug, Clone, Copy, PartialEq)]
struct Look {
    color: RGBColor,
    dash: Dash,
    shape: Option<Shape>,
    /// line width in pixels
    width: u32,
}

/// The look of the `i`-th series of a figure. Colour, line pattern and marker all change
/// from one series to the next (30 series before a combination repeats), so the figure
/// reads without colour and curves that coincide stay distinguishable: the solid line is the
/// widest and is drawn first, so a dashed or dotted curve on top of it leaves it visible in
/// the gaps, and the hollow markers leave the filled disc visible.
fn look(i: usize) -> Look {
    const DASHES: [Dash; 3] = [Dash::Solid, Dash::Dashed, Dash::Dotted];
    const SHAPES: [Shape; 5] = [
        Shape::Disc,
        Shape::Triangle,
        Shape::Square,
        Shape::Diamond,
        Shape::Cross,
    ];
    let dash = DASHES[i % DASHES.len()];
    Look {
        color: PALETTE[i % PALETTE.len()],
        dash,
        shape: Some(SHAPES[i % SHAPES.len()]),
        width: if dash == Dash::Solid { 3 } else { 2 },
    }
}

/// `c` moved the fraction `f` of the way to white.
fn tint(c: RGBColor, f: f64) -> RGBColor {
    let m = |x: u8| (f64::from(x) + (255.0 - f64::from(x)) * f).round() as u8;
    RGBColor(m(c.0), m(c.1), m(c.2))
}

/// A single series' look: solid line, filled discs.
fn plain(color: RGBColor) -> Look {
    Look {
        color,
        dash: Dash::Solid,
        shape: Some(Shape::Disc),
        width: 2,
    }
}

/// Length of a legend swatch's line in pixels.
const SWATCH: i32 = 28;

/// A pixel offset from an element's anchor.
type Px = (i32, i32);

/// The marker of a look as pixel offsets around its anchor: a filled polygon and an
/// outline (every shape is both, so that markers of all shapes have one element type;
/// hollow shapes fill with a transparent colour, which draws nothing).
fn marker_parts(look: &Look) -> (Vec<Px>, ShapeStyle, Vec<Px>, ShapeStyle) {
    let ngon = |r: f64, n: usize| -> Vec<Px> {
        (0..=n)
            .map(|k| {
                let a = std::f64::consts::TAU * k as f64 / n as f64;
                ((r * a.cos()).round() as i32, (r * a.sin()).round() as i32)
            })
            .collect()
    };
    let line = look.color.stroke_width(2);
    let hollow = TRANSPARENT.filled();
    let Some(shape) = look.shape else {
        return (Vec::new(), hollow, Vec::new(), line);
    };
    let outline = match shape {
        Shape::Disc => {
            let p = ngon(4.5, 16);
            return (
                p.clone(),
                look.color.filled(),
                p,
                look.color.stroke_width(1),
            );
        }
        Shape::Ring => ngon(8.0, 24),
        Shape::Triangle => vec![(0, -7), (6, 4), (-6, 4), (0, -7)],
        Shape::Square => vec![(-5, -5), (5, -5), (5, 5), (-5, 5), (-5, -5)],
        Shape::Diamond => vec![(0, -7), (7, 0), (0, 7), (-7, 0), (0, -7)],
        Shape::Cross => vec![(-5, -5), (5, 5), (0, 0), (-5, 5), (5, -5)],
    };
    (outline.clone(), hollow, outline, line)
}

/// The marker of `$look` at `$at` (data coordinates) as one element.
macro_rules! marker {
    ($at:expr, $look:expr) => {{
        let (fill, fill_style, outline, line_style) = marker_parts(&$look);
        EmptyElement::at($at)
            + Polygon::new(fill, fill_style)
            + PathElement::new(outline, line_style)
    }};
}

/// The legend swatch of `$look` at the legend anchor `$at`: a line of [`SWATCH`] pixels in
/// the look's pattern (with `$line`) and the look's marker in its middle.
macro_rules! swatch {
    ($at:expr, $look:expr, $line:expr) => {{
        let look: Look = $look;
        let (fill, fill_style, outline, line_style) = marker_parts(&look);
        let mid =
            |v: Vec<Px>| -> Vec<Px> { v.into_iter().map(|(x, y)| (x + SWATCH / 2, y)).collect() };
        // a solid line is a dash longer than the swatch
        let (on, off) = look.dash.pattern().unwrap_or((1000, 1));
        let path: Vec<Px> = if $line {
            vec![(0, 0), (SWATCH, 0)]
        } else {
            vec![(0, 0)]
        };
        EmptyElement::at($at)
            + DashedPathElement::new(path, on, off, look.color.stroke_width(look.width))
            + Polygon::new(mid(fill), fill_style)
            + PathElement::new(mid(outline), line_style)
    }};
}

#[derive(Debug, Clone)]
struct Series {
    label: String,
    /// (x, y, error)
    points: Vec<(f64, f64, Option<f64>)>,
}

/// A fitted curve: index of its data series, model, (volume, energy) samples.
type Curve = (usize, EosModel, Vec<(f64, f64)>);

/// The right panel of the overview: the main metric at each point's last good iteration
/// against a sweep axis.
#[derive(Debug, Clone)]
struct Finals {
    x_label: String,
    /// one series per group of points (temperature)
    groups: Vec<Series>,
    /// (x, y) of the points that did not converge
    unconverged: Vec<(f64, f64)>,
}

#[derive(Debug, Clone)]
enum Plot {
    /// rows of (metric name, values vs iteration, |change| vs iteration)
    Convergence {
        title: String,
        rows: Vec<(String, Series, Series)>,
    },
    /// per temperature: data series and fitted curves (label, model, points)
    Eos {
        data: Vec<Series>,
        curves: Vec<Curve>,
        x_label: String,
        y_label: String,
    },
    /// one panel per temperature, series per probability metric
    Panels {
        panels: Vec<(String, Vec<Series>)>,
        x_label: String,
        y_label: String,
    },
    /// every point: |change| of the main metric vs iteration (one series per point), and
    /// the final values against a sweep axis
    Overview {
        title: String,
        metric: String,
        changes: Vec<Series>,
        finals: Option<Finals>,
    },
}

/// Most legend entries a panel of the overview shows; with more points the left panel has
/// no legend (overview.csv names them).
const OVERVIEW_LEGEND_MAX: usize = 12;

fn pe<E: std::fmt::Debug>(e: E) -> anyhow::Error {
    anyhow!("drawing failed: {e:?}")
}

fn range(vals: impl Iterator<Item = f64>, pad: f64) -> (f64, f64) {
    let (mut lo, mut hi) = (f64::INFINITY, f64::NEG_INFINITY);
    for v in vals.filter(|v| v.is_finite()) {
        lo = lo.min(v);
        hi = hi.max(v);
    }
    if !lo.is_finite() {
        return (0.0, 1.0);
    }
    if hi - lo <= 1e-300_f64.max(1e-12 * hi.abs()) {
        let d = if hi == 0.0 { 1.0 } else { 0.05 * hi.abs() };
        return (lo - d, hi + d);
    }
    let d = (hi - lo) * pad;
    (lo - d, hi + d)
}

fn extent(s: &[Series]) -> impl Iterator<Item = f64> + '_ {
    s.iter().flat_map(|s| {
        s.points.iter().flat_map(|&(_, y, e)| {
            let e = e.unwrap_or(0.0);
            [y - e, y + e]
        })
    })
}

/// Positive values of a series (for a log axis), same label.
fn positive(s: &Series) -> Series {
    Series {
        label: s.label.clone(),
        points: s
            .points
            .iter()
            .copied()
            .filter(|p| p.1 > 0.0 && p.1.is_finite())
            .collect(),
    }
}

/// Log-axis range of positive values: a factor 3 beyond the extremes.
fn log_range(vals: impl Iterator<Item = f64>) -> Option<(f64, f64)> {
    let pos: Vec<f64> = vals.filter(|v| *v > 0.0 && v.is_finite()).collect();
    if pos.is_empty() {
        return None;
    }
    let lo = pos.iter().copied().fold(f64::INFINITY, f64::min) / 3.0;
    let hi = pos.iter().copied().fold(0.0, f64::max) * 3.0;
    Some((lo, hi))
}

/// Draw a series as a line in its pattern, error bars, and its markers on top; with
/// `legend`, label it with a swatch of both.
fn draw_series<'a, DB, CT>(
    chart: &mut ChartContext<'a, DB, CT>,
    s: &Series,
    look: Look,
    legend: bool,
) -> Result<()>
where
    DB: DrawingBackend + 'a,
    DB::ErrorType: 'static,
    CT: CoordTranslate<From = (f64, f64)>,
{
    let pts: Vec<(f64, f64)> = s.points.iter().map(|&(x, y, _)| (x, y)).collect();
    let style = look.color.stroke_width(look.width);
    let anno = match look.dash.pattern() {
        None => chart
            .draw_series(LineSeries::new(pts.clone(), style))
            .map_err(pe)?,
        Some((on, off)) => chart
            .draw_series(DashedLineSeries::new(pts.clone(), on, off, style))
            .map_err(pe)?,
    };
    if legend {
        anno.label(s.label.clone())
            .legend(move |c| swatch!(c, look, true));
    }
    for &(x, y, e) in &s.points {
        if let Some(e) = e.filter(|e| *e > 0.0) {
            chart
                .draw_series(std::iter::once(PathElement::new(
                    vec![(x, y - e), (x, y + e)],
                    look.color.stroke_width(1),
                )))
                .map_err(pe)?;
        }
    }
    if look.shape.is_some() {
        chart
            .draw_series(pts.iter().map(|&p| marker!(p, look)))
            .map_err(pe)?;
    }
    Ok(())
}

fn draw_legend<'a, DB, CT>(
    chart: &mut ChartContext<'a, DB, CT>,
    at: SeriesLabelPosition,
) -> Result<()>
where
    DB: DrawingBackend + 'a,
    DB::ErrorType: 'static,
    CT: CoordTranslate,
{
    chart
        .configure_series_labels()
        .position(at)
        .legend_area_size(SWATCH + 6)
        .background_style(WHITE.mix(0.85))
        .border_style(BLACK)
        .label_font(("sans-serif", 14))
        .draw()
        .map_err(pe)
}

fn draw<DB: DrawingBackend>(root: &DrawingArea<DB, Shift>, plot: &Plot) -> Result<()>
where
    DB::ErrorType: 'static,
{
    root.fill(&WHITE).map_err(pe)?;
    match plot {
        Plot::Convergence { title, rows } => {
            let (top, body) = root.split_vertically(36);
            top.draw(&Text::new(
                title.clone(),
                (12, 8),
                ("sans-serif", 22).into_font(),
            ))
            .map_err(pe)?;
            let areas = body.split_evenly((rows.len().max(1), 2));
            for (r, (name, values, change)) in rows.iter().enumerate() {
                let lk = plain(PALETTE[r % PALETTE.len()]);
                let n_it = values.points.iter().map(|p| p.0).fold(1.0_f64, f64::max);
                let (y0, y1) = range(extent(std::slice::from_ref(values)), 0.1);
                let prec = decimals(y1 - y0);
                let mut c = ChartBuilder::on(&areas[2 * r])
                    .margin(10)
                    .x_label_area_size(36)
                    .y_label_area_size(90)
                    .caption(name.clone(), ("sans-serif", 16))
                    .build_cartesian_2d(0.5..n_it + 0.5, y0..y1)
                    .map_err(pe)?;
                c.configure_mesh()
                    .x_desc("iteration")
                    .y_desc(name.clone())
                    .x_labels((n_it as usize + 1).min(21))
                    .x_label_formatter(&|x| format!("{x:.0}"))
                    .y_label_formatter(&|y| format!("{y:.prec$}"))
                    .draw()
                    .map_err(pe)?;
                draw_series(&mut c, values, lk, false)?;
                let area = &areas[2 * r + 1];
                let Some((lo, hi)) = log_range(change.points.iter().map(|p| p.1)) else {
                    area.draw(&Text::new(
                        format!("|Δ {name}|: needs two iterations"),
                        (20, 40),
                        ("sans-serif", 16).into_font(),
                    ))
                    .map_err(pe)?;
                    continue;
                };
                let mut c = ChartBuilder::on(area)
                    .margin(10)
                    .x_label_area_size(36)
                    .y_label_area_size(90)
                    .caption(format!("|Δ {name}| (log scale)"), ("sans-serif", 16))
                    .build_cartesian_2d(0.5..n_it + 0.5, (lo..hi).log_scale())
                    .map_err(pe)?;
                c.configure_mesh()
                    .light_line_style(WHITE)
                    .y_labels(6)
                    .x_desc("iteration")
                    .y_desc("|change|")
                    .x_labels((n_it as usize + 1).min(21))
                    .x_label_formatter(&|x| format!("{x:.0}"))
                    .y_label_formatter(&|y| format!("{y:.0e}"))
                    .draw()
                    .map_err(pe)?;
                draw_series(&mut c, &positive(change), lk, false)?;
            }
        }
        Plot::Eos {
            data,
            curves,
            x_label,
            y_label,
        } => {
            let (x0, x1) = range(data.iter().flat_map(|s| s.points.iter().map(|p| p.0)), 0.05);
            let (y0, y1) = range(
                extent(data).chain(curves.iter().flat_map(|c| c.2.iter().map(|p| p.1))),
                0.08,
            );
            let prec = decimals(y1 - y0);
            let mut c = ChartBuilder::on(root)
                .margin(16)
                .x_label_area_size(44)
                .y_label_area_size(90)
                .caption("Energy versus volume", ("sans-serif", 22))
                .build_cartesian_2d(x0..x1, y0..y1)
                .map_err(pe)?;
            c.configure_mesh()
                .x_desc(x_label.clone())
                .y_desc(y_label.clone())
                .y_label_formatter(&|y| format!("{y:.prec$}"))
                .draw()
                .map_err(pe)?;
            // markers of temperature i: look(i)'s colour and shape; its fits in the same
            // colour, Birch-Murnaghan solid and Vinet dashed
            let marker_look = |i: usize| Look {
                dash: Dash::Solid,
                width: 2,
                ..look(i)
            };
            for (i, s) in data.iter().enumerate() {
                let lk = marker_look(i);
                c.draw_series(s.points.iter().map(|&(x, y, _)| marker!((x, y), lk)))
                    .map_err(pe)?
                    .label(s.label.clone())
                    .legend(move |at| swatch!(at, lk, false));
                for &(x, y, e) in &s.points {
                    if let Some(e) = e.filter(|e| *e > 0.0) {
                        c.draw_series(std::iter::once(PathElement::new(
                            vec![(x, y - e), (x, y + e)],
                            lk.color.stroke_width(1),
                        )))
                        .map_err(pe)?;
                    }
                }
            }
            // the two fits usually lie on top of each other: Birch-Murnaghan as a wide
            // light band, Vinet as dark dashes on it, both visible where they coincide
            for (i, model, pts) in curves {
                let color = PALETTE[*i % PALETTE.len()];
                let lk = match model {
                    EosModel::BirchMurnaghan3 => Look {
                        color: tint(color, 0.55),
                        dash: Dash::Solid,
                        shape: None,
                        width: 5,
                    },
                    EosModel::Vinet => Look {
                        color,
                        dash: Dash::Dashed,
                        shape: None,
                        width: 2,
                    },
                };
                let s = Series {
                    label: format!("{} {}", data[*i].label, model_name(*model)),
                    points: pts.iter().map(|&(x, y)| (x, y, None)).collect(),
                };
                draw_series(&mut c, &s, lk, true)?;
            }
            // the data markers again, on top of the curves
            for (i, s) in data.iter().enumerate() {
                let lk = marker_look(i);
                c.draw_series(s.points.iter().map(|&(x, y, _)| marker!((x, y), lk)))
                    .map_err(pe)?;
            }
            draw_legend(&mut c, SeriesLabelPosition::UpperMiddle)?;
        }
        Plot::Panels {
            panels,
            x_label,
            y_label,
        } => {
            let areas = root.split_evenly((1, panels.len().max(1)));
            for (area, (title, series)) in areas.iter().zip(panels) {
                let (x0, x1) = range(
                    series.iter().flat_map(|s| s.points.iter().map(|p| p.0)),
                    0.05,
                );
                let (y0, y1) = range(extent(series), 0.1);
                let mut c = ChartBuilder::on(area)
                    .margin(12)
                    .x_label_area_size(44)
                    .y_label_area_size(60)
                    .caption(title.clone(), ("sans-serif", 20))
                    .build_cartesian_2d(x0..x1, y0..y1)
                    .map_err(pe)?;
                c.configure_mesh()
                    .x_desc(x_label.clone())
                    .y_desc(y_label.clone())
                    .y_label_formatter(&|y| format!("{y:.2}"))
                    .draw()
                    .map_err(pe)?;
                for (i, s) in series.iter().enumerate() {
                    draw_series(&mut c, s, look(i), true)?;
                }
                // probabilities sum to one: the middle is where the curves are least often
                draw_legend(&mut c, SeriesLabelPosition::MiddleRight)?;
            }
        }
        Plot::Overview {
            title,
            metric,
            changes,
            finals,
        } => {
            let (top, body) = root.split_vertically(36);
            top.draw(&Text::new(
                title.clone(),
                (12, 8),
                ("sans-serif", 22).into_font(),
            ))
            .map_err(pe)?;
            let areas = body.split_evenly((1, if finals.is_some() { 2 } else { 1 }));
            let n_it = changes
                .iter()
                .flat_map(|s| s.points.iter().map(|p| p.0))
                .fold(1.0_f64, f64::max);
            match log_range(changes.iter().flat_map(|s| s.points.iter().map(|p| p.1))) {
                None => {
                    areas[0]
                        .draw(&Text::new(
                            format!("|Δ {metric}|: needs two iterations"),
                            (20, 40),
                            ("sans-serif", 16).into_font(),
                        ))
                        .map_err(pe)?;
                }
                Some((lo, hi)) => {
                    let legend = changes.len() <= OVERVIEW_LEGEND_MAX;
                    let caption = if legend {
                        format!("|Δ {metric}| between iterations (log scale)")
                    } else {
                        format!(
                            "|Δ {metric}| between iterations (log scale), {} points",
                            changes.len()
                        )
                    };
                    let mut c = ChartBuilder::on(&areas[0])
                        .margin(12)
                        .x_label_area_size(44)
                        .y_label_area_size(80)
                        .caption(caption, ("sans-serif", 16))
                        .build_cartesian_2d(0.5..n_it + 0.5, (lo..hi).log_scale())
                        .map_err(pe)?;
                    c.configure_mesh()
                        .light_line_style(WHITE)
                        .y_labels(8)
                        .x_desc("iteration")
                        .y_desc("|change|")
                        .x_labels((n_it as usize + 1).min(21))
                        .x_label_formatter(&|x| format!("{x:.0}"))
                        .y_label_formatter(&|y| format!("{y:.0e}"))
                        .draw()
                        .map_err(pe)?;
                    for (i, s) in changes.iter().enumerate() {
                        draw_series(&mut c, &positive(s), look(i), legend)?;
                    }
                    if legend {
                        draw_legend(&mut c, SeriesLabelPosition::UpperRight)?;
                    }
                }
            }
            if let Some(f) = finals {
                let (x0, x1) = range(
                    f.groups.iter().flat_map(|s| s.points.iter().map(|p| p.0)),
                    0.05,
                );
                let (y0, y1) = range(extent(&f.groups), 0.1);
                let prec = decimals(y1 - y0);
                let mut c = ChartBuilder::on(&areas[1])
                    .margin(12)
                    .x_label_area_size(44)
                    .y_label_area_size(90)
                    .caption(
                        format!("{metric} at the last good iteration"),
                        ("sans-serif", 16),
                    )
                    .build_cartesian_2d(x0..x1, y0..y1)
                    .map_err(pe)?;
                c.configure_mesh()
                    .x_desc(f.x_label.clone())
                    .y_desc(metric.clone())
                    .y_label_formatter(&|y| format!("{y:.prec$}"))
                    .draw()
                    .map_err(pe)?;
                for (i, s) in f.groups.iter().enumerate() {
                    draw_series(&mut c, s, look(i), true)?;
                }
                if !f.unconverged.is_empty() {
                    let ring = Look {
                        color: BLACK,
                        dash: Dash::Solid,
                        shape: Some(Shape::Ring),
                        width: 2,
                    };
                    c.draw_series(f.unconverged.iter().map(|&at| marker!(at, ring)))
                        .map_err(pe)?
                        .label("not converged")
                        .legend(move |at| swatch!(at, ring, false));
                }
                draw_legend(&mut c, SeriesLabelPosition::UpperRight)?;
            }
        }
    }
    root.present().map_err(pe)?;
    Ok(())
}

/// Decimals that resolve a tenth of `span` on an axis.
fn decimals(span: f64) -> usize {
    if !(span.is_finite() && span > 0.0) {
        return 3;
    }
    (-(span / 10.0).log10()).ceil().clamp(0.0, 12.0) as usize
}

fn model_name(m: EosModel) -> &'static str {
    match m {
        EosModel::BirchMurnaghan3 => "Birch-Murnaghan 3",
        EosModel::Vinet => "Vinet",
    }
}

/// Write `<stem>.svg` and `<stem>.png` of a plot into `dir`.
fn render(dir: &Path, stem: &str, size: (u32, u32), plot: &Plot) -> Result<()> {
    let mut svg = String::new();
    {
        let root = SVGBackend::with_string(&mut svg, size).into_drawing_area();
        draw(&root, plot).with_context(|| format!("{stem}.svg"))?;
    }
    fs::write(dir.join(format!("{stem}.svg")), svg)
        .with_context(|| format!("cannot write {stem}.svg"))?;
    let png = dir.join(format!("{stem}.png"));
    {
        let root = BitMapBackend::new(&png, size).into_drawing_area();
        draw(&root, plot).with_context(|| format!("{stem}.png"))?;
    }
    Ok(())
}

// ---------------------------------------------------------------------------------------
// generation

struct Output {
    /// file name → attempts behind it
    sources: BTreeMap<String, BTreeSet<i64>>,
}

impl Output {
    fn add(&mut self, file: &str, src: &BTreeSet<i64>) {
        self.sources
            .entry(file.to_string())
            .or_default()
            .extend(src.iter().copied());
    }
}

fn csv_field(s: &str) -> String {
    if s.contains([',', '"', '\n']) {
        format!("\"{}\"", s.replace('"', "\"\""))
    } else {
        s.to_string()
    }
}

fn num(v: f64) -> String {
    format!("{v}")
}

fn opt_num(v: Option<f64>) -> String {
    v.map(num).unwrap_or_default()
}

fn html_escape(s: &str) -> String {
    s.replace('&', "&amp;")
        .replace('<', "&lt;")
        .replace('>', "&gt;")
        .replace('"', "&quot;")
}

fn fmt_pm(v: f64, e: Option<f64>) -> String {
    match e {
        Some(e) if e > 0.0 => format!("{v:.6} ± {e:.2e}"),
        _ => format!("{v:.8}"),
    }
}

fn axis_text(v: &Value) -> String {
    match v {
        Value::String(s) => s.clone(),
        other => other.to_string(),
    }
}

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
    let camp = crate::audit::campaign(pool).await?;
    let spec_text: String = sqlx::query_scalar("SELECT spec_text FROM campaign WHERE id = 1")
        .fetch_one(pool)
        .await?;
    let points = load_points(pool).await?;
    if points.is_empty() {
        bail!(
            "campaign {} has no points recorded; nothing to report",
            camp.name
        );
    }
    let conv_metrics = if opts.convergence_metrics.is_empty() {
        let m = stop_metrics(&spec_text);
        if m.is_empty() {
            vec![opts.energy_metric.clone()]
        } else {
            m
        }
    } else {
        opts.convergence_metrics.clone()
    };

    // where to build
    let out_dir = if out_dir.is_absolute() {
        out_dir.to_path_buf()
    } else {
        std::env::current_dir()?.join(out_dir)
    };
    let parent = out_dir
        .parent()
        .with_context(|| format!("{}: not a folder path", out_dir.display()))?;
    let name = out_dir
        .file_name()
        .with_context(|| format!("{}: not a folder path", out_dir.display()))?
        .to_string_lossy()
        .to_string();
    if out_dir.exists() && !out_dir.join("index.html").is_file() {
        let empty = fs::read_dir(&out_dir)
            .map(|mut d| d.next().is_none())
            .unwrap_or(false);
        if !empty {
            bail!(
                "{} exists and is not a rondo report (no index.html); choose another --out folder",
                out_dir.display()
            );
        }
    }
    fs::create_dir_all(parent).with_context(|| format!("{}: cannot create", parent.display()))?;
    let tmp = parent.join(format!(".{name}.tmp-{}", std::process::id()));
    if tmp.exists() {
        fs::remove_dir_all(&tmp).with_context(|| format!("{}: cannot clear", tmp.display()))?;
    }
    fs::create_dir_all(&tmp).with_context(|| format!("{}: cannot create", tmp.display()))?;
    let result = build(&tmp, &points, opts, &conv_metrics, &camp.name, progress);
    let (figures, tables, eos_rows, notes, out, html_sources) = match result {
        Ok(x) => x,
        Err(e) => {
            let _ = fs::remove_dir_all(&tmp);
            return Err(e);
        }
    };
    let mut out = out;
    out.add("index.html", &html_sources);
    let total = figures.len() + 3;

    // store every file and record the report
    progress(&Progress {
        done: total - 1,
        total,
        step: "recording the report's provenance".into(),
    });
    let store = ArtifactStore::open(&ws.join("store"))
        .with_context(|| format!("{}: cannot open the artifact store", ws.display()))?;
    let mut files = Vec::new();
    for (file, _) in out.sources.iter() {
        let p = tmp.join(file);
        let (hash, size) = store
            .put_file(&p)
            .with_context(|| format!("{}: cannot store", p.display()))?;
        files.push((file.clone(), hash, size));
    }
    let exe = crate::analysis::OwnProgram::current();
    ensure_schema(pool).await?;
    let mut tx = pool.begin().await?;
    let now = chrono::Utc::now().to_rfc3339_opts(chrono::SecondsFormat::Secs, true);
    let r = sqlx::query(
        "INSERT INTO reports(argv_json, out_dir, options_json, program_path, program_blake3,
             program_unknown, host, started_at, ended_at, rondo_version) VALUES (?,?,?,?,?,?,?,?,?,?)",
    )
    .bind(serde_json::to_string(&opts.argv)?)
    .bind(out_dir.display().to_string())
    .bind(serde_json::to_string(opts)?)
    .bind(exe.path.display().to_string())
    .bind(exe.hash())
    .bind(exe.unknown())
    .bind(crate::store::hostname())
    .bind(&started_at)
    .bind(&now)
    .bind(env!("CARGO_PKG_VERSION"))
    .execute(&mut *tx)
    .await?;
    let report_id = r.last_insert_rowid();
    for (file, hash, size) in &files {
        sqlx::query(
            "INSERT OR IGNORE INTO artifacts(hash, size, original_name, created_at) VALUES (?,?,?,?)",
        )
        .bind(hash)
        .bind(*size as i64)
        .bind(file)
        .bind(&now)
        .execute(&mut *tx)
        .await?;
        sqlx::query("INSERT INTO report_outputs(report_id, role, artifact) VALUES (?,?,?)")
            .bind(report_id)
            .bind(file)
            .bind(hash)
            .execute(&mut *tx)
            .await?;
        for a in out.sources.get(file).into_iter().flatten() {
            sqlx::query("INSERT INTO report_sources(report_id, role, attempt_id) VALUES (?,?,?)")
                .bind(report_id)
                .bind(file)
                .bind(a)
                .execute(&mut *tx)
                .await?;
        }
    }
    tx.commit().await.context("cannot record the report")?;

    // move into place
    if out_dir.exists() {
        let old = parent.join(format!(".{name}.old-{}", std::process::id()));
        fs::rename(&out_dir, &old).with_context(|| {
            format!(
                "{}: cannot move the previous report aside",
                out_dir.display()
            )
        })?;
        fs::rename(&tmp, &out_dir)
            .with_context(|| format!("{}: cannot move the report into place", out_dir.display()))?;
        let _ = fs::remove_dir_all(&old);
    } else {
        fs::rename(&tmp, &out_dir)
            .with_context(|| format!("{}: cannot move the report into place", out_dir.display()))?;
    }
    progress(&Progress {
        done: total,
        total,
        step: "done".into(),
    });
    Ok(ReportSummary {
        report_id,
        out_dir,
        figures,
        tables,
        eos: eos_rows,
        notes,
        files: files
            .into_iter()
            .map(|(name, blake3, _)| ReportFile { name, blake3 })
            .collect(),
    })
}

/// Points grouped by temperature: sort key → (temperature, points).
type Groups<'a> = BTreeMap<String, (Option<f64>, Vec<&'a PointData>)>;

fn t_label(t: Option<f64>) -> String {
    match t {
        Some(t) => format!("T = {t} K"),
        None => "all points".to_string(),
    }
}

/// The overview figure `overview.{svg,png,csv}`: the |change| of `main` between iterations
/// for every point (left), and its value at each point's last good iteration against the
/// volume axis (or the first numeric sweep axis), one series per temperature (right).
/// Returns the figure and the attempts behind it, or `None` (with a note) when no point
/// recorded `main`.
fn overview(
    dir: &Path,
    points: &[PointData],
    main: &str,
    opts: &ReportOptions,
    groups: &Groups<'_>,
    out: &mut Output,
    notes: &mut Vec<String>,
) -> Result<Option<(FigureInfo, BTreeSet<i64>)>> {
    let mut changes = Vec::new();
    let mut csv = String::from("point,state,metric,iteration,value,error,abs_change\n");
    let mut src = BTreeSet::new();
    for p in points {
        let Some(series) = p.metrics.get(main) else {
            continue;
        };
        let label = if p.state == "converged" {
            p.id.clone()
        } else {
            format!("{} ({})", p.id, p.state)
        };
        let mut change = Series {
            label,
            points: Vec::new(),
        };
        let mut prev: Option<f64> = None;
        for (&it, s) in series {
            src.insert(s.attempt);
            let d = prev.map(|q| (s.value - q).abs());
            if let Some(d) = d {
                change.points.push((it as f64, d, None));
            }
            let _ = writeln!(
                csv,
                "{},{},{},{},{},{},{}",
                csv_field(&p.id),
                csv_field(&p.state),
                csv_field(main),
                it,
                num(s.value),
                opt_num(s.error),
                opt_num(d)
            );
            prev = Some(s.value);
        }
        changes.push(change);
    }
    if changes.is_empty() {
        notes.push(format!(
            "no point recorded {main} in a good iteration; no overview figure"
        ));
        return Ok(None);
    }
    // right panel: the volume axis, else the first axis with numbers
    let x_axis = if points.iter().any(|p| p.axis(&opts.volume_axis).is_some()) {
        Some(opts.volume_axis.clone())
    } else {
        points
            .iter()
            .flat_map(|p| p.values.iter())
            .find(|(_, v)| v.is_number())
            .map(|(k, _)| k.clone())
    };
    let finals = x_axis.map(|x_axis| {
        // grouped by temperature unless the temperature is the x axis
        let by_t = x_axis != opts.temperature_axis;
        let mut sets: Vec<(String, Vec<&PointData>)> = Vec::new();
        if by_t {
            for (t, pts) in groups.values() {
                sets.push((t_label(*t), pts.clone()));
            }
        } else {
            sets.push(("all points".into(), points.iter().collect()));
        }
        let mut series = Vec::new();
        let mut unconverged = Vec::new();
        for (label, pts) in sets {
            let mut s = Series {
                label,
                points: Vec::new(),
            };
            for p in pts {
                let (Some(x), Some(v)) = (p.axis(&x_axis), p.converged(main)) else {
                    continue;
                };
                s.points.push((x, v.value, v.error));
                if p.state != "converged" {
                    unconverged.push((x, v.value));
                }
            }
            s.points.sort_by(|a, b| a.0.total_cmp(&b.0));
            if !s.points.is_empty() {
                series.push(s);
            }
        }
        Finals {
            x_label: if x_axis == opts.volume_axis {
                format!("{x_axis} (Å³)")
            } else if x_axis == opts.temperature_axis {
                format!("{x_axis} (K)")
            } else {
                x_axis
            },
            groups: series,
            unconverged,
        }
    });
    let finals = finals.filter(|f| !f.groups.is_empty());
    let title = format!("Overview: {main} at all {} points", changes.len());
    let size = if finals.is_some() {
        (1500, 640)
    } else {
        (900, 640)
    };
    let plot = Plot::Overview {
        title: title.clone(),
        metric: main.to_string(),
        changes,
        finals,
    };
    render(dir, "overview", size, &plot)?;
    fs::write(dir.join("overview.csv"), &csv).context("cannot write overview.csv")?;
    for f in ["overview.svg", "overview.png", "overview.csv"] {
        out.add(f, &src);
    }
    let fig = FigureInfo {
        name: "overview".into(),
        title,
        svg: "overview.svg".into(),
        png: "overview.png".into(),
        csv: "overview.csv".into(),
    };
    Ok(Some((fig, src)))
}

type Built = (
    Vec<FigureInfo>,
    Vec<String>,
    Vec<EosRow>,
    Vec<String>,
    Output,
    BTreeSet<i64>,
);

fn build(
    dir: &Path,
    points: &[PointData],
    opts: &ReportOptions,
    conv_metrics: &[String],
    campaign: &str,
    progress: &mut dyn FnMut(&Progress),
) -> Result<Built> {
    let mut out = Output {
        sources: BTreeMap::new(),
    };
    let mut figures = Vec::new();
    let mut notes = Vec::new();
    let mut all_sources = BTreeSet::new();
    let n_fig = points.len() + 3;
    let total = n_fig + 3;
    let mut done = 0;
    let mut step = |done: &mut usize, what: String| {
        progress(&Progress {
            done: *done,
            total,
            step: what,
        });
        *done += 1;
    };
    let fig = |name: &str, title: &str| FigureInfo {
        name: name.to_string(),
        title: title.to_string(),
        svg: format!("{name}.svg"),
        png: format!("{name}.png"),
        csv: format!("{name}.csv"),
    };
    let write = |file: &str, text: &str| -> Result<()> {
        fs::write(dir.join(file), text).with_context(|| format!("cannot write {file}"))
    };

    // convergence per point
    for p in points {
        step(&mut done, format!("convergence of {}", p.id));
        let mut rows = Vec::new();
        let mut csv = String::from("point,metric,iteration,value,error,abs_change\n");
        let mut src = BTreeSet::new();
        for m in conv_metrics {
            let Some(series) = p.metrics.get(m) else {
                continue;
            };
            let mut values = Series {
                label: m.clone(),
                points: Vec::new(),
            };
            let mut change = Series {
                label: format!("|Δ {m}|"),
                points: Vec::new(),
            };
            let mut prev: Option<f64> = None;
            for (&it, s) in series {
                src.insert(s.attempt);
                values.points.push((it as f64, s.value, s.error));
                let d = prev.map(|q| (s.value - q).abs());
                if let Some(d) = d {
                    change.points.push((it as f64, d, None));
                }
                let _ = writeln!(
                    csv,
                    "{},{},{},{},{},{}",
                    csv_field(&p.id),
                    csv_field(m),
                    it,
                    num(s.value),
                    opt_num(s.error),
                    opt_num(d)
                );
                prev = Some(s.value);
            }
            rows.push((m.clone(), values, change));
        }
        if rows.is_empty() {
            notes.push(format!(
                "point {}: no good iteration recorded any of {}; no convergence figure",
                p.id,
                conv_metrics.join(", ")
            ));
            continue;
        }
        let name = format!("convergence-{}", p.id);
        let title = format!(
            "Convergence of {} ({})",
            p.id,
            p.values
                .iter()
                .map(|(k, v)| format!("{k} = {}", axis_text(v)))
                .collect::<Vec<_>>()
                .join(", ")
        );
        let plot = Plot::Convergence {
            title: title.clone(),
            rows: rows.clone(),
        };
        render(dir, &name, (1100, 40 + 300 * rows.len() as u32), &plot)?;
        write(&format!("{name}.csv"), &csv)?;
        for ext in ["svg", "png", "csv"] {
            out.add(&format!("{name}.{ext}"), &src);
        }
        all_sources.extend(src.iter().copied());
        figures.push(fig(&name, &title));
    }

    // group converged points by temperature
    let mut groups: Groups<'_> = BTreeMap::new();
    for p in points {
        let t = p.axis(&opts.temperature_axis);
        let key = t.map(|t| format!("{:020.6}", t)).unwrap_or_default();
        groups.entry(key).or_insert((t, Vec::new())).1.push(p);
    }

    // overview: every point's main metric (the first convergence metric)
    step(&mut done, "overview".into());
    if let Some(main) = conv_metrics.first() {
        overview(dir, points, main, opts, &groups, &mut out, &mut notes)?
            .into_iter()
            .for_each(|(f, src)| {
                all_sources.extend(src);
                figures.insert(0, f);
            });
    }

    // energy versus volume with the equation of state
    step(&mut done, "energy versus volume".into());
    let mut eos_rows = Vec::new();
    let mut data = Vec::new();
    let mut curves = Vec::new();
    let mut csv = String::from("kind,temperature,volume,energy,error,point\n");
    let mut fits_csv = String::from(
        "temperature,model,e0,e0_stderr,v0,v0_stderr,b0_ev_per_a3,b0_stderr,b0_gpa,b0_gpa_stderr,b0_prime,b0_prime_stderr,rss,volumes\n",
    );
    let mut src = BTreeSet::new();
    for (t, pts) in groups.values() {
        let mut s = Series {
            label: t_label(*t),
            points: Vec::new(),
        };
        for p in pts {
            if p.state != "converged" {
                continue;
            }
            let (Some(v), Some(e)) = (p.axis(&opts.volume_axis), p.converged(&opts.energy_metric))
            else {
                continue;
            };
            src.insert(e.attempt);
            s.points.push((v, e.value, e.error));
            let _ = writeln!(
                csv,
                "data,{},{},{},{},{}",
                opt_num(*t),
                num(v),
                num(e.value),
                opt_num(e.error),
                csv_field(&p.id)
            );
        }
        s.points.sort_by(|a, b| a.0.total_cmp(&b.0));
        let skipped = pts.iter().filter(|p| p.state != "converged").count();
        if skipped > 0 {
            notes.push(format!(
                "{}: {skipped} point(s) not converged are left out of the equation-of-state data",
                t_label(*t)
            ));
        }
        if s.points.is_empty() {
            continue;
        }
        let vols: Vec<f64> = s.points.iter().map(|p| p.0).collect();
        let ens: Vec<f64> = s.points.iter().map(|p| p.1).collect();
        // weighted by the reported errors when every energy has one
        let sigma: Option<Vec<f64>> = s
            .points
            .iter()
            .map(|p| p.2.filter(|e| *e > 0.0 && e.is_finite()))
            .collect();
        let distinct = vols
            .iter()
            .map(|v| v.to_bits())
            .collect::<BTreeSet<_>>()
            .len();
        let idx = data.len();
        if distinct < MIN_VOLUMES {
            notes.push(format!(
                "{}: {distinct} converged volume(s); an equation-of-state fit needs at least {MIN_VOLUMES}, so only the points are shown",
                t_label(*t)
            ));
        } else {
            for model in [EosModel::BirchMurnaghan3, EosModel::Vinet] {
                match eos::fit(model, &vols, &ens, sigma.as_deref()) {
                    Ok(f) => {
                        let (v0, v1) = (vols[0], vols[vols.len() - 1]);
                        let pts: Vec<(f64, f64)> = (0..=120)
                            .map(|k| {
                                let v = v0 + (v1 - v0) * k as f64 / 120.0;
                                (v, eos::energy(model, &f.params(), v))
                            })
                            .collect();
                        for (v, e) in pts.iter().step_by(4) {
                            let _ = writeln!(
                                csv,
                                "{},{},{},{},,",
                                match model {
                                    EosModel::BirchMurnaghan3 => "fit-birch-murnaghan-3",
                                    EosModel::Vinet => "fit-vinet",
                                },
                                opt_num(*t),
                                num(*v),
                                num(*e)
                            );
                        }
                        let _ = writeln!(
                            fits_csv,
                            "{},{},{},{},{},{},{},{},{},{},{},{},{},{}",
                            opt_num(*t),
                            model_name(model),
                            num(f.e0),
                            num(f.stderr[0]),
                            num(f.v0),
                            num(f.stderr[1]),
                            num(f.b0),
                            num(f.stderr[2]),
                            num(f.b0_gpa),
                            num(f.b0_gpa_stderr),
                            num(f.b0_prime),
                            num(f.stderr[3]),
                            num(f.rss),
                            vols.len()
                        );
                        curves.push((idx, model, pts));
                        eos_rows.push(EosRow {
                            temperature: *t,
                            fit: f,
                        });
                    }
                    Err(e) => notes.push(format!(
                        "{}: {} fit refused: {e}",
                        t_label(*t),
                        model_name(model)
                    )),
                }
            }
        }
        data.push(s);
    }
    if data.is_empty() {
        notes.push(format!(
            "no converged point has both the sweep axis `{}` and the metric `{}`; no energy-volume figure",
            opts.volume_axis, opts.energy_metric
        ));
    } else {
        let plot = Plot::Eos {
            data,
            curves,
            x_label: format!("{} (Å³)", opts.volume_axis),
            y_label: format!("{} (eV)", opts.energy_metric),
        };
        render(dir, "eos", (1000, 700), &plot)?;
        write("eos.csv", &csv)?;
        write("eos-fits.csv", &fits_csv)?;
        for f in ["eos.svg", "eos.png", "eos.csv", "eos-fits.csv"] {
            out.add(f, &src);
        }
        all_sources.extend(src.iter().copied());
        figures.push(fig(
            "eos",
            "Energy versus volume with fitted equations of state",
        ));
    }

    // configuration probabilities versus volume
    step(&mut done, "configuration probabilities".into());
    let mut panels = Vec::new();
    let mut csv = String::from("temperature,volume,metric,value,error,point\n");
    let mut src = BTreeSet::new();
    for (t, pts) in groups.values() {
        let mut series = Vec::new();
        for m in &opts.probability_metrics {
            let mut s = Series {
                label: m.clone(),
                points: Vec::new(),
            };
            for p in pts {
                let (Some(v), Some(x)) = (p.axis(&opts.volume_axis), p.converged(m)) else {
                    continue;
                };
                src.insert(x.attempt);
                s.points.push((v, x.value, x.error));
                let _ = writeln!(
                    csv,
                    "{},{},{},{},{},{}",
                    opt_num(*t),
                    num(v),
                    csv_field(m),
                    num(x.value),
                    opt_num(x.error),
                    csv_field(&p.id)
                );
            }
            s.points.sort_by(|a, b| a.0.total_cmp(&b.0));
            if !s.points.is_empty() {
                series.push(s);
            }
        }
        if !series.is_empty() {
            panels.push((t_label(*t), series));
        }
    }
    if panels.is_empty() {
        notes.push(format!(
            "no point recorded {}; no configuration-probability figure",
            opts.probability_metrics.join(", ")
        ));
    } else {
        let w = 560 * panels.len() as u32;
        let plot = Plot::Panels {
            panels,
            x_label: format!("{} (Å³)", opts.volume_axis),
            y_label: "probability".into(),
        };
        render(dir, "probabilities", (w.max(700), 600), &plot)?;
        write("probabilities.csv", &csv)?;
        for f in [
            "probabilities.svg",
            "probabilities.png",
            "probabilities.csv",
        ] {
            out.add(f, &src);
        }
        all_sources.extend(src.iter().copied());
        figures.push(fig(
            "probabilities",
            "Configuration probabilities versus volume",
        ));
    }

    // converged observables
    step(&mut done, "tables".into());
    let axes: Vec<String> = {
        let mut a: Vec<String> = Vec::new();
        for p in points {
            for k in p.values.keys() {
                if !a.contains(k) {
                    a.push(k.clone());
                }
            }
        }
        a
    };
    let metric_names: BTreeSet<&String> = points.iter().flat_map(|p| p.metrics.keys()).collect();
    let mut csv = String::from("point,");
    for a in &axes {
        csv.push_str(&csv_field(a));
        csv.push(',');
    }
    csv.push_str("state,iteration,metric,value,error\n");
    let mut table = String::from("<div class=\"wide\">\n<table>\n<thead><tr><th>point</th>");
    for a in &axes {
        let _ = write!(table, "<th>{}</th>", html_escape(a));
    }
    table.push_str("<th>state</th><th>iteration</th>");
    for m in &metric_names {
        let _ = write!(table, "<th>{}</th>", html_escape(m));
    }
    table.push_str("</tr></thead>\n<tbody>\n");
    let mut src = BTreeSet::new();
    for p in points {
        let _ = write!(table, "<tr><td>{}</td>", html_escape(&p.id));
        for a in &axes {
            let _ = write!(
                table,
                "<td>{}</td>",
                p.values.get(a).map(axis_text).unwrap_or_default()
            );
        }
        let _ = write!(
            table,
            "<td class=\"{0}\">{0}</td><td>{1}</td>",
            html_escape(&p.state),
            p.last_good
                .map(|i| i.to_string())
                .unwrap_or_else(|| "-".into())
        );
        for m in &metric_names {
            match p.converged(m) {
                Some(s) => {
                    src.insert(s.attempt);
                    let _ = write!(table, "<td>{}</td>", fmt_pm(s.value, s.error));
                    let _ = write!(csv, "{},", csv_field(&p.id));
                    for a in &axes {
                        let _ = write!(
                            csv,
                            "{},",
                            csv_field(&p.values.get(a).map(axis_text).unwrap_or_default())
                        );
                    }
                    let _ = writeln!(
                        csv,
                        "{},{},{},{},{}",
                        p.state,
                        p.last_good.unwrap_or(0),
                        csv_field(m),
                        num(s.value),
                        opt_num(s.error)
                    );
                }
                None => table.push_str("<td>-</td>"),
            }
        }
        table.push_str("</tr>\n");
    }
    table.push_str("</tbody>\n</table>\n</div>\n");
    write("observables.csv", &csv)?;
    out.add("observables.csv", &src);
    all_sources.extend(src.iter().copied());
    let tables = vec!["observables.csv".to_string(), "eos-fits.csv".to_string()]
        .into_iter()
        .filter(|t| out.sources.contains_key(t))
        .collect::<Vec<_>>();

    // index.html
    step(&mut done, "index.html".into());
    let mut html = String::new();
    let _ = write!(
        html,
        "<!DOCTYPE html>\n<html lang=\"en\">\n<head>\n<meta charset=\"utf-8\">\n\
         <title>rondo report: {c}</title>\n<style>\n\
         body {{ font-family: sans-serif; margin: 2em; color: #222; background: #fff; }}\n\
         figure {{ margin: 1.5em 0; }} img {{ max-width: 100%; border: 1px solid #ccc; }}\n\
         table {{ border-collapse: collapse; font-size: 0.9em; }}\n\
         th, td {{ border: 1px solid #bbb; padding: 0.25em 0.6em; text-align: right; white-space: nowrap; }}\n\
         th {{ background: #eef; }} td.failed, td.capped {{ color: #b00; }}\n\
         .notes li {{ color: #a50; }} .wide {{ overflow-x: auto; }}\n</style>\n</head>\n<body>\n\
         <h1>Campaign {c}</h1>\n",
        c = html_escape(campaign)
    );
    if !notes.is_empty() {
        html.push_str("<h2>Notes</h2>\n<ul class=\"notes\">\n");
        for n in &notes {
            let _ = writeln!(html, "<li>{}</li>", html_escape(n));
        }
        html.push_str("</ul>\n");
    }
    html.push_str("<h2>Converged observables</h2>\n<p>Values at each point's last good iteration; ± is the standard error the stage reported. Data: <a href=\"observables.csv\">observables.csv</a>.</p>\n");
    html.push_str(&table);
    if !eos_rows.is_empty() {
        html.push_str("<h2>Equation-of-state fits</h2>\n<p>Data: <a href=\"eos-fits.csv\">eos-fits.csv</a>.</p>\n<table>\n<thead><tr><th>temperature</th><th>model</th><th>E0 (eV)</th><th>V0 (Å³)</th><th>B0 (GPa)</th><th>B0′</th></tr></thead>\n<tbody>\n");
        for r in &eos_rows {
            let f = &r.fit;
            let _ = writeln!(
                html,
                "<tr><td>{}</td><td>{}</td><td>{}</td><td>{}</td><td>{}</td><td>{}</td></tr>",
                r.temperature.map(|t| format!("{t} K")).unwrap_or_default(),
                model_name(f.model),
                fmt_pm(f.e0, Some(f.stderr[0])),
                fmt_pm(f.v0, Some(f.stderr[1])),
                fmt_pm(f.b0_gpa, Some(f.b0_gpa_stderr)),
                fmt_pm(f.b0_prime, Some(f.stderr[3]))
            );
        }
        html.push_str("</tbody>\n</table>\n");
    }
    html.push_str("<h2>Figures</h2>\n");
    for f in &figures {
        let _ = writeln!(
            html,
            "<figure id=\"{n}\">\n<img src=\"{png}\" alt=\"{t}\">\n<figcaption>{t} — \
             <a href=\"{svg}\">SVG</a>, <a href=\"{png}\">PNG</a>, data <a href=\"{csv}\">{csv}</a></figcaption>\n</figure>",
            n = html_escape(&f.name),
            png = html_escape(&f.png),
            svg = html_escape(&f.svg),
            csv = html_escape(&f.csv),
            t = html_escape(&f.title)
        );
    }
    html.push_str("</body>\n</html>\n");
    write("index.html", &html)?;
    let _ = done;
    Ok((figures, tables, eos_rows, notes, out, all_sources))
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn csv_fields_are_quoted() {
        assert_eq!(csv_field("a,b"), "\"a,b\"");
        assert_eq!(csv_field("say \"x\""), "\"say \"\"x\"\"\"");
        assert_eq!(csv_field("plain"), "plain");
    }

    #[test]
    fn ranges_widen_flat_data() {
        let (lo, hi) = range([2.0, 2.0].into_iter(), 0.1);
        assert!(lo < 2.0 && hi > 2.0);
        let (lo, hi) = range(std::iter::empty(), 0.1);
        assert_eq!((lo, hi), (0.0, 1.0));
    }

    #[test]
    fn series_looks_differ_in_more_than_colour() {
        // 30 series before a (colour, pattern, marker) combination repeats
        let combos: BTreeSet<_> = (0..30)
            .map(|i| {
                let l = look(i);
                (l.color.rgb(), l.dash as u8, l.shape.map(|s| s as u8))
            })
            .collect();
        assert_eq!(combos.len(), 30);
        assert_eq!(look(30), look(0));
        // neighbours differ in pattern and marker, not only in colour
        for i in 0..29 {
            let (a, b) = (look(i), look(i + 1));
            assert_ne!(a.dash, b.dash);
            assert_ne!(a.shape, b.shape);
        }
        // the solid line is the widest, and only the disc is filled
        assert!(look(0).width > look(1).width && look(0).width > look(2).width);
        for i in 0..5 {
            let (fill, fill_style, _, _) = marker_parts(&look(i));
            let filled = !fill.is_empty() && fill_style.color.alpha() > 0.0;
            assert_eq!(filled, look(i).shape == Some(Shape::Disc), "{i}");
        }
    }

    #[test]
    fn palette_is_okabe_ito_without_yellow_and_black() {
        let hex: Vec<String> = PALETTE
            .iter()
            .map(|c| format!("#{:02X}{:02X}{:02X}", c.0, c.1, c.2))
            .collect();
        assert_eq!(
            hex,
            ["#0072B2", "#D55E00", "#009E73", "#CC79A7", "#E69F00", "#56B4E9"]
        );
        assert_eq!(tint(RGBColor(0, 100, 255), 0.5), RGBColor(128, 178, 255));
    }

    #[test]
    fn stop_rule_metrics_come_from_the_campaign_text() {
        let t = "campaign: x\nstop:\n  when:\n    - { metric: update.n_f, change-below: 1e-6 }\n    - { metric: solve.p0, within-errors: 2 }\n  max-iterations: 9\n";
        assert_eq!(stop_metrics(t), vec!["update.n_f", "solve.p0"]);
    }
}
