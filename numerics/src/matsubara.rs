//! Fermionic Matsubara frequencies, the Fermi function, tail-corrected Matsubara sums and the
//! one fit of the high-frequency tail that every stage and solver of the workspace uses.
//!
//! Owns the frequency grid convention used across rondo (positive frequencies only,
//! ω_n = (2n+1)π/β for n = 0..N-1; negative ones follow from G(-iω) = G(iω)*), an
//! overflow-safe Fermi function, and the equal-time sums n = G(τ=0⁻) = (1/β) Σ_n G(iω_n)
//! e^{iω_n 0⁺} with the slowly decaying high-frequency tail subtracted and summed
//! analytically (a textbook technique; e.g. Mahan, "Many-Particle Physics", 3rd ed., §3.5
//! for the frequency sums used below).
//!
//! # The high-frequency tail ([`fit_tail`])
//!
//! A function with the spectral representation F(iω) = F_0 + ∫ dε ρ(ε)/(iω − ε), ρ of
//! bounded support (a Green's function, a hybridization function Δ(iω) = Σ_b V_b²/(iω − ε_b),
//! a self-energy), has for |ω| > max|ε| the convergent expansion
//!
//! ```text
//! F(iω) = c0 + c1/(iω) + c2/(iω)² + c3/(iω)³ + …,   c0 = F_0,   c_k = ∫ dε ρ(ε) ε^{k−1}
//! ```
//!
//! (expand 1/(iω − ε) = Σ_{k≥0} ε^k/(iω)^{k+1}; for a discrete bath c_k = Σ_b V_b² ε_b^{k−1}).
//! This is the textbook moment expansion of a propagator in its spectral moments (e.g. Mahan,
//! "Many-Particle Physics", 3rd ed., the chapter on finite-temperature Green's functions and
//! their spectral representation; the chapter is cited from memory). With
//! 1/(iω)^k = (−i)^k/ω^k its real and imaginary parts are power series in x = 1/ω²:
//!
//! ```text
//! Re F(iω)   =  c0 − c2 x + c4 x² − c6 x³ + …
//! ω Im F(iω) = −c1 + c3 x − c5 x² + c7 x³ + …
//! ```
//!
//! [`fit_tail`] fits both by linear least squares (QR) with a polynomial of degree
//! [`TAIL_FIT_DEGREE`] in x over the upper half of the grid (n = N/2 … N−1) and reads the
//! moments off the coefficients; the static part c0 = lim_{ω→∞} Re F(iω) is the fit's value at
//! x = 0. The truncation error of c0 is of the order of the first neglected moment times
//! x_max^{D+1} (D the degree, x_max = 1/ω_{N/2}²), i.e. ∝ (max|ε|/ω_{N/2})^{2D+2}, so a few tens
//! of frequencies above the spectral range already give c0 to 1e-9 and better. Taking the
//! value at the last frequency instead leaves the leading term −c2/ω²_{N−1} in the static
//! part, which depends on N. Below the spectral range (ω_{N/2} < max|ε|) the series does
//! not converge and no fit of the tail is reliable: use more frequencies.

use num_complex::Complex64;

/// Fermionic Matsubara frequency ω_n = (2n+1)π/β.
pub fn fermionic_frequency(beta: f64, n: i64) -> f64 {
    (2 * n + 1) as f64 * std::f64::consts::PI / beta
}

/// The first `n_iw` non-negative fermionic Matsubara frequencies ω_0 … ω_{N-1}.
pub fn fermionic_grid(beta: f64, n_iw: usize) -> Vec<f64> {
    (0..n_iw as i64)
        .map(|n| fermionic_frequency(beta, n))
        .collect()
}

/// The Fermi function f(ε) = 1/(e^{βε}+1), computed without overflow for any βε.
pub fn fermi(beta: f64, eps: f64) -> f64 {
    let x = beta * eps;
    if x > 0.0 {
        let e = (-x).exp();
        e / (1.0 + e)
    } else {
        1.0 / (1.0 + x.exp())
    }
}

/// (1/β) Σ_{n∈ℤ} e^{iω_n 0⁺}/(iω_n) = 1/2 (the free pole at zero energy, f(0)).
const TAIL1_SUM: f64 = 0.5;

