//! Built-in stages that run inside rondo instead of as a program: the mixer and the
//! Legendre noise filter.
//!
//! `mix` reads one or more input roles (each a `.npy` array, real or complex, or a `.json`
//! object whose numeric top-level fields are mixed), concatenates them in the stage's role
//! order into one vector, takes one mixing step with the mixer state kept as an artifact of
//! the previous iteration (absent at iteration 1), splits the result back and writes one
//! output per role (same shape, type or key set) and the new state. Optional per-role
//! weights scale each role's block of the vector the mixer sees. The numerics live in
//! `rondo_numerics::mixing`; this module owns the file handling, the layout checks and the
//! weighting, so a state read back after a restart continues the same sequence bit for bit.

use std::path::{Path, PathBuf};

use rondo_numerics::mixing::{self, Method, MixerConfig, MixerState};
use rondo_numerics::npy::{self, NpyArray};
use serde::{Deserialize, Serialize};

use crate::spec::{FilterSettings, MixMethod, MixSettings, FILTER_METRICS, LEGACY_ROLE};
use crate::validate::Metric;

mod command;
pub use command::{run_argv, BuiltinCommand, FilterArgs, MixArgs};

/// File name of the mixer state in the attempt's scratch directory.
pub const STATE_FILE: &str = "mixer-state.json";

/// Layout version of [`StateFile`].
const LAYOUT_VERSION: u32 = 2;

/// How one role's file maps onto its block of the mixed vector.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(tag = "kind", rename_all = "kebab-case")]
enum BlockKind {
    /// A float64 `.npy` array of this shape.
    NpyReal { shape: Vec<usize> },
    /// A complex128 `.npy` array of this shape, mixed as interleaved real and imaginary parts.
    NpyComplex { shape: Vec<usize> },
    /// A JSON object; these numeric top-level fields (sorted) are mixed.
    Json { keys: Vec<String> },
}

impl BlockKind {
    fn describe(&self) -> String {
        match self {
            BlockKind::NpyReal { shape } => format!("real array of shape {shape:?}"),
            BlockKind::NpyComplex { shape } => format!("complex array of shape {shape:?}"),
            BlockKind::Json { keys } => format!("JSON object with numeric fields {keys:?}"),
        }
    }
}

/// One role of the layout.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
struct Block {
    role: String,
    #[serde(flatten)]
    kind: BlockKind,
    /// Number of vector elements of the block.
    len: usize,
    /// Weight of the block in the mixer's metric (1 unless set in `settings: weights`).
    weight: f64,
}

/// What the state artifact holds: the mixer's own state and the layout it belongs to.
#[derive(Debug, Clone, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
struct StateFile {
    layout_version: u32,
    /// Roles in vector order.
    layout: Vec<Block>,
    /// The numerics crate's state (over the weighted vector).
    mixer: MixerState,
}

/// The state of the one-array form written before multi-array mixing existed.
#[derive(Debug, Clone, Deserialize)]
#[serde(deny_unknown_fields)]
struct LegacyStateFile {
    shape: Vec<usize>,
    complex: bool,
    mixer: MixerState,
}

/// What a mixing step reports.
#[derive(Debug, Clone)]
pub struct MixReport {
    /// Metrics: `residual_norm` (from the second step on; with several roles also
    /// `residual_norm_ROLE` per role), `history`, `resets`.
    pub metrics: Vec<Metric>,
    /// Out-of-the-ordinary event for the log (history reset, fallback).
    pub event: Option<String>,
}

