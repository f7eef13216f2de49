//! Mixing for self-consistency loops x = g(x): linear, Anderson and modified Broyden.
//!
//! This module owns the mixing step of the built-in mixing stage. The step is a pure
//! function [`mix`] of the configuration, the state written by the previous iteration and
//! the new output vector `g(x)`. The state ([`MixerState`]) serialises every number as the
//! hexadecimal bit pattern of the `f64`, so a state written to JSON and read back continues
//! the sequence bit for bit, whatever JSON parser reads it.
//!
//! Conventions: the residual is `f_k = g(x_k) − x_k`; `alpha` is the mixing parameter
//! (the damping β of Walker & Ni); a history of `m` keeps `m + 1` iterates and so `m`
//! differences.
//!
//! * Linear: `x_{k+1} = x_k + α f_k`.
//! * Anderson (D. G. Anderson, J. ACM 12, 547 (1965)), in the difference form of
//!   Walker & Ni, SIAM J. Numer. Anal. 49, 1715 (2011):
//!   `γ = argmin ‖f_k − ΔF γ‖₂`, solved by SVD (never the normal equations), then
//!   `x_{k+1} = x_k + α f_k − (ΔX + α ΔF) γ`. A regularisation `w0 > 0` adds
//!   `w0² Σ_j ‖ΔF_j‖² γ_j²` to the objective (Johnson's `w0` on normalised differences),
//!   solved as an augmented least-squares problem.
//! * Modified Broyden (D. D. Johnson, PRB 38, 12807 (1988)), unit weights `w_k = 1`:
//!   normalised differences `ΔF̂`, `u = α ΔF̂ + ΔV̂`, `(w0² I + ΔF̂ᵀΔF̂) γ = ΔF̂ᵀ F`,
//!   `x_{k+1} = x_k + α F − Σ_l γ_l u_l`. As published, this solves the small normal
//!   equations (LU); `w0` is what keeps them well conditioned.
//!
//! A failed step (non-finite result, singular solve) or a residual that grew for
//! `restart_after_growth` consecutive iterations clears the history and takes a linear
//! step; [`MixOutcome::event`] says so.

use nalgebra::{DMatrix, DVector};
use serde::{Deserialize, Serialize};

/// Version of the [`MixerState`] layout; a state with another version is refused.
pub const STATE_VERSION: u32 = 1;

/// Mixing method.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "kebab-case")]
pub enum Method {
    /// `x_{k+1} = x_k + α f_k`.
    Linear,
    /// Anderson / Pulay mixing with a bounded history and an SVD least-squares solve.
    Anderson,
    /// Johnson's modified Broyden mixing with a bounded history.
    Broyden,
}

impl Method {
    /// The name used in campaign files and event messages.
    pub fn name(self) -> &'static str {
        match self {
            Method::Linear => "linear",
            Method::Anderson => "anderson",
            Method::Broyden => "broyden",
        }
    }
}

/// Options of the mixer.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct MixerConfig {
    /// Mixing method.
    pub method: Method,
    /// Mixing parameter α in (0, 1].
    pub alpha: f64,
    /// Number of differences kept (≥ 1); ignored by linear mixing.
    pub history: usize,
    /// Regularisation, Johnson's w0 (finite, ≥ 0); 0 means none.
    pub w0: f64,
    /// Reset the history after this many consecutive growing residuals; 0 disables.
    pub restart_after_growth: usize,
}

impl Default for MixerConfig {
    /// Anderson, α = 0.5, 8 differences, no regularisation, reset after 3 growing residuals.
    fn default() -> Self {
        Self {
            method: Method::Anderson,
            alpha: 0.5,
            history: 8,
            w0: 0.0,
            restart_after_growth: 3,
        }
    }
}

impl MixerConfig {
    /// Check the options: α in (0, 1], history ≥ 1, finite w0 ≥ 0.
    pub fn validate(&self) -> Result<(), MixError> {
        if !(self.alpha > 0.0 && self.alpha <= 1.0) {
            return Err(MixError::AlphaOutOfRange(self.alpha));
        }
        if self.history == 0 {
            return Err(MixError::HistoryZero);
        }
        if !(self.w0.is_finite() && self.w0 >= 0.0) {
            return Err(MixError::InvalidW0(self.w0));
        }
        Ok(())
    }
}

