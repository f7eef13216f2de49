//! Report generation on a recorded workspace: the folder's files, the fitted equation of
//! state, decodable non-blank PNGs, an index.html that references every figure, report CSVs
//! that trace back to the band stage's program, and a headless Chromium screenshot.

mod fixtures;

use std::path::{Path, PathBuf};
use std::process::Command;

use anyhow::{bail, Context, Result};
use rondo::export::report::{self, Progress};
use rondo::query as audit;

fn err_text(e: anyhow::Error) -> String {
    format!("{e:#}")
}

fn python3_works() -> bool {
    Command::new("python3")
        .arg("-c")
        .arg("import zlib")
        .output()
        .map(|o| o.status.success())
        .unwrap_or(false)
}

/// python3 for the PNG decoder; a loud skip without one, and a failure when CI or a
/// component that needs python3 (the browser and PROV checks) is required.
fn python() -> Option<String> {
    let ok = python3_works();
    if !ok {
        fixtures::skip::skip_or_fail(
            "python3 is not available to decode the PNGs",
            "install python3 (the standard library is enough)",
            &["RONDO_REQUIRE_BROWSER", "RONDO_REQUIRE_PROV"],
        );
    }
    ok.then(|| "python3".to_string())
}

/// (width, height, non-white fraction, dark fraction, distinct colours) of a PNG, decoded by
/// a standard-library-only decoder.
fn png_stats(py: &str, png: &Path) -> Result<(u32, u32, f64, f64, usize)> {
    let script = Path::new(env!("CARGO_MANIFEST_DIR")).join("tests/fixtures/png_stats.py");
    let o = Command::new(py).arg(&script).arg(png).output()?;
    if !o.status.success() {
        bail!(
            "{}: {}",
            png.display(),
            String::from_utf8_lossy(&o.stderr).trim()
        );
    }
    let s = String::from_utf8_lossy(&o.stdout).to_string();
    let f: Vec<&str> = s.split_whitespace().collect();
    if f.len() != 5 {
        bail!("png_stats printed `{s}`");
    }
    Ok((
        f[0].parse()?,
        f[1].parse()?,
        f[2].parse()?,
        f[3].parse()?,
        f[4].parse()?,
    ))
}

async fn make_report(
    dir: &Path,
) -> Result<(fixtures::Fixture, report::ReportSummary, Vec<Progress>)> {
    let fx = fixtures::build(dir).await?;
    let mut steps = Vec::new();
    let out = dir.join("report");
    let sum = report::generate(&fx.pool, &fx.ws, &out, &mut |p| steps.push(p.clone())).await?;
    Ok((fx, sum, steps))
}