/// (1/β) Σ_{n∈ℤ} 1/(iω_n)² = −β/4, from Σ_{n≥0} 1/(2n+1)² = π²/8.
fn tail2_sum(beta: f64) -> f64 {
    -beta / 4.0
}

/// (1/β) Σ_{n∈ℤ} 1/(iω_n)⁴ = β³/48, from Σ_{n≥0} 1/(2n+1)⁴ = π⁴/96.
fn tail4_sum(beta: f64) -> f64 {
    beta.powi(3) / 48.0
}

/// High-frequency expansion G(iω) ≈ c1/(iω) + c2/(iω)² + c3/(iω)³ + c4/(iω)⁴ + …
///
/// For a free level ε: c1 = 1, c2 = ε, c3 = ε², c4 = ε³. For a correlated orbital c1 = 1
/// and c2 is the static (Hartree-shifted) level relative to the chemical potential.
#[derive(Debug, Clone, Copy, PartialEq, Default)]
pub struct Tail {
    /// Coefficient of 1/(iω).
    pub c1: f64,
    /// Coefficient of 1/(iω)².
    pub c2: f64,
    /// Coefficient of 1/(iω)³ (odd: does not change the real equal-time sum).
    pub c3: f64,
    /// Coefficient of 1/(iω)⁴.
    pub c4: f64,
}

impl Tail {
    /// Two-term tail c1/(iω) + c2/(iω)².
    pub fn two(c1: f64, c2: f64) -> Self {
        Self {
            c1,
            c2,
            c3: 0.0,
            c4: 0.0,
        }
    }

    /// The tail evaluated at frequency ω (i.e. at iω).
    pub fn eval(&self, w: f64) -> Complex64 {
        let iw = Complex64::new(0.0, w);
        let inv = iw.inv();
        let inv2 = inv * inv;
        inv * self.c1 + inv2 * self.c2 + inv2 * inv * self.c3 + inv2 * inv2 * self.c4
    }
}

/// The equal-time value n = G(τ=0⁻) = (1/β) Σ_{n∈ℤ} G(iω_n) e^{iω_n 0⁺} of one orbital
/// (one spin), from G on the first `giw.len()` positive frequencies.
///
/// The tail is subtracted frequency by frequency and its sum added back in closed form:
/// n = c1/2 − c2 β/4 + c4 β³/48 + (2/β) Σ_{n≥0} Re[G(iω_n) − tail(iω_n)].
/// With the two-term tail the truncation error falls as N⁻³; with c4 as N⁻⁵.
pub fn density_from_giw(beta: f64, giw: &[Complex64], tail: Tail) -> f64 {
    let mut s = 0.0;
    // Sum from the highest frequency down to keep the small terms first.
    for (n, g) in giw.iter().enumerate().rev() {
        let w = fermionic_frequency(beta, n as i64);
        s += (g - tail.eval(w)).re;
    }
    tail.c1 * TAIL1_SUM + tail.c2 * tail2_sum(beta) + tail.c4 * tail4_sum(beta) + 2.0 * s / beta
}

/// Σ_{n≥N} (2n+1)^{−p} for p ≥ 2: below N = 16 the terms up to n = 15 are summed and the
/// rest is the value at N = 16; from N = 16 on by the Euler–Maclaurin formula
/// (Abramowitz & Stegun 23.1.30, equation number from memory) for f(x) = (2x+1)^{−p} from
/// x = N, with u = 2N+1:
/// ∫ f = u^{1−p}/(2(p−1)), f(N)/2 = u^{−p}/2, and −B_{2k}/(2k)! f^{(2k−1)}(N) for k = 1…4,
/// f^{(m)}(N) = (−2)^m p(p+1)…(p+m−1) u^{−p−m}; the first neglected term (B10) is below
/// 1e-11 of the sum from N = 16 on.
fn odd_power_remainder(p: i32, n: usize) -> f64 {
    if n < 16 {
        let head: f64 = (n..16).rev().map(|k| ((2 * k + 1) as f64).powi(-p)).sum();
        return odd_power_remainder(p, 16) + head;
    }
    let u = (2 * n + 1) as f64;
    let pf = f64::from(p);
    // B2, B4, B6, B8 divided by (2k)!.
    const B_OVER_FACT: [f64; 4] = [
        1.0 / 6.0 / 2.0,
        -1.0 / 30.0 / 24.0,
        1.0 / 42.0 / 720.0,
        -1.0 / 30.0 / 40320.0,
    ];
    let mut sum = u.powf(1.0 - pf) / (2.0 * (pf - 1.0)) + 0.5 * u.powi(-p);
    for (k, b) in B_OVER_FACT.iter().enumerate() {
        let m = 2 * k as i32 + 1; // order of the derivative
        let rising: f64 = (0..m).map(|j| pf + f64::from(j)).product();
        let deriv = (-2.0f64).powi(m) * rising * u.powi(-p - m);
        sum -= b * deriv;
    }
    sum
}

