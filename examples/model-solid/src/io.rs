//! File formats of the stages: H(k) and Matsubara arrays (.npy), density and levels (JSON),
//! `metrics.json`; every reader validates shape and finiteness and names the file.

use anyhow::{bail, Context, Result};
use num_complex::Complex64;
use rondo_numerics::npy;
use serde::{Deserialize, Serialize};
use std::collections::BTreeMap;
use std::path::Path;

use crate::model::Sym2;

/// Number of columns of `hk.npy`: weight, H_cc, H_cf, H_fc, H_ff.
pub const HK_COLUMNS: usize = 5;

/// H(k) on a k mesh with weights (what `band` writes).
#[derive(Debug, Clone)]
pub struct HkMesh {
    /// Weights (sum 1).
    pub weights: Vec<f64>,
    /// The real symmetric 2×2 Hamiltonians.
    pub h: Vec<Sym2>,
}

/// Read `hk.npy`: float64, shape (nk, 5) = (w_k, H_cc, H_cf, H_fc, H_ff).
pub fn read_hk(path: &Path) -> Result<HkMesh> {
    let arr = npy::read_any(path)?;
    let shown = path.display();
    if arr.shape.len() != 2 || arr.shape[1] != HK_COLUMNS || arr.shape[0] == 0 {
        bail!(
            "{shown}: H(k) must have shape (nk, {HK_COLUMNS}) with nk > 0, found {:?}",
            arr.shape
        );
    }
    let data = arr
        .as_real()
        .with_context(|| format!("{shown}: H(k) must be a real float64 array, found complex"))?;
    if arr.has_nonfinite() {
        bail!("{shown}: H(k) contains NaN or infinite values");
    }
    let mut weights = Vec::with_capacity(arr.shape[0]);
    let mut h = Vec::with_capacity(arr.shape[0]);
    for (i, row) in data.chunks_exact(HK_COLUMNS).enumerate() {
        if (row[2] - row[3]).abs() > 1e-12 * (1.0 + row[2].abs()) {
            bail!(
                "{shown}: row {i}: H(k) is not symmetric (H_cf = {}, H_fc = {})",
                row[2],
                row[3]
            );
        }
        if row[0] < 0.0 {
            bail!("{shown}: row {i}: negative k weight {}", row[0]);
        }
        weights.push(row[0]);
        h.push(Sym2 {
            a: row[1],
            b: row[2],
            d: row[4],
        });
    }
    let wsum: f64 = weights.iter().sum();
    if (wsum - 1.0).abs() > 1e-10 {
        bail!("{shown}: k weights sum to {wsum}, expected 1");
    }
    Ok(HkMesh { weights, h })
}

/// Write `hk.npy` (atomically).
pub fn write_hk(path: &Path, mesh: &HkMesh) -> Result<()> {
    let mut flat = Vec::with_capacity(mesh.h.len() * HK_COLUMNS);
    for (w, h) in mesh.weights.iter().zip(&mesh.h) {
        flat.extend_from_slice(&[*w, h.a, h.b, h.b, h.d]);
    }
    npy::write_real(path, &[mesh.h.len(), HK_COLUMNS], &flat)?;
    Ok(())
}

/// Read a complex128 function of Matsubara frequency, shape (n_iw,).
pub fn read_matsubara(path: &Path, what: &str) -> Result<Vec<Complex64>> {
    let arr = npy::read_any(path)?;
    let shown = path.display();
    if arr.shape.len() != 1 || arr.shape[0] == 0 {
        bail!(
            "{shown}: {what} must have shape (n_iw,) with n_iw > 0, found {:?}",
            arr.shape
        );
    }
    let data = arr.as_complex().with_context(|| {
        format!("{shown}: {what} must be complex128 (values on Matsubara frequencies), found real")
    })?;
    if arr.has_nonfinite() {
        bail!("{shown}: {what} contains NaN or infinite values");
    }
    Ok(data.to_vec())
}

/// Write a complex128 function of Matsubara frequency (atomically).
pub fn write_matsubara(path: &Path, data: &[Complex64]) -> Result<()> {
    npy::write_complex(path, &[data.len()], data)?;
    Ok(())
}

