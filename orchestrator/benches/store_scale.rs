//! Store-at-scale benchmark: a workspace of 1,000,000 attempts (100 points × 10,000
//! iterations of a one-stage, one-metric cycle) and what a user does with it every day:
//! `rondo status --json`, `rondo run` on the finished campaign (a resume that finds nothing
//! to do), and `rondo trace POINT/last/stage.metric`. Each is timed (median of repeats) and its
//! peak RSS taken by `/usr/bin/time`. A second part runs 10,000 points in
//! flight (3 iterations of a no-op stage each) and reports rondo's peak RSS.
//!
//! The big store is made through rondo's own schema: `rondo run` records the campaign, its
//! points and their first iterations for real (stopped by a cancel request), then the rest
//! of the history is filled in with SQL that copies the recorded rows (same columns, same
//! artifacts, metric = iteration number) and the points are marked capped, as a run to the
//! cap would leave them.
//!
//! Run with `cargo bench -p rondo --bench store_scale` (`-- --write-docs` replaces the
//! "Store at scale" section of docs/performance.md). Environment: `RONDO_BENCH_POINTS`
//! (100), `RONDO_BENCH_ITERATIONS` (10000), `RONDO_BENCH_INFLIGHT` (10000),
//! `RONDO_BENCH_REPEATS` (3), `RONDO_BIN_DIR`.

use std::fmt::Write as _;
use std::path::{Path, PathBuf};
use std::process::{Command, Stdio};
use std::time::{Duration, Instant};

use anyhow::{bail, Context, Result};

mod common;

const BEGIN: &str = "<!-- store-scale:begin (written by `cargo bench -p rondo --bench store_scale -- --write-docs`) -->";
const END: &str = "<!-- store-scale:end -->";

fn env_num(key: &str, default: usize) -> Result<usize> {
    match std::env::var(key) {
        Ok(v) => v
            .parse()
            .with_context(|| format!("{key} must be a whole number")),
        Err(_) => Ok(default),
    }
}

fn rondo_bin() -> Result<PathBuf> {
    let path = match std::env::var_os("RONDO_BIN_DIR") {
        Some(dir) => PathBuf::from(dir).join("rondo"),
        None => PathBuf::from(env!("CARGO_BIN_EXE_rondo")),
    };
    if !path.is_file() {
        bail!("{}: no rondo binary (set RONDO_BIN_DIR)", path.display());
    }
    Ok(path)
}

fn campaign(points: usize, iterations: usize) -> String {
    let values: Vec<String> = (1..=points).map(|i| i.to_string()).collect();
    format!(
        r#"campaign: store-scale
about: benchmark (not physics)
programs:
  sh: {{ path: /bin/sh }}
sweep:
  product:
    a: [{values}]
cycle:
  s:
    run: [sh, -c, 'echo "{{\"x\": $RONDO_ITERATION}}" > metrics.json']
    metrics: [x]
stop:
  when:
    - {{ metric: s.x, change-below: 0.5, for: 1 }}
  max-iterations: {iterations}
"#,
        values = values.join(", ")
    )
}

/// Wall time (s) and peak RSS (KiB) of one rondo command, from `/usr/bin/time -f "%e %M"`;
/// the exit code must be in `ok`.
fn timed(rondo: &Path, dir: &Path, args: &[&str], ok: &[i32]) -> Result<(f64, f64)> {
    let o = Command::new("/usr/bin/time")
        .args(["-f", "rondo-bench-time %e %M"])
        .arg(rondo)
        .args(args)
        .current_dir(dir)
        .stdout(Stdio::null())
        .stderr(Stdio::piped())
        .output()
        .with_context(|| format!("/usr/bin/time rondo {args:?} (Debian package `time`)"))?;
    let err = String::from_utf8_lossy(&o.stderr);
    let code = o.status.code().unwrap_or(-1);
    if !ok.contains(&code) {
        bail!("rondo {args:?} exited {code}:\n{err}");
    }
    let line = err
        .lines()
        .rev()
        .find_map(|l| l.strip_prefix("rondo-bench-time "))
        .context("no /usr/bin/time line")?;
    let mut it = line.split_whitespace();
    let secs = it.next().and_then(|s| s.parse().ok()).context("%e")?;
    let kib = it.next().and_then(|s| s.parse().ok()).context("%M")?;
    Ok((secs, kib))
}

fn median(v: &[f64]) -> f64 {
    let mut s = v.to_vec();
    s.sort_by(f64::total_cmp);
    s[s.len() / 2]
}