/// The equal-time value (2/β) Σ_{n≥0} Re F(iω_n) of a function that decays at least as
/// 1/(iω)² (no 1/(iω) term, so the sum converges absolutely; e.g. G − G_ref for a reference
/// with the same first moment), from F on the first N frequencies and its tail beyond them:
/// (2/β) Σ_{n<N} Re F(iω_n) + (2/β) Σ_{n≥N} Re[c2/(iω_n)² + c4/(iω_n)⁴], with the remainders
/// of Σ (2n+1)^{−2} and Σ (2n+1)^{−4} in closed form. Nothing is subtracted inside the grid,
/// so a large c4 costs no precision (unlike the closed-form sums of the whole tail in
/// [`density_from_giw`], whose c4 β³/48 cancels against the data), and the truncation error
/// is that of the first neglected moment, O(N⁻⁵). `tail.c1` must be zero and is ignored;
/// c3 has no real part on the axis.
pub fn sum_with_tail_beyond(beta: f64, data: &[Complex64], tail: Tail) -> f64 {
    let n = data.len();
    let head: f64 = data.iter().rev().map(|z| z.re).sum();
    let s = beta / std::f64::consts::PI;
    // Re 1/(iω)² = −1/ω², Re 1/(iω)⁴ = 1/ω⁴, ω_n = (π/β)(2n+1).
    let beyond = -tail.c2 * s * s * odd_power_remainder(2, n)
        + tail.c4 * s.powi(4) * odd_power_remainder(4, n);
    2.0 / beta * (head + beyond)
}

/// Equal-time value from G and a reference function whose equal-time value `n_ref` is
/// known exactly (e.g. a free propagator with the same first moments):
/// n = n_ref + (2/β) Σ_{n≥0} Re[G(iω_n) − G_ref(iω_n)].
pub fn density_with_reference(beta: f64, giw: &[Complex64], gref: &[Complex64], n_ref: f64) -> f64 {
    let s: f64 = giw.iter().zip(gref).rev().map(|(g, r)| (g - r).re).sum();
    n_ref + 2.0 * s / beta
}

/// Free propagator 1/(iω − ε) on the positive grid.
pub fn free_giw(beta: f64, n_iw: usize, eps: f64) -> Vec<Complex64> {
    fermionic_grid(beta, n_iw)
        .into_iter()
        .map(|w| (Complex64::new(-eps, w)).inv())
        .collect()
}

/// Estimate c1 and c2 of a Green's function from its last two frequencies:
/// c1 ≈ −ω Im G(iω), c2 ≈ −ω² Re G(iω) at the highest frequency (leading orders).
pub fn tail_from_last(beta: f64, giw: &[Complex64]) -> Option<Tail> {
    let n = giw.len().checked_sub(1)?;
    let w = fermionic_frequency(beta, n as i64);
    let g = giw[n];
    Some(Tail::two(-w * g.im, -w * w * g.re))
}

/// Degree of the polynomial in x = 1/ω² that [`fit_tail`] fits to Re F and to ω Im F
/// (lowered for short grids: at most one less than the number of frequencies in the window).
pub const TAIL_FIT_DEGREE: usize = 3;

