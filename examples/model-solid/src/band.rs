//! The `band` stage: H(k) of the model on a simple-cubic k mesh for a volume and a density.

use rondo_numerics::lattice::{full_mesh, irreducible_mesh, sc_dispersion};
use std::collections::BTreeMap;

use crate::io::{Density, HkMesh};
use crate::model::{Model, Sym2};

/// Result of the band stage.
#[derive(Debug, Clone)]
pub struct BandOutput {
    /// H(k) with weights.
    pub mesh: HkMesh,
    /// Metrics: hopping, hybridization, f level, bandwidth, lower-band energy.
    pub metrics: BTreeMap<&'static str, f64>,
}

/// Build H(k) on an L×L×L mesh (O_h-reduced unless `full`).
pub fn band(model: &Model, volume: f64, kmesh: usize, density: &Density, full: bool) -> BandOutput {
    let t = model.hopping(volume);
    let v = model.hybridization(volume);
    let eps_f = model.f_level(density.n_f);
    let points = if full {
        full_mesh(kmesh)
    } else {
        irreducible_mesh(kmesh)
    };
    let mut weights = Vec::with_capacity(points.len());
    let mut h = Vec::with_capacity(points.len());
    let (mut lo, mut hi, mut lower) = (f64::INFINITY, f64::NEG_INFINITY, 0.0);
    for p in &points {
        let hk = Sym2 {
            a: sc_dispersion(t, kmesh, p.m),
            b: v,
            d: eps_f,
        };
        let (e, _) = hk.eigen();
        lo = lo.min(e[0]);
        hi = hi.max(e[1]);
        lower += p.weight * e[0];
        weights.push(p.weight);
        h.push(hk);
    }
    let mut metrics = BTreeMap::new();
    metrics.insert("hopping", t);
    metrics.insert("hybridization", v);
    metrics.insert("eps_f", eps_f);
    metrics.insert("bandwidth", hi - lo);
    metrics.insert("band_energy", 2.0 * lower);
    metrics.insert("nk", points.len() as f64);
    BandOutput {
        mesh: HkMesh { weights, h },
        metrics,
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::model::DEMO;

    fn start() -> Density {
        Density {
            n_f: 1.0,
            n_c: 0.8,
            mu: 0.0,
            energy: None,
        }
    }

    #[test]
    fn conduction_bandwidth_is_12t() {
        // With v = 0 the conduction band is the bare simple-cubic band of width 12t
        // (fact of the trade, e.g. Ashcroft & Mermin ch. 10).
        let mut m = DEMO;
        m.hyb0 = 0.0;
        let out = band(&m, 27.0, 12, &start(), false);
        let t = m.hopping(27.0);
        let (lo, hi) = out
            .mesh
            .h
            .iter()
            .fold((f64::MAX, f64::MIN), |(l, h), x| (l.min(x.a), h.max(x.a)));
        assert!((hi - lo - 12.0 * t).abs() < 1e-12);
        assert_eq!(out.mesh.h.len(), 84); // (L/2+1)(L/2+2)(L/2+3)/6 at L=12
    }

    #[test]
    fn irreducible_equals_full_mesh() {
        let a = band(&DEMO, 28.0, 8, &start(), false);
        let b = band(&DEMO, 28.0, 8, &start(), true);
        assert_eq!(b.mesh.h.len(), 512);
        assert!((a.metrics["band_energy"] - b.metrics["band_energy"]).abs() < 1e-12);
    }

    #[test]
    fn band_energy_converges_with_mesh() {
        // Lower-band energy per site: successive meshes agree better and better.
        let e: Vec<f64> = [8, 16, 32]
            .iter()
            .map(|&l| band(&DEMO, 28.0, l, &start(), false).metrics["band_energy"])
            .collect();
        assert!((e[1] - e[2]).abs() < (e[0] - e[1]).abs() + 1e-15);
        assert!((e[1] - e[2]).abs() < 1e-3);
    }

    #[test]
    fn feedback_moves_the_f_level() {
        let mut d = start();
        d.n_f = 1.2;
        let out = band(&DEMO, 28.0, 4, &d, false);
        assert!((out.metrics["eps_f"] - (DEMO.eps_f0 + DEMO.feedback * 0.2)).abs() < 1e-14);
    }
}
