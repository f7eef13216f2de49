//! The built-in `filter` stage, a Legendre noise filter (Boehnke et al., Phys. Rev. B 84,
//! 075145 (2011)): from G(τ) on a uniform grid 0..β or on the bin centres of a histogram
//! (`.npy` of shape (n, 2) = τ, G or (n, 3) = τ, G, σ) fit G_l with the same kernel the model
//! engine's Monte Carlo solver uses, drop the coefficients lost in the noise (with σ given),
//! and write the requested outputs: `gtau` (filtered, same grid and layout (n, 2)), `gl`
//! ((kept, 2) = G_l, σ_l), `giw` (complex, `matsubara` positive frequencies), and with
//! Δ(iω_n) and the level ε, `sigma` = iω − ε − Δ − 1/G.
//!
//! Owns the file handling and grid checks around `rondo_numerics::legendre`; knows no store
//! and no scheduler.

use std::path::{Path, PathBuf};

use num_complex::Complex64;
use rondo_numerics::legendre::{self, TauGrid};
use rondo_numerics::npy;

use super::{metric, Builtin, MixReport, StageFiles};
use crate::spec::{FilterSettings, FILTER_METRICS};

/// Input roles the filter reads.
pub const FILTER_INPUTS: [&str; 3] = ["gtau", "delta", "levels"];
/// Output roles the filter writes.
pub const FILTER_OUTPUTS: [&str; 4] = ["gtau", "giw", "sigma", "gl"];

/// The filter stage with its settings: a [`Builtin`] reading `gtau` (and `delta`, `levels`
/// for `sigma`) and writing any of [`FILTER_OUTPUTS`].
#[derive(Debug, Clone)]
pub struct Filter {
    /// The `settings:` of the stage.
    pub settings: FilterSettings,
}

impl Builtin for Filter {
    fn name(&self) -> &'static str {
        "filter"
    }

    fn run(&self, files: &StageFiles) -> Result<MixReport, String> {
        if let Some((r, _)) = files
            .inputs
            .iter()
            .find(|(r, _)| !FILTER_INPUTS.contains(&r.as_str()))
        {
            return Err(format!(
                "the filter has no input `{r}` (it reads gtau, delta, levels)"
            ));
        }
        if let Some((r, _)) = files
            .outputs
            .iter()
            .find(|(r, _)| !FILTER_OUTPUTS.contains(&r.as_str()))
        {
            return Err(format!(
                "the filter has no output `{r}` (it writes gtau, giw, sigma, gl)"
            ));
        }
        let Some(gtau) = files.input("gtau") else {
            return Err("the input `gtau` has no file (give --input gtau=PATH)".into());
        };
        filter(
            &self.settings,
            gtau,
            files.input("delta"),
            files.input("levels"),
            &files.outputs,
        )
    }
}

/// G(τ) as read: the grid, the values and, with a third column, their error bars.
struct Gtau {
    tau: Vec<f64>,
    g: Vec<f64>,
    sigma: Option<Vec<f64>>,
}

/// The filter (see the module documentation): fit, truncate, write each output asked for.
pub fn filter(
    with: &FilterSettings,
    gtau: &Path,
    delta: Option<&Path>,
    levels: Option<&Path>,
    outputs: &[(String, PathBuf)],
) -> Result<MixReport, String> {
    let data = read_gtau(gtau)?;
    let (grid, beta) = tau_grid(gtau, &data.tau)?;
    let n = data.tau.len();
    let nl = with.legendre;
    let (mut gl, gl_err) =
        legendre::gl_from_tau_grid(&data.g, data.sigma.as_deref(), beta, grid, nl);
    let kept = match &gl_err {
        Some(e) => legendre::significant_count(&gl, e),
        None => nl,
    };
    gl.truncate(kept);
    let giw = legendre::gl_to_giw_many(&gl, with.matsubara);
    let tail = legendre::tail_moments(&gl, beta);
    for (role, path) in outputs {
        let res = match role.as_str() {
            "gtau" => {
                let mut flat = Vec::with_capacity(2 * n);
                for t in &data.tau {
                    flat.push(*t);
                    flat.push(legendre::gl_to_gtau(&gl, beta, *t));
                }
                npy::write_real(path, &[n, 2], &flat)
            }
            "gl" => {
                let e = gl_err.clone().unwrap_or_else(|| vec![0.0; nl]);
                let flat: Vec<f64> = gl.iter().zip(&e).flat_map(|(a, b)| [*a, *b]).collect();
                npy::write_real(path, &[kept, 2], &flat)
            }
            "giw" => npy::write_complex(path, &[giw.len()], &giw),
            "sigma" => {
                let (Some(d), Some(l)) = (delta, levels) else {
                    return Err("the output `sigma` needs the inputs `delta` and `levels`".into());
                };
                let s = self_energy(&giw, beta, d, l)?;
                npy::write_complex(path, &[s.len()], &s)
            }
            other => return Err(format!("the filter has no output `{other}`")),
        };
        res.map_err(|e| format!("{}: {e}", path.display()))?;
    }
    Ok(MixReport {
        metrics: vec![
            metric(FILTER_METRICS[0], kept as f64),
            metric(FILTER_METRICS[1], (nl - kept) as f64),
            metric(FILTER_METRICS[2], -legendre::gl_to_gtau(&gl, beta, beta)),
            metric(FILTER_METRICS[3], tail[0]),
        ],
        event: None,
    })
}

