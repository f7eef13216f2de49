//! The `project` stage: Löwdin-orthonormalized f projectors from the Bloch eigenvectors in an
//! energy window, the local Green's function and the hybridization function Δ(iω_n).
//!
//! Projectors P_n(k) = ⟨f|ψ_nk⟩ for the bands n inside the window [μ+e_min, μ+e_max];
//! overlap O(k) = Σ_n |P_n(k)|², Löwdin P̃ = O^{-1/2} P (Löwdin, J. Chem. Phys. 18, 365
//! (1950)). G_loc(iω) = Σ_k w_k P̃ [iω + μ − E_k − P̃† Σ(iω) P̃]⁻¹ P̃†, ε_loc = Σ_k w_k P̃ E_k P̃†,
//! Δ(iω) = iω + μ − ε_loc − Σ(iω) − G_loc(iω)⁻¹. With a window holding both bands the
//! projection is exact and Δ(iω) → 0 at high frequency, so Δ has no static part.

use anyhow::{bail, Result};
use num_complex::Complex64;
use rondo_numerics::matsubara::{density_from_giw, fermionic_grid, high_frequency_constant, Tail};
use std::collections::BTreeMap;

use crate::io::HkMesh;
use crate::model::inv2;

/// Energy window relative to μ (eV); `None` bounds are open.
#[derive(Debug, Clone, Copy, Default)]
pub struct Window {
    /// Lower bound relative to μ.
    pub emin: Option<f64>,
    /// Upper bound relative to μ.
    pub emax: Option<f64>,
}

/// Projector of one k point: the bands kept, their energies and P̃_n.
#[derive(Debug, Clone)]
pub struct KProjector {
    /// Band energies inside the window.
    pub energies: Vec<f64>,
    /// Orthonormalized projector elements P̃_n (real here: H(k) is real symmetric).
    pub p: Vec<f64>,
    /// Overlap O(k) before orthonormalization.
    pub overlap: f64,
}

/// Build the projectors on every k point. Points whose window holds no f weight
/// (O(k) < 1e-10) get an empty projector and are reported in `dropped`.
pub fn projectors(mesh: &HkMesh, mu: f64, window: Window) -> (Vec<KProjector>, usize) {
    let mut out = Vec::with_capacity(mesh.h.len());
    let mut dropped = 0;
    for h in &mesh.h {
        let (e, u) = h.eigen();
        let mut energies = Vec::new();
        let mut raw = Vec::new();
        for n in 0..2 {
            let rel = e[n] - mu;
            let inside =
                window.emin.is_none_or(|lo| rel >= lo) && window.emax.is_none_or(|hi| rel <= hi);
            if inside {
                energies.push(e[n]);
                raw.push(u[1][n]); // ⟨f|ψ_n⟩
            }
        }
        let overlap: f64 = raw.iter().map(|x| x * x).sum();
        if overlap < 1e-10 {
            dropped += 1;
            out.push(KProjector {
                energies: Vec::new(),
                p: Vec::new(),
                overlap,
            });
            continue;
        }
        let s = overlap.sqrt().recip();
        out.push(KProjector {
            energies,
            p: raw.iter().map(|x| x * s).collect(),
            overlap,
        });
    }
    (out, dropped)
}

/// Output of the project stage.
#[derive(Debug, Clone)]
pub struct ProjectOutput {
    /// Δ(iω_n).
    pub delta: Vec<Complex64>,
    /// G_loc(iω_n).
    pub gloc: Vec<Complex64>,
    /// Local f level.
    pub eps_f: f64,
    /// Metrics.
    pub metrics: BTreeMap<&'static str, f64>,
}

