//! Equations of state E(V): third-order Birch–Murnaghan and Vinet forms, their pressures,
//! and a least-squares fit of E0, V0, B0, B0′ to energy–volume data.
//!
//! * Birch–Murnaghan (F. Birch, Phys. Rev. 71, 809 (1947)), η = (V0/V)^{2/3}:
//!   `E = E0 + (9 V0 B0/16) [ (η−1)³ B0′ + (η−1)² (6 − 4η) ]`.
//! * Vinet (P. Vinet, J. Ferrante, J. H. Rose, J. R. Smith, J. Geophys. Res. 92, 9319
//!   (1987)), x = (V/V0)^{1/3}: `P = 3B0 (1−x)/x² exp[(3/2)(B0′−1)(1−x)]` and its integral
//!   `E = E0 + 2B0V0/(B0′−1)² {2 − [5 + 3B0′(x−1) − 3x] exp[−(3/2)(B0′−1)(x−1)]}`.
//!
//! Units: energies in eV, volumes in Å³, B0 in eV/Å³ (and GPa through
//! [`crate::units::EV_PER_A3_IN_GPA`]). The fit is Levenberg–Marquardt with analytic
//! Jacobians, started from a parabola; standard errors come from the covariance
//! (JᵀJ)⁻¹, scaled by χ²/(N − 4) (the usual default) and, when per-point σ are given, also
//! unscaled ("absolute σ").

use nalgebra::{DMatrix, DVector};
use serde::{Deserialize, Serialize};

use crate::units::EV_PER_A3_IN_GPA;

/// Fewest volumes a fit accepts: four parameters and at least one degree of freedom.
pub const MIN_VOLUMES: usize = 5;

/// Equation-of-state model.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "kebab-case")]
pub enum EosModel {
    /// Third-order Birch–Murnaghan.
    BirchMurnaghan3,
    /// Vinet (universal) form.
    Vinet,
}

/// The four parameters of either model.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
pub struct EosParams {
    /// Energy at the minimum, eV.
    pub e0: f64,
    /// Volume at the minimum, Å³.
    pub v0: f64,
    /// Bulk modulus at V0, eV/Å³.
    pub b0: f64,
    /// Pressure derivative of the bulk modulus at V0.
    pub b0_prime: f64,
}

impl EosParams {
    fn to_array(self) -> [f64; 4] {
        [self.e0, self.v0, self.b0, self.b0_prime]
    }

    fn from_array(p: [f64; 4]) -> Self {
        Self {
            e0: p[0],
            v0: p[1],
            b0: p[2],
            b0_prime: p[3],
        }
    }
}

/// E(V) in eV.
pub fn energy(model: EosModel, p: &EosParams, v: f64) -> f64 {
    energy_and_gradient(model, &p.to_array(), v).0
}

/// P(V) = −dE/dV in eV/Å³.
pub fn pressure(model: EosModel, p: &EosParams, v: f64) -> f64 {
    match model {
        EosModel::BirchMurnaghan3 => {
            let r = p.v0 / v;
            let eta = r.powf(2.0 / 3.0);
            1.5 * p.b0
                * (r.powf(7.0 / 3.0) - r.powf(5.0 / 3.0))
                * (1.0 + 0.75 * (p.b0_prime - 4.0) * (eta - 1.0))
        }
        EosModel::Vinet => {
            let x = (v / p.v0).cbrt();
            3.0 * p.b0 * (1.0 - x) / (x * x) * (1.5 * (p.b0_prime - 1.0) * (1.0 - x)).exp()
        }
    }
}

/// E(V) and ∂E/∂(E0, V0, B0, B0′).
fn energy_and_gradient(model: EosModel, p: &[f64; 4], v: f64) -> (f64, [f64; 4]) {
    let [e0, v0, b0, bp] = *p;
    match model {
        EosModel::BirchMurnaghan3 => {
            let eta = (v0 / v).powf(2.0 / 3.0);
            let d = eta - 1.0;
            let s = d * d * d * bp + d * d * (6.0 - 4.0 * eta);
            let ds_deta = 3.0 * d * d * bp + 2.0 * d * (6.0 - 4.0 * eta) - 4.0 * d * d;
            let k = 9.0 * v0 * b0 / 16.0;
            let de_dv0 = 9.0 * b0 / 16.0 * s + k * ds_deta * (2.0 / 3.0) * eta / v0;
            (
                e0 + k * s,
                [1.0, de_dv0, 9.0 * v0 / 16.0 * s, k * d * d * d],
            )
        }
        EosModel::Vinet => {
            // With c = B0′ − 1 and y = x − 1 the bracket 5 + 3B0′y − 3x is q = 2 + 3cy.
            let x = (v / v0).cbrt();
            let c = bp - 1.0;
            let y = x - 1.0;
            let q = 2.0 + 3.0 * c * y;
            let ex = (-1.5 * c * y).exp();
            let w = 2.0 - q * ex;
            let k = 2.0 * b0 * v0 / (c * c);
            let de_dbp = -2.0 * k / c * w + k * ex * y * (1.5 * q - 3.0);
            let de_dv0 = k / v0 * w + k * c * ex * (3.0 - 1.5 * q) * x / (3.0 * v0);
            (e0 + k * w, [1.0, de_dv0, 2.0 * v0 / (c * c) * w, de_dbp])
        }
    }
}