/// Record the campaign and a first iteration of every point for real, then stop the run.
fn seed_real_run(rondo: &Path, dir: &Path, ws: &Path) -> Result<()> {
    let mut child = Command::new(rondo)
        .args(["run", "c.yaml", "-q", "--max-running", "2"])
        .current_dir(dir)
        .stdout(Stdio::null())
        .stderr(Stdio::null())
        .spawn()
        .context("rondo run")?;
    let db = ws.join("rondo.db");
    let deadline = Instant::now() + Duration::from_secs(600);
    loop {
        std::thread::sleep(Duration::from_millis(500));
        if let Some(st) = child.try_wait()? {
            bail!("the seeding run ended on its own ({st}) before it was stopped");
        }
        if db.is_file()
            && count(
                &db,
                "SELECT count(DISTINCT point) FROM iterations WHERE state = 'good'",
            )? >= count(&db, "SELECT count(*) FROM points")?
        {
            break;
        }
        if Instant::now() > deadline {
            let _ = child.kill();
            bail!("the seeding run did not record a good iteration of every point in 10 min");
        }
    }
    // SAFETY: a plain signal to our own child.
    unsafe { libc::kill(child.id() as libc::pid_t, libc::SIGTERM) };
    let st = child.wait()?;
    eprintln!("seeding run stopped: {st}");
    Ok(())
}

fn count(db: &Path, sql: &str) -> Result<i64> {
    let rt = tokio::runtime::Builder::new_current_thread()
        .enable_all()
        .build()?;
    rt.block_on(async {
        let opts = sqlx::sqlite::SqliteConnectOptions::new()
            .filename(db)
            .read_only(true);
        let pool = sqlx::SqlitePool::connect_with(opts).await?;
        let n: i64 = sqlx::query_scalar(sql).fetch_one(&pool).await?;
        pool.close().await;
        Ok(n)
    })
}

/// Fill in iterations 1..=N of every point from the rows of its first good iteration and
/// mark the points capped, in one transaction.
fn fill_history(db: &Path, iterations: usize) -> Result<()> {
    let rt = tokio::runtime::Builder::new_current_thread()
        .enable_all()
        .build()?;
    rt.block_on(async {
        let pool = rondo::store::open(db).await?;
        let mut tx = pool.begin().await?;
        let n = iterations as i64;
        // Keep iteration 1 of each point (real), drop anything later (partial), then copy.
        for sql in [
            "DELETE FROM metrics WHERE attempt_id IN (SELECT id FROM attempts WHERE iteration > 1 OR state <> 'succeeded')",
            "DELETE FROM attempt_outputs WHERE attempt_id IN (SELECT id FROM attempts WHERE iteration > 1 OR state <> 'succeeded')",
            "DELETE FROM attempt_inputs WHERE attempt_id IN (SELECT id FROM attempts WHERE iteration > 1 OR state <> 'succeeded')",
            "DELETE FROM attempts WHERE iteration > 1 OR state <> 'succeeded'",
            "DELETE FROM iterations WHERE iteration > 1",
            "CREATE TEMP TABLE seq(i INTEGER PRIMARY KEY)",
        ] {
            sqlx::query(sql).execute(&mut *tx).await?;
        }
        sqlx::query(
            "WITH RECURSIVE s(i) AS (SELECT 2 UNION ALL SELECT i + 1 FROM s WHERE i < ?) \
             INSERT INTO seq SELECT i FROM s",
        )
        .bind(n)
        .execute(&mut *tx)
        .await?;
        let stmts = [
            "INSERT INTO iterations (point, iteration, state, started_at, ended_at, stop_json) \
             SELECT it.point, seq.i, it.state, it.started_at, it.ended_at, it.stop_json \
             FROM iterations it, seq WHERE it.iteration = 1",
            "INSERT INTO attempts (point, iteration, stage, attempt, state, argv_json, workdir, \
             executor, handle_id, host, started_at, ended_at, exit_status, failure_kind, \
             failure_message, program_path, program_blake3, program_version, parameters_json, \
             seed, rondo_version, created_at) \
             SELECT a.point, seq.i, a.stage, a.attempt, a.state, a.argv_json, a.workdir, \
             a.executor, a.handle_id, a.host, a.started_at, a.ended_at, a.exit_status, \
             a.failure_kind, a.failure_message, a.program_path, a.program_blake3, \
             a.program_version, a.parameters_json, a.seed, a.rondo_version, a.created_at \
             FROM attempts a, seq WHERE a.iteration = 1",
            "INSERT INTO attempt_outputs (attempt_id, role, artifact) \
             SELECT b.id, o.role, o.artifact FROM attempts b \
             JOIN attempts a ON a.point = b.point AND a.stage = b.stage AND a.iteration = 1 \
             JOIN attempt_outputs o ON o.attempt_id = a.id WHERE b.iteration > 1",
            "INSERT INTO metrics (attempt_id, name, value, error) \
             SELECT b.id, m.name, b.iteration, m.error FROM attempts b \
             JOIN attempts a ON a.point = b.point AND a.stage = b.stage AND a.iteration = 1 \
             JOIN metrics m ON m.attempt_id = a.id WHERE b.iteration > 1",
            "UPDATE points SET state = 'capped', reason = 'reached max-iterations'",
        ];
        for sql in stmts {
            let t = Instant::now();
            sqlx::query(sql).execute(&mut *tx).await?;
            eprintln!("{:.1} s: {}", t.elapsed().as_secs_f64(), &sql[..60.min(sql.len())]);
        }
        tx.commit().await?;
        sqlx::query("ANALYZE").execute(&pool).await?;
        pool.close().await;
        anyhow::Ok(())
    })
}

