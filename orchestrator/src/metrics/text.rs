//! A metric from a text file (or the stdout) by a regular expression with one capture
//! group: the first or the last match, its group parsed as a number (`1.5e-3`, and the
//! `1.5D-03` form of Fortran output).

use std::path::Path;

use regex::Regex;

use super::{malformed, missing, read_bytes};
use crate::validate::Invalid;

/// Lines of the file shown when the pattern matches nothing.
const TAIL_LINES: usize = 5;

/// The number the pattern's capture group matches, first or last match.
pub(super) fn read(path: &Path, metric: &str, regex: &Regex, first: bool) -> Result<f64, Invalid> {
    let bytes = read_bytes(path, metric)?;
    let text = String::from_utf8_lossy(&bytes);
    let mut all = regex.captures_iter(&text);
    let caps = if first { all.next() } else { all.last() };
    let Some(caps) = caps else {
        return Err(missing(format!(
            "{}: the pattern `{}` of metric `{metric}` matches nothing; its last lines: {}",
            path.display(),
            regex.as_str(),
            tail(&text)
        )));
    };
    let Some(m) = caps.get(1) else {
        return Err(missing(format!(
            "{}: the pattern `{}` of metric `{metric}` matched, but its capture group did not take part in the match",
            path.display(),
            regex.as_str()
        )));
    };
    parse_number(m.as_str()).ok_or_else(|| {
        malformed(format!(
            "{}: the pattern `{}` of metric `{metric}` captured `{}`, which is not a number",
            path.display(),
            regex.as_str(),
            m.as_str()
        ))
    })
}

/// A number as printed: Rust's float syntax (correctly rounded), or with a `D`/`d` exponent.
fn parse_number(s: &str) -> Option<f64> {
    let s = s.trim();
    s.parse::<f64>()
        .ok()
        .or_else(|| s.replace(['D', 'd'], "e").parse::<f64>().ok())
}

/// Characters of the tail shown at most.
const TAIL_CHARS: usize = 1500;

/// The last non-blank lines of a text on one line, separated by ` | ` (a point's reason is
/// shown as one line), or a note that the file is empty.
fn tail(text: &str) -> String {
    let lines: Vec<&str> = text.lines().filter(|l| !l.trim().is_empty()).collect();
    if lines.is_empty() {
        return "(the file is empty)".into();
    }
    let t = lines[lines.len().saturating_sub(TAIL_LINES)..].join(" | ");
    let skip = t.chars().count().saturating_sub(TAIL_CHARS);
    t.chars().skip(skip).collect()
}

#[cfg(test)]
mod tests {
    use super::*;

    fn log(d: &Path) -> std::io::Result<std::path::PathBuf> {
        let p = d.join("scf.log");
        std::fs::write(
            &p,
            "start\n:: total energy = -1.25 Ry\nmixing\n:: total energy = -1.5D+00 Ry\nend\n",
        )?;
        Ok(p)
    }

    #[test]
    fn first_and_last_match_and_fortran_exponents() -> Result<(), Box<dyn std::error::Error>> {
        let d = tempfile::tempdir()?;
        let p = log(d.path())?;
        let re = Regex::new(r"total energy = (\S+) Ry")?;
        assert_eq!(read(&p, "e", &re, true), Ok(-1.25));
        assert_eq!(read(&p, "e", &re, false), Ok(-1.5));
        Ok(())
    }

    #[test]
    fn no_match_names_file_pattern_and_tail() -> Result<(), Box<dyn std::error::Error>> {
        let d = tempfile::tempdir()?;
        let p = log(d.path())?;
        let re = Regex::new(r"fermi level = (\S+)")?;
        let e = read(&p, "ef", &re, false).err().ok_or("no error")?;
        assert_eq!(e.kind, "missing-output");
        assert!(e.message.contains("scf.log"), "{}", e.message);
        assert!(e.message.contains(r"fermi level = (\S+)"), "{}", e.message);
        assert!(
            e.message
                .ends_with("its last lines: start | :: total energy = -1.25 Ry | mixing | :: total energy = -1.5D+00 Ry | end"),
            "{}",
            e.message
        );
        // a capture that is no number
        let re = Regex::new(r"(?m)^(start)$")?;
        assert_eq!(
            read(&p, "x", &re, false).map_err(|e| e.kind),
            Err("malformed-output")
        );
        // a missing file
        let gone = d.path().join("none.log");
        assert_eq!(
            read(&gone, "x", &re, false).map_err(|e| e.kind),
            Err("missing-output")
        );
        Ok(())
    }
}
