//! `rondo extract`: writing a recorded artifact out of the store to a file, checked against
//! its recorded BLAKE3 and never seen half-written. Resolves the target with
//! [`crate::query`]; knows no engine and no scheduler.

use std::fs::File;
use std::path::{Path, PathBuf};

use anyhow::{bail, Context, Result};
use sqlx::SqlitePool;

use crate::query::{hash_file_with_progress, resolve, resolve_target, Target};
use crate::store::reads::artifacts;

/// A refusal of `rondo extract` caused by what the user asked (an unknown target, a file in
/// the way): the command line reports it as bad input.
#[derive(Debug, thiserror::Error)]
#[error("{0}")]
pub struct Refused(pub String);

/// An artifact written out by [`extract`].
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct Extracted {
    /// Where it was written.
    pub path: std::path::PathBuf,
    /// Its BLAKE3 hash, checked on the written file.
    pub hash: String,
    /// Its size in bytes.
    pub size: u64,
}

/// A refusal (what the user asked cannot be done) as an error of type [`Refused`].
fn refused(m: String) -> anyhow::Error {
    anyhow::Error::new(Refused(m))
}

/// The artifact `target` names for extraction: a final value of one attempt names that
/// iteration's metrics file; an average of several is refused.
async fn artifact_of(pool: &SqlitePool, ws: &Path, target: &str) -> Result<String> {
    match resolve(pool, ws, target, &mut |_, _| {}).await {
        Err(e) => Err(refused(format!("{e:#}"))),
        Ok(Target::Final(f)) if f.attempts.len() == 1 => resolve_target(
            pool,
            ws,
            &format!(
                "{}/{}/{}",
                f.point,
                f.iterations.first().copied().unwrap_or_default(),
                f.name
            ),
        )
        .await
        .map_err(|e| refused(format!("{e:#}"))),
        Ok(Target::Final(f)) => Err(refused(format!(
            "{target} is the mean of {} iterations' values, not a file; extract one \
             iteration's metrics file (e.g. {}/{}/{}) or an output (POINT/final/stage.output)",
            f.attempts.len(),
            f.point,
            f.iterations.last().copied().unwrap_or(1),
            f.name
        ))),
        Ok(_) => resolve_target(pool, ws, target)
            .await
            .map_err(|e| refused(format!("{e:#}"))),
    }
}

/// Where the file goes (`out`, or `out/<recorded name>` for a folder) and the folder it is
/// written in; refused when a file is in the way without `force` or the folder is missing.
fn destination(out: &Path, name: &str, hash: &str, force: bool) -> Result<(PathBuf, PathBuf)> {
    let dest = if out.is_dir() {
        out.join(
            Path::new(name)
                .file_name()
                .map(|n| n.to_os_string())
                .unwrap_or_else(|| hash.to_string().into()),
        )
    } else {
        out.to_path_buf()
    };
    if !force && dest.symlink_metadata().is_ok() {
        return Err(refused(format!(
            "{} exists; pass --force to replace it",
            dest.display()
        )));
    }
    let dir = match dest.parent() {
        Some(d) if !d.as_os_str().is_empty() => d.to_path_buf(),
        _ => PathBuf::from("."),
    };
    if !dir.is_dir() {
        return Err(refused(format!(
            "{}: no such folder to write into",
            dir.display()
        )));
    }
    Ok((dest, dir))
}

/// Copy `src` to `tmp`, synced; returns the copy's BLAKE3 and size.
fn copy_synced(src: &Path, tmp: &Path, hash: &str) -> Result<(String, u64)> {
    let mut from = File::open(src).with_context(|| {
        format!(
            "{}: artifact {hash} is recorded but missing from the store",
            src.display()
        )
    })?;
    let mut to = File::create(tmp).with_context(|| format!("{}: cannot create", tmp.display()))?;
    std::io::copy(&mut from, &mut to)
        .with_context(|| format!("{}: cannot write", tmp.display()))?;
    to.sync_all()
        .with_context(|| format!("{}: cannot sync", tmp.display()))?;
    let size = to.metadata()?.len();
    drop(to);
    Ok((hash_file_with_progress(tmp, &mut |_, _| {})?, size))
}

/// Move the checked copy `tmp` to `dest`; without `force`, a hard link never replaces a file
/// that appeared meanwhile.
fn place(tmp: &Path, dest: &Path, dir: &Path, force: bool) -> Result<()> {
    let placed = if force {
        std::fs::rename(tmp, dest)
    } else {
        std::fs::hard_link(tmp, dest).and_then(|()| std::fs::remove_file(tmp))
    };
    if let Err(e) = placed {
        let _ = std::fs::remove_file(tmp);
        if e.kind() == std::io::ErrorKind::AlreadyExists {
            return Err(refused(format!(
                "{} exists; pass --force to replace it",
                dest.display()
            )));
        }
        return Err(e).with_context(|| format!("{}: cannot write", dest.display()));
    }
    if let Ok(d) = File::open(dir) {
        let _ = d.sync_all();
    }
    Ok(())
}

/// Write the artifact named by `target` (any form [`resolve`] accepts; a metric names its
/// attempt's metrics file) to `out`, or into `out` under its recorded name when `out` is a
/// folder. An existing file is refused unless `force`. The bytes go to a temporary file in
/// the same folder, are synced and hashed, and only a file whose BLAKE3 matches the record
/// is moved into place (no other process ever sees a partial file).
pub async fn extract(
    pool: &SqlitePool,
    ws: &Path,
    target: &str,
    out: &Path,
    force: bool,
) -> Result<Extracted> {
    let hash = artifact_of(pool, ws, target).await?;
    let name = artifacts::original_name(pool, &hash).await?;
    let (dest, dir) = destination(out, &name, &hash, force)?;
    let src = ws.join("store").join(&hash[..2]).join(&hash[2..]);
    let file_name = dest
        .file_name()
        .map(|n| n.to_string_lossy().into_owned())
        .unwrap_or_default();
    let tmp = dir.join(format!(".{file_name}.rondo-{}.tmp", std::process::id()));
    let (got, size) = match copy_synced(&src, &tmp, &hash) {
        Ok(w) => w,
        Err(e) => {
            let _ = std::fs::remove_file(&tmp);
            return Err(e);
        }
    };
    if got != hash {
        let _ = std::fs::remove_file(&tmp);
        bail!(
            "the copy of artifact {hash} has BLAKE3 {got}: the store's file is damaged \
             ({}); nothing was written to {}",
            src.display(),
            dest.display()
        );
    }
    place(&tmp, &dest, &dir, force)?;
    Ok(Extracted {
        path: dest,
        hash,
        size,
    })
}
