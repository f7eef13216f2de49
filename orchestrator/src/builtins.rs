//! Built-in stages that run inside rondo instead of as a program: the mixer.
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

use crate::spec::{MixMethod, MixWith};
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