/// Read G(τ): a real array of shape (n ≥ 3, 2) or (n, 3), finite, error bars not negative.
fn read_gtau(gtau: &Path) -> Result<Gtau, String> {
    let shown = gtau.display();
    let arr = npy::read_any(gtau).map_err(|e| format!("{shown}: {e}"))?;
    let data = arr
        .as_real()
        .ok_or_else(|| format!("{shown}: G(τ) must be a real float64 array"))?;
    let cols = arr.shape.get(1).copied().unwrap_or(0);
    if arr.shape.len() != 2 || !(cols == 2 || cols == 3) || arr.shape[0] < 3 {
        return Err(format!(
            "{shown}: G(τ) must have shape (n ≥ 3, 2) = τ, G or (n, 3) = τ, G, σ; found {:?}",
            arr.shape
        ));
    }
    if arr.has_nonfinite() {
        return Err(format!("{shown}: G(τ) contains NaN or infinite values"));
    }
    let n = arr.shape[0];
    let tau: Vec<f64> = (0..n).map(|i| data[i * cols]).collect();
    let g: Vec<f64> = (0..n).map(|i| data[i * cols + 1]).collect();
    let sigma: Option<Vec<f64>> = (cols == 3).then(|| (0..n).map(|i| data[i * cols + 2]).collect());
    Ok(Gtau { tau, g, sigma })
}

/// Which of the two uniform grids `tau` is, and β: τ_i = iβ/(n−1) (values at the points,
/// τ_0 = 0), or the bin centres τ_i = (i + ½)β/n of a histogram (bin averages, τ_0 = h/2).
fn tau_grid(gtau: &Path, tau: &[f64]) -> Result<(TauGrid, f64), String> {
    let shown = gtau.display();
    let n = tau.len();
    let h = if n > 1 { tau[1] - tau[0] } else { 0.0 };
    let (grid, beta) = if tau[0].abs() <= 1e-12 * tau[n - 1].abs() {
        (TauGrid::Endpoints, tau[n - 1])
    } else {
        (TauGrid::Midpoints, tau[n - 1] + 0.5 * h)
    };
    if !(beta > 0.0 && h > 0.0)
        || (grid == TauGrid::Midpoints && (tau[0] - 0.5 * h).abs() > 1e-9 * beta)
    {
        return Err(format!(
            "{shown}: the τ grid must be uniform on [0, β]: from τ = 0 to β, or the bin centres \
             (i + ½)β/n of a histogram; found τ_0 = {}, τ_1 = {}, τ_last = {}",
            tau[0],
            tau.get(1).copied().unwrap_or(f64::NAN),
            tau[n - 1]
        ));
    }
    let t0 = tau[0];
    if let Some(i) = (0..n).find(|&i| (tau[i] - t0 - i as f64 * h).abs() > 1e-9 * beta) {
        return Err(format!(
            "{shown}: row {i}: the τ grid is not uniform (τ = {}, expected {})",
            tau[i],
            t0 + i as f64 * h
        ));
    }
    Ok((grid, beta))
}