/// The high-frequency expansion F(iω) ≈ c0 + c1/(iω) + c2/(iω)² + c3/(iω)³ + c4/(iω)⁴ of a
/// function of Matsubara frequency, fitted by [`fit_tail`].
#[derive(Debug, Clone, Copy, PartialEq, Default)]
pub struct TailFit {
    /// The static part c0 = lim Re F(iω) (zero for a Green's function or a hybridization
    /// function without a constant; the Hartree term of a self-energy).
    pub c0: f64,
    /// The moments c1 … c4 of the decaying part.
    pub tail: Tail,
    /// Index of the lowest frequency of the fitting window (the window ends at the grid's end).
    pub first: usize,
    /// Degree of the fitted polynomials in 1/ω².
    pub degree: usize,
    /// Root-mean-square of |F(iω_n) − fit(iω_n)| over the window: of the order of the
    /// rounding of F when the expansion holds there, large when the window lies inside the
    /// spectral range.
    pub rms_residual: f64,
}

impl TailFit {
    /// c0 + c1/(iω) + … + c4/(iω)⁴ at frequency ω.
    pub fn eval(&self, w: f64) -> Complex64 {
        Complex64::new(self.c0, 0.0) + self.tail.eval(w)
    }
}

/// Least-squares coefficients of Σ_k b_k t^k through (t_j, y_j), by QR of the Vandermonde
/// matrix (t in (0, 1], degree + 1 ≤ number of points).
fn poly_lstsq(t: &[f64], y: &[f64], degree: usize) -> Option<Vec<f64>> {
    use nalgebra::{DMatrix, DVector};
    let a = DMatrix::from_fn(t.len(), degree + 1, |j, k| t[j].powi(k as i32));
    let qr = a.qr();
    let qty = qr.q().transpose() * DVector::from_column_slice(y);
    let b = qr.r().solve_upper_triangular(&qty)?;
    let b: Vec<f64> = b.iter().copied().collect();
    b.iter().all(|v| v.is_finite()).then_some(b)
}

/// Fit the high-frequency expansion of `data` (F on the first `data.len()` positive
/// frequencies of β): see the module documentation for the formula and its validity.
/// `None` for empty data or a singular fit.
pub fn fit_tail(beta: f64, data: &[Complex64]) -> Option<TailFit> {
    let n = data.len();
    if n == 0 {
        return None;
    }
    let first = n / 2;
    let window = &data[first..];
    let degree = TAIL_FIT_DEGREE.min(window.len() - 1);
    let w_first = fermionic_frequency(beta, first as i64);
    let w: Vec<f64> = (first..n)
        .map(|i| fermionic_frequency(beta, i as i64))
        .collect();
    // t = (ω_first/ω)² = x ω_first² lies in (0, 1]: a well-conditioned Vandermonde matrix.
    let t: Vec<f64> = w.iter().map(|wi| (w_first / wi).powi(2)).collect();
    let re: Vec<f64> = window.iter().map(|z| z.re).collect();
    let wim: Vec<f64> = window.iter().zip(&w).map(|(z, wi)| wi * z.im).collect();
    let a = poly_lstsq(&t, &re, degree)?;
    let b = poly_lstsq(&t, &wim, degree)?;
    // Back from t to x = 1/ω²: the coefficient of x^k is that of t^k times ω_first^{2k}.
    let scale = |k: usize| w_first.powi(2 * k as i32);
    let coef = |v: &[f64], k: usize| v.get(k).map(|c| c * scale(k)).unwrap_or(0.0);
    let fit = TailFit {
        c0: coef(&a, 0),
        tail: Tail {
            c1: -coef(&b, 0),
            c2: -coef(&a, 1),
            c3: coef(&b, 1),
            c4: coef(&a, 2),
        },
        first,
        degree,
        rms_residual: 0.0,
    };
    // Residual of the full polynomials (all fitted orders, not only c0 … c4).
    let poly = |v: &[f64], tj: f64| v.iter().rev().fold(0.0, |acc, c| acc * tj + c);
    let ss: f64 = window
        .iter()
        .zip(&w)
        .zip(&t)
        .map(|((z, wi), tj)| {
            let m = Complex64::new(poly(&a, *tj), poly(&b, *tj) / wi);
            (z - m).norm_sqr()
        })
        .sum();
    Some(TailFit {
        rms_residual: (ss / window.len() as f64).sqrt(),
        ..fit
    })
}