/// The density passed between iterations (`density.json`).
#[derive(Debug, Clone, Copy, Serialize, Deserialize, PartialEq)]
#[serde(deny_unknown_fields)]
pub struct Density {
    /// f occupation per site (both spins).
    pub n_f: f64,
    /// conduction occupation per site (both spins).
    pub n_c: f64,
    /// chemical potential in eV.
    pub mu: f64,
    /// total energy per site in eV, when known.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub energy: Option<f64>,
}

/// Local levels of the correlated orbital (`levels.json`, written by `project`).
#[derive(Debug, Clone, Copy, Serialize, Deserialize, PartialEq)]
#[serde(deny_unknown_fields)]
pub struct Levels {
    /// Local f level Σ_k w_k (P H P†)(k) in eV.
    pub eps_f: f64,
    /// Chemical potential used in eV.
    pub mu: f64,
    /// Inverse temperature in 1/eV.
    pub beta: f64,
}

fn read_json<T: for<'de> Deserialize<'de>>(path: &Path, what: &str) -> Result<T> {
    let text = std::fs::read_to_string(path)
        .with_context(|| format!("{}: cannot read the {what} file", path.display()))?;
    serde_json::from_str(&text)
        .with_context(|| format!("{}: malformed {what} JSON", path.display()))
}

/// Read and validate `density.json`.
pub fn read_density(path: &Path) -> Result<Density> {
    let d: Density = read_json(path, "density")?;
    for (name, v) in [("n_f", d.n_f), ("n_c", d.n_c), ("mu", d.mu)] {
        if !v.is_finite() {
            bail!("{}: density field '{name}' is not finite", path.display());
        }
    }
    if !(0.0..=2.0).contains(&d.n_f) || !(0.0..=2.0).contains(&d.n_c) {
        bail!(
            "{}: occupations must lie in [0, 2] per orbital, found n_f = {}, n_c = {}",
            path.display(),
            d.n_f,
            d.n_c
        );
    }
    Ok(d)
}

/// Read and validate `levels.json`.
pub fn read_levels(path: &Path) -> Result<Levels> {
    let l: Levels = read_json(path, "levels")?;
    let beta_ok = l.beta.is_finite() && l.beta > 0.0;
    if !l.eps_f.is_finite() || !l.mu.is_finite() || !beta_ok {
        bail!(
            "{}: levels must be finite with beta > 0, found {:?}",
            path.display(),
            l
        );
    }
    Ok(l)
}

/// Write a small JSON value atomically.
pub fn write_json<T: Serialize>(path: &Path, value: &T) -> Result<()> {
    let mut text = serde_json::to_string_pretty(value)?;
    text.push('\n');
    npy::write_atomic(path, text.as_bytes())?;
    Ok(())
}

/// Write `metrics.json`: a flat object name → number, or name → `{"value": x, "error": e}`
/// for a metric that carries a standard error; refuses non-finite values and negative errors.
pub fn write_metrics(
    path: &Path,
    metrics: &BTreeMap<&'static str, crate::solve::Metric>,
) -> Result<()> {
    let mut out = serde_json::Map::new();
    for (k, (v, e)) in metrics {
        if !v.is_finite() {
            bail!(
                "metric '{k}' is not finite ({v}); refusing to write {}",
                path.display()
            );
        }
        let entry = match e {
            None => serde_json::json!(v),
            Some(e) if e.is_finite() && *e >= 0.0 => serde_json::json!({"value": v, "error": e}),
            Some(e) => bail!(
                "metric '{k}' has an invalid error bar ({e}); refusing to write {}",
                path.display()
            ),
        };
        out.insert((*k).to_string(), entry);
    }
    write_json(path, &serde_json::Value::Object(out))
}

/// Metrics without error bars, in the form `write_metrics` takes.
pub fn exact_metrics(
    metrics: BTreeMap<&'static str, f64>,
) -> BTreeMap<&'static str, crate::solve::Metric> {
    metrics.into_iter().map(|(k, v)| (k, (v, None))).collect()
}

/// β in 1/eV from a temperature in kelvin, rejecting non-positive or non-finite values.
pub fn beta_from_temperature(t_kelvin: f64) -> Result<f64> {
    rondo_numerics::units::beta_from_kelvin(t_kelvin).with_context(|| {
        format!("temperature must be a finite positive number of kelvin, got {t_kelvin}")
    })
}