fn main() -> Result<()> {
    let write_docs = std::env::args().any(|a| a == "--write-docs");
    let points = env_num("RONDO_BENCH_POINTS", 100)?;
    let iterations = env_num("RONDO_BENCH_ITERATIONS", 10_000)?;
    let inflight = env_num("RONDO_BENCH_INFLIGHT", 10_000)?;
    let repeats = env_num("RONDO_BENCH_REPEATS", 3)?.max(1);
    let rondo = rondo_bin()?;
    let dir = tempfile::tempdir().context("bench folder")?;
    let ws = dir.path().join("c.rondo");
    std::fs::write(dir.path().join("c.yaml"), campaign(points, iterations))?;

    let t = Instant::now();
    seed_real_run(&rondo, dir.path(), &ws)?;
    fill_history(&ws.join("rondo.db"), iterations)?;
    let attempts = count(&ws.join("rondo.db"), "SELECT count(*) FROM attempts")?;
    let build = t.elapsed().as_secs_f64();
    eprintln!("store of {attempts} attempts built in {build:.0} s");

    let wsarg = ws.display().to_string();
    let mid = format!("p{:03}/last/s.x", points.div_ceil(2));
    // (name, arguments, accepted exit codes, remove the database's seal first: a start after
    // an unclean end, when every page is checked).
    let cases: Vec<(&str, Vec<String>, Vec<i32>, bool)> = vec![
        (
            "`rondo status --json`",
            vec![
                "status".into(),
                "--workspace".into(),
                wsarg.clone(),
                "--json".into(),
            ],
            vec![0],
            false,
        ),
        (
            "`rondo run` after an unclean end (no seal: `quick_check` reads every page)",
            vec!["run".into(), "c.yaml".into(), "-q".into()],
            vec![0, 3],
            true,
        ),
        (
            "`rondo run` (finished campaign, closed cleanly: resume finds nothing to do)",
            vec!["run".into(), "c.yaml".into(), "-q".into()],
            vec![0, 3],
            false,
        ),
        (
            "`rondo trace POINT/last/s.x`",
            vec![
                "trace".into(),
                "--workspace".into(),
                wsarg.clone(),
                mid.clone(),
            ],
            vec![0],
            false,
        ),
    ];
    let mut rows = Vec::new();
    for (name, args, ok, unsealed) in &cases {
        let args: Vec<&str> = args.iter().map(String::as_str).collect();
        let mut ts = Vec::new();
        let mut rss: f64 = 0.0;
        for _ in 0..repeats {
            if *unsealed {
                let seal = ws.join("rondo.db.sealed");
                std::fs::remove_file(&seal)
                    .with_context(|| format!("{}: no seal to remove", seal.display()))?;
            }
            let (dt, r) = timed(&rondo, dir.path(), &args, ok)?;
            eprintln!("{name}: {dt:.3} s, {r} KiB");
            ts.push(dt);
            rss = rss.max(r);
        }
        rows.push((name.to_string(), median(&ts), ts, rss));
    }

    // 10,000 points in flight: peak RSS of the run, measured alone in a fresh process
    // tree (a child process of its own, so RUSAGE_CHILDREN is its own).
    let fl = tempfile::tempdir()?;
    std::fs::write(fl.path().join("c.yaml"), campaign(inflight, 3))?;
    let (secs, kib) = timed(
        &rondo,
        fl.path(),
        &["run", "c.yaml", "-q", "--max-running", "2"],
        &[0, 3],
    )?;

    let (date, commit, dirty) = common::measured_at();
    let mut s = String::new();
    writeln!(s, "{BEGIN}")?;
    writeln!(
        s,
        "Measured {date} at commit `{commit}`{dirty}, rondo from `{}`. Store: {attempts} \
         attempts ({points} points × {iterations} iterations), built in {build:.0} s. Median \
         of {repeats} runs. Command: `cargo bench -p rondo --bench store_scale -- --write-docs`.",
        rondo.display()
    )?;
    writeln!(s)?;
    writeln!(s, "| command | median (s) | all runs (s) | peak RSS (MB) |")?;
    writeln!(s, "| --- | --: | --- | --: |")?;
    for (name, m, ts, rss) in &rows {
        let all: Vec<String> = ts.iter().map(|t| format!("{t:.2}")).collect();
        writeln!(
            s,
            "| {name} | {m:.2} | {} | {:.0} |",
            all.join(", "),
            rss / 1024.0
        )?;
    }
    writeln!(s)?;
    writeln!(
        s,
        "{inflight} points in flight (3 iterations of a one-metric no-op stage each, \
         `--max-running 2`): peak RSS **{:.0} MB**, wall {secs:.0} s (`/usr/bin/time -f %M`).",
        kib / 1024.0
    )?;
    writeln!(s, "{END}")?;
    println!("{s}");
    if write_docs {
        common::write_section(BEGIN, END, "Store at scale", &s)?;
    }
    Ok(())
}