#[tokio::test]
async fn report_folder_is_complete_and_fits_the_equation_of_state() -> Result<()> {
    let d = tempfile::tempdir()?;
    let (_fx, sum, steps) = make_report(d.path()).await?;
    let out = &sum.out_dir;
    // the overview + 10 convergence figures + eos + probabilities
    assert_eq!(sum.figures.len(), 13, "{:?}", sum.figures);
    for f in &sum.figures {
        for file in [&f.svg, &f.png, &f.csv] {
            let p = out.join(file);
            assert!(
                p.is_file() && std::fs::metadata(&p)?.len() > 0,
                "{}",
                p.display()
            );
        }
        let svg = std::fs::read_to_string(out.join(&f.svg))?;
        assert!(
            svg.starts_with("<svg") && svg.contains("<text"),
            "{} has no text",
            f.svg
        );
    }
    for t in ["observables.csv", "eos-fits.csv", "index.html"] {
        assert!(out.join(t).is_file(), "{t}");
    }
    // nothing left beside the folder
    let stray: Vec<_> = std::fs::read_dir(d.path())?
        .filter_map(|e| e.ok())
        .filter(|e| e.file_name().to_string_lossy().starts_with(".report"))
        .collect();
    assert!(stray.is_empty());
    // progress reached the end
    let last = steps.last().context("progress was reported")?;
    assert_eq!(last.done, last.total);
    assert!(steps.windows(2).all(|w| w[0].done <= w[1].done));
    // the fixture's converged energies are an exact Birch-Murnaghan E(V) plus a constant
    // 1e-5 eV: the fit recovers V0, B0, B0' of the fixture
    assert_eq!(sum.eos.len(), 4, "BM3 and Vinet at two temperatures");
    for r in &sum.eos {
        let t = r.temperature.context("temperature")?;
        let p = fixtures::eos_params(t);
        if r.fit.model == rondo_numerics::eos::EosModel::BirchMurnaghan3 {
            assert!((r.fit.v0 - p.v0).abs() < 1e-6, "{t}: {}", r.fit.v0);
            assert!((r.fit.b0 - p.b0).abs() < 1e-6, "{t}: {}", r.fit.b0);
            assert!((r.fit.e0 - (p.e0 + 1e-5)).abs() < 1e-8, "{t}: {}", r.fit.e0);
        } else {
            // a different form through the same five points: close, not equal
            assert!((r.fit.v0 - p.v0).abs() < 0.05, "{t}: {}", r.fit.v0);
        }
    }
    assert!(sum.notes.is_empty(), "{:?}", sum.notes);
    // CSV content: the converged energy of p005 (V = 28, 100 K) at its last iteration
    let eos_csv = std::fs::read_to_string(out.join("eos.csv"))?;
    let row = eos_csv
        .lines()
        .find(|l| l.ends_with(",p005"))
        .context("p005 in eos.csv")?;
    let e: f64 = row.split(',').nth(3).context("energy column")?.parse()?;
    assert_eq!(e, fixtures::energy(28.0, 100.0, 3));
    let conv = std::fs::read_to_string(out.join("convergence-p003.csv"))?;
    // stop-rule metrics update.n_f and update.energy, 3 iterations each, plus the header
    assert_eq!(conv.lines().count(), 7, "{conv}");
    assert!(conv.contains("update.n_f") && conv.contains("update.energy"));
    let obs = std::fs::read_to_string(out.join("observables.csv"))?;
    assert!(obs
        .lines()
        .any(|l| l.starts_with("p010,") && l.contains("solve.p1") && l.ends_with(",0.004")));
    Ok(())
}

#[tokio::test]
async fn pngs_decode_and_are_not_blank() -> Result<()> {
    let Some(py) = python() else {
        return Ok(());
    };
    let d = tempfile::tempdir()?;
    let (_fx, sum, _) = make_report(d.path()).await?;
    for name in ["eos", "probabilities", "convergence-p001", "overview"] {
        let f = sum.figures.iter().find(|f| f.name == name).context(name)?;
        let (w, h, nonwhite, dark, colours) = png_stats(&py, &sum.out_dir.join(&f.png))?;
        assert!(w >= 700 && h >= 300, "{name}: {w}x{h}");
        assert!(
            nonwhite > 0.005,
            "{name}: only {nonwhite} of the pixels are not white"
        );
        // axes and text are drawn in black
        assert!(dark > 0.001, "{name}: {dark} dark pixels");
        // anti-aliased text and coloured series give many colours
        assert!(colours > 20, "{name}: {colours} colours");
    }
    Ok(())
}

#[tokio::test]
async fn index_html_shows_every_figure_and_needs_nothing_outside() -> Result<()> {
    let d = tempfile::tempdir()?;
    let (_fx, sum, _) = make_report(d.path()).await?;
    let html = std::fs::read_to_string(sum.out_dir.join("index.html"))?;
    // the overview + 10 convergence figures + eos + probabilities
    assert_eq!(sum.figures.len(), 13, "{:?}", sum.figures);
    for f in &sum.figures {
        assert!(
            html.contains(&format!("src=\"{}\"", f.png)),
            "{} not shown",
            f.png
        );
        assert!(html.contains(&format!("href=\"{}\"", f.svg)));
        assert!(html.contains(&format!("href=\"{}\"", f.csv)));
    }
    assert!(html.contains("href=\"observables.csv\""));
    assert!(
        !html.contains("http://") && !html.contains("https://"),
        "external resource"
    );
    // every referenced file exists in the folder (each figure's three and observables.csv)
    let referenced: Vec<&str> = html
        .split(['"'])
        .filter(|s| s.ends_with(".png") || s.ends_with(".svg") || s.ends_with(".csv"))
        .collect();
    assert!(referenced.len() > 3 * sum.figures.len(), "{referenced:?}");
    for part in referenced {
        assert!(
            sum.out_dir.join(part).is_file(),
            "{part} referenced but missing"
        );
    }
    assert!(html.contains("<td>p010</td>") && html.contains("± 4.00e-3"));
    Ok(())
}

