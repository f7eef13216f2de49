//! The report's tables and page: the converged observables (`observables.csv` and its HTML
//! table) and `index.html` with the notes, the tables and every figure.

use std::collections::BTreeSet;
use std::fmt::Write as _;

use anyhow::{Context, Result};

use super::data::PointData;
use super::folder::{axis_text, csv_field, fmt_pm, html_escape, num, opt_num, Folder};
use super::plot::model_name;

/// The sweep axes of all points, in order of first appearance.
fn axes_of(points: &[PointData]) -> Vec<String> {
    let mut a: Vec<String> = Vec::new();
    for p in points {
        for k in p.values.keys() {
            if !a.contains(k) {
                a.push(k.clone());
            }
        }
    }
    a
}

/// `observables.csv` (one row per point and metric at the last good iteration; with the
/// column `retired_in` when `with_retired`, so the default file stays as it was) and the
/// HTML table of the same (one row per point); returns the table.
pub fn observables(f: &mut Folder<'_>, points: &[PointData], with_retired: bool) -> Result<String> {
    let axes = axes_of(points);
    let metric_names: BTreeSet<&String> = points.iter().flat_map(|p| p.metrics.keys()).collect();
    let mut csv = String::from("point,");
    for a in &axes {
        csv.push_str(&csv_field(a));
        csv.push(',');
    }
    csv.push_str(if with_retired {
        "state,iteration,metric,value,error,retired_in\n"
    } else {
        "state,iteration,metric,value,error\n"
    });
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
        let axis = |a: &String| p.values.get(a).map(axis_text).unwrap_or_default();
        let _ = write!(table, "<tr><td>{}</td>", html_escape(&p.label()));
        for a in &axes {
            let _ = write!(table, "<td>{}</td>", axis(a));
        }
        let _ = write!(
            table,
            "<td class=\"{0}\">{0}</td><td>{1}</td>",
            html_escape(p.state.as_str()),
            p.last_good
                .map(|i| i.to_string())
                .unwrap_or_else(|| "-".into())
        );
        for m in &metric_names {
            let Some(s) = p.converged(m) else {
                table.push_str("<td>-</td>");
                continue;
            };
            src.insert(s.attempt);
            let _ = write!(table, "<td>{}</td>", fmt_pm(s.value, s.error));
            let _ = write!(csv, "{},", csv_field(&p.id));
            for a in &axes {
                let _ = write!(csv, "{},", csv_field(&axis(a)));
            }
            let _ = write!(
                csv,
                "{},{},{},{},{}",
                p.state,
                p.last_good.unwrap_or(0),
                csv_field(m),
                num(s.value),
                opt_num(s.error),
            );
            if with_retired {
                let n = p.retired_in.map(|n| n.to_string()).unwrap_or_default();
                let _ = write!(csv, ",{n}");
            }
            csv.push('\n');
        }
        table.push_str("</tr>\n");
    }
    table.push_str("</tbody>\n</table>\n</div>\n");
    f.write("observables.csv", &csv)?;
    f.publish(&["observables.csv".to_string()], &src);
    Ok(table)
}

/// The head of `index.html`, with its style sheet, up to the campaign's heading.
fn head(campaign: &str) -> String {
    format!(
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
    )
}

/// The equation-of-state section of `index.html` (empty without fits).
fn eos_section(f: &Folder<'_>) -> String {
    let mut html = String::new();
    if f.eos_rows.is_empty() {
        return html;
    }
    html.push_str("<h2>Equation-of-state fits</h2>\n<p>Data: <a href=\"eos-fits.csv\">eos-fits.csv</a>.</p>\n<table>\n<thead><tr><th>temperature</th><th>model</th><th>E0 (eV)</th><th>V0 (Å³)</th><th>B0 (GPa)</th><th>B0′</th></tr></thead>\n<tbody>\n");
    for r in &f.eos_rows {
        let fit = &r.fit;
        let _ = writeln!(
            html,
            "<tr><td>{}</td><td>{}</td><td>{}</td><td>{}</td><td>{}</td><td>{}</td></tr>",
            r.temperature.map(|t| format!("{t} K")).unwrap_or_default(),
            model_name(fit.model),
            fmt_pm(fit.e0, Some(fit.stderr[0])),
            fmt_pm(fit.v0, Some(fit.stderr[1])),
            fmt_pm(fit.b0_gpa, Some(fit.b0_gpa_stderr)),
            fmt_pm(fit.b0_prime, Some(fit.stderr[3]))
        );
    }
    html.push_str("</tbody>\n</table>\n");
    html
}