/// The mixer configuration of a stage.
pub fn config(with: &MixSettings) -> MixerConfig {
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

/// One role's new file as read: its layout block, its values and, for JSON, the object.
struct Loaded {
    kind: BlockKind,
    values: Vec<f64>,
    json: Option<serde_json::Map<String, serde_json::Value>>,
}

fn load(role: &str, path: &Path) -> Result<Loaded, String> {
    let shown = path.display();
    let bytes = std::fs::read(path).map_err(|e| format!("{shown}: cannot read `{role}`: {e}"))?;
    if bytes.starts_with(b"\x93NUMPY") {
        let arr = npy::read_any(path).map_err(|e| format!("{shown}: {e}"))?;
        if arr.is_empty() {
            return Err(format!("{shown}: the array `{role}` to mix is empty"));
        }
        if arr.has_nonfinite() {
            return Err(format!(
                "{shown}: the array `{role}` to mix contains NaN or infinite values"
            ));
        }
        let shape = arr.shape.clone();
        let kind = if arr.is_complex() {
            BlockKind::NpyComplex { shape }
        } else {
            BlockKind::NpyReal { shape }
        };
        return Ok(Loaded {
            kind,
            values: arr.to_flat_f64(),
            json: None,
        });
    }
    let v: serde_json::Value = serde_json::from_slice(&bytes).map_err(|e| {
        format!("{shown}: `{role}` is neither a .npy array nor valid JSON ({e}); the mixer takes .npy arrays and JSON objects")
    })?;
    let serde_json::Value::Object(obj) = v else {
        return Err(format!(
            "{shown}: `{role}` must be a JSON object whose numeric top-level fields are mixed"
        ));
    };
    let mut keys = Vec::new();
    let mut values = Vec::new();
    let mut sorted: Vec<(&String, &serde_json::Value)> = obj.iter().collect();
    sorted.sort_by(|a, b| a.0.cmp(b.0));
    for (k, val) in sorted {
        if let Some(x) = val.as_f64() {
            if !x.is_finite() {
                return Err(format!("{shown}: field `{k}` of `{role}` is not finite"));
            }
            keys.push(k.clone());
            values.push(x);
        }
    }
    if keys.is_empty() {
        return Err(format!(
            "{shown}: `{role}` has no numeric top-level field to mix"
        ));
    }
    Ok(Loaded {
        kind: BlockKind::Json { keys },
        values,
        json: Some(obj),
    })
}

fn read_state(p: &Path) -> Result<StateFile, String> {
    let shown = p.display();
    let text = std::fs::read_to_string(p)
        .map_err(|e| format!("{shown}: cannot read the mixer state: {e}"))?;
    if text.trim().is_empty() {
        return Err(format!("{shown}: the mixer state file is empty"));
    }
    let v: serde_json::Value =
        serde_json::from_str(&text).map_err(|e| format!("{shown}: malformed mixer state: {e}"))?;
    if v.get("layout").is_none() && v.get("shape").is_some() {
        let old: LegacyStateFile = serde_json::from_value(v)
            .map_err(|e| format!("{shown}: malformed mixer state: {e}"))?;
        let len = old.shape.iter().product::<usize>() * if old.complex { 2 } else { 1 };
        let shape = old.shape;
        return Ok(StateFile {
            layout_version: LAYOUT_VERSION,
            layout: vec![Block {
                role: LEGACY_ROLE.into(),
                kind: if old.complex {
                    BlockKind::NpyComplex { shape }
                } else {
                    BlockKind::NpyReal { shape }
                },
                len,
                weight: 1.0,
            }],
            mixer: old.mixer,
        });
    }
    let s: StateFile =
        serde_json::from_value(v).map_err(|e| format!("{shown}: malformed mixer state: {e}"))?;
    if s.layout_version != LAYOUT_VERSION {
        return Err(format!(
            "{shown}: mixer state layout version {} is not the supported {LAYOUT_VERSION}",
            s.layout_version
        ));
    }
    Ok(s)
}

/// Pair each input role with its output file. The stage's outputs list exactly its input
/// roles; the one-array form (`new`) has a single output of any role name.
pub fn mix_pairs<F: Clone>(
    input_roles: &[String],
    outputs: &[(String, F)],
) -> Result<Vec<(String, F)>, String> {
    if input_roles.len() == 1 && input_roles[0] == LEGACY_ROLE && outputs.len() == 1 {
        return Ok(vec![(LEGACY_ROLE.to_string(), outputs[0].1.clone())]);
    }
    let mut pairs = Vec::new();
    for r in input_roles {
        let Some((_, f)) = outputs.iter().find(|(o, _)| o == r) else {
            return Err(format!("the mix stage has no output for its input `{r}`"));
        };
        pairs.push((r.clone(), f.clone()));
    }
    if let Some((o, _)) = outputs.iter().find(|(o, _)| !input_roles.contains(o)) {
        return Err(format!(
            "the output `{o}` has no input `{o}` to mix; the mix stage's outputs must be exactly its input roles"
        ));
    }
    Ok(pairs)
}

/// One mixing step over `roles` = (role, new file, output file), in vector order. Errors are
/// messages naming the file and what is wrong; nothing is written on error.
pub fn mix(
    with: &MixSettings,
    roles: &[(String, PathBuf, PathBuf)],
    state: Option<&Path>,
    state_out: &Path,
) -> Result<MixReport, String> {
    let cfg = config(with);
    cfg.validate().map_err(|e| e.to_string())?;
    if roles.is_empty() {
        return Err("the mix stage has no input".into());
    }
    let mut loaded = Vec::with_capacity(roles.len());
    let mut layout = Vec::with_capacity(roles.len());
    for (role, path, _) in roles {
        let l = load(role, path)?;
        let weight = with
            .weights
            .as_ref()
            .and_then(|w| w.get(role))
            .copied()
            .unwrap_or(1.0);
        if !(weight.is_finite() && weight > 0.0) {
            return Err(format!(
                "weight {weight} of `{role}` must be a positive number"
            ));
        }
        layout.push(Block {
            role: role.clone(),
            kind: l.kind.clone(),
            len: l.values.len(),
            weight,
        });
        loaded.push(l);
    }
    let prev = match state {
        None => None,
        Some(p) => {
            let s = read_state(p)?;
            check_layout(p, &s.layout, &layout, roles)?;
            Some(s)
        }
    };
    // The mixer works on y = (w_1 x_1, …, w_n x_n).
    let raw: Vec<f64> = loaded
        .iter()
        .flat_map(|l| l.values.iter().copied())
        .collect();
    let weighted: Vec<f64> = layout
        .iter()
        .zip(&loaded)
        .flat_map(|(b, l)| l.values.iter().map(move |x| x * b.weight))
        .collect();
    let step = mixing::mix(&cfg, prev.as_ref().map(|s| &s.mixer), &weighted)
        .map_err(|e| format!("mixing {}: {e}", roles_list(roles)))?;
    // Iteration 1 passes the inputs through exactly; later the weights are divided out.
    let next: Vec<f64> = if prev.is_none() {
        raw
    } else {
        let mut out = Vec::with_capacity(step.next.len());
        let mut at = 0;
        for b in &layout {
            out.extend(step.next[at..at + b.len].iter().map(|y| y / b.weight));
            at += b.len;
        }
        out
    };
    if next.iter().any(|x| !x.is_finite()) {
        return Err(format!(
            "mixing {}: the mixed vector is not finite",
            roles_list(roles)
        ));
    }
    // Encode everything before writing anything.
    enum Payload {
        Npy(NpyArray),
        Bytes(Vec<u8>),
    }
    let mut files: Vec<(&Path, Payload)> = Vec::with_capacity(roles.len() + 1);
    let mut at = 0;
    for ((b, l), (role, _, out)) in layout.iter().zip(loaded).zip(roles) {
        let part = next[at..at + b.len].to_vec();
        at += b.len;
        let bytes = match (&b.kind, l.json) {
            (BlockKind::NpyReal { shape }, _) | (BlockKind::NpyComplex { shape }, _) => {
                let complex = matches!(b.kind, BlockKind::NpyComplex { .. });
                let arr = NpyArray::from_flat_f64(shape.clone(), complex, part)
                    .ok_or_else(|| format!("internal: mixed `{role}` does not fit its shape"))?;
                Payload::Npy(arr)
            }
            (BlockKind::Json { keys }, Some(mut obj)) => {
                for (k, x) in keys.iter().zip(part) {
                    obj.insert(k.clone(), serde_json::Value::from(x));
                }
                let mut text = serde_json::to_string_pretty(&serde_json::Value::Object(obj))
                    .map_err(|e| format!("cannot encode mixed `{role}`: {e}"))?;
                text.push('\n');
                Payload::Bytes(text.into_bytes())
            }
            (BlockKind::Json { .. }, None) => {
                return Err(format!("internal: `{role}` lost its JSON object"));
            }
        };
        let ext_ok = match b.kind {
            BlockKind::Json { .. } => out.extension().is_some_and(|e| e == "json"),
            _ => out.extension().is_some_and(|e| e == "npy"),
        };
        if !ext_ok {
            return Err(format!(
                "output {} of `{role}` must end in {} for a {}",
                out.display(),
                if matches!(b.kind, BlockKind::Json { .. }) {
                    ".json"
                } else {
                    ".npy"
                },
                b.kind.describe()
            ));
        }
        files.push((out.as_path(), bytes));
    }
    let state_text = serde_json::to_string(&StateFile {
        layout_version: LAYOUT_VERSION,
        layout: layout.clone(),
        mixer: step.state.clone(),
    })
    .map_err(|e| format!("cannot encode the mixer state: {e}"))?;
    files.push((state_out, Payload::Bytes(state_text.into_bytes())));
    for (path, payload) in &files {
        match payload {
            Payload::Npy(arr) => arr.write(path),
            Payload::Bytes(b) => npy::write_atomic(path, b),
        }
        .map_err(|e| format!("{}: {e}", path.display()))?;
    }
    let mut metrics = vec![
        metric("history", step.state.history_len() as f64),
        metric("resets", step.state.resets() as f64),
    ];
    if step.residual_norm.is_finite() {
        metrics.push(metric("residual_norm", step.residual_norm));
        // Per role (unweighted), from the residual the mixer stored last.
        if let (Some(p), true) = (&prev, layout.len() > 1) {
            let x = p.mixer.x();
            let mut at = 0;
            for b in &layout {
                let r2: f64 = (at..at + b.len)
                    .map(|i| ((weighted[i] - x[i]) / b.weight).powi(2))
                    .sum();
                metrics.push(metric(&format!("residual_norm_{}", b.role), r2.sqrt()));
                at += b.len;
            }
        }
    }
    Ok(MixReport {
        metrics,
        event: step.event,
    })
}

fn roles_list(roles: &[(String, PathBuf, PathBuf)]) -> String {
    roles
        .iter()
        .map(|(r, p, _)| format!("`{r}` ({})", p.display()))
        .collect::<Vec<_>>()
        .join(", ")
}

/// The layout of this iteration's inputs must be the one the history was built on.
fn check_layout(
    state: &Path,
    old: &[Block],
    new: &[Block],
    roles: &[(String, PathBuf, PathBuf)],
) -> Result<(), String> {
    let names = |l: &[Block]| l.iter().map(|b| b.role.clone()).collect::<Vec<_>>();
    if names(old) != names(new) {
        return Err(format!(
            "{}: the mixer history holds the roles {:?} but this iteration mixes {:?}; \
             the stage's inputs changed between iterations",
            state.display(),
            names(old),
            names(new)
        ));
    }
    for ((o, n), (_, path, _)) in old.iter().zip(new).zip(roles) {
        if o.kind != n.kind {
            return Err(format!(
                "{}: `{}` is a {} but the mixer history's is a {}; \
                 the stage feeding the mixer changed its output layout between iterations",
                path.display(),
                n.role,
                n.kind.describe(),
                o.kind.describe()
            ));
        }
        if o.weight != n.weight {
            return Err(format!(
                "{}: the weight of `{}` is {:?} but the history was built with {:?}; \
                 weights cannot change within a point's iterations",
                state.display(),
                n.role,
                n.weight,
                o.weight
            ));
        }
    }
    Ok(())
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
/// uniform grid 0..β or on the bin centres of a histogram (`.npy` of shape (n, 2) = τ, G or
/// (n, 3) = τ, G, σ) fit G_l with the same kernel the model engine's Monte Carlo solver
/// uses, drop the coefficients lost in
/// the noise (with σ given), and write the requested outputs: `gtau` (filtered, same grid
/// and layout (n, 2)), `gl` ((kept, 2) = G_l, σ_l), `giw` (complex, `matsubara` positive
/// frequencies), and with Δ(iω_n) and the level ε, `sigma` = iω − ε − Δ − 1/G.
pub fn filter(
    with: &FilterSettings,
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
    // Two uniform grids: τ_i = iβ/(n−1) (values at the points, τ_0 = 0), or the bin centres
    // τ_i = (i + ½)β/n of a histogram (bin averages, τ_0 = h/2).
    let h = if n > 1 { tau[1] - tau[0] } else { 0.0 };
    let (grid, beta) = if tau[0].abs() <= 1e-12 * tau[n - 1].abs() {
        (legendre::TauGrid::Endpoints, tau[n - 1])
    } else {
        (legendre::TauGrid::Midpoints, tau[n - 1] + 0.5 * h)
    };
    if !(beta > 0.0 && h > 0.0)
        || (grid == legendre::TauGrid::Midpoints && (tau[0] - 0.5 * h).abs() > 1e-9 * beta)
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
    if sigma.as_ref().is_some_and(|s| s.iter().any(|e| *e < 0.0)) {
        return Err(format!("{shown}: negative error bars in column 3"));
    }
    let nl = with.legendre;
    let (mut gl, gl_err) = legendre::gl_from_tau_grid(&g, sigma.as_deref(), beta, grid, nl);
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
            metric(FILTER_METRICS[0], kept as f64),
            metric(FILTER_METRICS[1], (nl - kept) as f64),
            metric(FILTER_METRICS[2], -legendre::gl_to_gtau(&gl, beta, beta)),
            metric(FILTER_METRICS[3], tail[0]),
        ],
        event: None,
    })
}

