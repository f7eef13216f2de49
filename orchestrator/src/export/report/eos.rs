//! The energy-versus-volume figure `eos.{svg,png,csv}` and the table `eos-fits.csv`: the
//! converged points per temperature and, with enough volumes, the Birch-Murnaghan and Vinet
//! fits of each temperature.

use std::collections::BTreeSet;
use std::fmt::Write as _;

use anyhow::Result;
use rondo_numerics::eos::{self, EosModel, MIN_VOLUMES};

use super::data::{t_label, Groups};
use super::folder::{csv_field, figure, num, opt_num, Folder};
use super::plot::{model_name, render, Curve, Plot, Series};
use super::{EosRow, ReportOptions};

/// The figure's data as it is gathered: series, curves and both CSV texts.
struct EosData {
    data: Vec<Series>,
    curves: Vec<Curve>,
    csv: String,
    fits_csv: String,
}

/// Make the energy-versus-volume figure and the fits table, or a note why not.
pub fn energy_volume(f: &mut Folder<'_>, opts: &ReportOptions, groups: &Groups<'_>) -> Result<()> {
    let mut d = EosData {
        data: Vec::new(),
        curves: Vec::new(),
        csv: String::from("kind,temperature,volume,energy,error,point\n"),
        fits_csv: String::from(
            "temperature,model,e0,e0_stderr,v0,v0_stderr,b0_ev_per_a3,b0_stderr,b0_gpa,b0_gpa_stderr,b0_prime,b0_prime_stderr,rss,volumes\n",
        ),
    };
    let mut src = BTreeSet::new();
    for (t, pts) in groups.values() {
        let mut s = Series {
            label: t_label(*t),
            points: Vec::new(),
        };
        for p in pts {
            if !p.is_converged() {
                continue;
            }
            let (Some(v), Some(e)) = (p.axis(&opts.volume_axis), p.converged(&opts.energy_metric))
            else {
                continue;
            };
            src.insert(e.attempt);
            s.points.push((v, e.value, e.error));
            let _ = writeln!(
                d.csv,
                "data,{},{},{},{},{}",
                opt_num(*t),
                num(v),
                num(e.value),
                opt_num(e.error),
                csv_field(&p.id)
            );
        }
        s.points.sort_by(|a, b| a.0.total_cmp(&b.0));
        let skipped = pts.iter().filter(|p| !p.is_converged()).count();
        if skipped > 0 {
            f.notes.push(format!(
                "{}: {skipped} point(s) not converged are left out of the equation-of-state data",
                t_label(*t)
            ));
        }
        if s.points.is_empty() {
            continue;
        }
        fit_group(f, &mut d, *t, &s);
        d.data.push(s);
    }
    if d.data.is_empty() {
        f.notes.push(format!(
            "no converged point has both the sweep axis `{}` and the metric `{}`; no energy-volume figure",
            opts.volume_axis, opts.energy_metric
        ));
        return Ok(());
    }
    let plot = Plot::Eos {
        data: d.data,
        curves: d.curves,
        x_label: format!("{} (Å³)", opts.volume_axis),
        y_label: format!("{} (eV)", opts.energy_metric),
    };
    render(f.dir, "eos", (1000, 700), &plot)?;
    f.write("eos.csv", &d.csv)?;
    f.write("eos-fits.csv", &d.fits_csv)?;
    let files = ["eos.svg", "eos.png", "eos.csv", "eos-fits.csv"].map(String::from);
    f.publish(&files, &src);
    f.figures.push(figure(
        "eos",
        "Energy versus volume with fitted equations of state",
    ));
    Ok(())
}

/// Fit both models to one temperature's series `s` (the next data series), weighted by the
/// reported errors when every energy has one; with too few volumes, a note instead.
fn fit_group(f: &mut Folder<'_>, d: &mut EosData, t: Option<f64>, s: &Series) {
    let vols: Vec<f64> = s.points.iter().map(|p| p.0).collect();
    let ens: Vec<f64> = s.points.iter().map(|p| p.1).collect();
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
    let idx = d.data.len();
    if distinct < MIN_VOLUMES {
        f.notes.push(format!(
            "{}: {distinct} converged volume(s); an equation-of-state fit needs at least {MIN_VOLUMES}, so only the points are shown",
            t_label(t)
        ));
        return;
    }
    for model in [EosModel::BirchMurnaghan3, EosModel::Vinet] {
        match eos::fit(model, &vols, &ens, sigma.as_deref()) {
            Ok(fit) => {
                let (v0, v1) = (vols[0], vols[vols.len() - 1]);
                let pts: Vec<(f64, f64)> = (0..=120)
                    .map(|k| {
                        let v = v0 + (v1 - v0) * k as f64 / 120.0;
                        (v, eos::energy(model, &fit.params(), v))
                    })
                    .collect();
                write_fit(d, t, model, &fit, &pts, vols.len());
                d.curves.push((idx, model, pts));
                f.eos_rows.push(EosRow {
                    temperature: t,
                    fit,
                });
            }
            Err(e) => f.notes.push(format!(
                "{}: {} fit refused: {e}",
                t_label(t),
                model_name(model)
            )),
        }
    }
}

/// One fit's rows: every fourth curve sample in `eos.csv`, its parameters in
/// `eos-fits.csv`.
fn write_fit(
    d: &mut EosData,
    t: Option<f64>,
    model: EosModel,
    f: &eos::EosFit,
    pts: &[(f64, f64)],
    volumes: usize,
) {
    for (v, e) in pts.iter().step_by(4) {
        let _ = writeln!(
            d.csv,
            "{},{},{},{},,",
            match model {
                EosModel::BirchMurnaghan3 => "fit-birch-murnaghan-3",
                EosModel::Vinet => "fit-vinet",
            },
            opt_num(t),
            num(*v),
            num(*e)
        );
    }
    let _ = writeln!(
        d.fits_csv,
        "{},{},{},{},{},{},{},{},{},{},{},{},{},{}",
        opt_num(t),
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
        volumes
    );
}
