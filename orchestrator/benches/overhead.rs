//! Orchestrator overhead benchmark: 2,000 no-op stage attempts (`true`) run by `rondo run`
//! with full provenance in SQLite, against the same 2,000 `true` commands run by
//! `xargs -P`. Two campaign shapes (200 points × 10 iterations, 2,000 points × 1 iteration),
//! `--max-running 2` and `--max-running 4`, each repeated (default 3 times); medians are reported, with a
//! per-attempt breakdown of where rondo's time goes taken from the attempt timestamps in
//! the workspace database.
//!
//! Binaries: `$RONDO_BIN_DIR/rondo` if set, otherwise the `rondo` cargo built for this bench
//! (the release-optimised bench profile). Run with
//! `cargo bench -p rondo --bench overhead` and add `-- --write-docs` to replace the
//! "Orchestrator overhead" section of `docs/performance.md`.
//!
//! Environment: `RONDO_BENCH_REPEATS` (default 3), `RONDO_BENCH_JOBS` (default "2,4"),
//! `RONDO_BENCH_SHAPES` (default "200x10,2000x1"), `RONDO_BENCH_DOCS` (the document to
//! update), `RONDO_BENCH_COMMIT` (the commit the binaries were built from, if not this
//! checkout's HEAD). Needs `xargs` and the `sqlite3` shell.

use std::fmt::Write as _;
use std::path::{Path, PathBuf};
use std::process::{Command, Stdio};
use std::time::Instant;

use anyhow::{bail, Context, Result};

/// Total no-op attempts per measurement.
const ATTEMPTS: usize = 2000;
const BEGIN: &str =
    "<!-- overhead:begin (written by `cargo bench -p rondo --bench overhead -- --write-docs`) -->";
const END: &str = "<!-- overhead:end -->";

fn main() -> Result<()> {
    let write_docs = std::env::args().any(|a| a == "--write-docs");
    let repeats: usize = env_or("RONDO_BENCH_REPEATS", "3")
        .parse()
        .context("RONDO_BENCH_REPEATS must be a whole number")?;
    let jobs: Vec<usize> = env_or("RONDO_BENCH_JOBS", "2,4")
        .split(',')
        .map(|s| s.trim().parse::<usize>())
        .collect::<Result<_, _>>()
        .context("RONDO_BENCH_JOBS must be a comma-separated list of whole numbers")?;
    let shapes: Vec<(usize, usize)> = env_or("RONDO_BENCH_SHAPES", "200x10,2000x1")
        .split(',')
        .map(parse_shape)
        .collect::<Result<_>>()?;
    let rondo = rondo_bin()?;
    let truth = which("true")?;
    eprintln!("rondo: {}\ntrue: {}", rondo.display(), truth.display());

    let mut rows = Vec::new();
    for &j in &jobs {
        for &(points, iters) in &shapes {
            let mut rondo_t = Vec::new();
            let mut xargs_t = Vec::new();
            let mut phases = Vec::new();
            // Interleave the two so slow phases of a noisy machine hit both alike.
            for rep in 0..repeats {
                let (t, ph) = run_rondo(&rondo, &truth, points, iters, j)?;
                eprintln!("rondo {points}x{iters} --max-running {j} rep {rep}: {t:.2} s");
                rondo_t.push(t);
                phases.push(ph);
                let x = run_xargs(&truth, j)?;
                eprintln!("xargs -P {j} rep {rep}: {x:.2} s");
                xargs_t.push(x);
            }
            rows.push(Row {
                points,
                iters,
                jobs: j,
                rondo: rondo_t,
                xargs: xargs_t,
                phases: median_phases(&phases),
            });
        }
    }
    let section = render(&rows, repeats)?;
    println!("{section}");
    if write_docs {
        let docs = match std::env::var_os("RONDO_BENCH_DOCS") {
            Some(p) => PathBuf::from(p),
            None => Path::new(env!("CARGO_MANIFEST_DIR")).join("../docs/performance.md"),
        };
        replace_section(&docs, &section)?;
        eprintln!("wrote {}", docs.display());
    }
    Ok(())
}

struct Row {
    points: usize,
    iters: usize,
    jobs: usize,
    rondo: Vec<f64>,
    xargs: Vec<f64>,
    phases: Phases,
}

