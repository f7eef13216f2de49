//! Slurm turnaround benchmark: the demo campaign (`examples/model-sweep.yaml` as shipped,
//! its light stages placed on the host) run with the local executor and with `--on slurm`
//! at the **default** poll interval on the one-node Slurm (`scripts/dev-slurm`), with every
//! `squeue` call counted through a shim on PATH. Beside the ratio it measures the floor no
//! orchestrator can go under on this machine: Slurm's own time from `sbatch` to a trivial
//! job's first act, times the number of batch jobs on the longest point's chain (each waits
//! for the previous one's outputs).
//!
//! Run with `cargo build --release -p model-solid && cargo bench -p rondo --bench
//! slurm_turnaround` (add `-- --write-docs` to replace the "Slurm turnaround" section of
//! docs/performance.md). Needs a Slurm that answers (`bash scripts/dev-slurm start`).
//! Environment: `RONDO_BIN_DIR` (a folder with rondo and model-solid; default the release
//! binaries cargo built), `RONDO_BENCH_REPEATS` (default 1), `RONDO_BENCH_PROBES` (trivial
//! jobs for the latency floor, default 10).

use std::collections::BTreeMap;
use std::fmt::Write as _;
use std::path::{Path, PathBuf};
use std::process::Command;
use std::time::{Duration, Instant};

use anyhow::{bail, Context, Result};

mod common;

const BEGIN: &str = "<!-- slurm-turnaround:begin (written by `cargo bench -p rondo --bench slurm_turnaround -- --write-docs`) -->";
const END: &str = "<!-- slurm-turnaround:end -->";

fn env_num(key: &str, default: usize) -> Result<usize> {
    match std::env::var(key) {
        Ok(v) => v
            .parse()
            .with_context(|| format!("{key}={v:?}: not a whole number")),
        Err(_) => Ok(default),
    }
}

/// The folder holding `rondo` and `model-solid`.
fn bin_dir() -> Result<PathBuf> {
    let dir = match std::env::var_os("RONDO_BIN_DIR") {
        Some(d) => PathBuf::from(d),
        None => PathBuf::from(env!("CARGO_BIN_EXE_rondo"))
            .parent()
            .context("rondo binary without a folder")?
            .to_path_buf(),
    };
    for b in ["rondo", "model-solid"] {
        if !dir.join(b).is_file() {
            bail!(
                "{}: no {b} binary (build it with `cargo build --release -p model-solid`, or \
                 set RONDO_BIN_DIR)",
                dir.join(b).display()
            );
        }
    }
    Ok(dir)
}

fn repo() -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR")).join("..")
}

/// A fresh copy of the demo (campaign file and start files) in `dir`.
fn demo_in(dir: &Path) -> Result<()> {
    let ex = repo().join("examples");
    std::fs::copy(ex.join("model-sweep.yaml"), dir.join("model-sweep.yaml"))
        .context("copy the demo")?;
    std::fs::create_dir_all(dir.join("start"))?;
    for f in ["density.json", "sigma.npy"] {
        std::fs::copy(ex.join("start").join(f), dir.join("start").join(f))
            .with_context(|| format!("copy start/{f}"))?;
    }
    Ok(())
}

/// A folder with an `squeue` that logs each call and runs the real one.
fn squeue_shim(dir: &Path) -> Result<(PathBuf, PathBuf)> {
    let out = Command::new("sh")
        .args(["-c", "command -v squeue"])
        .output()
        .context("look for squeue")?;
    let real = String::from_utf8_lossy(&out.stdout).trim().to_string();
    if real.is_empty() {
        bail!("squeue is not on PATH: start Slurm with `bash scripts/dev-slurm start`");
    }
    let shim = dir.join("shim");
    std::fs::create_dir_all(&shim)?;
    let log = dir.join("squeue-calls.log");
    std::fs::write(
        shim.join("squeue"),
        format!(
            "#!/bin/sh\ndate +%s.%N >> '{}'\nexec '{real}' \"$@\"\n",
            log.display()
        ),
    )?;
    use std::os::unix::fs::PermissionsExt;
    std::fs::set_permissions(shim.join("squeue"), std::fs::Permissions::from_mode(0o755))?;
    Ok((shim, log))
}

/// Wall time of `rondo run model-sweep.yaml ARGS` in `dir`.
fn run_demo(dir: &Path, path: &str, args: &[&str]) -> Result<f64> {
    let t = Instant::now();
    let o = Command::new("rondo")
        .args(["run", "model-sweep.yaml", "-q"])
        .args(args)
        .current_dir(dir)
        .env("PATH", path)
        .output()
        .context("run rondo")?;
    let wall = t.elapsed().as_secs_f64();
    if !o.status.success() {
        bail!(
            "rondo run {args:?} failed ({}): {}",
            o.status,
            String::from_utf8_lossy(&o.stderr)
        );
    }
    Ok(wall)
}

/// (batch jobs in all, batch jobs of the point with the most) from the workspace's store.
fn batch_jobs(ws: &Path) -> Result<(usize, usize)> {
    let rt = tokio::runtime::Builder::new_current_thread()
        .enable_all()
        .build()?;
    let points: Vec<String> = rt.block_on(async {
        let pool = rondo::store::open(&ws.join("rondo.db")).await?;
        let rows: Vec<(String,)> =
            sqlx::query_as("SELECT point FROM attempts WHERE executor = 'slurm'")
                .fetch_all(&pool)
                .await?;
        pool.close().await;
        anyhow::Ok(rows.into_iter().map(|r| r.0).collect())
    })?;
    let mut per: BTreeMap<String, usize> = BTreeMap::new();
    for p in points {
        *per.entry(p).or_default() += 1;
    }
    Ok((per.values().sum(), per.values().copied().max().unwrap_or(0)))
}