#[tokio::test]
async fn report_csv_traces_back_to_the_band_program() -> Result<()> {
    let d = tempfile::tempdir()?;
    let (fx, sum, _) = make_report(d.path()).await?;
    let csv = sum.out_dir.join("convergence-p003.csv");
    let hash = audit::resolve_target(&fx.pool, &fx.ws, csv.to_str().unwrap_or_default()).await?;
    let lin = audit::lineage(&fx.pool, &hash).await?;
    let first = &lin.attempts[0];
    assert_eq!(first.kind, "report");
    assert_eq!(first.id, sum.report_id);
    assert_eq!(first.outputs.get("convergence-p003.csv"), Some(&hash));
    // the figure's numbers came from p003's update attempts only
    assert_eq!(first.sources.len(), 3);
    let rest = &lin.attempts[1..];
    assert!(rest.iter().all(|a| a.point.as_deref() == Some("p003")));
    assert_eq!(rest.len(), 15);
    let band = rest
        .iter()
        .find(|a| a.stage == "band" && a.iteration == Some(1))
        .context("band in the lineage of the report CSV")?;
    assert_eq!(
        band.program.blake3.as_deref(),
        Some(fx.band_program_blake3.as_str())
    );
    let j = serde_json::to_value(&lin)?;
    assert_eq!(j["attempts"][0]["stage"], "report");
    assert!(j["attempts"][0]["point"].is_null());
    let text = lin.to_text();
    assert!(
        text.contains(&format!("out convergence-p003.csv {hash}")),
        "{text}"
    );
    assert!(text.contains("other report files") && text.contains(&fx.band_program_blake3));
    // the EOS data file: read from all ten points' last update
    let h = audit::resolve_target(
        &fx.pool,
        &fx.ws,
        sum.out_dir.join("eos.csv").to_str().unwrap_or_default(),
    )
    .await?;
    let lin = audit::lineage(&fx.pool, &h).await?;
    assert_eq!(lin.attempts[0].sources.len(), 10);
    assert_eq!(lin.attempts.len(), 1 + 150);
    // the store holds an identical copy
    assert_eq!(
        std::fs::read(fx.store.path_of(&hash))?,
        std::fs::read(&csv)?
    );
    Ok(())
}

#[tokio::test]
async fn second_report_replaces_the_folder_and_refuses_foreign_folders() -> Result<()> {
    let d = tempfile::tempdir()?;
    let (fx, first, _) = make_report(d.path()).await?;
    let again = report::generate(&fx.pool, &fx.ws, &first.out_dir, &mut |_| {}).await?;
    assert_eq!(again.report_id, first.report_id + 1);
    assert_eq!(again.files, first.files, "same data, same bytes");
    let foreign = d.path().join("notes");
    std::fs::create_dir_all(&foreign)?;
    std::fs::write(foreign.join("todo.txt"), "keep me")?;
    let e = err_text(
        report::generate(&fx.pool, &fx.ws, &foreign, &mut |_| {})
            .await
            .unwrap_err(),
    );
    assert!(e.contains("is not a rondo report"), "{e}");
    assert_eq!(
        std::fs::read_to_string(foreign.join("todo.txt"))?,
        "keep me"
    );
    Ok(())
}

#[tokio::test]
async fn too_few_volumes_plot_points_and_say_why() -> Result<()> {
    let d = tempfile::tempdir()?;
    let fx = fixtures::build(d.path()).await?;
    // two of the five volumes did not converge
    sqlx::query("UPDATE points SET state = 'failed', reason = 'solve diverged' WHERE id IN ('p001', 'p003')")
        .execute(&fx.pool)
        .await?;
    let sum = report::generate(&fx.pool, &fx.ws, &d.path().join("r"), &mut |_| {}).await?;
    assert_eq!(sum.eos.len(), 2, "BM3 and Vinet at 600 K: {:?}", sum.eos);
    assert!(
        sum.eos.iter().all(|r| r.temperature == Some(600.0)),
        "only 600 K has 5 volumes"
    );
    let note = sum
        .notes
        .iter()
        .find(|n| n.contains("T = 100 K") && n.contains("at least 5"))
        .cloned();
    assert!(note.is_some(), "{:?}", sum.notes);
    let html = std::fs::read_to_string(sum.out_dir.join("index.html"))?;
    assert!(html.contains("only the points are shown"));
    assert!(html.contains("class=\"failed\""));
    Ok(())
}

