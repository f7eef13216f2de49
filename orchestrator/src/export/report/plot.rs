//! The report's figures as data ([`Plot`]: series, fitted curves, panels) and the shared
//! drawing parts: axis ranges, a series with error bars and markers, the legend, and
//! writing a plot as SVG and PNG. The drawing of each kind of figure is in `draw`.

use std::fs;
use std::path::Path;

use anyhow::{anyhow, Context, Result};
use plotters::coord::Shift;
use plotters::prelude::*;
use rondo_numerics::eos::EosModel;

use super::style::{Look, SWATCH};

/// A series of (x, y, error) points with its legend label.
#[derive(Debug, Clone)]
pub struct Series {
    pub label: String,
    /// (x, y, error)
    pub points: Vec<(f64, f64, Option<f64>)>,
}

/// A fitted curve: index of its data series, model, (volume, energy) samples.
pub type Curve = (usize, EosModel, Vec<(f64, f64)>);

/// The right panel of the overview: the main metric at each point's last good iteration
/// against a sweep axis.
#[derive(Debug, Clone)]
pub struct Finals {
    pub x_label: String,
    /// one series per group of points (temperature)
    pub groups: Vec<Series>,
    /// (x, y) of the points that did not converge
    pub unconverged: Vec<(f64, f64)>,
}

/// One figure.
#[derive(Debug, Clone)]
pub enum Plot {
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
pub const OVERVIEW_LEGEND_MAX: usize = 12;

/// A drawing error as an error of ours.
pub fn pe<E: std::fmt::Debug>(e: E) -> anyhow::Error {
    anyhow!("drawing failed: {e:?}")
}

/// Axis range of the finite values, widened by `pad` (flat data widened by 5 %).
pub fn range(vals: impl Iterator<Item = f64>, pad: f64) -> (f64, f64) {
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

/// The y values of series including their error bars.
pub fn extent(s: &[Series]) -> impl Iterator<Item = f64> + '_ {
    s.iter().flat_map(|s| {
        s.points.iter().flat_map(|&(_, y, e)| {
            let e = e.unwrap_or(0.0);
            [y - e, y + e]
        })
    })
}

/// Positive values of a series (for a log axis), same label.
pub fn positive(s: &Series) -> Series {
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
pub fn log_range(vals: impl Iterator<Item = f64>) -> Option<(f64, f64)> {
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
pub fn draw_series<'a, DB, CT>(
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

/// Draw the legend of the labelled series at `at`.
pub fn draw_legend<'a, DB, CT>(
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

/// Draw a plot on `root` (one function per kind of figure, in `draw`).
pub fn draw<DB: DrawingBackend>(root: &DrawingArea<DB, Shift>, plot: &Plot) -> Result<()>
where
    DB::ErrorType: 'static,
{
    root.fill(&WHITE).map_err(pe)?;
    match plot {
        Plot::Convergence { title, rows } => super::draw::convergence(root, title, rows)?,
        Plot::Eos {
            data,
            curves,
            x_label,
            y_label,
        } => super::draw::eos(root, data, curves, x_label, y_label)?,
        Plot::Panels {
            panels,
            x_label,
            y_label,
        } => super::draw::panels(root, panels, x_label, y_label)?,
        Plot::Overview {
            title,
            metric,
            changes,
            finals,
        } => super::draw::overview(root, title, metric, changes, finals.as_ref())?,
    }
    root.present().map_err(pe)?;
    Ok(())
}

/// Decimals that resolve a tenth of `span` on an axis.
pub fn decimals(span: f64) -> usize {
    if !(span.is_finite() && span > 0.0) {
        return 3;
    }
    (-(span / 10.0).log10()).ceil().clamp(0.0, 12.0) as usize
}

/// The name of an equation-of-state model in figures and tables.
pub fn model_name(m: EosModel) -> &'static str {
    match m {
        EosModel::BirchMurnaghan3 => "Birch-Murnaghan 3",
        EosModel::Vinet => "Vinet",
    }
}

/// Write `<stem>.svg` and `<stem>.png` of a plot into `dir`.
pub fn render(dir: &Path, stem: &str, size: (u32, u32), plot: &Plot) -> Result<()> {
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

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn ranges_widen_flat_data() {
        let (lo, hi) = range([2.0, 2.0].into_iter(), 0.1);
        assert!(lo < 2.0 && hi > 2.0);
        let (lo, hi) = range(std::iter::empty(), 0.1);
        assert_eq!((lo, hi), (0.0, 1.0));
    }
}
