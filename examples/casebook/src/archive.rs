//! The HDF5 archive `<name>.impurity.h5`: the impurity data of the case (Δ, G_loc, Σ, G, the
//! levels, the density matrix, attributes β, μ, n_f, U) as f64 datasets, so every number is
//! stored exactly. Complex functions of Matsubara frequency are (n_w, 2) datasets with the
//! real part in column 0 and the imaginary part in column 1. Existing datasets and attributes
//! are overwritten in place; the file itself is never replaced. Owns the layout only.

use anyhow::{bail, Context, Result};
use hdf5_metno as hdf5;
use num_complex::Complex64;
use std::path::Path;

/// Group holding everything the impurity sub-steps exchange.
pub const GROUP: &str = "impurity";

/// The open archive.
pub struct Archive {
    file: hdf5::File,
    shown: String,
}

fn h5err(shown: &str, what: &str) -> impl FnOnce(hdf5::Error) -> anyhow::Error {
    let (shown, what) = (shown.to_string(), what.to_string());
    move |e| anyhow::anyhow!("{shown}: {what}: {e}")
}

impl Archive {
    /// Create a new archive (replacing any file at `path`) with the start self-energy.
    pub fn create(path: &Path, sigma: &[Complex64]) -> Result<Archive> {
        let shown = path.display().to_string();
        let file = hdf5::File::create(path).map_err(h5err(&shown, "cannot create"))?;
        file.create_group(GROUP)
            .map_err(h5err(&shown, "cannot create the group /impurity"))?;
        let a = Archive { file, shown };
        a.write_complex("sigma", sigma)?;
        Ok(a)
    }

    /// Open an existing archive for reading and writing.
    pub fn open(path: &Path) -> Result<Archive> {
        let shown = path.display().to_string();
        if !path.is_file() {
            bail!("{shown}: the impurity archive is missing; make the case with `casebook init`");
        }
        let file = hdf5::File::open_rw(path).map_err(h5err(&shown, "cannot open"))?;
        Ok(Archive { file, shown })
    }

    /// Open an existing archive for reading only (a file the caller may not write, such as
    /// an orchestrator's read-only input).
    pub fn open_read(path: &Path) -> Result<Archive> {
        let shown = path.display().to_string();
        let file = hdf5::File::open(path).map_err(h5err(&shown, "cannot open"))?;
        Ok(Archive { file, shown })
    }

    fn group(&self) -> Result<hdf5::Group> {
        self.file
            .group(GROUP)
            .map_err(h5err(&self.shown, "no group /impurity"))
    }

    /// Write a real dataset of the given shape at /impurity/NAME, in place when it exists
    /// with that shape.
    pub fn write_real(&self, name: &str, shape: &[usize], data: &[f64]) -> Result<()> {
        if let Some(i) = data.iter().position(|x| !x.is_finite()) {
            bail!(
                "{}: refusing to write /impurity/{name}: element {i} is not finite",
                self.shown
            );
        }
        let g = self.group()?;
        let what = format!("cannot write /impurity/{name}");
        if g.link_exists(name) {
            let ds = g.dataset(name).map_err(h5err(&self.shown, &what))?;
            if ds.shape() == shape {
                return ds.write_raw(data).map_err(h5err(&self.shown, &what));
            }
            g.unlink(name).map_err(h5err(&self.shown, &what))?;
        }
        let ds = g
            .new_dataset::<f64>()
            .shape(shape.to_vec())
            .create(name)
            .map_err(h5err(&self.shown, &what))?;
        ds.write_raw(data).map_err(h5err(&self.shown, &what))
    }

    /// Read a real dataset /impurity/NAME: its shape and its elements in row-major order.
    pub fn read_real(&self, name: &str) -> Result<(Vec<usize>, Vec<f64>)> {
        let what = format!("cannot read /impurity/{name}");
        let ds = self
            .group()?
            .dataset(name)
            .map_err(h5err(&self.shown, &what))?;
        let data: Vec<f64> = ds.read_raw().map_err(h5err(&self.shown, &what))?;
        if data.iter().any(|x| !x.is_finite()) {
            bail!(
                "{}: /impurity/{name} holds NaN or infinite values",
                self.shown
            );
        }
        Ok((ds.shape(), data))
    }

    /// Write a complex function of Matsubara frequency as an (n_w, 2) dataset.
    pub fn write_complex(&self, name: &str, data: &[Complex64]) -> Result<()> {
        let flat: Vec<f64> = data.iter().flat_map(|z| [z.re, z.im]).collect();
        self.write_real(name, &[data.len(), 2], &flat)
    }

    /// Read a complex function of Matsubara frequency from an (n_w, 2) dataset.
    pub fn read_complex(&self, name: &str) -> Result<Vec<Complex64>> {
        let (shape, flat) = self.read_real(name)?;
        if shape.len() != 2 || shape[1] != 2 || shape[0] == 0 {
            bail!(
                "{}: /impurity/{name} must have shape (n_w, 2) = (re, im), found {shape:?}",
                self.shown
            );
        }
        Ok(flat
            .chunks_exact(2)
            .map(|c| Complex64::new(c[0], c[1]))
            .collect())
    }

    /// Set a scalar f64 attribute of /impurity (in place when it exists).
    pub fn set_attr(&self, name: &str, value: f64) -> Result<()> {
        let g = self.group()?;
        let what = format!("cannot write the attribute {name} of /impurity");
        let attr = match g.attr(name) {
            Ok(a) => a,
            Err(_) => g
                .new_attr::<f64>()
                .shape(())
                .create(name)
                .map_err(h5err(&self.shown, &what))?,
        };
        attr.write_scalar(&value).map_err(h5err(&self.shown, &what))
    }

    /// Read a scalar f64 attribute of /impurity.
    pub fn attr(&self, name: &str) -> Result<f64> {
        let what = format!("no attribute {name} on /impurity (has `casebook project` run?)");
        let v: f64 = self
            .group()?
            .attr(name)
            .and_then(|a| a.read_scalar())
            .map_err(h5err(&self.shown, &what))?;
        if !v.is_finite() {
            bail!(
                "{}: the attribute {name} of /impurity is not finite",
                self.shown
            );
        }
        Ok(v)
    }

    /// Flush everything to the file.
    pub fn flush(&self) -> Result<()> {
        self.file
            .flush()
            .map_err(h5err(&self.shown, "cannot flush"))
            .context("the impurity archive may be incomplete")
    }
}
