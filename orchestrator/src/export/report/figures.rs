//! The data, CSV and files of the report's figures other than energy versus volume: the
//! convergence of each point, the overview of all points, and the configuration
//! probabilities.

use std::collections::BTreeSet;
use std::fmt::Write as _;

use anyhow::{Context, Result};

use super::data::{t_label, Groups, PointData};
use super::folder::{axis_text, csv_field, figure, num, opt_num, Folder};
use super::plot::{render, Finals, Plot, Series};
use super::ReportOptions;

/// `convergence-<point>.{svg,png,csv}`: per convergence metric, its values and |change|
/// per iteration; a note instead when the point recorded none of them.
pub fn convergence(f: &mut Folder<'_>, p: &PointData, conv_metrics: &[String]) -> Result<()> {
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
        f.notes.push(format!(
            "point {}: no good iteration recorded any of {}; no convergence figure",
            p.id,
            conv_metrics.join(", ")
        ));
        return Ok(());
    }
    let name = format!("convergence-{}", p.id);
    let title = format!(
        "Convergence of {} ({})",
        p.label(),
        p.values
            .iter()
            .map(|(k, v)| format!("{k} = {}", axis_text(v)))
            .collect::<Vec<_>>()
            .join(", ")
    );
    let height = 40 + 300 * rows.len() as u32;
    let plot = Plot::Convergence {
        title: title.clone(),
        rows,
    };
    render(f.dir, &name, (1100, height), &plot)?;
    f.write(&format!("{name}.csv"), &csv)?;
    f.publish_figure(&name, &src);
    f.figures.push(figure(&name, &title));
    Ok(())
}

/// The overview figure `overview.{svg,png,csv}`: the |change| of `main` between iterations
/// for every point (left), and its value at each point's last good iteration against the
/// volume axis (or the first numeric sweep axis), one series per temperature (right).
/// Shown first; a note instead when no point recorded `main`.
pub fn overview(
    f: &mut Folder<'_>,
    points: &[PointData],
    main: &str,
    opts: &ReportOptions,
    groups: &Groups<'_>,
) -> Result<()> {
    let mut changes = Vec::new();
    let mut csv = String::from("point,state,metric,iteration,value,error,abs_change\n");
    let mut src = BTreeSet::new();
    for p in points {
        let Some(series) = p.metrics.get(main) else {
            continue;
        };
        let label = if p.is_converged() {
            p.label()
        } else {
            format!("{} ({})", p.label(), p.state)
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
                csv_field(p.state.as_str()),
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
        f.notes.push(format!(
            "no point recorded {main} in a good iteration; no overview figure"
        ));
        return Ok(());
    }
    let finals = overview_finals(points, main, opts, groups).filter(|f| !f.groups.is_empty());
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
    render(f.dir, "overview", size, &plot)?;
    std::fs::write(f.dir.join("overview.csv"), &csv).context("cannot write overview.csv")?;
    f.publish_figure("overview", &src);
    f.figures.insert(0, figure("overview", &title));
    Ok(())
}

/// The right panel of the overview: `main` at each point's last good iteration against the
/// volume axis, else the first axis with numbers (`None` without one), one series per
/// temperature unless the temperature is that axis.
fn overview_finals(
    points: &[PointData],
    main: &str,
    opts: &ReportOptions,
    groups: &Groups<'_>,
) -> Option<Finals> {
    let x_axis = if points.iter().any(|p| p.axis(&opts.volume_axis).is_some()) {
        Some(opts.volume_axis.clone())
    } else {
        points
            .iter()
            .flat_map(|p| p.values.iter())
            .find(|(_, v)| v.is_number())
            .map(|(k, _)| k.clone())
    }?;
    let mut sets: Vec<(String, Vec<&PointData>)> = Vec::new();
    if x_axis != opts.temperature_axis {
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
            if !p.is_converged() {
                unconverged.push((x, v.value));
            }
        }
        s.points.sort_by(|a, b| a.0.total_cmp(&b.0));
        if !s.points.is_empty() {
            series.push(s);
        }
    }
    Some(Finals {
        x_label: if x_axis == opts.volume_axis {
            format!("{x_axis} (Å³)")
        } else if x_axis == opts.temperature_axis {
            format!("{x_axis} (K)")
        } else {
            x_axis
        },
        groups: series,
        unconverged,
    })
}

/// `probabilities.{svg,png,csv}`: the configuration probabilities versus volume, one panel
/// per temperature; a note instead when no point recorded them.
pub fn probabilities(f: &mut Folder<'_>, opts: &ReportOptions, groups: &Groups<'_>) -> Result<()> {
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
        f.notes.push(format!(
            "no point recorded {}; no configuration-probability figure",
            opts.probability_metrics.join(", ")
        ));
        return Ok(());
    }
    let w = 560 * panels.len() as u32;
    let plot = Plot::Panels {
        panels,
        x_label: format!("{} (Å³)", opts.volume_axis),
        y_label: "probability".into(),
    };
    render(f.dir, "probabilities", (w.max(700), 600), &plot)?;
    f.write("probabilities.csv", &csv)?;
    f.publish_figure("probabilities", &src);
    f.figures.push(figure(
        "probabilities",
        "Configuration probabilities versus volume",
    ));
    Ok(())
}
