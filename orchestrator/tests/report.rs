//! Report generation on a recorded workspace: the folder's files, the fitted equation of
//! state, decodable non-blank PNGs, an index.html that references every figure, report CSVs
//! that trace back to the band stage's program, and a headless Chromium screenshot.

mod fixtures;

use std::path::{Path, PathBuf};
use std::process::Command;

use anyhow::{bail, Context, Result};
use rondo::audit;
use rondo::report::{self, Progress};

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
    // 10 convergence figures + eos + probabilities
    assert_eq!(sum.figures.len(), 12, "{:?}", sum.figures);
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
    for name in ["eos", "probabilities", "convergence-p001"] {
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
    // 10 convergence figures + eos + probabilities
    assert_eq!(sum.figures.len(), 12, "{:?}", sum.figures);
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
