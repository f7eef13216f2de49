//! Scratch directories of attempts: where they live in the workspace, and the pool of
//! emptied ones that new attempts reuse.
//!
//! Each attempt runs in `scratch/<point>.i<iteration>.<stage>.a<attempt>/` (one level, so a
//! new point or iteration needs no folder of its own). Creating a
//! directory and its two log files allocates three inodes, which on a busy ext4 file system
//! costs more than all the rest of an attempt's bookkeeping; renaming an emptied directory
//! into place and truncating its logs allocates none. So the directory of a succeeded
//! attempt is emptied (its `stdout.txt`/`stderr.txt` truncated, an `inputs/` folder
//! emptied, everything else removed) and parked under `scratch/.free/`, from where the next
//! attempt takes it. A directory is parked only once it is empty, so whatever a crash leaves
//! there is clean.

use std::io::ErrorKind;
use std::path::{Path, PathBuf};

use anyhow::{Context, Result};

/// Log files the local executor writes in every scratch directory; kept (truncated) in a
/// parked directory so the next attempt reuses their inodes.
const LOGS: [&str; 2] = ["stdout.txt", "stderr.txt"];
/// Parked directories kept at most; more are removed.
const MAX_PARKED: usize = 64;

/// The scratch directory of an attempt.
pub fn attempt_dir(
    scratch: &Path,
    point: &str,
    iteration: u32,
    stage: &str,
    attempt: u32,
) -> PathBuf {
    scratch.join(format!("{point}.i{iteration:04}.{stage}.a{attempt}"))
}

/// Emptied scratch directories ready for reuse.
#[derive(Debug)]
pub struct Pool {
    dir: PathBuf,
    free: Vec<PathBuf>,
    next: u64,
}

impl Pool {
    /// The pool under `scratch/.free`, with whatever an earlier run parked there.
    pub fn open(scratch: &Path) -> Result<Pool> {
        let dir = scratch.join(".free");
        std::fs::create_dir_all(&dir)
            .with_context(|| format!("{}: cannot create", dir.display()))?;
        let mut free = Vec::new();
        let mut next = 0;
        for entry in
            std::fs::read_dir(&dir).with_context(|| format!("{}: cannot list", dir.display()))?
        {
            let entry = entry.with_context(|| format!("{}: cannot list", dir.display()))?;
            if let Some(n) = entry
                .file_name()
                .to_str()
                .and_then(|s| s.parse::<u64>().ok())
            {
                next = next.max(n + 1);
                free.push(entry.path());
            }
        }
        Ok(Pool { dir, free, next })
    }

    /// Make `dest` an empty directory (its parent is created if needed), reusing a parked
    /// one when there is one.
    pub fn create(&mut self, dest: &Path) -> Result<()> {
        while let Some(parked) = self.free.pop() {
            match rename_into(&parked, dest) {
                Ok(()) => return Ok(()),
                // Gone or unusable: forget it and try the next.
                Err(_) => {
                    let _ = std::fs::remove_dir_all(&parked);
                }
            }
        }
        match std::fs::create_dir(dest) {
            Ok(()) => Ok(()),
            Err(e) if e.kind() == ErrorKind::NotFound => {
                if let Some(parent) = dest.parent() {
                    std::fs::create_dir_all(parent)
                        .with_context(|| format!("{}: cannot create", parent.display()))?;
                }
                std::fs::create_dir(dest)
                    .with_context(|| format!("{}: cannot create", dest.display()))
            }
            Err(e) => Err(e).with_context(|| format!("{}: cannot create", dest.display())),
        }
    }

    /// Done with `dir` (a succeeded attempt's): empty it and park it, or remove it when the
    /// pool is full or emptying fails.
    pub fn recycle(&mut self, dir: &Path) {
        if self.free.len() >= MAX_PARKED || empty_out(dir).is_err() {
            let _ = std::fs::remove_dir_all(dir);
            return;
        }
        let parked = self.dir.join(self.next.to_string());
        self.next += 1;
        match std::fs::rename(dir, &parked) {
            Ok(()) => self.free.push(parked),
            Err(_) => {
                let _ = std::fs::remove_dir_all(dir);
            }
        }
    }
}

