//! The invented demo solid: parameters, volume laws and the small 2×2 algebra of the model.
//!
//! Periodic Anderson model on a simple cubic lattice (orbital 0 = conduction "c",
//! orbital 1 = correlated "f"), spin degenerate:
//!
//! H(k) = [[ε_c(k), v], [v, ε_f]],  ε_c(k) = −2t(V)(cos kx + cos ky + cos kz),
//! t(V) = t0 (V0/V)^p_t,  v(V) = v0 (V0/V)^p_v,
//! ε_f = ε_f0 + K (n_f − n_ref)  (electrostatic feedback of the f charge on its level),
//! plus a Hubbard U on the f orbital and a repulsive core energy A (V0/V)^p_core per site.
//!
//! All numbers below are invented demo physics, chosen so that the self-consistent energy
//! versus volume has a minimum near V0; they describe no real material.

use num_complex::Complex64;

/// The invented model constants (energies in eV, volumes in Å³).
#[derive(Debug, Clone, Copy)]
pub struct Model {
    /// Reference volume per site V0.
    pub v0_volume: f64,
    /// Nearest-neighbour hopping at V0.
    pub t0: f64,
    /// Volume exponent of the hopping.
    pub p_t: f64,
    /// On-site c–f hybridization at V0.
    pub hyb0: f64,
    /// Volume exponent of the hybridization.
    pub p_v: f64,
    /// Bare f level (relative to the conduction band centre).
    pub eps_f0: f64,
    /// Electrostatic feedback constant K.
    pub feedback: f64,
    /// Reference f charge of the feedback term.
    pub n_ref: f64,
    /// Prefactor A of the repulsive core energy.
    pub core_a: f64,
    /// Volume exponent of the core energy.
    pub p_core: f64,
}

/// Name of the demo parameter set, reported by `model-solid --version` so that a change of
/// the invented constants shows in every attempt's provenance.
pub const DEMO_NAME: &str = "demo-pam-1";

/// The demo parameter set (invented).
pub const DEMO: Model = Model {
    v0_volume: 28.0,
    t0: 0.40,
    p_t: 1.4,
    hyb0: 0.50,
    p_v: 1.8,
    eps_f0: -1.2,
    feedback: 0.8,
    n_ref: 1.0,
    core_a: 0.38,
    p_core: 4.0,
};

impl Model {
    /// Hopping t(V).
    pub fn hopping(&self, volume: f64) -> f64 {
        self.t0 * (self.v0_volume / volume).powf(self.p_t)
    }

    /// Hybridization v(V).
    pub fn hybridization(&self, volume: f64) -> f64 {
        self.hyb0 * (self.v0_volume / volume).powf(self.p_v)
    }

    /// f level with the feedback of the f charge n_f.
    pub fn f_level(&self, n_f: f64) -> f64 {
        self.eps_f0 + self.feedback * (n_f - self.n_ref)
    }

    /// Repulsive core energy per site.
    pub fn core_energy(&self, volume: f64) -> f64 {
        self.core_a * (self.v0_volume / volume).powf(self.p_core)
    }
}

/// A real symmetric 2×2 matrix [[a, b], [b, d]] (the model's H(k)).
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Sym2 {
    /// c–c element.
    pub a: f64,
    /// c–f element.
    pub b: f64,
    /// f–f element.
    pub d: f64,
}

impl Sym2 {
    /// Eigenvalues (ascending) and eigenvectors (columns, same order) in closed form.
    pub fn eigen(&self) -> ([f64; 2], [[f64; 2]; 2]) {
        let m = 0.5 * (self.a + self.d);
        let h = 0.5 * (self.a - self.d);
        let r = (h * h + self.b * self.b).sqrt();
        let theta = 0.5 * (2.0 * self.b).atan2(self.a - self.d);
        let (s, c) = theta.sin_cos();
        // (c, s) has eigenvalue m + r; (−s, c) has m − r.
        ([m - r, m + r], [[-s, c], [c, s]])
    }
}

/// Inverse of a complex 2×2 matrix [[p, q], [r, s]] given row-major.
pub fn inv2(m: [Complex64; 4]) -> [Complex64; 4] {
    let det = m[0] * m[3] - m[1] * m[2];
    let id = det.inv();
    [m[3] * id, -m[1] * id, -m[2] * id, m[0] * id]
}

/// Lattice Green's function in the orbital basis at z = iω + μ with an f self-energy σ:
/// G = [z − H − diag(0, σ)]⁻¹, returned row-major (cc, cf, fc, ff).
pub fn lattice_g(z: Complex64, h: &Sym2, sigma: Complex64) -> [Complex64; 4] {
    let b = Complex64::new(-h.b, 0.0);
    inv2([z - h.a, b, b, z - h.d - sigma])
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn eigen_decomposition() {
        for h in [
            Sym2 {
                a: -1.3,
                b: 0.4,
                d: 0.2,
            },
            Sym2 {
                a: 0.5,
                b: 0.0,
                d: -0.7,
            },
            Sym2 {
                a: 0.0,
                b: -0.3,
                d: 0.0,
            },
        ] {
            let (e, u) = h.eigen();
            assert!(e[0] <= e[1]);
            for n in 0..2 {
                let v = [u[0][n], u[1][n]];
                let hv = [h.a * v[0] + h.b * v[1], h.b * v[0] + h.d * v[1]];
                assert!((hv[0] - e[n] * v[0]).abs() < 1e-14 && (hv[1] - e[n] * v[1]).abs() < 1e-14);
                assert!((v[0] * v[0] + v[1] * v[1] - 1.0).abs() < 1e-14);
            }
        }
    }

    #[test]
    fn volume_laws() {
        let m = DEMO;
        assert!((m.hopping(m.v0_volume) - m.t0).abs() < 1e-15);
        assert!(m.hopping(26.0) > m.hopping(30.0));
        assert!(m.hybridization(26.0) > m.hybridization(30.0));
        assert!((m.f_level(m.n_ref) - m.eps_f0).abs() < 1e-15);
    }
}