#[tokio::test]
async fn empty_campaign_is_refused_clearly() -> Result<()> {
    let d = tempfile::tempdir()?;
    let pool = rondo::store::open(&d.path().join("rondo.db")).await?;
    let e = err_text(
        report::generate(&pool, d.path(), &d.path().join("r"), &mut |_| {})
            .await
            .unwrap_err(),
    );
    assert!(e.contains("no campaign recorded"), "{e}");
    assert!(!d.path().join("r").exists());
    Ok(())
}

fn chromium() -> Option<PathBuf> {
    let p = PathBuf::from("/usr/bin/chromium");
    p.is_file().then_some(p)
}

#[tokio::test]
async fn chromium_screenshot_of_the_report_is_not_blank() -> Result<()> {
    let Some(browser) = chromium() else {
        fixtures::skip::skip_or_fail(
            "/usr/bin/chromium is not installed; the report page was not screenshotted",
            "apt-get install -y --no-install-recommends chromium",
            &["RONDO_REQUIRE_BROWSER"],
        );
        return Ok(());
    };
    if !python3_works() {
        bail!("python3 is needed to decode the screenshot");
    }
    let py = "python3";
    let d = tempfile::tempdir()?;
    let (_fx, sum, _) = make_report(d.path()).await?;
    let profile = d.path().join("chromium-profile");
    let shot = d.path().join("screenshot.png");
    let url = format!("file://{}", sum.out_dir.join("index.html").display());
    let out = Command::new(&browser)
        .args([
            "--headless",
            "--no-sandbox",
            "--disable-gpu",
            "--disable-quic",
            "--no-first-run",
            "--disable-background-networking",
            "--disable-component-update",
            "--disable-sync",
            "--hide-scrollbars",
        ])
        .arg(format!("--user-data-dir={}", profile.display()))
        .arg(format!("--screenshot={}", shot.display()))
        .arg("--window-size=1200,900")
        .arg(&url)
        .output()
        .context("cannot start chromium")?;
    assert!(
        shot.is_file(),
        "chromium wrote no screenshot (status {:?}): {}",
        out.status,
        String::from_utf8_lossy(&out.stderr)
    );
    let (w, h, nonwhite, dark, colours) = png_stats(py, &shot)?;
    assert_eq!((w, h), (1200, 900));
    // the page's table, headings and the first figures: far from a white page
    assert!(
        nonwhite > 0.02,
        "screenshot is nearly blank: {nonwhite} non-white"
    );
    assert!(dark > 0.002, "no dark text in the screenshot: {dark}");
    assert!(colours > 20, "{colours} colours");
    Ok(())
}

#[tokio::test]
async fn workspace_relative_paths_resolve() -> Result<()> {
    let d = tempfile::tempdir()?;
    let (fx, sum, _) = make_report(d.path()).await?;
    // the report folder is <ws>/report in this fixture
    assert_eq!(sum.out_dir, d.path().join("report"));
    let mut seen = (0, 0);
    let t = audit::resolve(
        &fx.pool,
        &fx.ws,
        "report/probabilities.csv",
        &mut |done, total| seen = (done, total),
    )
    .await?;
    let audit::Target::Artifact { hash } = t else {
        bail!("expected an artifact");
    };
    let size = std::fs::metadata(sum.out_dir.join("probabilities.csv"))?.len();
    assert_eq!(seen, (size, size), "hashing progress reached the file size");
    assert!(sum
        .files
        .iter()
        .any(|f| f.name == "probabilities.csv" && f.blake3 == hash));
    Ok(())
}

