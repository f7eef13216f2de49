//! Built-in stages that run inside rondo instead of as a program: the mixer and the
//! Legendre noise filter.
//!
//! `mix` reads the stage's input array `new` (.npy, real or complex), the mixer state kept as
//! an artifact of the previous iteration (absent at iteration 1), and writes the mixed array
//! (same shape and type) and the new state. The numerics live in `rondo_numerics::mixing`;
//! this module owns the file handling and the checks around it, so a state read back after a
//! restart continues the same sequence bit for bit.

use std::path::Path;

use rondo_numerics::mixing::{self, Method, MixerConfig, MixerState};
use rondo_numerics::npy::{self, NpyArray};
use serde::{Deserialize, Serialize};

use crate::spec::{FilterWith, MixMethod, MixWith};
use crate::validate::Metric;

/// File name of the mixer state in the attempt's scratch directory.
pub const STATE_FILE: &str = "mixer-state.json";

/// What the state artifact holds: the mixer's own state and the array layout it belongs to.
#[derive(Debug, Clone, Serialize, Deserialize)]
struct StateFile {
    /// Shape of the mixed array.
    shape: Vec<usize>,
    /// Whether it is complex (mixed as interleaved real and imaginary parts).
    complex: bool,
    /// The numerics crate's state.
    mixer: MixerState,
}

/// What a mixing step reports.
#[derive(Debug, Clone)]
pub struct MixReport {
    /// Metrics: `residual_norm` (from the second step on), `history`, `resets`.
    pub metrics: Vec<Metric>,
    /// Out-of-the-ordinary event for the log (history reset, fallback).
    pub event: Option<String>,
}

/// The mixer configuration of a stage.
pub fn config(with: &MixWith) -> MixerConfig {
    let d = MixerConfig::default();
    MixerConfig {
        method: match with.method {
            MixMethod::Linear => Method::Linear,
            MixMethod::Anderson => Method::Anderson,
            MixMethod::Broyden => Method::Broyden,
        },
        alpha: with.alpha,
        history: with.history.unwrap_or(d.history),
        w0: with.w0.unwrap_or(d.w0),
        restart_after_growth: with.restart_after_growth.unwrap_or(d.restart_after_growth),
    }
}

/// The argv recorded for a built-in mix attempt (it names the options that determine it).
pub fn mix_argv(with: &MixWith) -> Vec<String> {
    let c = config(with);
    vec![
        "rondo".into(),
        "builtin".into(),
        "mix".into(),
        format!("--method={}", c.method.name()),
        format!("--alpha={:?}", c.alpha),
        format!("--history={}", c.history),
        format!("--w0={:?}", c.w0),
        format!("--restart-after-growth={}", c.restart_after_growth),
    ]
}

