//! Metrics taken from what a program writes, as the stage's `read-metrics:` declares: a
//! text file or the stdout by pattern (`text`), a JSON file by pointer (`json`), an HDF5
//! dataset or attribute (`hdf5`), each converted from its energy unit to eV when the
//! source names one. Also the check of the datasets an HDF5 output must hold (`hdf5`).
//!
//! Called from `engine::settle::check_outputs` on the blocking pool, after the program has
//! ended and before anything is stored. Reads files of the attempt's scratch folder only:
//! no store, no scheduler, no engine state. A source that finds nothing fails the attempt
//! with a message naming the file and what was looked for.

mod hdf5;
mod json;
mod text;

use std::path::{Path, PathBuf};

pub use self::hdf5::check_datasets;
use crate::spec::{MetricSource, SourceKind};
use crate::validate::{Invalid, Metric};

/// Read every source of `sources` from the scratch folder `dir`, in order.
pub fn read_sources(
    dir: &Path,
    sources: &[MetricSource],
    allow_nonfinite: bool,
) -> Result<Vec<Metric>, Invalid> {
    let mut out = Vec::with_capacity(sources.len());
    for s in sources {
        let path = source_path(dir, s);
        let raw = match &s.kind {
            SourceKind::Text { regex, first } => text::read(&path, &s.name, regex, *first)?,
            SourceKind::Json { pointer } => json::read(&path, &s.name, pointer)?,
            SourceKind::Hdf5Dataset { path: ds, index } => {
                hdf5::read_dataset(&path, &s.name, ds, index.as_deref())?
            }
            SourceKind::Hdf5Attribute { object, name } => {
                hdf5::read_attribute(&path, &s.name, object, name)?
            }
        };
        let value = s.unit.map_or(raw, |u| u.to_ev(raw));
        if !allow_nonfinite && !value.is_finite() {
            return Err(nonfinite(format!(
                "{}: metric `{}` is {raw}, not a finite number (set `allow-nonfinite: true` on the stage to accept it)",
                path.display(),
                s.name
            )));
        }
        out.push(Metric {
            name: s.name.clone(),
            value,
            error: None,
        });
    }
    Ok(out)
}

/// The standard output in a scratch folder: `stdout.txt` where rondo runs the program
/// itself; a batch job's own output file (`slurm-JOBID.out`, the job's stdout) otherwise.
const STDOUT_FILE: &str = "stdout.txt";

/// The file a source reads: its file in `dir`; for the stdout, `stdout.txt` or, when a batch
/// job ran the stage and there is none, the job's output file (the last of its name order,
/// the latest job id of equal length).
fn source_path(dir: &Path, s: &MetricSource) -> PathBuf {
    let path = dir.join(&s.file);
    if s.file != STDOUT_FILE || path.exists() {
        return path;
    }
    let mut jobs: Vec<PathBuf> = std::fs::read_dir(dir)
        .into_iter()
        .flatten()
        .flatten()
        .map(|e| e.path())
        .filter(|p| {
            p.file_name()
                .and_then(|n| n.to_str())
                .is_some_and(|n| n.starts_with("slurm-") && n.ends_with(".out"))
        })
        .collect();
    jobs.sort_by_key(|p| (p.as_os_str().len(), p.clone()));
    jobs.pop().unwrap_or(path)
}

/// A file or the value in it is missing.
fn missing(message: String) -> Invalid {
    Invalid {
        kind: "missing-output",
        message,
    }
}

/// A file is not of the form the source reads.
fn malformed(message: String) -> Invalid {
    Invalid {
        kind: "malformed-output",
        message,
    }
}

/// A value is NaN or infinite.
fn nonfinite(message: String) -> Invalid {
    Invalid {
        kind: "nonfinite-output",
        message,
    }
}

/// The file a source reads must exist.
fn read_bytes(path: &Path, metric: &str) -> Result<Vec<u8>, Invalid> {
    std::fs::read(path).map_err(|e| {
        missing(format!(
            "{}: cannot read the file of metric `{metric}`: {e}",
            path.display()
        ))
    })
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::spec::EnergyUnit;

    fn stdout_source() -> Result<MetricSource, regex::Error> {
        Ok(MetricSource {
            name: "fermi".into(),
            file: STDOUT_FILE.into(),
            kind: SourceKind::Text {
                regex: regex::Regex::new(r"fermi = (\S+)")?,
                first: false,
            },
            unit: Some(EnergyUnit::Ha),
        })
    }

    #[test]
    fn the_stdout_of_a_batch_job_is_its_output_file() -> Result<(), Box<dyn std::error::Error>> {
        let d = tempfile::tempdir()?;
        std::fs::write(d.path().join("slurm-99.out"), "fermi = 1.0\n")?;
        std::fs::write(d.path().join("slurm-100.out"), "fermi = 0.5\n")?;
        let m = read_sources(d.path(), &[stdout_source()?], false).map_err(|e| e.message)?;
        assert_eq!(m[0].value, 0.5 * EnergyUnit::HARTREE_EV);
        // rondo's own stdout.txt comes first
        std::fs::write(d.path().join(STDOUT_FILE), "fermi = 0.25\n")?;
        let m = read_sources(d.path(), &[stdout_source()?], false).map_err(|e| e.message)?;
        assert_eq!(m[0].value, 0.25 * EnergyUnit::HARTREE_EV);
        Ok(())
    }

    #[test]
    fn a_nonfinite_value_fails_unless_allowed() -> Result<(), Box<dyn std::error::Error>> {
        let d = tempfile::tempdir()?;
        std::fs::write(d.path().join(STDOUT_FILE), "fermi = NaN\n")?;
        let e = read_sources(d.path(), &[stdout_source()?], false)
            .err()
            .ok_or("no error")?;
        assert_eq!(e.kind, "nonfinite-output");
        assert!(e.message.contains("allow-nonfinite"), "{}", e.message);
        let m = read_sources(d.path(), &[stdout_source()?], true).map_err(|e| e.message)?;
        assert!(m[0].value.is_nan());
        Ok(())
    }

    #[test]
    fn units_convert_with_the_codata_2018_energies() {
        assert_eq!(EnergyUnit::Ry.to_ev(1.0), 13.605_693_122_994);
        assert_eq!(EnergyUnit::Ha.to_ev(1.0), 27.211_386_245_988);
        assert_eq!(EnergyUnit::Ev.to_ev(-2.5), -2.5);
        // in CODATA 2018 E_h = 2 hc R∞ exactly, and doubling is exact in binary
        assert_eq!(EnergyUnit::Ha.to_ev(1.0), 2.0 * EnergyUnit::Ry.to_ev(1.0));
        for (name, unit) in EnergyUnit::NAMES {
            assert_eq!(EnergyUnit::parse(name), Some(unit));
        }
        assert_eq!(EnergyUnit::parse("kcal"), None);
    }
}