/// The report tables are created on demand and by store migration 2 alike: a migrator that
/// has 0002 registered (as the store will) applies cleanly both to a workspace whose report
/// already created them and to a new one.
#[tokio::test]
async fn migration_two_agrees_with_the_on_demand_tables() -> Result<()> {
    // Every migration of the store (2 brought the report tables; later ones must keep them).
    fn with_two() -> sqlx::migrate::Migrator {
        rondo::store::migrator()
    }
    let latest = with_two().iter().map(|m| m.version).max().unwrap_or(0);
    let d = tempfile::tempdir()?;
    let (fx, sum, _) = make_report(d.path()).await?;
    with_two().run(&fx.pool).await?;
    let n: i64 = sqlx::query_scalar("SELECT COUNT(*) FROM report_outputs WHERE report_id = ?")
        .bind(sum.report_id)
        .fetch_one(&fx.pool)
        .await?;
    assert_eq!(
        n as usize,
        sum.files.len(),
        "migration 2 kept the recorded report"
    );
    // a new workspace migrated to the latest version first
    let d2 = tempfile::tempdir()?;
    let pool = rondo::store::open(&d2.path().join("rondo.db")).await?;
    with_two().run(&pool).await?;
    report::ensure_schema(&pool).await?;
    let v: i64 = sqlx::query_scalar("SELECT MAX(version) FROM _sqlx_migrations")
        .fetch_one(&pool)
        .await?;
    assert_eq!(v, latest);
    Ok(())
}

#[tokio::test]
async fn energies_with_errors_give_a_weighted_fit() -> Result<()> {
    let d = tempfile::tempdir()?;
    let fx = fixtures::build(d.path()).await?;
    sqlx::query("UPDATE metrics SET error = 2e-4 WHERE name = 'update.energy'")
        .execute(&fx.pool)
        .await?;
    let sum = report::generate(&fx.pool, &fx.ws, &d.path().join("r"), &mut |_| {}).await?;
    let bm: Vec<_> = sum
        .eos
        .iter()
        .filter(|r| r.fit.model == rondo_numerics::eos::EosModel::BirchMurnaghan3)
        .collect();
    assert_eq!(bm.len(), 2);
    for r in bm {
        let t = r.temperature.context("temperature")?;
        // exact Birch-Murnaghan data: the weighted fit still recovers V0
        assert!((r.fit.v0 - fixtures::eos_params(t).v0).abs() < 1e-6);
        assert!(r.fit.chi2_per_dof.is_some(), "σ were passed to the fit");
        assert!(r.fit.stderr_absolute_sigma.is_some());
    }
    let csv = std::fs::read_to_string(sum.out_dir.join("eos.csv"))?;
    assert!(csv
        .lines()
        .any(|l| l.starts_with("data,") && l.contains(",0.0002,")));
    Ok(())
}

/// Pixels of each colour (hex RRGGBB) in a PNG, counted by tests/fixtures/png_colours.py.
fn png_colour_counts(py: &str, png: &Path, colours: &[&str]) -> Result<Vec<u64>> {
    let script = Path::new(env!("CARGO_MANIFEST_DIR")).join("tests/fixtures/png_colours.py");
    let o = Command::new(py)
        .arg(&script)
        .arg(png)
        .args(colours)
        .output()?;
    if !o.status.success() {
        bail!(
            "{}: {}",
            png.display(),
            String::from_utf8_lossy(&o.stderr).trim()
        );
    }
    let s = String::from_utf8_lossy(&o.stdout).to_string();
    let v = s
        .split_whitespace()
        .map(|x| x.parse::<u64>())
        .collect::<std::result::Result<Vec<_>, _>>()?;
    if v.len() != colours.len() {
        bail!("png_colours printed `{s}`");
    }
    Ok(v)
}

/// The text elements of an SVG: (content, x, y, font size).
fn svg_texts(svg: &str) -> Vec<(String, f64, f64, f64)> {
    let attr = |el: &str, name: &str| -> Option<f64> {
        el.split(&format!(" {name}=\""))
            .nth(1)?
            .split('"')
            .next()?
            .parse()
            .ok()
    };
    let mut out = Vec::new();
    for part in svg.split("<text").skip(1) {
        let Some((tag, rest)) = part.split_once('>') else {
            continue;
        };
        let Some((content, _)) = rest.split_once("</text>") else {
            continue;
        };
        if let (Some(x), Some(y), Some(size)) =
            (attr(tag, "x"), attr(tag, "y"), attr(tag, "font-size"))
        {
            out.push((content.trim().to_string(), x, y, size));
        }
    }
    out
}