/// One mixing step. Errors are messages naming the file and what is wrong; nothing is
/// written on error.
pub fn mix(
    with: &MixWith,
    new: &Path,
    state: Option<&Path>,
    out: &Path,
    state_out: &Path,
) -> Result<MixReport, String> {
    let cfg = config(with);
    cfg.validate().map_err(|e| e.to_string())?;
    let arr = npy::read_any(new).map_err(|e| format!("{}: {e}", new.display()))?;
    if arr.is_empty() {
        return Err(format!("{}: the array to mix is empty", new.display()));
    }
    if arr.has_nonfinite() {
        return Err(format!(
            "{}: the array to mix contains NaN or infinite values",
            new.display()
        ));
    }
    let prev = match state {
        None => None,
        Some(p) => {
            let text = std::fs::read_to_string(p)
                .map_err(|e| format!("{}: cannot read the mixer state: {e}", p.display()))?;
            if text.trim().is_empty() {
                return Err(format!("{}: the mixer state file is empty", p.display()));
            }
            let s: StateFile = serde_json::from_str(&text)
                .map_err(|e| format!("{}: malformed mixer state: {e}", p.display()))?;
            if s.shape != arr.shape || s.complex != arr.is_complex() {
                return Err(format!(
                    "{}: shape {:?} ({}) differs from the mixer history's {:?} ({}); \
                     the stage feeding the mixer changed its output layout between iterations",
                    new.display(),
                    arr.shape,
                    if arr.is_complex() { "complex" } else { "real" },
                    s.shape,
                    if s.complex { "complex" } else { "real" },
                ));
            }
            Some(s)
        }
    };
    let flat = arr.to_flat_f64();
    let step = mixing::mix(&cfg, prev.as_ref().map(|s| &s.mixer), &flat)
        .map_err(|e| format!("mixing {}: {e}", new.display()))?;
    let shape = arr.shape.clone();
    let complex = arr.is_complex();
    let mixed = NpyArray::from_flat_f64(shape.clone(), complex, step.next)
        .ok_or_else(|| "internal: mixed vector does not fit the array shape".to_string())?;
    let state_text = serde_json::to_string(&StateFile {
        shape,
        complex,
        mixer: step.state.clone(),
    })
    .map_err(|e| format!("cannot encode the mixer state: {e}"))?;
    mixed
        .write(out)
        .map_err(|e| format!("{}: {e}", out.display()))?;
    npy::write_atomic(state_out, state_text.as_bytes())
        .map_err(|e| format!("{}: {e}", state_out.display()))?;
    let mut metrics = vec![
        Metric {
            name: "history".into(),
            value: step.state.history_len() as f64,
            error: None,
        },
        Metric {
            name: "resets".into(),
            value: step.state.resets() as f64,
            error: None,
        },
    ];
    if step.residual_norm.is_finite() {
        metrics.push(Metric {
            name: "residual_norm".into(),
            value: step.residual_norm,
            error: None,
        });
    }
    Ok(MixReport {
        metrics,
        event: step.event,
    })
}

/// The argv recorded for a built-in filter attempt.
pub fn filter_argv(with: &FilterWith) -> Vec<String> {
    vec![
        "rondo".into(),
        "builtin".into(),
        "filter".into(),
        format!("--legendre={}", with.legendre),
        format!("--matsubara={}", with.matsubara),
    ]
}

fn metric(name: &str, value: f64) -> Metric {
    Metric {
        name: name.into(),
        value,
        error: None,
    }
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

/// The Legendre filter (Boehnke et al., Phys. Rev. B 84, 075145 (2011)): from G(τ) on a
/// uniform grid 0..β (`.npy` of shape (n, 2) = τ, G or (n, 3) = τ, G, σ) fit G_l with the
/// same kernel the model engine's Monte Carlo solver uses, drop the coefficients lost in
/// the noise (with σ given), and write the requested outputs: `gtau` (filtered, same grid
/// and layout (n, 2)), `gl` ((kept, 2) = G_l, σ_l), `giw` (complex, `matsubara` positive
/// frequencies), and with Δ(iω_n) and the level ε, `sigma` = iω − ε − Δ − 1/G.
pub fn filter(
    with: &FilterWith,
    gtau: &Path,
    delta: Option<&Path>,
    levels: Option<&Path>,
    outputs: &[(String, std::path::PathBuf)],
) -> Result<MixReport, String> {
    use num_complex::Complex64;
    use rondo_numerics::legendre;
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
    let beta = tau[n - 1];
    if beta.partial_cmp(&0.0) != Some(std::cmp::Ordering::Greater) || tau[0].abs() > 1e-12 * beta {
        return Err(format!("{shown}: the τ grid must run from 0 to β > 0"));
    }
    let h = beta / (n - 1) as f64;
    if let Some(i) = (0..n).find(|&i| (tau[i] - i as f64 * h).abs() > 1e-9 * beta) {
        return Err(format!(
            "{shown}: row {i}: the τ grid is not uniform (τ = {}, expected {})",
            tau[i],
            i as f64 * h
        ));
    }
    if sigma.as_ref().is_some_and(|s| s.iter().any(|e| *e < 0.0)) {
        return Err(format!("{shown}: negative error bars in column 3"));
    }
    let nl = with.legendre;
    let mut gl = legendre::gl_from_uniform_tau(&g, beta, nl);
    // Errors of G_l by linear propagation of independent σ_i through the same quadrature.
    let gl_err: Option<Vec<f64>> = sigma.as_ref().map(|s| {
        let mut var = vec![0.0; nl];
        let mut unit = vec![0.0; n];
        for i in 0..n {
            if s[i] == 0.0 {
                continue;
            }
            unit[i] = 1.0;
            let k = legendre::gl_from_uniform_tau(&unit, beta, nl);
            unit[i] = 0.0;
            for l in 0..nl {
                var[l] += (k[l] * s[i]).powi(2);
            }
        }
        var.into_iter().map(f64::sqrt).collect()
    });
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
                for t in &tau {
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
                npy::write_complex(path, &[s.len()], &s)
            }
            other => return Err(format!("the filter has no output `{other}`")),
        };
        res.map_err(|e| format!("{}: {e}", path.display()))?;
    }
    Ok(MixReport {
        metrics: vec![
            metric("legendre_kept", kept as f64),
            metric("legendre_dropped", (nl - kept) as f64),
            metric("density_per_spin", -legendre::gl_to_gtau(&gl, beta, beta)),
            metric("tail_c1", tail[0]),
        ],
        event: None,
    })
}