/// Run the projection for H(k), the f self-energy Σ(iω_n), μ and β.
pub fn project(
    mesh: &HkMesh,
    sigma: &[Complex64],
    mu: f64,
    beta: f64,
    window: Window,
) -> Result<ProjectOutput> {
    let (proj, dropped) = projectors(mesh, mu, window);
    let wsum: f64 = mesh
        .weights
        .iter()
        .zip(&proj)
        .filter(|(_, p)| !p.p.is_empty())
        .map(|(w, _)| *w)
        .sum();
    if wsum <= 0.0 {
        bail!("the energy window holds no f weight at any k point; widen --emin/--emax");
    }
    let grid = fermionic_grid(beta, sigma.len());
    let mut gloc = vec![Complex64::new(0.0, 0.0); sigma.len()];
    let mut eps_f = 0.0;
    let (mut omin, mut omax) = (f64::INFINITY, f64::NEG_INFINITY);
    for (w, kp) in mesh.weights.iter().zip(&proj) {
        if kp.p.is_empty() {
            continue;
        }
        let w = w / wsum;
        omin = omin.min(kp.overlap);
        omax = omax.max(kp.overlap);
        eps_f += w * kp
            .p
            .iter()
            .zip(&kp.energies)
            .map(|(p, e)| p * p * e)
            .sum::<f64>();
        for (n, (&wn, s)) in grid.iter().zip(sigma).enumerate() {
            let z = Complex64::new(mu, wn);
            let g = match kp.p.len() {
                1 => {
                    let p2 = kp.p[0] * kp.p[0];
                    p2 / (z - kp.energies[0] - s * p2)
                }
                _ => {
                    let (p0, p1) = (kp.p[0], kp.p[1]);
                    let m = [
                        z - kp.energies[0] - s * (p0 * p0),
                        -s * (p0 * p1),
                        -s * (p1 * p0),
                        z - kp.energies[1] - s * (p1 * p1),
                    ];
                    let gi = inv2(m);
                    gi[0] * (p0 * p0) + (gi[1] + gi[2]) * (p0 * p1) + gi[3] * (p1 * p1)
                }
            };
            gloc[n] += g * w;
        }
    }
    let delta: Vec<Complex64> = grid
        .iter()
        .zip(sigma)
        .zip(&gloc)
        .map(|((&wn, s), g)| Complex64::new(mu - eps_f, wn) - s - g.inv())
        .collect();
    let sigma_inf = high_frequency_constant(beta, sigma);
    let n_f = 2.0 * density_from_giw(beta, &gloc, Tail::two(1.0, eps_f - mu + sigma_inf));
    let mut metrics = BTreeMap::new();
    metrics.insert("eps_f", eps_f);
    metrics.insert("n_f_loc", n_f);
    metrics.insert("overlap_min", omin);
    metrics.insert("overlap_max", omax);
    metrics.insert("dropped_k", dropped as f64);
    metrics.insert("delta_im_w0", delta[0].im);
    Ok(ProjectOutput {
        delta,
        gloc,
        eps_f,
        metrics,
    })
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::band::band;
    use crate::io::Density;
    use crate::model::{lattice_g, DEMO};

    fn mesh() -> HkMesh {
        band(
            &DEMO,
            28.0,
            8,
            &Density {
                n_f: 1.0,
                n_c: 0.8,
                mu: 0.0,
                energy: None,
            },
            false,
        )
        .mesh
    }

    #[test]
    fn all_band_window_is_exact() {
        // Both bands inside: Σ_n |⟨f|ψ_n⟩|² = 1 (completeness of the eigenbasis) to 1e-12.
        let (proj, dropped) = projectors(&mesh(), 0.0, Window::default());
        assert_eq!(dropped, 0);
        for p in &proj {
            assert!((p.overlap - 1.0).abs() < 1e-12);
            assert_eq!(p.p.len(), 2);
        }
    }

    #[test]
    fn narrow_window_gives_orthonormal_set() {
        // Only the lower band near μ: the overlap drops below 1, Löwdin restores P̃P̃† = 1.
        let (proj, _) = projectors(
            &mesh(),
            -0.5,
            Window {
                emin: Some(-3.0),
                emax: Some(0.5),
            },
        );
        let mut seen_partial = false;
        for p in &proj {
            if p.p.is_empty() {
                continue;
            }
            seen_partial |= p.overlap < 1.0 - 1e-6;
            let norm: f64 = p.p.iter().map(|x| x * x).sum();
            assert!((norm - 1.0).abs() < 1e-12);
        }
        assert!(seen_partial);
    }

    #[test]
    fn full_window_gloc_equals_orbital_basis() {
        let m = mesh();
        let beta = 20.0;
        let sigma: Vec<Complex64> = fermionic_grid(beta, 64)
            .iter()
            .map(|w| Complex64::new(1.0, 0.0) + 0.3 / Complex64::new(0.1, *w))
            .collect();
        let mu = 0.2;
        let out = project(&m, &sigma, mu, beta, Window::default()).unwrap();
        for (n, w) in fermionic_grid(beta, 64).iter().enumerate() {
            let z = Complex64::new(mu, *w);
            let g: Complex64 = m
                .weights
                .iter()
                .zip(&m.h)
                .map(|(wk, h)| lattice_g(z, h, sigma[n])[3] * wk)
                .sum();
            assert!((g - out.gloc[n]).norm() < 1e-12);
        }
        // local level = H_ff for the exact projection
        assert!((out.eps_f - m.h[0].d).abs() < 1e-12);
        // Δ(iω) ~ v²/(iω) at high frequency: -ω Im Δ → v² (fact of the trade: first moment
        // of the hybridization function is the sum of squared hoppings into the bath).
        let wl = fermionic_grid(beta, 64)[63];
        let v2 = DEMO.hyb0 * DEMO.hyb0;
        assert!((-wl * out.delta[63].im - v2).abs() < 0.02 * v2);
    }
}
