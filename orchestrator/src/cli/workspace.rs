//! Finding what a command works on: the campaign file (`load`), paths made absolute, and
//! the workspace named by `--workspace`, by a campaign file, or found in or below the
//! current folder.
//!
//! Owns the rules for locating files and workspaces; opens no database and runs no SQL.

use std::path::{Path, PathBuf};

use anyhow::{bail, Context, Result};

use super::BadInput;
use crate::engine;
use crate::spec::{self, Campaign};
use crate::store;

/// The campaign file, validated; a missing file is bad input.
pub fn load(file: &Path) -> Result<Campaign> {
    if !file.is_file() {
        bail!(BadInput(format!(
            "{}: no such campaign file",
            file.display()
        )));
    }
    Ok(spec::load(file)?)
}

/// `p` as an absolute path (relative ones from the current folder).
pub fn absolute(p: PathBuf) -> Result<PathBuf> {
    if p.is_absolute() {
        return Ok(p);
    }
    Ok(std::env::current_dir()
        .context("cannot read the current directory")?
        .join(p))
}

/// Workspaces (`*.rondo` folders holding a database) directly in `dir`, sorted.
fn workspaces_in(dir: &Path) -> Vec<PathBuf> {
    let mut found: Vec<PathBuf> = std::fs::read_dir(dir)
        .map(|entries| {
            entries
                .filter_map(|e| e.ok().map(|e| e.path()))
                .filter(|p| {
                    p.extension().is_some_and(|e| e == "rondo") && p.join(store::DB_FILE).is_file()
                })
                .collect()
        })
        .unwrap_or_default();
    found.sort();
    found
}

/// The workspace named by `--workspace`, by a campaign file (its default workspace beside
/// it), or else found the way a user expects: the only workspace in the current folder; if
/// there is none, the only one in its subfolders (the project root after `bash scripts/demo`
/// finds `examples/model-sweep.rondo`), named on stderr. Several candidates are listed and
/// the user is asked to choose.
pub fn find_workspace(file: Option<&Path>, workspace: Option<PathBuf>) -> Result<PathBuf> {
    if let Some(ws) = workspace {
        return absolute(ws);
    }
    if let Some(f) = file {
        if f.is_dir() {
            return absolute(f.to_path_buf());
        }
        return absolute(engine::default_workspace(f));
    }
    let here = std::env::current_dir().context("cannot read the current directory")?;
    let rel = |p: &Path| p.strip_prefix(&here).unwrap_or(p).display().to_string();
    let choose = |found: &[PathBuf], where_: &str| -> anyhow::Error {
        BadInput(format!(
            "several workspaces {where_}: {}; choose one with --workspace DIR",
            found.iter().map(|p| rel(p)).collect::<Vec<_>>().join(", ")
        ))
        .into()
    };
    let found = workspaces_in(&here);
    match found.as_slice() {
        [one] => return Ok(one.clone()),
        [] => {}
        _ => return Err(choose(&found, "here")),
    }
    let mut subdirs: Vec<PathBuf> = std::fs::read_dir(&here)
        .with_context(|| format!("{}: cannot list", here.display()))?
        .filter_map(|e| e.ok().map(|e| e.path()))
        .filter(|p| {
            p.is_dir()
                && !p
                    .file_name()
                    .is_some_and(|n| n.to_string_lossy().starts_with('.'))
        })
        .collect();
    subdirs.sort();
    let below: Vec<PathBuf> = subdirs.iter().flat_map(|d| workspaces_in(d)).collect();
    match below.as_slice() {
        [one] => {
            eprintln!(
                "rondo: workspace {} (the only one below this folder; --workspace names another)",
                rel(one)
            );
            Ok(one.clone())
        }
        [] => bail!(BadInput(
            "no workspace given, and none (*.rondo with a rondo.db) in the current folder or \
             its subfolders; pass the campaign file, or --workspace DIR"
                .into()
        )),
        _ => Err(choose(&below, "below this folder")),
    }
}