/// Median per-attempt times in milliseconds, from the attempt rows of one run.
#[derive(Default, Clone, Copy)]
struct Phases {
    /// created_at → started_at: scratch directory, input placement, the `planned` commit,
    /// process spawn.
    launch: f64,
    /// started_at → ended_at: the child as the executor saw it (includes its wait/poll).
    run: f64,
    /// ended_at of iteration i → created_at of iteration i+1 of the same point: completion
    /// handling, the `succeeded` transaction, stopping rules and scheduling.
    turnaround: Option<f64>,
    /// Wall time divided by attempts, times jobs: the per-slot cost of one attempt.
    slot_ms: f64,
}

fn env_or(key: &str, default: &str) -> String {
    std::env::var(key).unwrap_or_else(|_| default.to_string())
}

fn parse_shape(s: &str) -> Result<(usize, usize)> {
    let (p, i) = s
        .trim()
        .split_once('x')
        .with_context(|| format!("shape {s:?}: expected POINTSxITERATIONS, e.g. 200x10"))?;
    let p: usize = p
        .parse()
        .with_context(|| format!("shape {s:?}: bad point count"))?;
    let i: usize = i
        .parse()
        .with_context(|| format!("shape {s:?}: bad iteration count"))?;
    if p * i != ATTEMPTS {
        bail!("shape {s:?}: points × iterations must be {ATTEMPTS}");
    }
    Ok((p, i))
}

/// `$RONDO_BIN_DIR/rondo`, else the binary cargo built for this bench.
fn rondo_bin() -> Result<PathBuf> {
    let path = match std::env::var_os("RONDO_BIN_DIR") {
        Some(dir) => PathBuf::from(dir).join("rondo"),
        None => PathBuf::from(env!("CARGO_BIN_EXE_rondo")),
    };
    if !path.is_file() {
        bail!(
            "{}: no rondo binary; build it with `cargo build --release -p rondo` and set \
             RONDO_BIN_DIR to the folder holding it (e.g. $CARGO_TARGET_DIR/release)",
            path.display()
        );
    }
    Ok(path)
}

fn which(name: &str) -> Result<PathBuf> {
    let path = std::env::var_os("PATH").context("PATH is not set")?;
    std::env::split_paths(&path)
        .map(|d| d.join(name))
        .find(|p| p.is_file())
        .with_context(|| format!("`{name}` not found on PATH"))
}

fn campaign_text(truth: &Path, points: usize, iters: usize) -> String {
    let axis: Vec<String> = (1..=points).map(|k| k.to_string()).collect();
    format!(
        "campaign: overhead\n\
         about: {points} points x {iters} iterations of one no-op stage\n\
         programs:\n  noop: {{ path: {truth} }}\n\
         sweep:\n  product:\n    k: [{axis}]\n\
         cycle:\n  nop:\n    run: [noop]\n\
         stop:\n  max-iterations: {iters}\n",
        truth = truth.display(),
        axis = axis.join(", "),
    )
}

/// One timed `rondo run`; returns wall seconds and the per-attempt phases.
fn run_rondo(
    rondo: &Path,
    truth: &Path,
    points: usize,
    iters: usize,
    jobs: usize,
) -> Result<(f64, Phases)> {
    let dir = tempfile::tempdir().context("cannot create a temporary folder")?;
    let file = dir.path().join("overhead.yaml");
    std::fs::write(&file, campaign_text(truth, points, iters))
        .with_context(|| format!("{}: cannot write", file.display()))?;
    let t0 = Instant::now();
    let out = Command::new(rondo)
        .args([
            "run",
            "overhead.yaml",
            "--quiet",
            "--max-running",
            &jobs.to_string(),
        ])
        .current_dir(dir.path())
        .stdin(Stdio::null())
        .output()
        .with_context(|| format!("cannot run {}", rondo.display()))?;
    let wall = t0.elapsed().as_secs_f64();
    // No stopping rules: every point ends at its cap, which is exit code 3.
    if out.status.code() != Some(3) {
        bail!(
            "rondo run ended with {:?} (expected 3, all points capped):\n{}",
            out.status,
            String::from_utf8_lossy(&out.stderr)
        );
    }
    let db = dir.path().join("overhead.rondo/rondo.db");
    let n: usize = sql(
        &db,
        "SELECT count(*) FROM attempts WHERE state = 'succeeded'",
    )?
    .trim()
    .parse()
    .context("attempt count")?;
    if n != ATTEMPTS {
        bail!("expected {ATTEMPTS} succeeded attempts in the store, found {n}");
    }
    let mut ph = phases(&db)?;
    ph.slot_ms = wall * 1000.0 * jobs as f64 / ATTEMPTS as f64;
    Ok((wall, ph))
}