/// Seconds from `sbatch` to a trivial job's first act (a file it creates), `n` times one
/// after another; the folder is watched every 5 ms.
fn job_start_latency(dir: &Path, n: usize) -> Result<Vec<f64>> {
    let mut out = Vec::new();
    for i in 0..n {
        let flag = dir.join(format!("probe-{i}"));
        let t = Instant::now();
        let o = Command::new("sbatch")
            .args(["--parsable", "--output=/dev/null", "--error=/dev/null"])
            .arg(format!("--chdir={}", dir.display()))
            .args(["--job-name=rondo-bench-probe", "--wrap"])
            .arg(format!("touch '{}'", flag.display()))
            .output()
            .context("sbatch a probe")?;
        if !o.status.success() {
            bail!("sbatch: {}", String::from_utf8_lossy(&o.stderr));
        }
        while !flag.exists() {
            if t.elapsed() > Duration::from_secs(120) {
                bail!("a probe job did not start within 120 s");
            }
            std::thread::sleep(Duration::from_millis(5));
        }
        out.push(t.elapsed().as_secs_f64());
    }
    Ok(out)
}

fn median(v: &mut [f64]) -> f64 {
    v.sort_by(f64::total_cmp);
    if v.is_empty() {
        return f64::NAN;
    }
    let m = v.len() / 2;
    if v.len() % 2 == 1 {
        v[m]
    } else {
        (v[m - 1] + v[m]) / 2.0
    }
}

fn load_average() -> String {
    std::fs::read_to_string("/proc/loadavg")
        .map(|s| s.split_whitespace().take(3).collect::<Vec<_>>().join(" "))
        .unwrap_or_default()
}

fn main() -> Result<()> {
    let write_docs = std::env::args().any(|a| a == "--write-docs");
    let repeats = env_num("RONDO_BENCH_REPEATS", 1)?.max(1);
    let probes = env_num("RONDO_BENCH_PROBES", 10)?.max(1);
    let bins = bin_dir()?;
    let base = tempfile::tempdir().context("temp dir")?;
    let (shim, calls_log) = squeue_shim(base.path())?;
    let path = format!(
        "{}:{}:{}",
        shim.display(),
        bins.display(),
        std::env::var("PATH").unwrap_or_default()
    );
    let load_before = load_average();
    let mut rows = Vec::new();
    for r in 0..repeats {
        let l = base.path().join(format!("local-{r}"));
        std::fs::create_dir_all(&l)?;
        demo_in(&l)?;
        let local = run_demo(&l, &path, &[])?;
        let s = base.path().join(format!("slurm-{r}"));
        std::fs::create_dir_all(&s)?;
        demo_in(&s)?;
        let _ = std::fs::remove_file(&calls_log);
        let slurm = run_demo(&s, &path, &["--on", "slurm"])?;
        let calls = std::fs::read_to_string(&calls_log)
            .unwrap_or_default()
            .lines()
            .count();
        let (jobs, chain) = batch_jobs(&s.join("model-sweep.rondo"))?;
        eprintln!(
            "run {r}: local {local:.2} s, slurm {slurm:.2} s ({:.1}×), {jobs} batch jobs \
             (longest point {chain}), {calls} squeue calls",
            slurm / local
        );
        rows.push((local, slurm, jobs, chain, calls));
    }
    let mut lat = job_start_latency(base.path(), probes)?;
    let lat_med = median(&mut lat);
    let lat_max = lat.last().copied().unwrap_or(f64::NAN);
    let load_after = load_average();
    let (date, commit, dirty) = common::measured_at();
    let mut md = String::new();
    writeln!(md, "{BEGIN}")?;
    writeln!(
        md,
        "Measured {date} at commit `{commit}`{dirty}; 2 CPUs, a shared machine (load average \
         {load_before} before, {load_after} after); the one-node Slurm of `scripts/dev-slurm` \
         (4 job slots). Command: `cargo build --release -p model-solid && cargo bench -p rondo \
         --bench slurm_turnaround -- --write-docs`.\n"
    )?;
    writeln!(
        md,
        "| run | local (s) | `--on slurm`, default 30 s poll (s) | ratio | batch jobs | on the longest point | `squeue` calls | allowed (1 per 30 s + 1) |"
    )?;
    writeln!(md, "| --- | --- | --- | --- | --- | --- | --- | --- |")?;
    for (i, (local, slurm, jobs, chain, calls)) in rows.iter().enumerate() {
        let allowed = (slurm / 30.0).ceil() as usize + 1;
        writeln!(
            md,
            "| {} | {local:.2} | {slurm:.2} | {:.1}× | {jobs} | {chain} | {calls} | {allowed} |",
            i + 1,
            slurm / local
        )?;
    }
    let (_, slurm0, _, chain0, _) = rows[0];
    writeln!(
        md,
        "\nSlurm's own start latency (`sbatch` to a trivial job's first act, {probes} jobs one \
         after another): median {lat_med:.2} s, at most {lat_max:.2} s. The longest point's \
         {chain0} batch jobs run one after another (each needs the previous one's outputs), \
         so {chain0} × {lat_med:.2} s = {:.1} s is spent in Slurm before any of them computes \
         anything, and rondo notices each end from its exit marker within about a second \
         (half a second on average: {:.1} s more). That floor, {:.1} s, is {:.0} % of the \
         `--on slurm` wall time.",
        chain0 as f64 * lat_med,
        chain0 as f64 * 0.5,
        chain0 as f64 * (lat_med + 0.5),
        100.0 * chain0 as f64 * (lat_med + 0.5) / slurm0
    )?;
    writeln!(md, "{END}")?;
    print!("{md}");
    if write_docs {
        common::write_section(BEGIN, END, "Slurm turnaround", &md)?;
    }
    Ok(())
}