/// Result of [`fit`].
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct EosFit {
    /// Model fitted.
    pub model: EosModel,
    /// Energy at the minimum, eV.
    pub e0: f64,
    /// Equilibrium volume, Å³.
    pub v0: f64,
    /// Bulk modulus, eV/Å³.
    pub b0: f64,
    /// Bulk modulus, GPa (1 eV/Å³ = 160.2176634 GPa, CODATA 2018 elementary charge).
    pub b0_gpa: f64,
    /// Pressure derivative of the bulk modulus.
    pub b0_prime: f64,
    /// Standard errors of (E0, V0, B0 in eV/Å³, B0′): √diag of (JᵀWJ)⁻¹ · χ²/(N − 4).
    pub stderr: [f64; 4],
    /// Standard errors with the given σ taken as absolute (unscaled covariance); `None`
    /// without σ.
    pub stderr_absolute_sigma: Option<[f64; 4]>,
    /// Standard error of B0 in GPa (from `stderr`).
    pub b0_gpa_stderr: f64,
    /// Covariance matrix matching `stderr` (scaled), order (E0, V0, B0, B0′).
    pub covariance: [[f64; 4]; 4],
    /// Residuals E_data − E_fit per volume, eV.
    pub residuals: Vec<f64>,
    /// Σ residual², eV².
    pub rss: f64,
    /// Σ (residual/σ)² / (N − 4); `None` without σ.
    pub chi2_per_dof: Option<f64>,
    /// Parabola starting values (E0, V0, B0, B0′ = 4).
    pub start: [f64; 4],
    /// Levenberg–Marquardt iterations used.
    pub iterations: usize,
}

/// Which side of the scanned volumes a minimum lies on.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "kebab-case")]
pub enum Side {
    /// Below the smallest volume.
    BelowSmallest,
    /// Above the largest volume.
    AboveLargest,
}

impl std::fmt::Display for Side {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.write_str(match self {
            Side::BelowSmallest => "below the smallest volume",
            Side::AboveLargest => "above the largest volume",
        })
    }
}

/// Why a fit was refused.
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
pub enum EosError {
    /// Fewer than [`MIN_VOLUMES`] distinct volumes.
    #[error("an equation-of-state fit needs at least {MIN_VOLUMES} distinct volumes, got {found}; add volumes to the sweep")]
    TooFewVolumes {
        /// Distinct volumes given.
        found: usize,
    },
    /// Energies, volumes and σ differ in length.
    #[error("{volumes} volumes but {values} {what}")]
    LengthMismatch {
        /// Number of volumes.
        volumes: usize,
        /// Number of the other values.
        values: usize,
        /// "energies" or "sigma values".
        what: &'static str,
    },
    /// A value is NaN, infinite, or (volume, σ) not positive.
    #[error("{what} {index} is {value}; it must be finite{}", if *.positive { " and positive" } else { "" })]
    BadValue {
        /// Which input.
        what: &'static str,
        /// Position.
        index: usize,
        /// The value.
        value: f64,
        /// Whether it must be positive.
        positive: bool,
    },
    /// The minimum is not inside the scanned volumes.
    #[error(
        "the energy minimum lies {side} ({detail}); the scanned volumes run from {v_min} to {v_max} Å³: \
         extend the sweep on that side"
    )]
    MinimumOutsideRange {
        /// Which side.
        side: Side,
        /// How this was seen.
        detail: String,
        /// Smallest scanned volume.
        v_min: f64,
        /// Largest scanned volume.
        v_max: f64,
    },
    /// The data curve downwards: no minimum at all.
    #[error("the energies have no minimum (a parabola through them curves downwards, a = {0}); check the data")]
    NoMinimum(f64),
    /// The least-squares iteration did not reach a valid minimum.
    #[error("the {model:?} fit failed: {reason}")]
    FitFailed {
        /// Model.
        model: EosModel,
        /// What went wrong.
        reason: String,
    },
}