/// Errors of the mixer. Nothing is returned (no next vector, no state) on error.
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
pub enum MixError {
    /// The mixing parameter is outside (0, 1].
    #[error("mixing parameter alpha = {0} is outside (0, 1]; choose a value such as 0.3")]
    AlphaOutOfRange(f64),
    /// A history of zero differences was asked for.
    #[error("mixing history must be at least 1 (use method linear for no history)")]
    HistoryZero,
    /// The regularisation is negative or not finite.
    #[error("mixing regularisation w0 = {0} must be finite and >= 0")]
    InvalidW0(f64),
    /// The new vector is empty.
    #[error("the vector to mix is empty")]
    EmptyInput,
    /// The new vector has another length than the previous iteration.
    #[error(
        "the vector to mix has {found} elements but the mixer history has {expected}; \
         the array shapes changed between iterations"
    )]
    LengthMismatch {
        /// Length kept in the state.
        expected: usize,
        /// Length of the new vector.
        found: usize,
    },
    /// The new vector holds NaN or an infinity.
    #[error("element {index} of the vector to mix is {value}; the solver output is not finite")]
    NonFinite {
        /// Position of the first bad element.
        index: usize,
        /// Its value.
        value: f64,
    },
    /// The state read back is empty or inconsistent.
    #[error("mixer state is invalid: {0}")]
    InvalidState(String),
}

/// Everything the mixer carries from one iteration to the next.
///
/// Floats are stored as hexadecimal bit patterns, so a JSON round trip is exact.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct MixerState {
    version: u32,
    /// Method that wrote the state.
    method: Method,
    /// The last mixed vector, the input of the solver whose output is mixed next.
    #[serde(with = "hex_vec")]
    x: Vec<f64>,
    /// Previous inputs x_i (oldest first), at most `history + 1`.
    #[serde(with = "hex_vecs")]
    history_x: Vec<Vec<f64>>,
    /// Residuals f_i = g(x_i) − x_i matching `history_x`.
    #[serde(with = "hex_vecs")]
    history_f: Vec<Vec<f64>>,
    /// ‖f‖₂ of the last mixed iteration.
    #[serde(with = "hex_opt")]
    last_residual_norm: Option<f64>,
    /// Consecutive iterations whose residual grew.
    growth_count: usize,
    /// Mixing steps taken so far.
    iteration: usize,
    /// History resets so far.
    resets: usize,
}

impl MixerState {
    /// A state whose last mixed vector is `x0` and whose history is empty: the next call of
    /// [`mix`] with `g(x0)` takes a first linear step. Used when the start vector is known.
    pub fn start(method: Method, x0: &[f64]) -> Result<Self, MixError> {
        if x0.is_empty() {
            return Err(MixError::EmptyInput);
        }
        check_finite(x0)?;
        Ok(Self {
            version: STATE_VERSION,
            method,
            x: x0.to_vec(),
            history_x: Vec::new(),
            history_f: Vec::new(),
            last_residual_norm: None,
            growth_count: 0,
            iteration: 0,
            resets: 0,
        })
    }

    /// The last mixed vector (the solver input that produced the next `new`).
    pub fn x(&self) -> &[f64] {
        &self.x
    }

    /// Number of mixing steps taken.
    pub fn iteration(&self) -> usize {
        self.iteration
    }

    /// Number of stored iterates in the history.
    pub fn history_len(&self) -> usize {
        self.history_x.len()
    }

    /// Number of history resets so far.
    pub fn resets(&self) -> usize {
        self.resets
    }

    /// ‖f‖₂ of the last mixed iteration, if any.
    pub fn last_residual_norm(&self) -> Option<f64> {
        self.last_residual_norm
    }

    fn validate(&self) -> Result<(), MixError> {
        if self.version != STATE_VERSION {
            return Err(MixError::InvalidState(format!(
                "layout version {} is not the supported version {STATE_VERSION}",
                self.version
            )));
        }
        if self.x.is_empty() {
            return Err(MixError::InvalidState("the stored vector is empty".into()));
        }
        if self.history_x.len() != self.history_f.len() {
            return Err(MixError::InvalidState(format!(
                "{} stored inputs but {} stored residuals",
                self.history_x.len(),
                self.history_f.len()
            )));
        }
        let n = self.x.len();
        for (i, v) in self
            .history_x
            .iter()
            .chain(self.history_f.iter())
            .enumerate()
        {
            if v.len() != n {
                return Err(MixError::InvalidState(format!(
                    "stored vector {i} has {} elements, expected {n}",
                    v.len()
                )));
            }
        }
        let all = self
            .x
            .iter()
            .chain(self.history_x.iter().flatten())
            .chain(self.history_f.iter().flatten());
        if all.clone().any(|v| !v.is_finite()) {
            return Err(MixError::InvalidState(
                "it holds a non-finite number".into(),
            ));
        }
        if let Some(r) = self.last_residual_norm {
            if !(r.is_finite() && r >= 0.0) {
                return Err(MixError::InvalidState(format!(
                    "residual norm {r} is not valid"
                )));
            }
        }
        Ok(())
    }
}

