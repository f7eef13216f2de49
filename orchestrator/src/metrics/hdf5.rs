//! HDF5 files a program writes: a metric from a dataset (a scalar, or one element by
//! index) or from a scalar attribute of a group or dataset, and the check that an HDF5
//! output holds the datasets its stage declares, each numeric and (unless the stage allows
//! otherwise) finite. Opens files read-only; never writes.

use std::path::Path;

use h5::types::TypeDescriptor;
use hdf5_metno as h5;

use super::{malformed, missing, nonfinite};
use crate::validate::Invalid;

/// The HDF5 superblock signature (HDF5 File Format Specification, "Format Signature").
const SIGNATURE: &[u8; 8] = b"\x89HDF\r\n\x1a\n";

/// Open `path` as HDF5, or say what it is not.
fn open(path: &Path, what: &str) -> Result<h5::File, Invalid> {
    let shown = path.display();
    let head = std::fs::read(path)
        .map(|b| b.get(..8).map(<[u8]>::to_vec).unwrap_or_default())
        .map_err(|e| missing(format!("{shown}: cannot read {what}: {e}")))?;
    let opened = h5::File::open(path);
    match opened {
        Ok(f) => Ok(f),
        Err(e) if head.as_slice() != SIGNATURE => Err(malformed(format!(
            "{shown}: {what} is not an HDF5 file (no HDF5 signature at its start; the library says: {e})"
        ))),
        Err(e) => Err(malformed(format!("{shown}: cannot open {what} as HDF5: {e}"))),
    }
}

/// Whether a type is one number per element.
fn numeric(t: &TypeDescriptor) -> bool {
    matches!(
        t,
        TypeDescriptor::Integer(_) | TypeDescriptor::Unsigned(_) | TypeDescriptor::Float(_)
    )
}

/// A numeric dataset of `file`, or why not.
fn dataset(file: &h5::File, shown: &str, path: &str, who: &str) -> Result<h5::Dataset, Invalid> {
    let ds = file
        .dataset(path)
        .map_err(|_| missing(format!("{shown}: no dataset `{path}` ({who})")))?;
    let t = ds.dtype().and_then(|t| t.to_descriptor()).map_err(|e| {
        malformed(format!(
            "{shown}: `{path}` has a type rondo cannot read ({who}): {e}"
        ))
    })?;
    if !numeric(&t) {
        return Err(malformed(format!(
            "{shown}: `{path}` holds {t}, not numbers ({who})"
        )));
    }
    Ok(ds)
}

/// One element of a dataset: the only one, or the one at `index` (row-major).
pub(super) fn read_dataset(
    path: &Path,
    metric: &str,
    ds_path: &str,
    index: Option<&[usize]>,
) -> Result<f64, Invalid> {
    let shown = path.display().to_string();
    let who = format!("metric `{metric}`");
    let file = open(path, &format!("the file of {who}"))?;
    let ds = dataset(&file, &shown, ds_path, &who)?;
    let shape = ds.shape();
    let flat = match index {
        None if ds.size() == 1 => 0,
        None => {
            return Err(malformed(format!(
            "{shown}: `{ds_path}` has shape {shape:?}, not one element ({who}); add `index: [...]`"
        )))
        }
        Some(ix) => flat_index(&shape, ix).ok_or_else(|| {
            missing(format!(
                "{shown}: index {ix:?} is outside `{ds_path}` of shape {shape:?} ({who})"
            ))
        })?,
    };
    // The whole dataset is read and one element taken: metric datasets are small, and this
    // keeps one code path for every rank.
    let values: Vec<f64> = ds
        .read_raw()
        .map_err(|e| malformed(format!("{shown}: cannot read `{ds_path}` ({who}): {e}")))?;
    values.get(flat).copied().ok_or_else(|| {
        malformed(format!(
            "{shown}: `{ds_path}` holds fewer values than its shape says ({who})"
        ))
    })
}

/// The row-major offset of `ix` in `shape`, if inside it.
fn flat_index(shape: &[usize], ix: &[usize]) -> Option<usize> {
    if shape.len() != ix.len() {
        return None;
    }
    let mut flat = 0;
    for (&n, &i) in shape.iter().zip(ix) {
        if i >= n {
            return None;
        }
        flat = flat * n + i;
    }
    Some(flat)
}

/// A scalar numeric attribute of the group or dataset at `object`.
pub(super) fn read_attribute(
    path: &Path,
    metric: &str,
    object: &str,
    name: &str,
) -> Result<f64, Invalid> {
    let shown = path.display();
    let who = format!("metric `{metric}`");
    let file = open(path, &format!("the file of {who}"))?;
    let attr = match file.dataset(object) {
        Ok(ds) => ds.attr(name),
        Err(_) => match file.group(object) {
            Ok(g) => g.attr(name),
            Err(_) => {
                return Err(missing(format!(
                    "{shown}: no group or dataset `{object}` ({who})"
                )))
            }
        },
    }
    .map_err(|_| {
        missing(format!(
            "{shown}: `{object}` has no attribute `{name}` ({who})"
        ))
    })?;
    let t = attr.dtype().and_then(|t| t.to_descriptor()).map_err(|e| {
        malformed(format!(
            "{shown}: `{object}@{name}` has an unreadable type ({who}): {e}"
        ))
    })?;
    if !numeric(&t) || attr.size() != 1 {
        return Err(malformed(format!(
            "{shown}: `{object}@{name}` holds {} of {t}, not one number ({who})",
            attr.size()
        )));
    }
    let v: Vec<f64> = attr.read_raw().map_err(|e| {
        malformed(format!(
            "{shown}: cannot read `{object}@{name}` ({who}): {e}"
        ))
    })?;
    v.first()
        .copied()
        .ok_or_else(|| malformed(format!("{shown}: `{object}@{name}` is empty ({who})")))
}