/// The outputs of the `after-campaign:` stages: each file copied to
/// `after-campaign/STAGE[.AXIS=VALUE…]/FILE` (recorded with the attempts its run read) and
/// listed in a table; empty when no such stage ran.
pub fn after_campaign(
    f: &mut Folder<'_>,
    outputs: &[super::data::StageOutput],
    artifacts: &crate::artifacts::ArtifactStore,
) -> Result<String> {
    if outputs.is_empty() {
        return Ok(String::new());
    }
    let mut html = String::from(
        "<h2>After every point stopped</h2>\n<p>The outputs of the campaign's \
         <code>after-campaign:</code> stages (<code>rondo trace FILE</code> names the attempts each read).</p>\n\
         <table>\n<thead><tr><th>stage</th><th>group</th><th>output</th><th>file</th><th>BLAKE3</th></tr></thead>\n<tbody>\n",
    );
    for o in outputs {
        let group = crate::query::analysis::group_text(&o.group);
        let mut label = o.stage.clone();
        for (k, v) in &o.group {
            let v = v
                .as_str()
                .map(str::to_string)
                .unwrap_or_else(|| v.to_string());
            let _ = write!(label, ".{k}={}", v.replace('/', "_"));
        }
        let rel = format!("after-campaign/{label}/{}", o.file);
        let to = f.dir.join(&rel);
        if let Some(parent) = to.parent() {
            std::fs::create_dir_all(parent)
                .with_context(|| format!("{}: cannot create", parent.display()))?;
        }
        std::fs::copy(artifacts.path_of(&o.artifact), &to)
            .with_context(|| format!("{rel}: cannot copy artifact {}", o.artifact))?;
        f.publish(
            std::slice::from_ref(&rel),
            &o.sources.iter().copied().collect(),
        );
        let _ = writeln!(
            html,
            "<tr><td>{}</td><td>{}</td><td>{}</td><td><a href=\"{r}\">{r}</a></td><td><code>{}</code></td></tr>",
            html_escape(&o.stage),
            html_escape(&group),
            html_escape(&o.role),
            &o.artifact[..12.min(o.artifact.len())],
            r = html_escape(&rel),
        );
    }
    html.push_str("</tbody>\n</table>\n");
    Ok(html)
}

/// `cost.csv` (per point and stage, then per stage, then in all: attempts measured, CPU
/// seconds, core-hours, wall seconds, peak RSS) and the HTML section of the same per stage
/// and per point; empty when no attempt was measured.
pub fn cost(f: &mut Folder<'_>, costs: &crate::query::usage::Costs) -> Result<String> {
    use crate::query::usage::Cost;
    if costs.total.attempts == 0 {
        return Ok(String::new());
    }
    let mut csv = String::from(
        "point,stage,attempts,cpu_user_s,cpu_system_s,core_hours,wall_s,max_rss_kib\n",
    );
    let row = |csv: &mut String, p: &str, s: &str, c: &Cost| {
        let _ = writeln!(
            csv,
            "{},{},{},{},{},{},{},{}",
            csv_field(p),
            csv_field(s),
            c.attempts,
            num(c.cpu_user_s),
            num(c.cpu_system_s),
            num(c.core_hours()),
            num(c.wall_s),
            c.max_rss_kib.map(|k| k.to_string()).unwrap_or_default()
        );
    };
    for ((p, s), c) in &costs.by_point_stage {
        row(&mut csv, p, s, c);
    }
    for (s, c) in &costs.by_stage {
        row(&mut csv, "", s, c);
    }
    row(&mut csv, "", "", &costs.total);
    f.write("cost.csv", &csv)?;
    f.publish(&["cost.csv".to_string()], &BTreeSet::new());
    let mut html = String::from(
        "<h2>What it cost</h2>\n<p>CPU time (user + system) of the stages' programs as \
         measured per attempt, in core-hours, with wall time and the largest resident set. \
         Data: <a href=\"cost.csv\">cost.csv</a>.</p>\n<table>\n<thead><tr><th></th>\
         <th>attempts</th><th>core-hours</th><th>CPU (s)</th><th>wall (h)</th><th>peak RSS (MiB)</th></tr>\
         </thead>\n<tbody>\n",
    );
    let line = |html: &mut String, what: &str, c: &Cost| {
        let _ = writeln!(
            html,
            "<tr><td>{}</td><td>{}</td><td>{:.4}</td><td>{:.2}</td><td>{:.4}</td><td>{}</td></tr>",
            html_escape(what),
            c.attempts,
            c.core_hours(),
            c.cpu_user_s + c.cpu_system_s,
            c.wall_s / 3600.0,
            c.max_rss_kib
                .map(|k| format!("{:.1}", k as f64 / 1024.0))
                .unwrap_or_else(|| "-".into())
        );
    };
    for (s, c) in &costs.by_stage {
        line(&mut html, &format!("stage {s}"), c);
    }
    for (p, c) in &costs.by_point {
        line(&mut html, &format!("point {p}"), c);
    }
    line(&mut html, "in all", &costs.total);
    html.push_str("</tbody>\n</table>\n");
    Ok(html)
}

