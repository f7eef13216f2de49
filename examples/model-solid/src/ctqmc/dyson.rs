//! From Legendre coefficients to G(iω_n) and the self-energy.
//!
//! G(iω_n) = Σ_{l<L} T_nl G_l (Boehnke et al., PRB 84, 075145 (2011)) with L chosen from the
//! data: the series is cut where the coefficients sink below their standard errors, and the
//! dropped coefficients' possible contribution (each at most about its error) is added to the
//! error bar of G(iω_n) in quadrature. The
//! self-energy follows from Dyson's equation Σ = G0⁻¹ − G⁻¹ with G0⁻¹ = iω − ε − Δ(iω). At
//! high frequency it is replaced by its known expansion for density-density U,
//! Σ(iω) ≈ U n̄ + U² n̄(1 − n̄)/(iω) (n̄ the occupation of the other spin), from the frequency
//! where the two agree best onwards.

use num_complex::Complex64;
use rondo_numerics::binning::binning_analysis;
use rondo_numerics::legendre::{significant_count, t_row};
use rondo_numerics::matsubara::fermionic_frequency;

/// G(iω), Σ(iω) and how they were built.
#[derive(Debug, Clone)]
pub(crate) struct DysonOutput {
    pub g: Vec<Complex64>,
    /// Standard error of Re and Im of G(iω_n) (from the block G_l), zero in the tail region.
    pub g_err: Vec<Complex64>,
    pub sigma: Vec<Complex64>,
    /// Linearised standard error of Σ(iω_n): |δG|/|G|² in Re and Im (zero in the tail).
    pub sigma_err: Vec<Complex64>,
    pub kept: usize,
    pub crossover: usize,
}

/// Everything Dyson's equation needs.
pub(crate) struct DysonInput<'a> {
    pub beta: f64,
    pub gl: &'a [f64],
    pub gl_err: &'a [f64],
    /// G_l of each measurement bin (for the errors of G(iω_n)).
    pub gl_blocks: &'a [Vec<f64>],
    pub delta: &'a [Complex64],
    pub level: f64,
    pub u: f64,
    pub n_other: f64,
}

/// Standard error of the mean of a bin series (binning analysis; plain estimate as fallback).
fn std_error(x: &[f64]) -> f64 {
    match binning_analysis(x) {
        Ok(a) => a.std_error,
        Err(_) => {
            let n = x.len() as f64;
            let m = x.iter().sum::<f64>() / n;
            (x.iter().map(|v| (v - m).powi(2)).sum::<f64>() / (n * (n - 1.0))).sqrt()
        }
    }
}

pub(crate) fn dyson(inp: &DysonInput<'_>) -> DysonOutput {
    let n_w = inp.delta.len();
    let kept = significant_count(inp.gl, inp.gl_err).max(1);
    let mut full_row = vec![Complex64::new(0.0, 0.0); inp.gl.len().max(kept)];
    let nb = inp.gl_blocks.len();
    let mut g_leg = Vec::with_capacity(n_w);
    let mut g_err = Vec::with_capacity(n_w);
    let mut sigma_leg = Vec::with_capacity(n_w);
    let mut sigma_tail = Vec::with_capacity(n_w);
    let s0 = inp.u * inp.n_other;
    let s1 = inp.u * inp.u * inp.n_other * (1.0 - inp.n_other);
    for n in 0..n_w {
        t_row(n as i64, &mut full_row);
        let row = &full_row[..kept];
        let g: Complex64 = row.iter().zip(inp.gl).map(|(t, g)| t * g).sum();
        // The same linear map applied to each measurement bin, then the binning analysis.
        let (mut sr, mut si) = (0.0, 0.0);
        if nb > 1 {
            let (re, im): (Vec<f64>, Vec<f64>) = inp
                .gl_blocks
                .iter()
                .map(|b| {
                    let gb: Complex64 = row.iter().zip(b).map(|(t, g)| t * g).sum();
                    (gb.re, gb.im)
                })
                .unzip();
            sr = std_error(&re).powi(2);
            si = std_error(&im).powi(2);
        }
        // The dropped coefficients are known only to be below their errors: their possible
        // contribution enters the error bar (T_nl is imaginary for even l, real for odd l).
        for (t, e) in full_row.iter().zip(inp.gl_err).skip(kept) {
            sr += (t.re * e).powi(2);
            si += (t.im * e).powi(2);
        }
        let (sr, si) = (sr.sqrt(), si.sqrt());
        let iw = Complex64::new(0.0, fermionic_frequency(inp.beta, n as i64));
        let g0inv = iw - inp.level - inp.delta[n];
        g_leg.push(g);
        g_err.push(Complex64::new(sr, si));
        sigma_leg.push(g0inv - g.inv());
        sigma_tail.push(Complex64::new(s0, 0.0) + iw.inv() * s1);
    }
    // Crossover: best agreement between the Legendre and the tail self-energy, searched from
    // half the number of kept coefficients to four times it.
    // The crossover stays in the lower half of the grid, so that the upper half (from which
    // the density update reads the Hartree constant and the 1/(iω) coefficient) is the
    // noise-free tail.
    let half = (n_w / 2).max(1);
    let lo = (kept / 2).min(half - 1);
    let hi = (4 * kept).clamp(lo + 1, half);
    let mut crossover = n_w;
    let mut best = f64::INFINITY;
    for n in lo..hi.min(n_w) {
        let d = (sigma_leg[n] - sigma_tail[n]).norm();
        if d < best {
            best = d;
            crossover = n;
        }
    }
    // δΣ = δG/G² to first order.
    let mut sigma_err: Vec<Complex64> = g_leg
        .iter()
        .zip(&g_err)
        .map(|(g, e)| {
            let d = e.norm() / g.norm_sqr();
            Complex64::new(d, d)
        })
        .collect();
    let mut g = g_leg;
    let mut sigma = sigma_leg;
    for n in crossover..n_w {
        let iw = Complex64::new(0.0, fermionic_frequency(inp.beta, n as i64));
        sigma[n] = sigma_tail[n];
        g[n] = (iw - inp.level - inp.delta[n] - sigma_tail[n]).inv();
        g_err[n] = Complex64::new(0.0, 0.0);
        sigma_err[n] = Complex64::new(0.0, 0.0);
    }
    DysonOutput {
        g,
        g_err,
        sigma,
        sigma_err,
        kept,
        crossover,
    }
}
