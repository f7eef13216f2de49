//! Simple-cubic k-point meshes, the nearest-neighbour dispersion and Brillouin-zone sums.
//!
//! Owns the mesh convention: an L×L×L Monkhorst–Pack-type mesh through Γ, k = 2π m/L with
//! m = 0..L-1 in each direction (lattice constant 1), either in full with equal weights or
//! reduced to the irreducible wedge of the cubic point group O_h (48 operations: sign
//! changes and permutations of the three components) with weights = orbit size / L³.

/// One k-point with its weight (weights of a mesh sum to 1).
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct KPoint {
    /// Integer mesh coordinates m (k = 2π m / L).
    pub m: [usize; 3],
    /// Weight of the point (orbit size / L³ on the reduced mesh).
    pub weight: f64,
}

/// The full L³ mesh with weights 1/L³.
pub fn full_mesh(l: usize) -> Vec<KPoint> {
    let w = 1.0 / (l * l * l) as f64;
    let mut out = Vec::with_capacity(l * l * l);
    for a in 0..l {
        for b in 0..l {
            for c in 0..l {
                out.push(KPoint {
                    m: [a, b, c],
                    weight: w,
                });
            }
        }
    }
    out
}

/// The mesh reduced under O_h: representatives 0 ≤ a ≤ b ≤ c ≤ ⌊L/2⌋, each weighted by the
/// number of full-mesh points in its orbit divided by L³.
///
/// For even L the count is (L/2+1)(L/2+2)(L/2+3)/6 (binomial coefficient of multisets).
pub fn irreducible_mesh(l: usize) -> Vec<KPoint> {
    if l == 0 {
        return Vec::new();
    }
    let half = l / 2;
    // number of m in 0..L with min(m, L-m) = a
    let mult = |a: usize| -> usize {
        if a == 0 || (l % 2 == 0 && a == half) {
            1
        } else {
            2
        }
    };
    let total = (l * l * l) as f64;
    let mut out = Vec::new();
    for a in 0..=half {
        for b in a..=half {
            for c in b..=half {
                let perms = if a == b && b == c {
                    1
                } else if a == b || b == c {
                    3
                } else {
                    6
                };
                let size = perms * mult(a) * mult(b) * mult(c);
                out.push(KPoint {
                    m: [a, b, c],
                    weight: size as f64 / total,
                });
            }
        }
    }
    out
}

/// Nearest-neighbour simple-cubic dispersion ε(k) = −2t (cos kx + cos ky + cos kz),
/// bandwidth 12t (a fact of the trade; e.g. Ashcroft & Mermin, ch. 10).
pub fn sc_dispersion(t: f64, l: usize, m: [usize; 3]) -> f64 {
    let two_pi_over_l = 2.0 * std::f64::consts::PI / l as f64;
    -2.0 * t
        * m.iter()
            .map(|&mi| (two_pi_over_l * mi as f64).cos())
            .sum::<f64>()
}

/// Weighted average Σ_k w_k g(ε_k) over a mesh.
pub fn mesh_average(mesh: &[KPoint], l: usize, t: f64, g: impl Fn(f64) -> f64) -> f64 {
    mesh.iter()
        .map(|k| k.weight * g(sc_dispersion(t, l, k.m)))
        .sum()
}

/// Smallest and largest band energy on a mesh.
pub fn band_edges(mesh: &[KPoint], l: usize, t: f64) -> (f64, f64) {
    mesh.iter()
        .fold((f64::INFINITY, f64::NEG_INFINITY), |(lo, hi), k| {
            let e = sc_dispersion(t, l, k.m);
            (lo.min(e), hi.max(e))
        })
}

/// A histogram density of states on `nbins` equal bins over [−6t, 6t], normalized so that
/// Σ ρ_i Δ = 1.
pub fn histogram_dos(mesh: &[KPoint], l: usize, t: f64, nbins: usize) -> Vec<f64> {
    let lo = -6.0 * t;
    let de = 12.0 * t / nbins as f64;
    let mut rho = vec![0.0; nbins];
    for k in mesh {
        let e = sc_dispersion(t, l, k.m);
        let i = (((e - lo) / de).floor().max(0.0) as usize).min(nbins - 1);
        rho[i] += k.weight / de;
    }
    rho
}

#[cfg(test)]
mod tests {
    use super::*;
    use num_complex::Complex64;

    // Reference: reference/simple_cubic.py, output reference/output/simple_cubic.txt
    // (numpy sums over the full mesh; irreducible counts by explicit orbit enumeration).