/// An HDF5 output: the file opens as HDF5 and holds every dataset of `datasets`, each
/// numeric, with every value finite unless `allow_nonfinite`.
pub fn check_datasets(
    path: &Path,
    role: &str,
    datasets: &[String],
    allow_nonfinite: bool,
) -> Result<(), Invalid> {
    let shown = path.display().to_string();
    let who = format!("output `{role}`");
    let file = open(path, &who)?;
    for d in datasets {
        let ds = dataset(&file, &shown, d, &who)?;
        if allow_nonfinite {
            continue;
        }
        let values: Vec<f64> = ds
            .read_raw()
            .map_err(|e| malformed(format!("{shown}: cannot read `{d}` ({who}): {e}")))?;
        if let Some(i) = values.iter().position(|x| !x.is_finite()) {
            return Err(nonfinite(format!(
                "{shown}: `{d}` ({who}) holds a NaN or infinite value (element {i} in row-major order)"
            )));
        }
    }
    Ok(())
}

#[cfg(test)]
mod tests {
    use super::*;

    /// An archive with a scalar, a 2×2 dataset, a string dataset and two attributes.
    fn archive(p: &Path) -> h5::Result<()> {
        let f = h5::File::create(p)?;
        let g = f.create_group("impurity")?;
        g.new_dataset::<f64>()
            .shape(())
            .create("n_f")?
            .write_scalar(&0.875)?;
        g.new_dataset::<f64>()
            .shape([2, 2])
            .create("occ")?
            .write_raw(&[0.5, 0.25, 0.125, f64::NAN])?;
        g.new_dataset::<i32>()
            .shape([3])
            .create("counts")?
            .write_raw(&[1, 2, 3])?;
        g.new_attr::<f64>()
            .shape(())
            .create("mu")?
            .write_scalar(&-0.0625)?;
        f.new_attr::<u32>()
            .shape(())
            .create("version")?
            .write_scalar(&3)?;
        Ok(())
    }

    #[test]
    fn datasets_and_attributes_are_read() -> Result<(), Box<dyn std::error::Error>> {
        let d = tempfile::tempdir()?;
        let p = d.path().join("imp.h5");
        archive(&p)?;
        assert_eq!(read_dataset(&p, "n", "/impurity/n_f", None), Ok(0.875));
        assert_eq!(
            read_dataset(&p, "o", "/impurity/occ", Some(&[1, 0])),
            Ok(0.125)
        );
        assert_eq!(
            read_dataset(&p, "c", "/impurity/counts", Some(&[2])),
            Ok(3.0)
        );
        assert_eq!(read_attribute(&p, "mu", "/impurity", "mu"), Ok(-0.0625));
        assert_eq!(read_attribute(&p, "v", "/", "version"), Ok(3.0));
        let e = read_dataset(&p, "x", "/impurity/none", None)
            .err()
            .ok_or("no error")?;
        assert_eq!(e.kind, "missing-output");
        assert!(
            e.message.contains("imp.h5") && e.message.contains("/impurity/none"),
            "{}",
            e.message
        );
        assert_eq!(
            read_dataset(&p, "o", "/impurity/occ", None).map_err(|e| e.kind),
            Err("malformed-output")
        );
        assert_eq!(
            read_dataset(&p, "o", "/impurity/occ", Some(&[2, 0])).map_err(|e| e.kind),
            Err("missing-output")
        );
        assert_eq!(
            read_attribute(&p, "x", "/impurity", "beta").map_err(|e| e.kind),
            Err("missing-output")
        );
        Ok(())
    }

    #[test]
    fn outputs_must_be_hdf5_with_their_datasets() -> Result<(), Box<dyn std::error::Error>> {
        let d = tempfile::tempdir()?;
        let p = d.path().join("imp.h5");
        archive(&p)?;
        let ds = |v: &[&str]| v.iter().map(|s| s.to_string()).collect::<Vec<_>>();
        assert!(check_datasets(
            &p,
            "imp",
            &ds(&["/impurity/n_f", "/impurity/counts"]),
            false
        )
        .is_ok());
        let nan = check_datasets(&p, "imp", &ds(&["/impurity/occ"]), false);
        assert_eq!(nan.map_err(|e| e.kind), Err("nonfinite-output"));
        assert!(check_datasets(&p, "imp", &ds(&["/impurity/occ"]), true).is_ok());
        let gone = check_datasets(&p, "imp", &ds(&["/impurity/sigma"]), true)
            .err()
            .ok_or("no error")?;
        assert_eq!(gone.kind, "missing-output");
        assert!(gone.message.contains("/impurity/sigma"), "{}", gone.message);
        let text = d.path().join("fake.h5");
        std::fs::write(&text, "not an archive\n")?;
        let e = check_datasets(&text, "imp", &[], true)
            .err()
            .ok_or("no error")?;
        assert_eq!(e.kind, "malformed-output");
        assert!(e.message.contains("is not an HDF5 file"), "{}", e.message);
        Ok(())
    }
}