#[cfg(test)]
mod tests {
    use super::*;
    use num_complex::Complex64;

    fn with(alpha: f64) -> MixWith {
        MixWith {
            method: MixMethod::Linear,
            alpha,
            history: None,
            w0: None,
            restart_after_growth: None,
        }
    }

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
        let w = FilterWith {
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

    #[test]
    fn linear_steps_and_shape_checks() -> Result<(), Box<dyn std::error::Error>> {
        let d = tempfile::tempdir()?;
        let p = |n: &str| d.path().join(n);
        npy::write_complex(
            p("new1.npy"),
            &[2],
            &[Complex64::new(1.0, 2.0), Complex64::new(3.0, 4.0)],
        )?;
        mix(
            &with(0.5),
            &p("new1.npy"),
            None,
            &p("out1.npy"),
            &p("s1.json"),
        )?;
        // iteration 1 passes the array through unchanged
        assert_eq!(std::fs::read(p("out1.npy"))?, std::fs::read(p("new1.npy"))?);
        npy::write_complex(
            p("new2.npy"),
            &[2],
            &[Complex64::new(3.0, 2.0), Complex64::new(3.0, 0.0)],
        )?;
        let r = mix(
            &with(0.5),
            &p("new2.npy"),
            Some(&p("s1.json")),
            &p("out2.npy"),
            &p("s2.json"),
        )?;
        let out = npy::read_any(p("out2.npy"))?;
        let z = out.as_complex().ok_or("complex")?;
        // prev + α (new − prev)
        assert_eq!(z, &[Complex64::new(2.0, 2.0), Complex64::new(3.0, 2.0)]);
        assert!(r.metrics.iter().any(|m| m.name == "residual_norm"));
        // a different shape against the history is refused, nothing written
        npy::write_complex(p("bad.npy"), &[1], &[Complex64::new(1.0, 0.0)])?;
        let e = mix(
            &with(0.5),
            &p("bad.npy"),
            Some(&p("s2.json")),
            &p("out3.npy"),
            &p("s3.json"),
        );
        assert!(e.is_err_and(|m| m.contains("differs")));
        assert!(!p("out3.npy").exists() && !p("s3.json").exists());
        // alpha outside (0, 1]
        let e = mix(
            &with(1.5),
            &p("new2.npy"),
            None,
            &p("out4.npy"),
            &p("s4.json"),
        );
        assert!(e.is_err_and(|m| m.contains("alpha")));
        // empty state file
        std::fs::write(p("empty.json"), "")?;
        let e = mix(
            &with(0.5),
            &p("new2.npy"),
            Some(&p("empty.json")),
            &p("o.npy"),
            &p("s.json"),
        );
        assert!(e.is_err_and(|m| m.contains("empty")));
        Ok(())
    }
}
