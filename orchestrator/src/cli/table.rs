//! `rondo table metrics|finals [FILE] [--workspace W] [--format csv|jsonl] [--out FILE]`:
//! a workspace's metrics, or its points' final values, as a tidy table for notebooks
//! (docs/tables.md).
//!
//! Owns where the table goes (stdout, or a file written whole before it is named) and what
//! is said about it; the table is [`crate::export::tables`]'s. No SQL.

use std::io::Write;

use anyhow::{Context, Result};

use super::workspace::find_workspace;
use super::{TableArgs, TableFormatArg, TableKind, EXIT_OK};
use crate::export::tables::{self, Format, Table};
use crate::store;

/// `rondo table`.
pub async fn run(a: TableArgs) -> Result<u8> {
    let ws = find_workspace(a.file.as_deref(), a.workspace)?;
    let pool = store::open_existing(&ws).await?;
    let table = match a.table {
        TableKind::Metrics => Table::Metrics,
        TableKind::Finals => Table::Finals {
            with_retired: a.with_retired,
        },
    };
    let format = match a.format {
        TableFormatArg::Csv => Format::Csv,
        TableFormatArg::Jsonl => Format::Jsonl,
    };
    match &a.out {
        Some(path) => {
            // Written beside the target and renamed, so a reader never sees half a table.
            let tmp = path.with_extension("partial");
            let file = std::fs::File::create(&tmp)
                .with_context(|| format!("{}: cannot create", tmp.display()))?;
            let mut out = std::io::BufWriter::new(file);
            let rows = tables::write(&pool, table, format, a.page, &mut out)
                .await
                .with_context(|| format!("{}: cannot write the table", tmp.display()))?;
            out.flush()?;
            std::fs::rename(&tmp, path)
                .with_context(|| format!("{}: cannot write", path.display()))?;
            eprintln!("rondo: wrote {} ({rows} rows)", path.display());
        }
        None => {
            let stdout = std::io::stdout();
            let mut out = std::io::BufWriter::new(stdout.lock());
            match tables::write(&pool, table, format, a.page, &mut out).await {
                Ok(_) => {}
                // The reader went away (`rondo table metrics | head`): nothing more to say.
                Err(e) if is_broken_pipe(&e) => {}
                Err(e) => return Err(e),
            }
        }
    }
    pool.close().await;
    Ok(EXIT_OK)
}

fn is_broken_pipe(e: &anyhow::Error) -> bool {
    e.chain().any(|c| {
        c.downcast_ref::<std::io::Error>()
            .is_some_and(|io| io.kind() == std::io::ErrorKind::BrokenPipe)
    })
}