fn rename_into(parked: &Path, dest: &Path) -> std::io::Result<()> {
    match std::fs::rename(parked, dest) {
        Err(e) if e.kind() == ErrorKind::NotFound && parked.exists() => {
            if let Some(parent) = dest.parent() {
                std::fs::create_dir_all(parent)?;
            }
            std::fs::rename(parked, dest)
        }
        other => other,
    }
}

/// Remove everything in `dir` except the log files (truncated) and `inputs/` (emptied).
fn empty_out(dir: &Path) -> std::io::Result<()> {
    for entry in std::fs::read_dir(dir)? {
        let entry = entry?;
        let kind = entry.file_type()?;
        let name = entry.file_name();
        let path = entry.path();
        // A log that is also a stored output shares its inode with the store (outputs are
        // linked in): remove that name, never truncate the stored content.
        let linked = || {
            use std::os::unix::fs::MetadataExt;
            entry.metadata().map(|m| m.nlink() > 1).unwrap_or(true)
        };
        if kind.is_file() && LOGS.iter().any(|l| name == *l) && !linked() {
            std::fs::OpenOptions::new()
                .write(true)
                .open(&path)?
                .set_len(0)?;
        } else if kind.is_dir() && name == "inputs" {
            for inner in std::fs::read_dir(&path)? {
                let inner = inner?;
                if inner.file_type()?.is_dir() {
                    std::fs::remove_dir_all(inner.path())?;
                } else {
                    std::fs::remove_file(inner.path())?;
                }
            }
        } else if kind.is_dir() {
            std::fs::remove_dir_all(&path)?;
        } else {
            std::fs::remove_file(&path)?;
        }
    }
    Ok(())
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn a_recycled_directory_comes_back_empty_with_its_log_inodes() -> Result<()> {
        use std::os::unix::fs::MetadataExt;
        let d = tempfile::tempdir()?;
        let scratch = d.path().join("scratch");
        let mut pool = Pool::open(&scratch)?;
        let a = attempt_dir(&scratch, "p001", 1, "band", 1);
        pool.create(&a)?;
        std::fs::write(a.join("stdout.txt"), "lots of output")?;
        std::fs::write(a.join("hk.npy"), "x")?;
        std::fs::create_dir_all(a.join("inputs"))?;
        std::fs::write(a.join("inputs/density.json"), "{}")?;
        std::fs::create_dir_all(a.join("sub/deeper"))?;
        let ino = std::fs::metadata(a.join("stdout.txt"))?.ino();
        pool.recycle(&a);
        assert!(!a.exists());
        let b = attempt_dir(&scratch, "p002", 3, "solve", 2);
        pool.create(&b)?;
        let mut names: Vec<String> = std::fs::read_dir(&b)?
            .map(|e| e.map(|e| e.file_name().to_string_lossy().into_owned()))
            .collect::<std::io::Result<_>>()?;
        names.sort();
        assert_eq!(names, ["inputs", "stdout.txt"]);
        assert_eq!(std::fs::metadata(b.join("stdout.txt"))?.len(), 0);
        assert_eq!(std::fs::metadata(b.join("stdout.txt"))?.ino(), ino);
        assert_eq!(std::fs::read_dir(b.join("inputs"))?.count(), 0);
        // A new pool finds what an earlier run parked; an empty pool creates directories.
        pool.recycle(&b);
        let mut again = Pool::open(&scratch)?;
        let c = attempt_dir(&scratch, "p003", 1, "band", 1);
        again.create(&c)?;
        assert!(c.join("stdout.txt").is_file());
        let e = attempt_dir(&scratch, "p004", 1, "band", 1);
        again.create(&e)?;
        assert!(e.is_dir() && std::fs::read_dir(&e)?.count() == 0);
        Ok(())
    }
}