/// The constant c0 = lim Re F(iω) of a function F(iω) ≈ c0 + c1/(iω) + c2/(iω)² + … (the
/// static part of a hybridization function, the Hartree term of a self-energy): the c0 of
/// [`fit_tail`], 0 for empty data.
pub fn high_frequency_constant(beta: f64, data: &[Complex64]) -> f64 {
    fit_tail(beta, data).map(|f| f.c0).unwrap_or(0.0)
}

#[cfg(test)]
mod tests {
    use super::*;

    // Reference values computed with mpmath (50 digits), see reference/free_level.py and
    // reference/output/free_level.txt: free level β = 10, ε = 0.3.
    const BETA: f64 = 10.0;
    const EPS: f64 = 0.3;
    const F_EXACT: f64 = 0.047_425_873_177_566_78;

    #[test]
    fn grid_and_free_values() {
        let w = fermionic_grid(BETA, 11);
        assert!((w[0] - 0.314_159_265_358_979_3).abs() < 1e-15);
        assert!((w[1] - 0.942_477_796_076_938).abs() < 1e-15);
        assert!((w[10] - 6.597_344_572_538_566).abs() < 1e-14);
        let g = free_giw(BETA, 11, EPS);
        // G(iw_0) = -1.5898584497228821 - 1.6648958752990213j (reference/output/free_level.txt)
        assert!(
            (g[0] - Complex64::new(-1.589_858_449_722_882, -1.664_895_875_299_021)).norm() < 1e-14
        );
        assert!(
            (g[10] - Complex64::new(-0.006_878_374_566_432_373, -0.151_263_357_045_799_76)).norm()
                < 1e-15
        );
    }

    #[test]
    fn fermi_is_overflow_safe() {
        assert!((fermi(BETA, EPS) - F_EXACT).abs() < 1e-17);
        assert_eq!(fermi(1e6, 10.0), 0.0);
        assert_eq!(fermi(1e6, -10.0), 1.0);
        assert!((fermi(1.0, 0.0) - 0.5).abs() < 1e-16);
        assert!(fermi(1e308, 1e10).is_finite());
    }

    #[test]
    fn free_level_density_two_term_tail() {
        // Two-term tail (c1 = 1, c2 = ε): error ~ N^-3; 4096 frequencies give < 1e-10.
        let g = free_giw(BETA, 4096, EPS);
        let n = density_from_giw(BETA, &g, Tail::two(1.0, EPS));
        assert!((n - F_EXACT).abs() < 1e-10, "{n} vs {F_EXACT}");
        // Without the tail the sum converges only as 1/N and is far off.
        let raw = 2.0 / BETA * g.iter().map(|z| z.re).sum::<f64>() + 0.5;
        assert!((raw - F_EXACT).abs() > 1e-6);
    }

    #[test]
    fn free_level_density_four_term_tail_at_512() {
        // c1..c4 of a free level are 1, ε, ε², ε³; at 512 frequencies the error is ~1e-14.
        let g = free_giw(BETA, 512, EPS);
        let tail = Tail {
            c1: 1.0,
            c2: EPS,
            c3: EPS * EPS,
            c4: EPS.powi(3),
        };
        let n = density_from_giw(BETA, &g, tail);
        assert!((n - F_EXACT).abs() < 1e-12, "{n}");
        // Reference subtraction with a two-pole function of the same c1, c2
        // (poles ε ± 0.2, weight 1/2 each) and known density; error ~ N^-3.
        let n_w = 4096;
        let g = free_giw(BETA, n_w, EPS);
        let (a, b) = (
            free_giw(BETA, n_w, EPS - 0.2),
            free_giw(BETA, n_w, EPS + 0.2),
        );
        let gref: Vec<Complex64> = a.iter().zip(&b).map(|(x, y)| 0.5 * (x + y)).collect();
        let n_ref = 0.5 * (fermi(BETA, EPS - 0.2) + fermi(BETA, EPS + 0.2));
        let n2 = density_with_reference(BETA, &g, &gref, n_ref);
        assert!((n2 - F_EXACT).abs() < 1e-10, "{n2}");
    }