#[cfg(test)]
mod tests {
    use super::*;
    use num_complex::Complex64;
    use std::collections::BTreeMap;

    fn with(alpha: f64) -> MixSettings {
        MixSettings {
            method: MixMethod::Linear,
            alpha,
            history: None,
            w0: None,
            restart_after_growth: None,
            weights: None,
        }
    }

    /// One role's (role, new file, output file) in `d`.
    fn role(d: &Path, role: &str, new: &str, out: &str) -> (String, PathBuf, PathBuf) {
        (role.to_string(), d.join(new), d.join(out))
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

    #[test]
    fn linear_steps_and_shape_checks() -> Result<(), Box<dyn std::error::Error>> {
        let d = tempfile::tempdir()?;
        let dp = d.path();
        let p = |n: &str| dp.join(n);
        npy::write_complex(
            p("new1.npy"),
            &[2],
            &[Complex64::new(1.0, 2.0), Complex64::new(3.0, 4.0)],
        )?;
        let one = |new: &str, out: &str| vec![role(dp, "new", new, out)];
        mix(
            &with(0.5),
            &one("new1.npy", "out1.npy"),
            None,
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
            &one("new2.npy", "out2.npy"),
            Some(&p("s1.json")),
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
            &one("bad.npy", "out3.npy"),
            Some(&p("s2.json")),
            &p("s3.json"),
        );
        assert!(e.is_err_and(|m| m.contains("differs") || m.contains("changed its output")));
        assert!(!p("out3.npy").exists() && !p("s3.json").exists());
        // alpha outside (0, 1]
        let e = mix(
            &with(1.5),
            &one("new2.npy", "out4.npy"),
            None,
            &p("s4.json"),
        );
        assert!(e.is_err_and(|m| m.contains("alpha")));
        // empty state file
        std::fs::write(p("empty.json"), "")?;
        let e = mix(
            &with(0.5),
            &one("new2.npy", "o.npy"),
            Some(&p("empty.json")),
            &p("s.json"),
        );
        assert!(e.is_err_and(|m| m.contains("empty")));
        // a state of the older one-array layout is still read
        let old = serde_json::json!({
            "shape": [2],
            "complex": true,
            "mixer": serde_json::to_value(mixing::MixerState::start(
                Method::Linear,
                &[1.0, 2.0, 3.0, 4.0]
            )?)?,
        });
        std::fs::write(p("old.json"), old.to_string())?;
        mix(
            &with(0.5),
            &one("new2.npy", "o5.npy"),
            Some(&p("old.json")),
            &p("s5.json"),
        )?;
        assert_eq!(std::fs::read(p("o5.npy"))?, std::fs::read(p("out2.npy"))?);
        Ok(())
    }

    /// Writes a density-like JSON file.
    fn density(path: &Path, n_f: f64, mu: f64) -> std::io::Result<()> {
        std::fs::write(
            path,
            format!("{{\"n_f\": {n_f}, \"mu\": {mu}, \"label\": \"it\"}}"),
        )
    }

    /// A complex array and a JSON object mixed as one vector: each block follows
    /// x + α (g − x), non-numeric fields are copied, the layout is recorded, and a changed
    /// layout, a NaN in one role or an empty state fails with nothing written.
    #[test]
    fn several_arrays_mix_as_one_vector() -> Result<(), Box<dyn std::error::Error>> {
        let d = tempfile::tempdir()?;
        let dp = d.path();
        let p = |n: &str| dp.join(n);
        let c = |re: f64, im: f64| Complex64::new(re, im);
        let two = |it: u32| {
            vec![
                role(
                    dp,
                    "sigma",
                    &format!("sig{it}.npy"),
                    &format!("osig{it}.npy"),
                ),
                role(
                    dp,
                    "density",
                    &format!("den{it}.json"),
                    &format!("oden{it}.json"),
                ),
            ]
        };
        npy::write_complex(p("sig1.npy"), &[2], &[c(1.0, 2.0), c(3.0, 4.0)])?;
        density(&p("den1.json"), 1.0, 0.5)?;
        mix(&with(0.5), &two(1), None, &p("s1.json"))?;
        assert_eq!(
            std::fs::read(p("osig1.npy"))?,
            std::fs::read(p("sig1.npy"))?
        );
        let v: serde_json::Value = serde_json::from_slice(&std::fs::read(p("oden1.json"))?)?;
        assert_eq!(v["n_f"], 1.0);
        assert_eq!(v["label"], "it");
        let st: serde_json::Value = serde_json::from_slice(&std::fs::read(p("s1.json"))?)?;
        assert_eq!(st["layout"][0]["role"], "sigma");
        assert_eq!(st["layout"][0]["kind"], "npy-complex");
        assert_eq!(st["layout"][1]["kind"], "json");
        assert_eq!(st["layout"][1]["keys"], serde_json::json!(["mu", "n_f"]));

        npy::write_complex(p("sig2.npy"), &[2], &[c(3.0, 2.0), c(3.0, 0.0)])?;
        std::fs::write(
            p("den2.json"),
            r#"{"n_f": 2.0, "mu": 1.5, "label": "second"}"#,
        )?;
        let r = mix(&with(0.5), &two(2), Some(&p("s1.json")), &p("s2.json"))?;
        let z = npy::read_any(p("osig2.npy"))?;
        assert_eq!(
            z.as_complex().ok_or("complex")?,
            &[c(2.0, 2.0), c(3.0, 2.0)]
        );
        let v: serde_json::Value = serde_json::from_slice(&std::fs::read(p("oden2.json"))?)?;
        assert_eq!(v["n_f"], 1.5);
        assert_eq!(v["mu"], 1.0);
        assert_eq!(v["label"], "second");
        let get = |n: &str| r.metrics.iter().find(|m| m.name == n).map(|m| m.value);
        // residuals: Σ block (2, 0, 0, −4) → 2√5; density block (mu 1, n_f 1) → √2
        assert_eq!(get("residual_norm_sigma"), Some(20f64.sqrt()));
        assert_eq!(get("residual_norm_density"), Some(2f64.sqrt()));
        assert_eq!(get("residual_norm"), Some(22f64.sqrt()));

        // each failure below writes nothing
        let refused = |files: &[(String, PathBuf, PathBuf)], state: &Path, what: &str| {
            let e = mix(&with(0.5), files, Some(state), &p("s3.json"));
            let nothing = files.iter().all(|(_, _, o)| !o.exists()) && !p("s3.json").exists();
            match e {
                Err(m) if m.contains(what) && nothing => Ok(()),
                other => Err(format!("expected an error with `{what}`, got {other:?}")),
            }
        };
        // shape change in one role
        npy::write_complex(p("sig3.npy"), &[3], &[c(1.0, 0.0); 3])?;
        density(&p("den3.json"), 1.2, 0.9)?;
        refused(&two(3), &p("s2.json"), "complex array of shape [2]")?;
        // key-set change
        npy::write_complex(p("sig3.npy"), &[2], &[c(1.0, 0.0); 2])?;
        std::fs::write(p("den3.json"), r#"{"n_f": 1.0, "mu": 0.2, "n_c": 0.8}"#)?;
        refused(&two(3), &p("s2.json"), "numeric fields")?;
        // NaN in one role
        density(&p("den3.json"), 1.2, 0.9)?;
        npy::write_complex(p("sig3.npy"), &[2], &[c(f64::NAN, 0.0), c(1.0, 0.0)])?;
        refused(&two(3), &p("s2.json"), "NaN")?;
        // empty state file
        npy::write_complex(p("sig3.npy"), &[2], &[c(1.0, 0.0); 2])?;
        std::fs::write(p("empty.json"), "")?;
        refused(&two(3), &p("empty.json"), "empty")?;
        // roles swapped against the history
        let mut swapped = two(3);
        swapped.reverse();
        refused(&swapped, &p("s2.json"), "roles")?;
        // changed weights
        let mut w = with(0.5);
        w.weights = Some(BTreeMap::from([("density".to_string(), 4.0)]));
        let e = mix(&w, &two(3), Some(&p("s2.json")), &p("s3.json"));
        assert!(e.is_err_and(|m| m.contains("weight")));
        assert!(!p("s3.json").exists());
        Ok(())
    }

    /// Weights change the metric the mixer measures residuals in, not linear mixing: a
    /// linear step x + α (g − x) is the same in any diagonal scaling (exact here, the values
    /// are binary fractions), and the state records the weight of each block.
    #[test]
    fn weights_scale_the_residual_metric() -> Result<(), Box<dyn std::error::Error>> {
        let d = tempfile::tempdir()?;
        let dp = d.path();
        let p = |n: &str| dp.join(n);
        let files = |tag: &str, it: u32| {
            vec![
                role(dp, "a", &format!("a{it}.npy"), &format!("{tag}oa{it}.npy")),
                role(
                    dp,
                    "b",
                    &format!("b{it}.json"),
                    &format!("{tag}ob{it}.json"),
                ),
            ]
        };
        npy::write_real(p("a1.npy"), &[2], &[1.0, 2.0])?;
        std::fs::write(p("b1.json"), r#"{"x": 0.25}"#)?;
        npy::write_real(p("a2.npy"), &[2], &[2.0, 2.5])?;
        std::fs::write(p("b2.json"), r#"{"x": 0.75}"#)?;
        let mut wl = with(0.5);
        wl.weights = Some(BTreeMap::from([("b".to_string(), 8.0)]));
        for (tag, w) in [("u", with(0.5)), ("w", wl)] {
            mix(&w, &files(tag, 1), None, &p(&format!("{tag}s1.json")))?;
            mix(
                &w,
                &files(tag, 2),
                Some(&p(&format!("{tag}s1.json"))),
                &p(&format!("{tag}s2.json")),
            )?;
        }
        let b: serde_json::Value = serde_json::from_slice(&std::fs::read(p("wob2.json"))?)?;
        assert_eq!(b["x"], 0.5);
        assert_eq!(std::fs::read(p("uoa2.npy"))?, std::fs::read(p("woa2.npy"))?);
        // the weighted state holds the weighted vector: b's block is 8 × 0.5
        let st: serde_json::Value = serde_json::from_slice(&std::fs::read(p("ws2.json"))?)?;
        assert_eq!(st["layout"][1]["weight"], 8.0);
        Ok(())
    }

    /// The engine around a failing multi-array mix: a stage feeds the mixer a complex
    /// array and a JSON object; at iteration 3 one role goes bad (shape change, NaN,
    /// changed JSON field set; the producer allows non-finite output, so the NaN reaches
    /// the mixer). The point fails at that mix attempt with the reason
    /// recorded, and that attempt stores no output artifact.
    #[tokio::test(flavor = "multi_thread", worker_threads = 2)]
    async fn a_bad_role_fails_the_point_and_stores_nothing(
    ) -> Result<(), Box<dyn std::error::Error>> {
        use crate::engine::{self, ExecutorChoice, RunOptions};
        use sqlx::Row;
        let script = "#!/bin/sh\n\
            # $1 b input, $2 bad b, $3 b output, $4 a output, $5 same|keys\n\
            if [ \"$RONDO_ITERATION\" -ge 3 ]; then cp \"$2\" \"$3\"; else cp \"$1\" \"$3\"; fi\n\
            if [ \"$RONDO_ITERATION\" -ge 3 ] && [ \"$5\" = keys ]; then\n\
              printf '{\"x\": 0.5, \"y\": 1.0, \"label\": \"k\"}\\n' > \"$4\"\n\
            else\n\
              printf '{\"x\": 0.%s, \"label\": \"k\"}\\n' \"$RONDO_ITERATION\" > \"$4\"\n\
            fi\n";
        let c = |re: f64| Complex64::new(re, 0.5);
        for (case, bad, flag, needle) in [
            (
                "shape",
                vec![c(1.0); 3],
                "same",
                "complex array of shape [2]",
            ),
            ("nan", vec![c(f64::NAN), c(1.0)], "same", "NaN"),
            ("keys", vec![c(1.0); 2], "keys", "numeric fields"),
        ] {
            let d = tempfile::tempdir()?;
            let p = |n: &str| d.path().join(n);
            std::fs::write(p("step.sh"), script)?;
            npy::write_complex(p("b0.npy"), &[2], &[c(2.0), c(3.0)])?;
            npy::write_complex(p("bad.npy"), &[bad.len()], &bad)?;
            let yaml = format!(
                "campaign: mixfail-{case}\n\
                 start: {{ b: b0.npy, bad: bad.npy }}\n\
                 cycle:\n\
                 \x20 step:\n\
                 \x20   run: [/bin/sh, \"{script}\", \"{{{{input:b}}}}\", \"{{{{input:bad}}}}\", \"{{{{output:b}}}}\", \"{{{{output:a}}}}\", {flag}]\n\
                 \x20   inputs: {{ b: {{ previous: mix.b, initially: start.b }}, bad: start.bad }}\n\
                 \x20   outputs: {{ b: b.npy, a: a.json }}\n\
                 \x20   allow-nonfinite: true\n\
                 \x20 mix:\n\
                 \x20   builtin: mix\n\
                 \x20   inputs: {{ b: step.b, a: step.a }}\n\
                 \x20   outputs: {{ b: b.npy, a: a.json }}\n\
                 \x20   settings: {{ method: anderson, alpha: 0.5 }}\n\
                 stop: {{ max-iterations: 5 }}\n",
                script = p("step.sh").display()
            );
            std::fs::write(p("c.yaml"), yaml)?;
            let campaign = crate::spec::load(&p("c.yaml")).map_err(|e| e.to_string())?;
            let opts = RunOptions {
                workspace: engine::default_workspace(&p("c.yaml")),
                executor: ExecutorChoice::Local,
                jobs: 1,
                retry_failed: false,
                keep_scratch: false,
                grace: std::time::Duration::from_secs(1),
                allocation: None,
            };
            let summary = engine::run(
                &campaign,
                &opts,
                crate::progress::Progress::for_stderr(true),
            )
            .await?;
            assert_eq!(
                summary.states.get(&crate::store::PointState::Failed),
                Some(&1),
                "{case}: {summary:?}"
            );
            let db = opts.workspace.join("rondo.db");
            let pool =
                sqlx::SqlitePool::connect(&format!("sqlite://{}?mode=ro", db.display())).await?;
            let rows = sqlx::query(
                "SELECT a.id, a.failure_message, \
                 (SELECT count(*) FROM attempt_outputs o WHERE o.attempt_id = a.id) \
                 FROM attempts a WHERE a.stage = 'mix' AND a.iteration = 3",
            )
            .fetch_all(&pool)
            .await?;
            if rows.is_empty() {
                let all =
                    sqlx::query("SELECT stage, iteration, state, failure_message FROM attempts")
                        .fetch_all(&pool)
                        .await?;
                let all: Vec<(String, i64, String, Option<String>)> = all
                    .iter()
                    .map(|r| (r.get(0), r.get(1), r.get(2), r.get(3)))
                    .collect();
                panic!("{case}: no mix attempt at iteration 3: {all:?}");
            }
            for r in &rows {
                let msg: Option<String> = r.get(1);
                let outputs: i64 = r.get(2);
                assert!(
                    msg.as_deref().is_some_and(|m| m.contains(needle)),
                    "{case}: {msg:?}"
                );
                assert_eq!(outputs, 0, "{case}: a failed mix stored outputs");
            }
            // iterations 1 and 2 mixed both roles and stored them with the state
            let ok: i64 = sqlx::query_scalar(
                "SELECT count(*) FROM attempt_outputs o JOIN attempts a ON a.id = o.attempt_id \
                 WHERE a.stage = 'mix' AND a.state = 'succeeded' AND o.role IN ('a', 'b', 'state')",
            )
            .fetch_one(&pool)
            .await?;
            assert_eq!(ok, 6, "{case}");
            pool.close().await;
        }
        Ok(())
    }
}