/// Fit `model` to (volume, energy) data, optionally with per-point standard deviations σ.
pub fn fit(
    model: EosModel,
    volumes: &[f64],
    energies: &[f64],
    sigma: Option<&[f64]>,
) -> Result<EosFit, EosError> {
    let n = volumes.len();
    if energies.len() != n {
        return Err(EosError::LengthMismatch {
            volumes: n,
            values: energies.len(),
            what: "energies",
        });
    }
    if let Some(s) = sigma {
        if s.len() != n {
            return Err(EosError::LengthMismatch {
                volumes: n,
                values: s.len(),
                what: "sigma values",
            });
        }
    }
    for (i, &v) in volumes.iter().enumerate() {
        if !(v.is_finite() && v > 0.0) {
            return Err(EosError::BadValue {
                what: "volume",
                index: i,
                value: v,
                positive: true,
            });
        }
    }
    for (i, &e) in energies.iter().enumerate() {
        if !e.is_finite() {
            return Err(EosError::BadValue {
                what: "energy",
                index: i,
                value: e,
                positive: false,
            });
        }
    }
    if let Some(s) = sigma {
        for (i, &e) in s.iter().enumerate() {
            if !(e.is_finite() && e > 0.0) {
                return Err(EosError::BadValue {
                    what: "sigma",
                    index: i,
                    value: e,
                    positive: true,
                });
            }
        }
    }
    let mut distinct: Vec<f64> = volumes.to_vec();
    distinct.sort_by(f64::total_cmp);
    distinct.dedup();
    if distinct.len() < MIN_VOLUMES {
        return Err(EosError::TooFewVolumes {
            found: distinct.len(),
        });
    }
    let (v_min, v_max) = (distinct[0], distinct[distinct.len() - 1]);

    // The lowest energy at an end of the scan means the minimum is beyond it (or at it).
    let i_low = (0..n)
        .min_by(|&a, &b| energies[a].total_cmp(&energies[b]))
        .unwrap_or(0);
    if volumes[i_low] == v_min || volumes[i_low] == v_max {
        let side = if volumes[i_low] == v_min {
            Side::BelowSmallest
        } else {
            Side::AboveLargest
        };
        return Err(EosError::MinimumOutsideRange {
            side,
            detail: format!(
                "the lowest energy is at the end point V = {}",
                volumes[i_low]
            ),
            v_min,
            v_max,
        });
    }

    let start = parabola_start(volumes, energies)?;
    let weights: Vec<f64> = match sigma {
        Some(s) => s.iter().map(|s| 1.0 / s).collect(),
        None => vec![1.0; n],
    };
    let (p, iterations) = levenberg_marquardt(model, volumes, energies, &weights, start)?;
    if !(p[1] >= v_min && p[1] <= v_max) {
        let side = if p[1] < v_min {
            Side::BelowSmallest
        } else {
            Side::AboveLargest
        };
        return Err(EosError::MinimumOutsideRange {
            side,
            detail: format!("the fitted V0 = {}", p[1]),
            v_min,
            v_max,
        });
    }

    let (r, j) = residuals_and_jacobian(model, volumes, energies, &weights, &p);
    let chi2 = r.norm_squared();
    let dof = (n - 4) as f64;
    let unscaled = covariance(&j).ok_or_else(|| EosError::FitFailed {
        model,
        reason: "the Jacobian at the minimum is singular; the parameters are not determined".into(),
    })?;
    let mut cov = [[0.0; 4]; 4];
    let mut se = [0.0; 4];
    let mut se_abs = [0.0; 4];
    for a in 0..4 {
        for b in 0..4 {
            cov[a][b] = unscaled[(a, b)] * chi2 / dof;
        }
        se[a] = cov[a][a].sqrt();
        se_abs[a] = unscaled[(a, a)].sqrt();
    }
    let residuals: Vec<f64> = volumes
        .iter()
        .zip(energies)
        .map(|(&v, &e)| e - energy_and_gradient(model, &p, v).0)
        .collect();
    let rss = residuals.iter().map(|r| r * r).sum();
    Ok(EosFit {
        model,
        e0: p[0],
        v0: p[1],
        b0: p[2],
        b0_gpa: p[2] * EV_PER_A3_IN_GPA,
        b0_prime: p[3],
        stderr: se,
        stderr_absolute_sigma: sigma.map(|_| se_abs),
        b0_gpa_stderr: se[2] * EV_PER_A3_IN_GPA,
        covariance: cov,
        residuals,
        rss,
        chi2_per_dof: sigma.map(|_| chi2 / dof),
        start,
        iterations,
    })
}

impl EosFit {
    /// The fitted parameters.
    pub fn params(&self) -> EosParams {
        EosParams::from_array([self.e0, self.v0, self.b0, self.b0_prime])
    }
}