    #[test]
    fn tail_estimate() {
        let g = free_giw(BETA, 2048, EPS);
        let t = tail_from_last(BETA, &g).unwrap_or_default();
        assert!((t.c1 - 1.0).abs() < 1e-5);
        assert!((t.c2 - EPS).abs() < 1e-4);
        assert!(tail_from_last(BETA, &[]).is_none());
    }

    #[test]
    fn constant_from_two_frequencies() {
        // F = 1.5 + 0.7/(iω − 0.4): Re F = 1.5 − 0.28/(ω² + 0.16); constant to O(ω⁻⁴).
        let f: Vec<Complex64> = fermionic_grid(BETA, 512)
            .iter()
            .map(|w| Complex64::new(1.5, 0.0) + 0.7 * Complex64::new(-0.4, *w).inv())
            .collect();
        assert!((high_frequency_constant(BETA, &f) - 1.5).abs() < 1e-9);
    }

    /// Δ(iω) = c0 + Σ_b V_b²/(iω − ε_b) on n positive frequencies of β.
    fn bath(beta: f64, n: usize, c0: f64, levels: &[(f64, f64)]) -> Vec<Complex64> {
        fermionic_grid(beta, n)
            .iter()
            .map(|w| {
                let iw = Complex64::new(0.0, *w);
                Complex64::new(c0, 0.0)
                    + levels
                        .iter()
                        .map(|(e, v)| v * v / (iw - e))
                        .sum::<Complex64>()
            })
            .collect()
    }

    /// Moments of a discrete bath: c_k = Σ_b V_b² ε_b^{k−1} (geometric series of
    /// 1/(iω − ε), see the module documentation).
    fn bath_moment(levels: &[(f64, f64)], k: i32) -> f64 {
        levels.iter().map(|(e, v)| v * v * e.powi(k - 1)).sum()
    }

    const LEVELS: [(f64, f64); 3] = [(-0.6, 0.2), (0.8, 0.5), (1.5, 0.4)];

    #[test]
    fn tail_fit_recovers_the_moments_of_a_discrete_bath() {
        for (n, tol0) in [(64, 1e-10), (1024, 1e-14)] {
            for c0 in [0.0, 0.25, -1.3] {
                let d = bath(BETA, n, c0, &LEVELS);
                let f = fit_tail(BETA, &d).unwrap_or_default();
                assert_eq!((f.first, f.degree), (n / 2, TAIL_FIT_DEGREE));
                assert!((f.c0 - c0).abs() < tol0, "N = {n}: c0 {} vs {c0}", f.c0);
                let m = |k| bath_moment(&LEVELS, k);
                assert!(
                    (f.tail.c1 - m(1)).abs() < 1e-9,
                    "c1 {} vs {}",
                    f.tail.c1,
                    m(1)
                );
                assert!(
                    (f.tail.c2 - m(2)).abs() < 1e-7,
                    "c2 {} vs {}",
                    f.tail.c2,
                    m(2)
                );
                assert!(
                    (f.tail.c3 - m(3)).abs() < 1e-4,
                    "c3 {} vs {}",
                    f.tail.c3,
                    m(3)
                );
                assert!(f.rms_residual < 1e-11, "rms {}", f.rms_residual);
            }
        }
    }

    #[test]
    fn tail_fit_beats_the_last_frequency_by_orders_of_magnitude() {
        // No static part: the value at the last frequency is the leading term −c2/ω²
        // (here about −2.6e-4 at N = 64), the fit's c0 is zero to rounding.
        let d = bath(BETA, 64, 0.0, &LEVELS);
        let last = d[63].re;
        let w = fermionic_frequency(BETA, 63);
        assert!((last + bath_moment(&LEVELS, 2) / (w * w)).abs() < 1e-2 * last.abs());
        assert!(last.abs() > 1e-4);
        assert!(high_frequency_constant(BETA, &d).abs() < 1e-10);
    }

