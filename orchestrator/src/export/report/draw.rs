//! Drawing each kind of report figure: the convergence of one point, energy versus volume
//! with the fitted equations of state, the configuration-probability panels, and the
//! overview of all points (|change| per iteration, final values against a sweep axis).

use anyhow::Result;
use plotters::coord::Shift;
use plotters::prelude::*;
use rondo_numerics::eos::EosModel;

use super::plot::{
    decimals, draw_legend, draw_series, extent, log_range, model_name, pe, positive, range, Curve,
    Finals, Series, OVERVIEW_LEGEND_MAX,
};
use super::style::{look, plain, tint, Dash, Look, Shape, PALETTE};

/// A point's convergence: per metric, its values and (log scale) |change| per iteration.
pub fn convergence<DB>(
    root: &DrawingArea<DB, Shift>,
    title: &str,
    rows: &[(String, Series, Series)],
) -> Result<()>
where
    DB: DrawingBackend,
    DB::ErrorType: 'static,
{
    let body = titled(root, title)?;
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
    Ok(())
}

/// Energy versus volume: data markers per temperature, and the fits in the same colour.
pub fn eos<DB>(
    root: &DrawingArea<DB, Shift>,
    data: &[Series],
    curves: &[Curve],
    x_label: &str,
    y_label: &str,
) -> Result<()>
where
    DB: DrawingBackend,
    DB::ErrorType: 'static,
{
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
        .x_desc(x_label.to_string())
        .y_desc(y_label.to_string())
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
    Ok(())
}

/// Configuration probabilities: one panel per temperature, a series per metric.
pub fn panels<DB>(
    root: &DrawingArea<DB, Shift>,
    panels: &[(String, Vec<Series>)],
    x_label: &str,
    y_label: &str,
) -> Result<()>
where
    DB: DrawingBackend,
    DB::ErrorType: 'static,
{
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
            .x_desc(x_label.to_string())
            .y_desc(y_label.to_string())
            .y_label_formatter(&|y| format!("{y:.2}"))
            .draw()
            .map_err(pe)?;
        for (i, s) in series.iter().enumerate() {
            draw_series(&mut c, s, look(i), true)?;
        }
        // probabilities sum to one: the middle is where the curves are least often
        draw_legend(&mut c, SeriesLabelPosition::MiddleRight)?;
    }
    Ok(())
}

/// The overview: every point's |change| per iteration (left), and with `finals` the final
/// values against a sweep axis (right).
pub fn overview<DB>(
    root: &DrawingArea<DB, Shift>,
    title: &str,
    metric: &str,
    changes: &[Series],
    finals: Option<&Finals>,
) -> Result<()>
where
    DB: DrawingBackend,
    DB::ErrorType: 'static,
{
    let body = titled(root, title)?;
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
        overview_finals(&areas[1], metric, f)?;
    }
    Ok(())
}

/// The right panel of the overview: the metric at each point's last good iteration, the
/// points that did not converge ringed.
fn overview_finals<DB>(area: &DrawingArea<DB, Shift>, metric: &str, f: &Finals) -> Result<()>
where
    DB: DrawingBackend,
    DB::ErrorType: 'static,
{
    let (x0, x1) = range(
        f.groups.iter().flat_map(|s| s.points.iter().map(|p| p.0)),
        0.05,
    );
    let (y0, y1) = range(extent(&f.groups), 0.1);
    let prec = decimals(y1 - y0);
    let mut c = ChartBuilder::on(area)
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
        .y_desc(metric.to_string())
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
    Ok(())
}

/// Draw a figure's title in a 36-pixel band at the top; the area below it.
fn titled<DB>(root: &DrawingArea<DB, Shift>, title: &str) -> Result<DrawingArea<DB, Shift>>
where
    DB: DrawingBackend,
    DB::ErrorType: 'static,
{
    let (top, body) = root.split_vertically(36);
    top.draw(&Text::new(
        title.to_string(),
        (12, 8),
        ("sans-serif", 22).into_font(),
    ))
    .map_err(pe)?;
    Ok(body)
}