/// Starting values from E ≈ aV² + bV + c: V0 = −b/2a, B0 = 2aV0, E0 = c − b²/4a, B0′ = 4.
/// Fitted in the centred variable t = V − V̄ for conditioning.
fn parabola_start(volumes: &[f64], energies: &[f64]) -> Result<[f64; 4], EosError> {
    let n = volumes.len();
    let mean = volumes.iter().sum::<f64>() / n as f64;
    let m = DMatrix::from_fn(n, 3, |i, j| (volumes[i] - mean).powi(2 - j as i32));
    let e = DVector::from_column_slice(energies);
    let sol = m
        .svd(true, true)
        .solve(&e, 0.0)
        .map_err(|reason| EosError::FitFailed {
            model: EosModel::BirchMurnaghan3,
            reason: format!("parabola for the starting values: {reason}"),
        })?;
    let (a, b, c) = (sol[0], sol[1], sol[2]);
    if a.is_nan() || a <= 0.0 {
        return Err(EosError::NoMinimum(a));
    }
    let t0 = -b / (2.0 * a);
    let v0 = mean + t0;
    Ok([c - b * b / (4.0 * a), v0, 2.0 * a * v0, 4.0])
}

/// Weighted residuals r_i = w_i (E_i − E(V_i)) and their Jacobian ∂r/∂p.
fn residuals_and_jacobian(
    model: EosModel,
    volumes: &[f64],
    energies: &[f64],
    weights: &[f64],
    p: &[f64; 4],
) -> (DVector<f64>, DMatrix<f64>) {
    let n = volumes.len();
    let mut r = DVector::zeros(n);
    let mut j = DMatrix::zeros(n, 4);
    for i in 0..n {
        let (e, g) = energy_and_gradient(model, p, volumes[i]);
        r[i] = weights[i] * (energies[i] - e);
        for k in 0..4 {
            j[(i, k)] = -weights[i] * g[k];
        }
    }
    (r, j)
}

/// Levenberg–Marquardt with Marquardt's diagonal scaling; each step solves the augmented
/// least-squares problem [J; √λ D] δ = [−r; 0] by SVD.
fn levenberg_marquardt(
    model: EosModel,
    volumes: &[f64],
    energies: &[f64],
    weights: &[f64],
    start: [f64; 4],
) -> Result<([f64; 4], usize), EosError> {
    let fail = |reason: String| EosError::FitFailed { model, reason };
    let mut p = start;
    let (mut r, mut j) = residuals_and_jacobian(model, volumes, energies, weights, &p);
    let mut cost = r.norm_squared();
    if !cost.is_finite() {
        return Err(fail(
            "the model is not finite at the starting values".into(),
        ));
    }
    let mut lambda: f64 = 1e-3;
    let n = volumes.len();
    for it in 1..=1000 {
        let mut improved = false;
        let mut converged = false;
        for _ in 0..60 {
            let mut aug = DMatrix::zeros(n + 4, 4);
            aug.view_mut((0, 0), (n, 4)).copy_from(&j);
            for k in 0..4 {
                let d = j.column(k).norm().max(f64::MIN_POSITIVE);
                aug[(n + k, k)] = lambda.sqrt() * d;
            }
            let mut rhs = DVector::zeros(n + 4);
            rhs.rows_mut(0, n).copy_from(&(-&r));
            let delta = aug
                .svd(true, true)
                .solve(&rhs, 0.0)
                .map_err(|e| fail(e.to_string()))?;
            let trial = [
                p[0] + delta[0],
                p[1] + delta[1],
                p[2] + delta[2],
                p[3] + delta[3],
            ];
            let (rt, jt) = residuals_and_jacobian(model, volumes, energies, weights, &trial);
            let ct = rt.norm_squared();
            let small = (0..4).all(|k| delta[k].abs() <= 1e-15 * p[k].abs().max(1e-300));
            if ct.is_finite() && ct <= cost {
                converged = small || (cost - ct) <= 1e-30 * cost.max(f64::MIN_POSITIVE);
                p = trial;
                r = rt;
                j = jt;
                cost = ct;
                lambda = (lambda / 10.0).max(1e-12);
                improved = true;
                break;
            }
            if small {
                converged = true;
                break;
            }
            lambda *= 10.0;
        }
        if converged || !improved {
            return Ok((p, it));
        }
    }
    Err(fail(
        "no convergence in 1000 Levenberg–Marquardt iterations".into(),
    ))
}

/// (JᵀJ)⁻¹ through the SVD of J, or `None` when J is rank deficient.
fn covariance(j: &DMatrix<f64>) -> Option<DMatrix<f64>> {
    let svd = j.clone().svd(false, true);
    let vt = svd.v_t.as_ref()?;
    let s = &svd.singular_values;
    let smax = s.max();
    if s.iter()
        .any(|&x| x.is_nan() || x <= f64::EPSILON * 4.0 * smax)
    {
        return None;
    }
    let mut out = DMatrix::zeros(4, 4);
    for a in 0..4 {
        for b in 0..4 {
            out[(a, b)] = (0..4)
                .map(|k| vt[(k, a)] * vt[(k, b)] / (s[k] * s[k]))
                .sum();
        }
    }
    Some(out)
}
