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

use std::path::Path;

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
        let path = dir.join(&s.file);
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