/// The drawn (non-empty) polylines of an SVG, as lists of points.
fn polylines(svg: &str) -> Vec<Vec<(f64, f64)>> {
    svg.split("<polyline")
        .skip(1)
        .filter_map(|el| {
            let pts = el.split("points=\"").nth(1)?.split('"').next()?;
            let v: Vec<(f64, f64)> = pts
                .split_whitespace()
                .filter_map(|p| {
                    let (x, y) = p.split_once(',')?;
                    Some((x.parse().ok()?, y.parse().ok()?))
                })
                .collect();
            (!v.is_empty()).then_some(v)
        })
        .collect()
}

/// The legend swatch of the entry `label`: the polylines drawn in the 60 pixels left of
/// the label's text, within its line height.
fn swatch(svg: &str, label: &str) -> Result<Vec<Vec<(f64, f64)>>> {
    let texts = svg_texts(svg);
    let &(_, x, y, size) = texts
        .iter()
        .find(|t| t.0 == label)
        .with_context(|| format!("no text `{label}` in the SVG"))?;
    Ok(polylines(svg)
        .into_iter()
        .filter(|l| {
            l.iter()
                .all(|p| p.0 >= x - 60.0 && p.0 < x && p.1 >= y - 4.0 && p.1 <= y + size + 4.0)
        })
        .collect())
}

/// The horizontal two-point pieces of a swatch (its line), left to right.
fn line_pieces(sw: &[Vec<(f64, f64)>]) -> Vec<(f64, f64, f64)> {
    let mut v: Vec<(f64, f64, f64)> = sw
        .iter()
        .filter(|l| l.len() == 2 && l[0].1 == l[1].1)
        .map(|l| (l[0].0.min(l[1].0), l[0].0.max(l[1].0), l[0].1))
        .collect();
    v.sort_by(|a, b| a.0.total_cmp(&b.0));
    v
}

#[tokio::test]
async fn overview_figure_shows_every_point_first() -> Result<()> {
    let d = tempfile::tempdir()?;
    let (_fx, sum, _) = make_report(d.path()).await?;
    let first = sum.figures.first().context("figures")?;
    assert_eq!(first.name, "overview", "{:?}", sum.figures);
    assert_eq!(first.png, "overview.png");
    let html = std::fs::read_to_string(sum.out_dir.join("index.html"))?;
    let ov = html
        .find("src=\"overview.png\"")
        .context("overview not shown in index.html")?;
    let conv = html
        .find("src=\"convergence-p001.png\"")
        .context("convergence-p001 in index.html")?;
    assert!(ov < conv, "the overview comes before the per-point figures");
    // its data: the first stop-rule metric (update.n_f) of all 10 points, 3 iterations each
    let csv = std::fs::read_to_string(sum.out_dir.join("overview.csv"))?;
    let mut lines = csv.lines();
    assert_eq!(
        lines.next(),
        Some("point,state,metric,iteration,value,error,abs_change")
    );
    let rows: Vec<&str> = lines.collect();
    assert_eq!(rows.len(), 30, "{csv}");
    for i in 1..=10 {
        let id = format!("p{i:03}");
        let n = rows
            .iter()
            .filter(|l| l.starts_with(&format!("{id},converged,update.n_f,")))
            .count();
        assert_eq!(n, 3, "{id} in overview.csv");
    }
    // p003 (V = 27, T = 100 K) at iteration 3: the fixture's n_f and its change
    let row = rows
        .iter()
        .find(|l| l.starts_with("p003,converged,update.n_f,3,"))
        .context("p003 iteration 3")?;
    let f: Vec<&str> = row.split(',').collect();
    assert_eq!(f[4].parse::<f64>()?, fixtures::n_f(27.0, 100.0, 3));
    let change = (fixtures::n_f(27.0, 100.0, 3) - fixtures::n_f(27.0, 100.0, 2)).abs();
    assert_eq!(f[6].parse::<f64>()?, change);
    // every point is named in the legend of the convergence panel, both temperatures in the
    // panel of final values
    let svg = std::fs::read_to_string(sum.out_dir.join("overview.svg"))?;
    for i in 1..=10 {
        assert!(
            svg_texts(&svg).iter().any(|t| t.0 == format!("p{i:03}")),
            "p{i:03} not in the legend"
        );
    }
    for t in ["T = 100 K", "T = 600 K"] {
        assert!(
            svg_texts(&svg).iter().any(|x| x.0 == t),
            "{t} not in the legend"
        );
    }
    Ok(())
}

