//! The report folder being built: the files written so far with the attempts behind each,
//! the figures, the notes (what the report could not do, and why), and [`build`], which
//! makes every figure, table and `index.html` in turn; plus the text helpers of CSV and
//! HTML.

use std::collections::{BTreeMap, BTreeSet};
use std::fs;
use std::path::Path;

use anyhow::{Context, Result};
use serde_json::Value;

use super::data::{by_temperature, PointData};
use super::{eos, figures, html, EosRow, FigureInfo, Progress, ReportOptions};

/// The files of a report with the attempts behind each.
pub struct Output {
    /// file name → attempts behind it
    pub sources: BTreeMap<String, BTreeSet<i64>>,
}

impl Output {
    /// Note `file` with the attempts `src` behind it.
    pub fn add(&mut self, file: &str, src: &BTreeSet<i64>) {
        self.sources
            .entry(file.to_string())
            .or_default()
            .extend(src.iter().copied());
    }
}

/// A report folder being built.
pub struct Folder<'a> {
    /// Where the files go.
    pub dir: &'a Path,
    /// The files written, with their sources.
    pub out: Output,
    /// The figures made, in the order `index.html` shows them.
    pub figures: Vec<FigureInfo>,
    /// The tables (CSV file names).
    pub tables: Vec<String>,
    /// The equation-of-state fits made.
    pub eos_rows: Vec<EosRow>,
    /// What the report could not do, and why.
    pub notes: Vec<String>,
    /// The attempts behind any file (those behind `index.html`).
    pub all_sources: BTreeSet<i64>,
}

impl Folder<'_> {
    /// Write `text` to `file` in the folder.
    pub fn write(&self, file: &str, text: &str) -> Result<()> {
        fs::write(self.dir.join(file), text).with_context(|| format!("cannot write {file}"))
    }

    /// Note the files written, with the attempts behind them.
    pub fn publish(&mut self, files: &[String], src: &BTreeSet<i64>) {
        for f in files {
            self.out.add(f, src);
        }
        self.all_sources.extend(src.iter().copied());
    }

    /// Publish a figure's SVG, PNG and CSV with the attempts behind them.
    pub fn publish_figure(&mut self, name: &str, src: &BTreeSet<i64>) {
        let files = ["svg", "png", "csv"].map(|ext| format!("{name}.{ext}"));
        self.publish(&files, src);
    }
}

/// The figure `<name>.{svg,png,csv}` titled `title`.
pub fn figure(name: &str, title: &str) -> FigureInfo {
    FigureInfo {
        name: name.to_string(),
        title: title.to_string(),
        svg: format!("{name}.svg"),
        png: format!("{name}.png"),
        csv: format!("{name}.csv"),
    }
}

/// What the report's sections after the observables show: the cost, and the outputs of
/// the `after-campaign:` stages (copied from the artifact store).
pub struct Sections<'s> {
    /// What the attempts cost.
    pub costs: &'s crate::query::usage::Costs,
    /// The outputs of the `after-campaign:` stage runs.
    pub stage_outputs: &'s [super::data::StageOutput],
    /// The workspace's artifact store.
    pub artifacts: &'s crate::artifacts::ArtifactStore,
}

/// Build every file of the report in `dir`: a convergence figure per point, the overview,
/// energy versus volume, configuration probabilities, the observables table, the
/// outputs of the `after-campaign:` stages and `index.html`, calling `progress` before each step.
pub fn build<'a>(
    dir: &'a Path,
    points: &[PointData],
    opts: &ReportOptions,
    conv_metrics: &[String],
    campaign: &html::Heading,
    sections: Sections<'_>,
    progress: &mut dyn FnMut(&Progress),
) -> Result<Folder<'a>> {
    let mut f = Folder {
        dir,
        out: Output {
            sources: BTreeMap::new(),
        },
        figures: Vec::new(),
        tables: Vec::new(),
        eos_rows: Vec::new(),
        notes: Vec::new(),
        all_sources: BTreeSet::new(),
    };
    let total = points.len() + 3 + 3;
    let mut done = 0;
    let mut step = |what: String| {
        progress(&Progress {
            done,
            total,
            step: what,
        });
        done += 1;
    };
    for p in points {
        step(format!("convergence of {}", p.id));
        figures::convergence(&mut f, p, conv_metrics)?;
    }
    let groups = by_temperature(points, opts);
    step("overview".into());
    if let Some(main) = conv_metrics.first() {
        figures::overview(&mut f, points, main, opts, &groups)?;
    }
    step("energy versus volume".into());
    eos::energy_volume(&mut f, opts, &groups)?;
    step("configuration probabilities".into());
    figures::probabilities(&mut f, opts, &groups)?;
    step("tables".into());
    let table = html::observables(&mut f, points, opts.with_retired)?;
    let cost = html::cost(&mut f, sections.costs)?;
    let after = html::after_campaign(&mut f, sections.stage_outputs, sections.artifacts)?;
    f.tables = ["observables.csv", "eos-fits.csv", "cost.csv"]
        .into_iter()
        .filter(|t| f.out.sources.contains_key(*t))
        .map(String::from)
        .collect();
    step("index.html".into());
    html::index(&f, campaign, &table, &(after + &cost))?;
    Ok(f)
}

/// A CSV field, quoted when it holds a comma, quote or line break.
pub fn csv_field(s: &str) -> String {
    if s.contains([',', '"', '\n']) {
        format!("\"{}\"", s.replace('"', "\"\""))
    } else {
        s.to_string()
    }
}

/// A number as CSV writes it (the shortest text that reads back the same).
pub fn num(v: f64) -> String {
    format!("{v}")
}

/// An optional number as CSV writes it (empty when absent).
pub fn opt_num(v: Option<f64>) -> String {
    v.map(num).unwrap_or_default()
}

/// Text escaped for HTML.
pub fn html_escape(s: &str) -> String {
    s.replace('&', "&amp;")
        .replace('<', "&lt;")
        .replace('>', "&gt;")
        .replace('"', "&quot;")
}

/// A value with its error bar, as the HTML tables show it.
pub fn fmt_pm(v: f64, e: Option<f64>) -> String {
    match e {
        Some(e) if e > 0.0 => format!("{v:.6} ± {e:.2e}"),
        _ => format!("{v:.8}"),
    }
}

/// A sweep value as text (strings without quotes).
pub fn axis_text(v: &Value) -> String {
    match v {
        Value::String(s) => s.clone(),
        other => other.to_string(),
    }
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
}