/// Result of one mixing step.
#[derive(Debug, Clone, PartialEq)]
pub struct MixOutcome {
    /// The mixed vector, the next input of the solver.
    pub next: Vec<f64>,
    /// State to store for the next iteration.
    pub state: MixerState,
    /// ‖f_k‖₂ = ‖g(x_k) − x_k‖₂. NaN on the first call without a state, where no input
    /// vector is known and so no residual is defined.
    pub residual_norm: f64,
    /// What happened out of the ordinary (history reset, method change), for the event log.
    pub event: Option<String>,
}

/// One mixing step. `new` = g(x) produced by the solver from the vector x kept in `state`.
///
/// With no state (first iteration) the mixer returns `new` unchanged and starts its history
/// from it. The result depends only on the arguments, so a state read back from disk
/// continues the same sequence bit for bit.
pub fn mix(
    config: &MixerConfig,
    state: Option<&MixerState>,
    new: &[f64],
) -> Result<MixOutcome, MixError> {
    config.validate()?;
    if new.is_empty() {
        return Err(MixError::EmptyInput);
    }
    check_finite(new)?;
    let Some(state) = state else {
        let state = MixerState::start(config.method, new)?;
        return Ok(MixOutcome {
            next: new.to_vec(),
            state,
            residual_norm: f64::NAN,
            event: None,
        });
    };
    state.validate()?;
    if state.x.len() != new.len() {
        return Err(MixError::LengthMismatch {
            expected: state.x.len(),
            found: new.len(),
        });
    }

    let x = &state.x;
    let f: Vec<f64> = new.iter().zip(x).map(|(g, x)| g - x).collect();
    let norm = norm2(&f);

    let mut events: Vec<String> = Vec::new();
    let mut history_x = state.history_x.clone();
    let mut history_f = state.history_f.clone();
    let mut resets = state.resets;
    if state.method != config.method {
        if !history_x.is_empty() {
            events.push(format!(
                "history reset: method changed from {} to {}",
                state.method.name(),
                config.method.name()
            ));
            resets += 1;
        }
        history_x.clear();
        history_f.clear();
    }

    let mut growth_count = match state.last_residual_norm {
        Some(prev) if norm > prev => state.growth_count + 1,
        _ => 0,
    };
    let mut force_linear = false;
    // Linear mixing has no history to reset: a growing residual is only counted.
    if config.method != Method::Linear
        && config.restart_after_growth > 0
        && growth_count >= config.restart_after_growth
    {
        events.push(format!(
            "history reset: residual grew {growth_count} times; linear step"
        ));
        history_x.clear();
        history_f.clear();
        growth_count = 0;
        resets += 1;
        force_linear = true;
    }

    let linear = |x: &[f64], f: &[f64]| -> Vec<f64> {
        x.iter().zip(f).map(|(x, f)| x + config.alpha * f).collect()
    };

    let next = if config.method == Method::Linear {
        history_x.clear();
        history_f.clear();
        linear(x, &f)
    } else {
        history_x.push(x.clone());
        history_f.push(f.clone());
        let keep = config.history + 1;
        if history_x.len() > keep {
            let drop = history_x.len() - keep;
            history_x.drain(..drop);
            history_f.drain(..drop);
        }
        let accelerated = if force_linear || history_x.len() < 2 {
            None
        } else {
            let step = match config.method {
                Method::Anderson => anderson_step(config, &history_x, &history_f),
                _ => broyden_step(config, &history_x, &history_f),
            };
            match step {
                Some(v) if v.iter().all(|e| e.is_finite()) => Some(v),
                _ => {
                    events.push(format!(
                        "history reset: {} step failed (singular or non-finite); linear step",
                        config.method.name()
                    ));
                    resets += 1;
                    history_x = vec![x.clone()];
                    history_f = vec![f.clone()];
                    None
                }
            }
        };
        accelerated.unwrap_or_else(|| linear(x, &f))
    };
    if let Some((index, value)) = next
        .iter()
        .copied()
        .enumerate()
        .find(|(_, v)| !v.is_finite())
    {
        // Only a linear step can get here; with finite inputs it overflowed.
        return Err(MixError::NonFinite { index, value });
    }

    let state = MixerState {
        version: STATE_VERSION,
        method: config.method,
        x: next.clone(),
        history_x,
        history_f,
        last_residual_norm: Some(norm),
        growth_count,
        iteration: state.iteration + 1,
        resets,
    };
    let event = if events.is_empty() {
        None
    } else {
        Some(events.join("; "))
    };
    Ok(MixOutcome {
        next,
        state,
        residual_norm: norm,
        event,
    })
}