/// Query the workspace database with the sqlite3 command-line shell.
fn sql(db: &Path, query: &str) -> Result<String> {
    let out = Command::new("sqlite3")
        .arg("-readonly")
        .arg(db)
        .arg(query)
        .output()
        .context("cannot run sqlite3 (install the sqlite3 command-line shell)")?;
    if !out.status.success() {
        bail!("sqlite3: {}", String::from_utf8_lossy(&out.stderr));
    }
    Ok(String::from_utf8_lossy(&out.stdout).into_owned())
}

fn ms_list(db: &Path, query: &str) -> Result<Vec<f64>> {
    sql(db, query)?
        .lines()
        .filter(|l| !l.trim().is_empty())
        .map(|l| l.trim().parse::<f64>().context("bad number from sqlite3"))
        .collect()
}

fn phases(db: &Path) -> Result<Phases> {
    const MS: &str = "86400000.0";
    let launch = ms_list(
        db,
        &format!("SELECT (julianday(started_at) - julianday(created_at)) * {MS} FROM attempts"),
    )?;
    let run = ms_list(
        db,
        &format!("SELECT (julianday(ended_at) - julianday(started_at)) * {MS} FROM attempts"),
    )?;
    let turn = ms_list(
        db,
        &format!(
            "SELECT (julianday(b.created_at) - julianday(a.ended_at)) * {MS} FROM attempts a \
             JOIN attempts b ON b.point = a.point AND b.iteration = a.iteration + 1"
        ),
    )?;
    Ok(Phases {
        launch: median(&launch),
        run: median(&run),
        turnaround: (!turn.is_empty()).then(|| median(&turn)),
        slot_ms: 0.0,
    })
}

/// The same 2,000 `true` commands through `xargs -P jobs`.
fn run_xargs(truth: &Path, jobs: usize) -> Result<f64> {
    let list: String = (1..=ATTEMPTS).map(|k| format!("{k}\n")).collect();
    let t0 = Instant::now();
    let mut child = Command::new("xargs")
        .args(["-P", &jobs.to_string(), "-n", "1"])
        .arg(truth)
        .stdin(Stdio::piped())
        .stdout(Stdio::null())
        .spawn()
        .context("cannot run xargs")?;
    {
        use std::io::Write;
        let mut stdin = child.stdin.take().context("xargs stdin")?;
        stdin
            .write_all(list.as_bytes())
            .context("cannot feed xargs")?;
    }
    let status = child.wait().context("xargs")?;
    let wall = t0.elapsed().as_secs_f64();
    if !status.success() {
        bail!("xargs ended with {status}");
    }
    Ok(wall)
}

fn median(v: &[f64]) -> f64 {
    if v.is_empty() {
        return f64::NAN;
    }
    let mut s = v.to_vec();
    s.sort_by(f64::total_cmp);
    let n = s.len();
    if n % 2 == 1 {
        s[n / 2]
    } else {
        0.5 * (s[n / 2 - 1] + s[n / 2])
    }
}

fn median_phases(p: &[Phases]) -> Phases {
    let pick = |f: &dyn Fn(&Phases) -> f64| median(&p.iter().map(f).collect::<Vec<_>>());
    let turns: Vec<f64> = p.iter().filter_map(|x| x.turnaround).collect();
    Phases {
        launch: pick(&|x| x.launch),
        run: pick(&|x| x.run),
        turnaround: (!turns.is_empty()).then(|| median(&turns)),
        slot_ms: pick(&|x| x.slot_ms),
    }
}

/// Output of a git command in this checkout; `None` when git fails.
fn git(args: &[&str]) -> Option<String> {
    Command::new("git")
        .args(args)
        .current_dir(env!("CARGO_MANIFEST_DIR"))
        .output()
        .ok()
        .filter(|o| o.status.success())
        .map(|o| String::from_utf8_lossy(&o.stdout).trim().to_string())
}

/// The commit the binaries belong to and the state of the working tree, as the section
/// states them: `RONDO_BENCH_COMMIT` when the binaries were built elsewhere from a clean
/// export, otherwise this checkout's HEAD and whether its tracked files had changes.
fn provenance() -> (String, String) {
    if let Ok(c) = std::env::var("RONDO_BENCH_COMMIT") {
        return (
            c,
            "binaries built from a clean export of that commit".into(),
        );
    }
    let commit = git(&["rev-parse", "--short", "HEAD"]).unwrap_or_else(|| "unknown".into());
    let tree = match git(&["status", "--porcelain", "--untracked-files=no"]) {
        None => "working tree state unknown: git failed".to_string(),
        Some(s) if s.is_empty() => "clean working tree".to_string(),
        Some(s) => format!(
            "the working tree had uncommitted changes to {} tracked file(s)",
            s.lines().count()
        ),
    };
    (commit, tree)
}

