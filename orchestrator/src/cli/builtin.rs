//! `rondo builtin mix|filter`: run a built-in stage on the files given, relative paths from
//! the current folder; prints the metrics (`name value`, each number the shortest text of
//! its double) and any event (a history reset) on stderr.
//!
//! Owns only that output; the built-ins and their arguments are [`crate::builtins`]'s.

use std::path::Path;

use anyhow::Result;

use super::output::emit;
use super::{BadInput, EXIT_OK};
use crate::builtins::BuiltinCommand;

/// `rondo builtin ...`.
pub fn run(call: &BuiltinCommand) -> Result<u8> {
    let report = call
        .run(Path::new(""))
        .map_err(|m| BadInput(format!("builtin {}: {m}", call.name())))?;
    if let Some(e) = &report.event {
        eprintln!("rondo: builtin {}: {e}", call.name());
    }
    let mut text = String::new();
    for m in &report.metrics {
        text.push_str(&format!("{} {:?}\n", m.name, m.value));
    }
    emit(&text);
    Ok(EXIT_OK)
}