    #[test]
    fn irreducible_counts_and_weights() {
        for (l, n_irr) in [(2, 4), (4, 10), (6, 20), (8, 35), (10, 56), (12, 84)] {
            let irr = irreducible_mesh(l);
            assert_eq!(irr.len(), n_irr, "L={l}");
            let h = l / 2;
            assert_eq!(n_irr, (h + 1) * (h + 2) * (h + 3) / 6);
            let wsum: f64 = irr.iter().map(|k| k.weight).sum();
            assert!((wsum - 1.0).abs() < 1e-14);
            // orbit sizes sum to L^3
            let sizes: f64 = irr.iter().map(|k| k.weight * (l * l * l) as f64).sum();
            assert!((sizes - (l * l * l) as f64).abs() < 1e-9);
        }
        // odd L: orbit sizes still add to L^3
        let irr = irreducible_mesh(5);
        assert!((irr.iter().map(|k| k.weight).sum::<f64>() - 1.0).abs() < 1e-14);
    }

    #[test]
    fn moments_match_full_mesh() {
        // <e^2> = 6 t^2 and <e^4> = 90 t^4 for L >= 5 (exact lattice sums; L=4: 96, L=2: 12/336).
        for (l, e2, e4) in [
            (2, 12.0, 336.0),
            (4, 6.0, 96.0),
            (5, 6.0, 90.0),
            (8, 6.0, 90.0),
            (16, 6.0, 90.0),
        ] {
            for mesh in [full_mesh(l), irreducible_mesh(l)] {
                let m1 = mesh_average(&mesh, l, 1.0, |e| e);
                let m2 = mesh_average(&mesh, l, 1.0, |e| e * e);
                let m4 = mesh_average(&mesh, l, 1.0, |e| e.powi(4));
                assert!(m1.abs() < 1e-12, "L={l}");
                assert!((m2 - e2).abs() < 1e-10, "L={l} {m2}");
                assert!((m4 - e4).abs() < 1e-9, "L={l} {m4}");
            }
        }
        // L=3: <e^3> = -6 t^3
        let m3 = mesh_average(&irreducible_mesh(3), 3, 1.0, |e| e.powi(3));
        assert!((m3 + 6.0).abs() < 1e-10);
    }

    #[test]
    fn bandwidth_is_12t() {
        for l in [8, 12, 16] {
            let (lo, hi) = band_edges(&irreducible_mesh(l), l, 0.7);
            assert!((lo + 6.0 * 0.7).abs() < 1e-12 && (hi - 6.0 * 0.7).abs() < 1e-12);
        }
        // L=5 has no zone-boundary point: max = 4.854 (reference/output/simple_cubic.txt)
        let (_, hi) = band_edges(&full_mesh(5), 5, 1.0);
        assert!((hi - 4.854).abs() < 1e-3);
    }

    #[test]
    fn local_green_function_k_sum() {
        // G_loc(iω_0) at β=10, t=1, μ=0, k-sum on the L=32 and L=128 meshes:
        // -0.420118377118277 j and -0.419360016195422 j (reference/output/simple_cubic.txt);
        // the converged integral is -0.41936001612046711683 j.
        let w0 = std::f64::consts::PI / 10.0;
        for (l, want) in [(32, -0.420_118_377_118_277), (128, -0.419_360_016_195_422)] {
            let mesh = irreducible_mesh(l);
            let g: Complex64 = mesh
                .iter()
                .map(|k| k.weight * Complex64::new(-sc_dispersion(1.0, l, k.m), w0).inv())
                .sum();
            assert!(g.re.abs() < 1e-12);
            assert!((g.im - want).abs() < 1e-12, "L={l}: {}", g.im);
        }
    }

    #[test]
    fn histogram_dos_sum_rules() {
        // ∫ρ = 1, ∫E²ρ ≈ 6t², ρ(0)·t ≈ 0.1427 (elliptic-integral value 0.14267298...).
        let l = 48;
        let nb = 24;
        let rho = histogram_dos(&irreducible_mesh(l), l, 1.0, nb);
        let de = 12.0 / nb as f64;
        let norm: f64 = rho.iter().sum::<f64>() * de;
        assert!((norm - 1.0).abs() < 1e-12);
        let e2: f64 = rho
            .iter()
            .enumerate()
            .map(|(i, r)| {
                let e = -6.0 + (i as f64 + 0.5) * de;
                r * e * e * de
            })
            .sum();
        assert!((e2 - 6.0).abs() < 0.2, "{e2}");
        let mid = 0.5 * (rho[nb / 2 - 1] + rho[nb / 2]);
        assert!((mid - 0.142_672_982_723).abs() < 0.01, "{mid}");
    }
}
