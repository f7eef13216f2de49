//! Fermionic Matsubara frequencies, the Fermi function and tail-corrected Matsubara sums.
//!
//! Owns the frequency grid convention used across rondo (positive frequencies only,
//! ω_n = (2n+1)π/β for n = 0..N-1; negative ones follow from G(-iω) = G(iω)*), an
//! overflow-safe Fermi function, and the equal-time sums n = G(τ=0⁻) = (1/β) Σ_n G(iω_n)
//! e^{iω_n 0⁺} with the slowly decaying high-frequency tail subtracted and summed
//! analytically (a textbook technique; e.g. Mahan, "Many-Particle Physics", 3rd ed., §3.5
//! for the frequency sums used below).

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

/// The constant c0 of a function F(iω) ≈ c0 + s1/(iω) + s2/(iω)² (e.g. the Hartree part of a
/// self-energy), from the real parts at the last frequency and at the middle one:
/// Re F(ω) = c0 − s2/ω² + O(ω⁻⁴), so two frequencies eliminate s2.
pub fn high_frequency_constant(beta: f64, data: &[Complex64]) -> f64 {
    let n = data.len();
    if n < 4 {
        return data.last().map(|z| z.re).unwrap_or(0.0);
    }
    let (ia, ib) = (n / 2, n - 1);
    let wa2 = fermionic_frequency(beta, ia as i64).powi(2);
    let wb2 = fermionic_frequency(beta, ib as i64).powi(2);
    (wb2 * data[ib].re - wa2 * data[ia].re) / (wb2 - wa2)
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
}