/// What the page's heading names: the campaign and the revisions of its file.
pub struct Heading {
    /// The campaign's name.
    pub name: String,
    /// (number, BLAKE3, accepted at, physics accepted) of every revision, oldest first.
    pub revisions: Vec<(i64, String, String, bool)>,
    /// Points a revision retired.
    pub retired: usize,
    /// Whether they are in the report (`--with-retired`) or left out.
    pub retired_included: bool,
}

/// The campaign file's revisions, when it has more than one (empty otherwise).
fn revisions_section(h: &Heading) -> String {
    let mut html = String::new();
    if h.revisions.len() < 2 {
        return html;
    }
    html.push_str("<h2>Campaign file</h2>\n<p>Every attempt records the revision it ran under (<code>rondo trace</code> names it).</p>\n<table>\n<thead><tr><th>revision</th><th>BLAKE3</th><th>accepted</th><th>physics changed</th></tr></thead>\n<tbody>\n");
    for (n, hash, at, physics) in &h.revisions {
        let _ = writeln!(
            html,
            "<tr><td>{n}</td><td>{}</td><td>{}</td><td>{}</td></tr>",
            html_escape(hash.get(..16).unwrap_or(hash)),
            html_escape(at),
            if *physics {
                "yes (--accept-revision)"
            } else {
                "no"
            }
        );
    }
    html.push_str("</tbody>\n</table>\n");
    if h.retired > 0 && h.retired_included {
        let _ = writeln!(
            html,
            "<p>{} retired point(s) are included in this report (<code>--with-retired</code>), each marked <em>retired in revision N</em>.</p>",
            h.retired
        );
    } else if h.retired > 0 {
        let _ = writeln!(
            html,
            "<p>{} retired point(s) are left out of this report (<code>rondo status</code> lists them).</p>",
            h.retired
        );
    }
    html
}

/// Write `index.html`: notes, the campaign file's revisions, the observables `table`, the
/// fits, the `cost` section, every figure.
pub fn index(f: &Folder<'_>, campaign: &Heading, table: &str, cost: &str) -> Result<()> {
    let mut html = head(&campaign.name);
    if !f.notes.is_empty() {
        html.push_str("<h2>Notes</h2>\n<ul class=\"notes\">\n");
        for n in &f.notes {
            let _ = writeln!(html, "<li>{}</li>", html_escape(n));
        }
        html.push_str("</ul>\n");
    }
    html.push_str(&revisions_section(campaign));
    html.push_str("<h2>Converged observables</h2>\n<p>Values at each point's last good iteration; ± is the standard error the stage reported. Data: <a href=\"observables.csv\">observables.csv</a>.</p>\n");
    html.push_str(table);
    html.push_str(&eos_section(f));
    html.push_str(cost);
    html.push_str("<h2>Figures</h2>\n");
    for fig in &f.figures {
        let _ = writeln!(
            html,
            "<figure id=\"{n}\">\n<img src=\"{png}\" alt=\"{t}\">\n<figcaption>{t} — \
             <a href=\"{svg}\">SVG</a>, <a href=\"{png}\">PNG</a>, data <a href=\"{csv}\">{csv}</a></figcaption>\n</figure>",
            n = html_escape(&fig.name),
            png = html_escape(&fig.png),
            svg = html_escape(&fig.svg),
            csv = html_escape(&fig.csv),
            t = html_escape(&fig.title)
        );
    }
    html.push_str("</body>\n</html>\n");
    f.write("index.html", &html)
}
