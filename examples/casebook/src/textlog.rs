//! The text log `<name>.log`: one block of labelled lines per sub-step, appended in place.
//! Energies are printed in rydberg (converted from the eV the physics works in), every
//! number with the shortest round-trip form so that reading it gives back the same double.
//! The run journal `<name>.journal` (one line per invocation, with wall-clock times) lives
//! here too. Owns the format; what is printed is chosen by the sub-steps.

use anyhow::{Context, Result};
use std::fmt::Write as _;
use std::io::Write as _;
use std::path::Path;

/// The Rydberg energy hcR∞ in eV (CODATA 2018: 13.605 693 122 994 eV).
pub const RYDBERG_EV: f64 = 13.605_693_122_994;

/// Unit of a logged number.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Unit {
    /// An energy: given in eV, printed in Ry as `value / RYDBERG_EV`.
    Ry,
    /// A volume in Å³ (printed as `A^3`).
    Ang3,
    /// A charge or any other pure number (printed as `1`).
    One,
}

impl Unit {
    fn label(self) -> &'static str {
        match self {
            Unit::Ry => "Ry",
            Unit::Ang3 => "A^3",
            Unit::One => "1",
        }
    }

    fn convert(self, x: f64) -> f64 {
        match self {
            Unit::Ry => x / RYDBERG_EV,
            _ => x,
        }
    }
}

/// One block of the log, built in memory and appended at once.
#[derive(Debug)]
pub struct Block {
    text: String,
    step: String,
}

impl Block {
    /// Start the block of a sub-step.
    pub fn new(step: &str, iteration: u64) -> Block {
        let mut text = String::new();
        let _ = writeln!(text, "== {step} iteration {iteration}");
        Block {
            text,
            step: step.to_string(),
        }
    }

    /// A labelled number (`value` in eV for `Unit::Ry`).
    pub fn val(&mut self, label: &str, value: f64, unit: Unit) -> &mut Self {
        let v = format!("{:e}", unit.convert(value));
        let _ = writeln!(self.text, ":: {label:<28}= {v:>25} {}", unit.label());
        self
    }

    /// A labelled number with its standard error.
    pub fn val_err(&mut self, label: &str, value: f64, error: f64, unit: Unit) -> &mut Self {
        let v = format!("{:e}", unit.convert(value));
        let e = format!("{:e}", unit.convert(error));
        let _ = writeln!(self.text, ":: {label:<28}= {v:>25} +- {e} {}", unit.label());
        self
    }

    /// A labelled integer count.
    pub fn count(&mut self, label: &str, n: u64) -> &mut Self {
        let _ = writeln!(self.text, ":: {label:<28}= {n:>25} #");
        self
    }

    /// A labelled word.
    pub fn word(&mut self, label: &str, w: &str) -> &mut Self {
        let _ = writeln!(self.text, ":: {label:<28}= {w:>25} -");
        self
    }

    /// Append the block (with its end line) to the log and fsync it.
    pub fn append(mut self, path: &Path) -> Result<()> {
        let _ = writeln!(self.text, "== end {}", self.step);
        append_synced(path, &self.text)
    }
}

/// Append text to a file (created if missing) and fsync it.
pub fn append_synced(path: &Path, text: &str) -> Result<()> {
    let mut f = std::fs::OpenOptions::new()
        .create(true)
        .append(true)
        .open(path)
        .with_context(|| format!("{}: cannot open for appending", path.display()))?;
    f.write_all(text.as_bytes())
        .and_then(|_| f.sync_all())
        .with_context(|| format!("{}: cannot append", path.display()))
}

/// Append one line to the journal: UTC time (seconds since the epoch), step, detail.
pub fn journal(path: &Path, step: &str, detail: &str) -> Result<()> {
    append_synced(path, &journal_line(step, detail))
}

/// One journal line: the time and process id of this invocation. With `SOURCE_DATE_EPOCH`
/// set (the reproducible-builds convention: seconds since 1970), that time and `pid=-`
/// instead, so that running the same steps again gives a byte-identical case folder.
fn journal_line(step: &str, detail: &str) -> String {
    if let Some(t) = std::env::var("SOURCE_DATE_EPOCH")
        .ok()
        .and_then(|v| v.trim().parse::<u64>().ok())
    {
        return format!("{t}.000 {step} pid=- {detail}\n");
    }
    let now = std::time::SystemTime::now()
        .duration_since(std::time::UNIX_EPOCH)
        .map(|d| d.as_secs_f64())
        .unwrap_or(0.0);
    format!("{now:.3} {step} pid={} {detail}\n", std::process::id())
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn numbers_read_back_exactly() {
        let mut b = Block::new("update", 3);
        let e = -1.730_086_564_123_456_7_f64;
        b.val("total energy", e, Unit::Ry)
            .val("f charge", 0.1 + 0.2, Unit::One);
        let text = &b.text;
        let line = text
            .lines()
            .find(|l| l.starts_with(":: total energy"))
            .unwrap_or_default();
        let tok = line
            .split('=')
            .nth(1)
            .unwrap_or_default()
            .split_whitespace();
        let ry: f64 = tok
            .clone()
            .next()
            .unwrap_or_default()
            .parse()
            .unwrap_or(0.0);
        assert_eq!(ry, e / RYDBERG_EV);
        assert_eq!(tok.last(), Some("Ry"));
        let line = text
            .lines()
            .find(|l| l.contains("f charge"))
            .unwrap_or_default();
        let n: f64 = line
            .split_whitespace()
            .nth(4)
            .unwrap_or_default()
            .parse()
            .unwrap_or(0.0);
        assert_eq!(n.to_bits(), (0.1_f64 + 0.2).to_bits());
    }
}