/// Anderson step in the Walker–Ni difference form; the last history entry is (x_k, f_k).
fn anderson_step(config: &MixerConfig, hx: &[Vec<f64>], hf: &[Vec<f64>]) -> Option<Vec<f64>> {
    let n = hx[0].len();
    let m = hx.len() - 1;
    let dx = DMatrix::from_fn(n, m, |i, j| hx[j + 1][i] - hx[j][i]);
    let df = DMatrix::from_fn(n, m, |i, j| hf[j + 1][i] - hf[j][i]);
    let fk = DVector::from_column_slice(&hf[m]);
    let gamma = if config.w0 > 0.0 {
        let mut aug = DMatrix::zeros(n + m, m);
        aug.view_mut((0, 0), (n, m)).copy_from(&df);
        for j in 0..m {
            aug[(n + j, j)] = config.w0 * df.column(j).norm();
        }
        let mut rhs = DVector::zeros(n + m);
        rhs.rows_mut(0, n).copy_from(&fk);
        lstsq(aug, &rhs)?
    } else {
        lstsq(df.clone(), &fk)?
    };
    let xk = DVector::from_column_slice(&hx[m]);
    let next = &xk + config.alpha * &fk - (dx + config.alpha * df) * gamma;
    Some(next.as_slice().to_vec())
}

/// Minimum-norm least-squares solution by SVD, cutting singular values below
/// ε·max(rows, cols)·σ_max (the rule of LAPACK's gelsd with rcond = None).
fn lstsq(a: DMatrix<f64>, b: &DVector<f64>) -> Option<DVector<f64>> {
    let dims = a.nrows().max(a.ncols()) as f64;
    let svd = a.svd(true, true);
    let smax = svd.singular_values.max();
    let cut = f64::EPSILON * dims * smax;
    svd.solve(b, cut).ok()
}

/// Johnson's modified Broyden step with unit weights; the last entry is (V^(m), F^(m)).
fn broyden_step(config: &MixerConfig, hx: &[Vec<f64>], hf: &[Vec<f64>]) -> Option<Vec<f64>> {
    let n = hx[0].len();
    let m = hx.len() - 1;
    let mut df = DMatrix::zeros(n, m);
    let mut u = DMatrix::zeros(n, m);
    for j in 0..m {
        let dfj: Vec<f64> = hf[j + 1].iter().zip(&hf[j]).map(|(a, b)| a - b).collect();
        let scale = norm2(&dfj);
        if scale == 0.0 || !scale.is_finite() {
            return None;
        }
        for i in 0..n {
            let dfn = dfj[i] / scale;
            let dvn = (hx[j + 1][i] - hx[j][i]) / scale;
            df[(i, j)] = dfn;
            u[(i, j)] = config.alpha * dfn + dvn;
        }
    }
    let fm = DVector::from_column_slice(&hf[m]);
    let a = df.transpose() * &df + DMatrix::identity(m, m) * (config.w0 * config.w0);
    let c = df.transpose() * &fm;
    let gamma = a.lu().solve(&c)?;
    let vm = DVector::from_column_slice(&hx[m]);
    let next = vm + config.alpha * fm - u * gamma;
    Some(next.as_slice().to_vec())
}

fn norm2(v: &[f64]) -> f64 {
    v.iter().map(|e| e * e).sum::<f64>().sqrt()
}

fn check_finite(v: &[f64]) -> Result<(), MixError> {
    match v.iter().copied().enumerate().find(|(_, e)| !e.is_finite()) {
        Some((index, value)) => Err(MixError::NonFinite { index, value }),
        None => Ok(()),
    }
}

