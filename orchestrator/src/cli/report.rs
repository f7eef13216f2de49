//! `rondo report`: write the self-contained report folder, with a progress bar on a
//! terminal.
//!
//! Owns the options from the flags and what is said about the result; the report is
//! [`crate::export::report`]'s. No SQL.

use anyhow::Result;

use super::workspace::{absolute, find_workspace};
use super::{ReportArgs, EXIT_OK};
use crate::export::report::{self, ReportOptions};
use crate::store;

/// `rondo report`.
pub async fn run(a: ReportArgs) -> Result<u8> {
    let ws = find_workspace(None, a.workspace)?;
    // A report records its own provenance (argv, options, sources, outputs) in the
    // workspace, so it needs write access; the reading commands do not.
    let pool = store::open_existing_rw(
        &ws,
        "`rondo report` records the report's provenance in the workspace database",
    )
    .await?;
    let out = absolute(a.out.unwrap_or_else(|| ws.join("report")))?;
    let opts = ReportOptions {
        volume_axis: a.volume_axis,
        temperature_axis: a.temperature_axis,
        energy_metric: a.energy,
        argv: std::env::args().collect(),
        with_retired: a.with_retired,
        ..Default::default()
    };
    let bar = if std::io::IsTerminal::is_terminal(&std::io::stderr()) {
        Some(indicatif::ProgressBar::new(1))
    } else {
        None
    };
    let summary = report::generate_with(&pool, &ws, &out, &opts, &mut |p| {
        if let Some(b) = &bar {
            b.set_length(p.total as u64);
            b.set_position(p.done as u64);
            b.set_message(p.step.clone());
        }
    })
    .await?;
    if let Some(b) = &bar {
        b.finish_and_clear();
    }
    for n in &summary.notes {
        eprintln!("rondo: report: {n}");
    }
    eprintln!(
        "rondo: report in {} ({} figures, {} tables); open index.html",
        summary.out_dir.display(),
        summary.figures.len(),
        summary.tables.len()
    );
    Ok(EXIT_OK)
}