/// Σ(iω_n) = iω_n − ε − Δ(iω_n) − 1/G(iω_n), with Δ from `delta` (complex, at least as many
/// frequencies as G) and ε from `levels`.
fn self_energy(giw: &[Complex64], beta: f64, d: &Path, l: &Path) -> Result<Vec<Complex64>, String> {
    let eps = read_level(l)?;
    let da = npy::read_any(d).map_err(|e| format!("{}: {e}", d.display()))?;
    let dz = da
        .as_complex()
        .ok_or_else(|| format!("{}: Δ(iω_n) must be complex128", d.display()))?;
    if dz.len() < giw.len() {
        return Err(format!(
            "{}: Δ has {} frequencies, fewer than matsubara = {}",
            d.display(),
            dz.len(),
            giw.len()
        ));
    }
    let s: Vec<Complex64> = giw
        .iter()
        .enumerate()
        .map(|(k, gk)| {
            let w = rondo_numerics::matsubara::fermionic_frequency(beta, k as i64);
            Complex64::new(-eps, w) - dz[k] - gk.inv()
        })
        .collect();
    if s.iter().any(|z| !z.re.is_finite() || !z.im.is_finite()) {
        return Err("Σ(iω_n) is not finite: G(iω_n) vanished somewhere".into());
    }
    Ok(s)
}

/// The level ε of `levels.json`: `{"level": ε}`, or `{"eps_f": a, "mu": b}` meaning ε = a − b.
fn read_level(path: &Path) -> Result<f64, String> {
    let text = std::fs::read_to_string(path).map_err(|e| format!("{}: {e}", path.display()))?;
    let v: serde_json::Value = serde_json::from_str(&text)
        .map_err(|e| format!("{}: malformed JSON: {e}", path.display()))?;
    if let Some(l) = v.get("level").and_then(|x| x.as_f64()) {
        return Ok(l);
    }
    match (
        v.get("eps_f").and_then(|x| x.as_f64()),
        v.get("mu").and_then(|x| x.as_f64()),
    ) {
        (Some(e), Some(m)) => Ok(e - m),
        _ => Err(format!(
            "{}: needs {{\"level\": ε}} or {{\"eps_f\": .., \"mu\": ..}}",
            path.display()
        )),
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// A free level ε at inverse temperature β: G(τ) = −e^{−ετ}/(1+e^{−βε}) and
    /// G(iω_n) = 1/(iω_n − ε) (fact of the trade). The filter must give back G(iω_n), Σ = 0
    /// with Δ = 0, c1 = 1, and the density per spin f(ε).
    #[test]
    fn filter_recovers_a_free_level() -> Result<(), Box<dyn std::error::Error>> {
        let d = tempfile::tempdir()?;
        let (beta, eps, n) = (10.0, 0.3, 2001usize);
        let mut flat = Vec::new();
        for i in 0..n {
            let t = beta * i as f64 / (n - 1) as f64;
            flat.extend([t, -(-eps * t).exp() / (1.0 + (-beta * eps).exp()), 1e-6]);
        }
        let g = d.path().join("g.npy");
        npy::write_real(&g, &[n, 3], &flat)?;
        let delta = d.path().join("delta.npy");
        npy::write_complex(&delta, &[64], &vec![Complex64::new(0.0, 0.0); 64])?;
        let lv = d.path().join("levels.json");
        std::fs::write(&lv, format!("{{\"level\": {eps}}}"))?;
        let outs = vec![
            ("giw".to_string(), d.path().join("giw.npy")),
            ("sigma".to_string(), d.path().join("sigma.npy")),
            ("gl".to_string(), d.path().join("gl.npy")),
        ];
        let w = FilterSettings {
            legendre: 30,
            matsubara: 64,
        };
        let r = filter(&w, &g, Some(&delta), Some(&lv), &outs)?;
        let giw = npy::read_any(d.path().join("giw.npy"))?;
        let giw = giw.as_complex().ok_or("complex")?;
        for (k, z) in giw.iter().enumerate() {
            let wk = rondo_numerics::matsubara::fermionic_frequency(beta, k as i64);
            let exact = Complex64::new(-eps, wk).inv();
            assert!((z - exact).norm() < 1e-6, "n = {k}: {z} vs {exact}");
        }
        let sig = npy::read_any(d.path().join("sigma.npy"))?;
        let sig = sig.as_complex().ok_or("complex")?;
        assert!(
            sig.iter().take(16).all(|z| z.norm() < 1e-3),
            "{:?}",
            &sig[..4]
        );
        let get = |n: &str| r.metrics.iter().find(|m| m.name == n).map(|m| m.value);
        assert!((get("tail_c1").unwrap_or(0.0) - 1.0).abs() < 1e-6);
        let f = 1.0 / ((beta * eps).exp() + 1.0);
        assert!((get("density_per_spin").unwrap_or(0.0) - f).abs() < 1e-6);
        // bad grid
        npy::write_real(&g, &[2, 2], &[0.0, -0.5, 1.0, -0.5])?;
        assert!(filter(&w, &g, None, None, &outs[..1]).is_err_and(|m| m.contains("shape")));
        Ok(())
    }
}