/// Result of [`iterate_fixed_point`].
#[derive(Debug, Clone, PartialEq)]
pub struct FixedPointRun {
    /// K: the smallest k with ‖f_k‖₂ < tol (the number of updates; g ran K + 1 times).
    /// Equals `max_updates` when not converged.
    pub updates: usize,
    /// Whether ‖f_K‖₂ < tol was reached.
    pub converged: bool,
    /// x_K.
    pub x: Vec<f64>,
    /// ‖f_k‖₂ for k = 0..=K.
    pub residual_norms: Vec<f64>,
    /// Events reported by the mixer along the way.
    pub events: Vec<String>,
}

/// Iterate x = g(x) from `x0` with [`mix`], counting updates until ‖f_k‖₂ < `tol`.
///
/// `round_trip` is called on the state after every step and may replace it (tests pass a
/// JSON round trip here); pass `|s| Ok(s)` for none.
pub fn iterate_fixed_point<G, R>(
    config: &MixerConfig,
    x0: &[f64],
    mut g: G,
    tol: f64,
    max_updates: usize,
    mut round_trip: R,
) -> Result<FixedPointRun, MixError>
where
    G: FnMut(&[f64]) -> Vec<f64>,
    R: FnMut(MixerState) -> Result<MixerState, MixError>,
{
    let mut state = MixerState::start(config.method, x0)?;
    let mut x = x0.to_vec();
    let mut norms = Vec::new();
    let mut events = Vec::new();
    for k in 0..=max_updates {
        let gx = g(&x);
        let out = mix(config, Some(&state), &gx)?;
        norms.push(out.residual_norm);
        if out.residual_norm < tol {
            return Ok(FixedPointRun {
                updates: k,
                converged: true,
                x,
                residual_norms: norms,
                events,
            });
        }
        if k == max_updates {
            break;
        }
        if let Some(e) = out.event {
            events.push(format!("update {k}: {e}"));
        }
        x = out.next;
        state = round_trip(out.state)?;
    }
    Ok(FixedPointRun {
        updates: max_updates,
        converged: false,
        x,
        residual_norms: norms,
        events,
    })
}

mod hex_vec {
    use serde::de::Error;
    use serde::{Deserialize, Deserializer, Serializer};

    pub fn to_hex(v: f64) -> String {
        format!("{:016x}", v.to_bits())
    }

    pub fn from_hex<E: Error>(s: &str) -> Result<f64, E> {
        if s.len() != 16 {
            return Err(E::custom(format!(
                "'{s}' is not a 16-digit hexadecimal f64 bit pattern"
            )));
        }
        u64::from_str_radix(s, 16)
            .map(f64::from_bits)
            .map_err(|e| E::custom(format!("'{s}' is not a hexadecimal f64 bit pattern: {e}")))
    }

    pub fn serialize<S: Serializer>(v: &[f64], s: S) -> Result<S::Ok, S::Error> {
        s.collect_seq(v.iter().map(|e| to_hex(*e)))
    }

    pub fn deserialize<'de, D: Deserializer<'de>>(d: D) -> Result<Vec<f64>, D::Error> {
        let raw = Vec::<String>::deserialize(d)?;
        raw.iter().map(|s| from_hex(s)).collect()
    }
}

mod hex_vecs {
    use serde::{Deserialize, Deserializer, Serializer};

    pub fn serialize<S: Serializer>(v: &[Vec<f64>], s: S) -> Result<S::Ok, S::Error> {
        s.collect_seq(v.iter().map(|row| {
            row.iter()
                .map(|e| super::hex_vec::to_hex(*e))
                .collect::<Vec<_>>()
        }))
    }

    pub fn deserialize<'de, D: Deserializer<'de>>(d: D) -> Result<Vec<Vec<f64>>, D::Error> {
        let raw = Vec::<Vec<String>>::deserialize(d)?;
        raw.iter()
            .map(|row| row.iter().map(|s| super::hex_vec::from_hex(s)).collect())
            .collect()
    }
}

mod hex_opt {
    use serde::{Deserialize, Deserializer, Serializer};

    pub fn serialize<S: Serializer>(v: &Option<f64>, s: S) -> Result<S::Ok, S::Error> {
        match v {
            Some(e) => s.serialize_some(&super::hex_vec::to_hex(*e)),
            None => s.serialize_none(),
        }
    }

    pub fn deserialize<'de, D: Deserializer<'de>>(d: D) -> Result<Option<f64>, D::Error> {
        let raw = Option::<String>::deserialize(d)?;
        raw.map(|s| super::hex_vec::from_hex(&s)).transpose()
    }
}
