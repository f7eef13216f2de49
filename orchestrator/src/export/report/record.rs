//! Where a report is built and how it is recorded: the folder is built beside the
//! requested one and moved into place when complete; every file is stored as an artifact
//! and recorded as an output of a new report generation with the attempts behind it (the
//! SQL in [`crate::store::reads::reports`]).

use std::fs;
use std::path::{Path, PathBuf};

use anyhow::{bail, Context, Result};
use sqlx::SqlitePool;

use super::folder::Output;
use super::ReportOptions;
use crate::artifacts::ArtifactStore;
use crate::query::analysis::OwnProgram;
use crate::store::reads::reports;

/// The report folder being made: the requested folder (absolute), its parent and name, and
/// the temporary folder beside it the report is built in.
pub struct Placement {
    /// The requested folder, absolute.
    pub out_dir: PathBuf,
    parent: PathBuf,
    name: String,
    /// Where the report is built.
    pub tmp: PathBuf,
}

impl Placement {
    /// Check the requested folder (absent, empty or a previous report) and make an empty
    /// temporary folder beside it.
    pub fn prepare(out_dir: &Path) -> Result<Placement> {
        let out_dir = if out_dir.is_absolute() {
            out_dir.to_path_buf()
        } else {
            std::env::current_dir()?.join(out_dir)
        };
        let parent = out_dir
            .parent()
            .with_context(|| format!("{}: not a folder path", out_dir.display()))?
            .to_path_buf();
        let name = out_dir
            .file_name()
            .with_context(|| format!("{}: not a folder path", out_dir.display()))?
            .to_string_lossy()
            .to_string();
        if out_dir.exists() && !out_dir.join("index.html").is_file() {
            let empty = fs::read_dir(&out_dir)
                .map(|mut d| d.next().is_none())
                .unwrap_or(false);
            if !empty {
                bail!(
                    "{} exists and is not a rondo report (no index.html); choose another --out folder",
                    out_dir.display()
                );
            }
        }
        fs::create_dir_all(&parent)
            .with_context(|| format!("{}: cannot create", parent.display()))?;
        let tmp = parent.join(format!(".{name}.tmp-{}", std::process::id()));
        if tmp.exists() {
            fs::remove_dir_all(&tmp).with_context(|| format!("{}: cannot clear", tmp.display()))?;
        }
        fs::create_dir_all(&tmp).with_context(|| format!("{}: cannot create", tmp.display()))?;
        Ok(Placement {
            out_dir,
            parent,
            name,
            tmp,
        })
    }

    /// Remove the temporary folder of a report that failed.
    pub fn abandon(&self) {
        let _ = fs::remove_dir_all(&self.tmp);
    }

    /// Move the built report into place, replacing a previous one.
    pub fn finish(&self) -> Result<()> {
        let out_dir = &self.out_dir;
        if out_dir.exists() {
            let old = self
                .parent
                .join(format!(".{}.old-{}", self.name, std::process::id()));
            fs::rename(out_dir, &old).with_context(|| {
                format!(
                    "{}: cannot move the previous report aside",
                    out_dir.display()
                )
            })?;
            fs::rename(&self.tmp, out_dir).with_context(|| {
                format!("{}: cannot move the report into place", out_dir.display())
            })?;
            let _ = fs::remove_dir_all(&old);
        } else {
            fs::rename(&self.tmp, out_dir).with_context(|| {
                format!("{}: cannot move the report into place", out_dir.display())
            })?;
        }
        Ok(())
    }
}

/// Store every file of the built folder `tmp` in the workspace's artifact store; returns
/// (file name, hash, size) for each.
pub fn store_files(ws: &Path, tmp: &Path, out: &Output) -> Result<Vec<(String, String, u64)>> {
    let store = ArtifactStore::open(&ws.join("store"))
        .with_context(|| format!("{}: cannot open the artifact store", ws.display()))?;
    let mut files = Vec::new();
    for file in out.sources.keys() {
        let p = tmp.join(file);
        let (hash, size) = store
            .put_file(&p)
            .with_context(|| format!("{}: cannot store", p.display()))?;
        files.push((file.clone(), hash, size));
    }
    Ok(files)
}

/// Record the generation: its row (command line, options, rondo's executable), and each
/// file as an artifact and output with the attempts behind it. Returns the report id.
pub async fn record(
    pool: &SqlitePool,
    opts: &ReportOptions,
    out_dir: &Path,
    started_at: &str,
    out: &Output,
    files: &[(String, String, u64)],
) -> Result<i64> {
    let exe = OwnProgram::current();
    reports::ensure_tables(pool).await?;
    let now = chrono::Utc::now().to_rfc3339_opts(chrono::SecondsFormat::Secs, true);
    let argv_json = serde_json::to_string(&opts.argv)?;
    let options_json = serde_json::to_string(opts)?;
    let (dir, program_path) = (
        out_dir.display().to_string(),
        exe.path.display().to_string(),
    );
    let (blake3, unknown) = (exe.hash(), exe.unknown());
    let host = crate::store::hostname();
    let generation = reports::NewGeneration {
        argv_json: &argv_json,
        out_dir: &dir,
        options_json: &options_json,
        program_path: &program_path,
        program_blake3: blake3.as_deref(),
        program_unknown: unknown.as_deref(),
        host: &host,
        started_at,
        ended_at: &now,
        rondo_version: env!("CARGO_PKG_VERSION"),
    };
    let mut tx = pool.begin().await?;
    let report_id = reports::insert_generation(&mut tx, &generation).await?;
    for (file, hash, size) in files {
        reports::insert_artifact(&mut tx, hash, *size, file, &now).await?;
        reports::insert_output(&mut tx, report_id, file, hash).await?;
        for a in out.sources.get(file).into_iter().flatten() {
            reports::insert_source(&mut tx, report_id, file, *a).await?;
        }
    }
    tx.commit().await.context("cannot record the report")?;
    crate::failpoint::hit(crate::failpoint::Failpoint::ReportRecorded);
    Ok(report_id)
}
