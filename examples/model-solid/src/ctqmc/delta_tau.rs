//! The hybridization function in imaginary time, from Δ(iω_n) on the positive grid.
//!
//! Δ(τ) = (1/β) Σ_{n∈ℤ} e^{−iω_nτ} Δ(iω_n) = (2/β) Σ_{n≥0} Re[e^{−iω_nτ} Δ(iω_n)] converges
//! slowly because Δ(iω) ≈ c1/(iω) + c2/(iω)² + c3/(iω)³. The tail is subtracted frequency by
//! frequency and transformed in closed form (0 < τ < β):
//! 1/(iω) → −1/2, 1/(iω)² → (2τ − β)/4, 1/(iω)³ → (βτ − τ²)/4
//! (the expansion of the free-level G(τ) = −e^{−ετ}/(1 + e^{−βε}) in powers of ε).
//! The constant c0 and the moments c1…c3 come from the least-squares fit of the tail over the
//! upper half of the grid (`rondo_numerics::matsubara::fit_tail`), the fit that also gives
//! the solvers' static part of Δ.

use anyhow::{bail, Result};
use num_complex::Complex64;
use rondo_numerics::matsubara::{fermionic_frequency, TailFit};

/// F(τ) = −Δ(τ) on a uniform grid of [0, β], linearly interpolated, continued
/// antiperiodically to (−β, 0).
#[derive(Debug, Clone)]
pub struct HybFunction {
    beta: f64,
    inv_h: f64,
    values: Vec<f64>,
}

impl HybFunction {
    /// From Δ(iω_n), n = 0..N−1, and the fit of its tail: the constant c0 (moved into the
    /// level by the caller) is subtracted here, c1…c3 are transformed in closed form;
    /// `n_tau` grid intervals.
    pub fn from_matsubara(
        beta: f64,
        delta: &[Complex64],
        tail: &TailFit,
        n_tau: usize,
    ) -> Result<Self> {
        if delta.is_empty() {
            bail!("the hybridization function Δ(iω_n) is empty");
        }
        if n_tau < 2 {
            bail!("the imaginary-time grid of Δ(τ) needs at least 2 intervals, got {n_tau}");
        }
        if delta
            .iter()
            .any(|d| !(d.re.is_finite() && d.im.is_finite()))
        {
            bail!("the hybridization function Δ(iω_n) contains NaN or infinite values");
        }
        let (c0, c1, c2, c3) = (tail.c0, tail.tail.c1, tail.tail.c2, tail.tail.c3);
        // Residual after the tail on each frequency.
        let resid: Vec<Complex64> = delta
            .iter()
            .enumerate()
            .map(|(n, d)| {
                let iw = Complex64::new(0.0, fermionic_frequency(beta, n as i64));
                let inv = iw.inv();
                d - c0 - inv * c1 - inv * inv * c2 - inv * inv * inv * c3
            })
            .collect();
        let h = beta / n_tau as f64;
        let step_w = 2.0 * std::f64::consts::PI / beta;
        let mut values = Vec::with_capacity(n_tau + 1);
        for i in 0..=n_tau {
            let tau = i as f64 * h;
            // e^{−iω_nτ} by rotation, re-anchored every 64 steps to bound the rounding drift.
            let mut s = 0.0;
            let mut ph = Complex64::from_polar(1.0, -std::f64::consts::PI * tau / beta);
            let rot = Complex64::from_polar(1.0, -step_w * tau);
            for (n, r) in resid.iter().enumerate() {
                if n % 64 == 0 {
                    ph = Complex64::from_polar(1.0, -fermionic_frequency(beta, n as i64) * tau);
                }
                s += (ph * r).re;
                ph *= rot;
            }
            let tail =
                -0.5 * c1 + c2 * (2.0 * tau - beta) / 4.0 + c3 * (beta * tau - tau * tau) / 4.0;
            let delta_tau = 2.0 * s / beta + tail;
            values.push(-delta_tau);
        }
        Ok(Self {
            beta,
            inv_h: 1.0 / h,
            values,
        })
    }

    /// F(τ) for τ in (−β, β).
    #[inline]
    pub fn eval(&self, t: f64) -> f64 {
        let (t, sign) = if t < 0.0 {
            (t + self.beta, -1.0)
        } else {
            (t, 1.0)
        };
        let x = t * self.inv_h;
        let last = self.values.len() - 1;
        let i = (x as usize).min(last - 1);
        let frac = x - i as f64;
        sign * (self.values[i] + frac * (self.values[i + 1] - self.values[i]))
    }

    /// −F(τ) = Δ(τ) for τ in [0, β].
    pub fn delta_tau(&self, t: f64) -> f64 {
        -self.eval(t)
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn discrete_bath_delta_tau() {
        // Δ(iω) = Σ_b V_b²/(iω − ε_b) ↔ Δ(τ) = −Σ_b V_b² e^{−ε_b τ}/(1 + e^{−βε_b}) (free-level
        // propagator of each bath level, textbook).
        let beta = 10.0;
        let bath = [(-0.7, 0.4), (0.3, 0.6), (1.2, 0.3)];
        let delta: Vec<Complex64> = (0..2048)
            .map(|n| {
                let iw = Complex64::new(0.0, fermionic_frequency(beta, n));
                bath.iter().map(|(e, v)| v * v / (iw - e)).sum()
            })
            .collect();
        let tail = rondo_numerics::matsubara::fit_tail(beta, &delta).unwrap();
        assert!(tail.c0.abs() < 1e-13, "no static part: {}", tail.c0);
        let f = HybFunction::from_matsubara(beta, &delta, &tail, 1000).unwrap();
        for i in 0..=1000 {
            let tau = i as f64 * beta / 1000.0;
            let exact: f64 = bath
                .iter()
                .map(|(e, v)| -v * v * (-e * tau).exp() / (1.0 + (-beta * e).exp()))
                .sum();
            assert!(
                (f.delta_tau(tau) - exact).abs() < 2e-9,
                "τ={tau}: {} vs {exact}",
                f.delta_tau(tau)
            );
        }
        // Antiperiodic continuation.
        assert!((f.eval(-2.5) + f.eval(7.5)).abs() < 1e-15);
    }
}
