//! Large-file benchmark: a stage writes one big file (default 2 GiB) and the next stage
//! reads it, through `rondo run` with full provenance (hash, store, placement), against a
//! plain shell script that writes the same file, syncs it once (`sync big.bin`, an fsync of
//! that file: a bare `sync` would flush every other process's dirty pages too) and reads it.
//! Reports wall times, their ratio and the disk the workspace uses against the data's size.
//!
//! Both sides write with the same `dd` from /dev/zero (the content does not matter to
//! BLAKE3, fsync or links), so the difference is rondo's own work: hashing, the fsync of
//! the file and its folder, linking into the store, placing the input, SQLite.
//!
//! Run with `cargo bench -p rondo --bench large_files` (add `-- --write-docs` to replace
//! the "Large files" section of docs/performance.md). Environment: `RONDO_BENCH_SIZE_MIB`
//! (default 2048), `RONDO_BENCH_REPEATS` (default 3), `RONDO_BIN_DIR` (a folder with a
//! rondo binary; default the one cargo built for this bench), `RONDO_BENCH_DIR` (where the
//! files go; default the system temp dir, which must have room for twice the size).

use std::fmt::Write as _;
use std::path::{Path, PathBuf};
use std::process::Command;
use std::time::Instant;

use anyhow::{bail, Context, Result};

mod common;

const BEGIN: &str = "<!-- large-files:begin (written by `cargo bench -p rondo --bench large_files -- --write-docs`) -->";
const END: &str = "<!-- large-files:end -->";

fn env_or(key: &str, default: &str) -> String {
    std::env::var(key).unwrap_or_else(|_| default.to_string())
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

/// The writer both sides use: `dd` of `mib` MiB in 4 MiB blocks.
fn dd(out: &str, mib: u64) -> String {
    format!(
        "dd if=/dev/zero of={out} bs=4M count={} status=none",
        mib / 4
    )
}

fn run_shell(dir: &Path, mib: u64) -> Result<f64> {
    let script = format!(
        "{} && sync big.bin && cat big.bin > /dev/null && rm big.bin",
        dd("big.bin", mib)
    );
    let t = Instant::now();
    let st = Command::new("sh")
        .args(["-c", &script])
        .current_dir(dir)
        .status()
        .context("sh")?;
    let dt = t.elapsed().as_secs_f64();
    if !st.success() {
        bail!("the shell baseline failed: {st}");
    }
    Ok(dt)
}

fn campaign(mib: u64) -> String {
    format!(
        r#"campaign: large-files
about: benchmark (not physics)
programs:
  sh: {{ path: /bin/sh }}
sweep:
  product:
    n: [1]
cycle:
  w:
    run: [sh, -c, '{dd} && echo "{{\"n\": 1}}" > metrics.json']
    outputs: {{ big: big.bin }}
    metrics: [n]
  r:
    run: [sh, -c, 'cat "$1" > /dev/null', sh, "{{{{input:big}}}}"]
    inputs: {{ big: w.big }}
stop:
  max-iterations: 1
"#,
        dd = dd("big.bin", mib)
    )
}

/// Wall time of `rondo run` and the bytes the workspace occupies afterwards.
fn run_rondo(rondo: &Path, dir: &Path, mib: u64) -> Result<(f64, u64)> {
    let ws = dir.join("c.rondo");
    let _ = std::fs::remove_dir_all(&ws);
    std::fs::write(dir.join("c.yaml"), campaign(mib))?;
    let t = Instant::now();
    let o = Command::new(rondo)
        .args(["run", "c.yaml", "-q"])
        .current_dir(dir)
        .output()
        .context("rondo run")?;
    let dt = t.elapsed().as_secs_f64();
    // 3: the point stopped at its iteration cap (the campaign has one iteration).
    if !matches!(o.status.code(), Some(0 | 3)) {
        bail!(
            "rondo run failed: {}\n{}",
            o.status,
            String::from_utf8_lossy(&o.stderr)
        );
    }
    let du = Command::new("du")
        .args(["-s", "--block-size=1"])
        .arg(&ws)
        .output()
        .context("du")?;
    let used: u64 = String::from_utf8_lossy(&du.stdout)
        .split_whitespace()
        .next()
        .and_then(|s| s.parse().ok())
        .context("du output")?;
    std::fs::remove_dir_all(&ws)?;
    Ok((dt, used))
}

fn median(v: &[f64]) -> f64 {
    let mut s = v.to_vec();
    s.sort_by(f64::total_cmp);
    s[s.len() / 2]
}

fn main() -> Result<()> {
    let write_docs = std::env::args().any(|a| a == "--write-docs");
    let mib: u64 = env_or("RONDO_BENCH_SIZE_MIB", "2048")
        .parse()
        .context("RONDO_BENCH_SIZE_MIB must be a whole number")?;
    if mib < 4 || mib % 4 != 0 {
        bail!("RONDO_BENCH_SIZE_MIB must be a multiple of 4, at least 4");
    }
    let repeats: usize = env_or("RONDO_BENCH_REPEATS", "3")
        .parse()
        .context("RONDO_BENCH_REPEATS must be a whole number")?;
    let rondo = rondo_bin()?;
    let base = std::env::var_os("RONDO_BENCH_DIR")
        .map(PathBuf::from)
        .unwrap_or_else(std::env::temp_dir);
    let dir = tempfile::tempdir_in(&base).context("bench folder")?;
    let (mut sh, mut ro, mut used) = (Vec::new(), Vec::new(), Vec::new());
    for rep in 0..repeats {
        let s = run_shell(dir.path(), mib)?;
        eprintln!("shell rep {rep}: {s:.2} s");
        let (r, u) = run_rondo(&rondo, dir.path(), mib)?;
        eprintln!("rondo rep {rep}: {r:.2} s, workspace {u} bytes");
        sh.push(s);
        ro.push(r);
        used.push(u as f64);
    }
    let bytes = (mib << 20) as f64;
    let (s, r, u) = (median(&sh), median(&ro), median(&used));
    let (date, commit, dirty) = common::measured_at();
    let fmt = |v: &[f64]| {
        v.iter()
            .map(|x| format!("{x:.2}"))
            .collect::<Vec<_>>()
            .join(", ")
    };
    let mut out = String::new();
    writeln!(out, "{BEGIN}")?;
    writeln!(
        out,
        "Measured {date} at commit `{commit}`{dirty}, rondo from `{}`, {repeats} runs each \
         (interleaved), files in `{}`. Command: `cargo bench -p rondo --bench large_files \
         -- --write-docs`.",
        rondo.display(),
        base.display()
    )?;
    writeln!(out)?;
    writeln!(out, "| | wall (s, median) | all runs (s) |")?;
    writeln!(out, "| --- | --: | --- |")?;
    writeln!(
        out,
        "| shell: write {mib} MiB, `sync big.bin`, read | {s:.2} | {} |",
        fmt(&sh)
    )?;
    writeln!(
        out,
        "| rondo: stage writes {mib} MiB, next stage reads it | {r:.2} | {} |",
        fmt(&ro)
    )?;
    writeln!(out)?;
    writeln!(
        out,
        "Ratio rondo / shell: **{:.2}×** (goal ≤ 1.2×). Disk used by the workspace after the \
         run: {:.3}× the data (goal ≤ 1.05×; store, database and logs).",
        r / s,
        u / bytes
    )?;
    writeln!(out, "{END}")?;
    println!("{out}");
    if write_docs {
        common::write_section(BEGIN, END, "Large files", &out)?;
    }
    Ok(())
}