    #[test]
    fn tail_fit_on_short_grids() {
        assert!(fit_tail(BETA, &[]).is_none());
        assert_eq!(high_frequency_constant(BETA, &[]), 0.0);
        let c = Complex64::new(0.7, -0.1);
        // One frequency: the constant is the value itself (degree 0).
        let f = fit_tail(BETA, &[c]).unwrap_or_default();
        assert_eq!((f.first, f.degree, f.c0), (0, 0, 0.7));
        // At β = 0.5 even ω_0 = 2π lies above the bath levels: the expansion converges.
        for n in 2..8 {
            let d = bath(0.5, n, 0.4, &LEVELS);
            let f = fit_tail(0.5, &d).unwrap_or_default();
            assert_eq!(f.degree, TAIL_FIT_DEGREE.min(n - n / 2 - 1));
            if f.degree == 0 {
                // One frequency in the window: nothing to extrapolate with.
                assert_eq!(f.c0, d[n - 1].re);
            } else {
                assert!((f.c0 - 0.4).abs() < 2e-4, "N = {n}: {}", f.c0);
            }
        }
    }

    #[test]
    fn remainders_of_the_odd_power_sums() {
        // Σ_{n≥N} (2n+1)^{−p} summed directly (to M = 2·10⁶ terms, the rest by the integral
        // 1/(2(p−1)(2M)^{p−1})) against the closed forms.
        for n in [0usize, 1, 10, 15, 16, 17, 63, 200, 4096] {
            for p in [2, 4] {
                let m = 2_000_000usize;
                let direct: f64 = (n..m)
                    .rev()
                    .map(|k| ((2 * k + 1) as f64).powi(-p))
                    .sum::<f64>()
                    + 1.0 / ((p - 1) as f64 * 2.0 * ((2 * m) as f64).powi(p - 1));
                let r = odd_power_remainder(p, n);
                assert!(
                    (r - direct).abs() < 1e-10 * direct,
                    "p = {p}, N = {n}: {r} vs {direct}"
                );
            }
        }
        // The full sums: π²/8 and π⁴/96 (from ζ(2) = π²/6 and ζ(4) = π⁴/90).
        let pi = std::f64::consts::PI;
        assert!((odd_power_remainder(2, 0) - pi * pi / 8.0).abs() < 1e-14);
        assert!((odd_power_remainder(4, 0) - pi.powi(4) / 96.0).abs() < 1e-14);
    }

    #[test]
    fn sum_with_tail_beyond_converges_fast_and_keeps_its_digits() {
        // F = G(ε) − G(0) for free levels (reference/output/free_level.txt convention):
        // F = ε/(iω)² + ε²/(iω)³ + ε³/(iω)⁴ + …, equal-time value f(ε) − 1/2.
        let beta = 38.0;
        let eps = 2.0;
        let exact = fermi(beta, eps) - 0.5;
        for n_iw in [64, 256, 1024] {
            let f: Vec<Complex64> = free_giw(beta, n_iw, eps)
                .iter()
                .zip(free_giw(beta, n_iw, 0.0))
                .map(|(a, b)| a - b)
                .collect();
            let two = sum_with_tail_beyond(beta, &f, Tail::two(0.0, eps));
            let four = sum_with_tail_beyond(
                beta,
                &f,
                Tail {
                    c1: 0.0,
                    c2: eps,
                    c3: eps * eps,
                    c4: eps.powi(3),
                },
            );
            // Truncation: first neglected moment times (2/β)Σ_{n≥N} ω⁻⁴ (resp. ω⁻⁶).
            let s = beta / std::f64::consts::PI;
            let t4 = 2.0 / beta * eps.powi(3) * s.powi(4) * odd_power_remainder(4, n_iw);
            assert!(
                (two - exact).abs() < 1.1 * t4,
                "N = {n_iw}: {two} vs {exact}"
            );
            assert!((two - exact).abs() > 0.5 * t4);
            // The next moment ε⁵ enters with (2/β)Σ_{n≥N} ω⁻⁶ < (ε/ω_N)² t4.
            let w_n = fermionic_frequency(beta, n_iw as i64);
            assert!(
                (four - exact).abs() < (eps / w_n).powi(2) * t4,
                "N = {n_iw}: {four}"
            );
        }
    }
}