fn render(rows: &[Row], repeats: usize) -> Result<String> {
    let date = Command::new("date")
        .args(["-u", "+%Y-%m-%d %H:%M UTC"])
        .output()
        .map(|o| String::from_utf8_lossy(&o.stdout).trim().to_string())
        .unwrap_or_default();
    let (commit, tree) = provenance();
    let cpus = std::thread::available_parallelism()
        .map(|n| n.get())
        .unwrap_or(0);
    let mut s = String::new();
    writeln!(s, "{BEGIN}")?;
    writeln!(
        s,
        "Measured {date} at commit `{commit}` ({tree}); {cpus} CPUs, a shared and noisy"
    )?;
    writeln!(
        s,
        "machine (other people build and test on it at the same time), so treat"
    )?;
    writeln!(
        s,
        "differences under ~20 % as noise. Median of {repeats} runs each, rondo and"
    )?;
    writeln!(
        s,
        "xargs interleaved. Command: `cargo bench -p rondo --bench overhead -- --write-docs`."
    )?;
    writeln!(s)?;
    writeln!(s, "| shape | jobs | rondo (s) | xargs (s) | ratio | per attempt per slot (ms) | launch (ms) | child (ms) | turnaround (ms) |")?;
    writeln!(s, "| --- | --: | --: | --: | --: | --: | --: | --: | --: |")?;
    for r in rows {
        let (a, b) = (median(&r.rondo), median(&r.xargs));
        writeln!(
            s,
            "| {} pts × {} it | {} | {:.2} | {:.2} | {:.1}× | {:.1} | {:.1} | {:.1} | {} |",
            r.points,
            r.iters,
            r.jobs,
            a,
            b,
            a / b,
            r.phases.slot_ms,
            r.phases.launch,
            r.phases.run,
            r.phases
                .turnaround
                .map_or("–".to_string(), |t| format!("{t:.1}")),
        )?;
    }
    writeln!(s)?;
    writeln!(s, "All runs: {}.", all_runs(rows))?;
    writeln!(s)?;
    writeln!(
        s,
        "Columns: *per attempt per slot* = wall × jobs / 2000; *launch* = attempt row"
    )?;
    writeln!(
        s,
        "created → child started; *child* = started → ended as the local executor saw it;"
    )?;
    writeln!(
        s,
        "*turnaround* = an attempt ended → the same point's next attempt created (medians over"
    )?;
    writeln!(
        s,
        "all attempts, store timestamps have millisecond resolution)."
    )?;
    writeln!(s, "{END}")?;
    Ok(s)
}

fn all_runs(rows: &[Row]) -> String {
    rows.iter()
        .map(|r| {
            let f = |v: &[f64]| {
                v.iter()
                    .map(|x| format!("{x:.2}"))
                    .collect::<Vec<_>>()
                    .join("/")
            };
            format!(
                "{}×{} j{}: rondo {} s, xargs {} s",
                r.points,
                r.iters,
                r.jobs,
                f(&r.rondo),
                f(&r.xargs)
            )
        })
        .collect::<Vec<_>>()
        .join("; ")
}

/// Replace the text between the markers (or append the section under its heading), writing
/// to a temporary file first so the document is never half-written.
fn replace_section(docs: &Path, section: &str) -> Result<()> {
    let old = match std::fs::read_to_string(docs) {
        Ok(t) => t,
        Err(e) if e.kind() == std::io::ErrorKind::NotFound => "# Performance\n".to_string(),
        Err(e) => return Err(e).with_context(|| format!("{}: cannot read", docs.display())),
    };
    let new = match (old.find(BEGIN), old.find(END)) {
        (Some(a), Some(b)) if a < b => {
            format!(
                "{}{}{}",
                &old[..a],
                section.trim_end(),
                &old[b + END.len()..]
            )
        }
        _ => format!(
            "{}\n## Orchestrator overhead\n\n{}\n",
            old.trim_end(),
            section.trim_end()
        ),
    };
    let tmp = docs.with_extension("md.tmp");
    std::fs::write(&tmp, new).with_context(|| format!("{}: cannot write", tmp.display()))?;
    std::fs::rename(&tmp, docs).with_context(|| format!("{}: cannot replace", docs.display()))?;
    Ok(())
}