#[tokio::test]
async fn legend_swatches_show_each_series_line_style() -> Result<()> {
    let d = tempfile::tempdir()?;
    let (_fx, sum, _) = make_report(d.path()).await?;
    let svg = std::fs::read_to_string(sum.out_dir.join("eos.svg"))?;
    for t in ["100", "600"] {
        // Birch-Murnaghan: one unbroken line, no marker
        let bm = swatch(&svg, &format!("T = {t} K Birch-Murnaghan 3"))?;
        let pieces = line_pieces(&bm);
        assert_eq!(pieces.len(), 1, "{t} K BM3 swatch: {bm:?}");
        assert!(
            pieces[0].1 - pieces[0].0 >= 20.0,
            "{t} K BM3 swatch: {bm:?}"
        );
        assert_eq!(bm.len(), 1, "{t} K BM3 swatch has a marker: {bm:?}");
        // Vinet: dashed, i.e. several pieces on one line with gaps between them
        let vi = swatch(&svg, &format!("T = {t} K Vinet"))?;
        let pieces = line_pieces(&vi);
        assert!(
            pieces.len() >= 2,
            "{t} K Vinet swatch is not dashed: {vi:?}"
        );
        assert!(pieces.iter().all(|p| p.2 == pieces[0].2), "{vi:?}");
        for w in pieces.windows(2) {
            assert!(w[1].0 > w[0].1, "no gap between dashes: {vi:?}");
        }
        // the data entry: a marker, no line
        let data = swatch(&svg, &format!("T = {t} K"))?;
        assert!(
            line_pieces(&data).is_empty(),
            "the data swatch has a line: {data:?}"
        );
    }
    // the two temperatures' data markers differ in shape, not only in colour
    let outline = |label: &str| -> Result<Vec<(f64, f64)>> {
        let sw = swatch(&svg, label)?;
        let l = sw
            .first()
            .with_context(|| format!("{label}: no marker outline"))?;
        Ok(l.iter().map(|p| (p.0 - l[0].0, p.1 - l[0].1)).collect())
    };
    assert_ne!(outline("T = 100 K")?, outline("T = 600 K")?);
    Ok(())
}

#[tokio::test]
async fn coincident_probability_curves_stay_visible() -> Result<()> {
    let Some(py) = python() else {
        return Ok(()); // skipped loudly by python()
    };
    let d = tempfile::tempdir()?;
    let fx = fixtures::build(d.path()).await?;
    // p0 and p2 both zero at every point (the strong-coupling case): equal curves
    sqlx::query("UPDATE metrics SET value = 0 WHERE name IN ('solve.p0', 'solve.p2')")
        .execute(&fx.pool)
        .await?;
    let sum = report::generate(&fx.pool, &fx.ws, &d.path().join("r"), &mut |_| {}).await?;
    // the report's first and third colours (Okabe-Ito blue and bluish green: docs/report.md)
    let png = sum.out_dir.join("probabilities.png");
    let n = png_colour_counts(&py, &png, &["0072B2", "009E73", "D55E00"])?;
    let (p0, p2, p1) = (n[0], n[1], n[2]);
    eprintln!("probabilities.png: {p0} pixels of p0's colour, {p1} of p1's, {p2} of p2's");
    // p2 is drawn on top of p0; p0 must still show (in the gaps of p2's dotted line and
    // around p2's hollow markers), not just in its legend swatch (about 100 pixels a panel)
    assert!(p1 > 1000, "p1 drawn: {p1} pixels");
    assert!(p2 > 300, "p2 drawn: {p2} pixels");
    assert!(
        p0 as f64 > 0.5 * p2 as f64 && p0 > 600,
        "p0 hidden under p2: {p0} pixels of its colour against {p2}"
    );
    // and the three series differ in line pattern and marker in the SVG
    let svg = std::fs::read_to_string(sum.out_dir.join("probabilities.svg"))?;
    let solid = line_pieces(&swatch(&svg, "solve.p0")?);
    let dashed = line_pieces(&swatch(&svg, "solve.p1")?);
    let dotted = line_pieces(&swatch(&svg, "solve.p2")?);
    assert_eq!(solid.len(), 1, "{solid:?}");
    assert!(dashed.len() >= 2, "{dashed:?}");
    assert!(dotted.len() > dashed.len(), "{dotted:?} vs {dashed:?}");
    Ok(())
}
