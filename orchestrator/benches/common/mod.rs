//! Shared by the benchmarks that write their results into docs/performance.md: where they
//! were measured (date, commit, whether the tree was clean) and the replacement of their
//! own section of the document, written to a temporary file and renamed.
#![allow(dead_code)]

use std::path::{Path, PathBuf};
use std::process::Command;

use anyhow::{Context, Result};

/// `git ARGS` in this checkout, trimmed; "unknown" when git fails.
pub fn git(args: &[&str]) -> String {
    Command::new("git")
        .args(args)
        .current_dir(env!("CARGO_MANIFEST_DIR"))
        .output()
        .ok()
        .filter(|o| o.status.success())
        .map(|o| String::from_utf8_lossy(&o.stdout).trim().to_string())
        .unwrap_or_else(|| "unknown".to_string())
}

/// (UTC date and time, short HEAD commit, "" or a note that tracked files had changes).
pub fn measured_at() -> (String, String, &'static str) {
    let date = Command::new("date")
        .args(["-u", "+%Y-%m-%d %H:%M UTC"])
        .output()
        .map(|o| String::from_utf8_lossy(&o.stdout).trim().to_string())
        .unwrap_or_default();
    let dirty = if git(&["status", "--porcelain", "--untracked-files=no"]).is_empty() {
        ""
    } else {
        " (the working tree had uncommitted changes)"
    };
    (date, git(&["rev-parse", "--short", "HEAD"]), dirty)
}

/// Replace the text between `begin` and `end` of `$RONDO_BENCH_DOCS` (default
/// docs/performance.md) by `section` (which carries both markers), or append it under
/// `heading` when the markers are not there yet.
pub fn write_section(begin: &str, end: &str, heading: &str, section: &str) -> Result<()> {
    let docs = match std::env::var_os("RONDO_BENCH_DOCS") {
        Some(p) => PathBuf::from(p),
        None => Path::new(env!("CARGO_MANIFEST_DIR")).join("../docs/performance.md"),
    };
    let text = std::fs::read_to_string(&docs)
        .with_context(|| format!("{}: cannot read", docs.display()))?;
    let new = match (text.find(begin), text.find(end)) {
        (Some(a), Some(b)) if b > a => {
            format!(
                "{}{}{}",
                &text[..a],
                section.trim_end(),
                &text[b + end.len()..]
            )
        }
        _ => format!(
            "{}\n\n## {heading}\n\n{}\n",
            text.trim_end(),
            section.trim_end()
        ),
    };
    let tmp = docs.with_extension("md.tmp");
    std::fs::write(&tmp, new)?;
    std::fs::rename(&tmp, &docs)?;
    eprintln!("wrote {}", docs.display());
    Ok(())
}
