//! In-process volume × temperature scan of the self-consistent cycle, for choosing the
//! invented demo constants: prints iteration counts and the converged energy per point.
//!
//! `cargo run --release -p model-solid --example scan -- [name=value ...]` where names are
//! model constants (core_a, p_core, eps_f0, feedback, t0, hyb0, p_t, p_v) or run settings
//! (u, kmesh, nw, electrons, alpha, max_iter, energy_tol, temps=300,1200,
//! volumes=26,27,28,29,30). A point has converged when n_f changes by less than 1e-6 and the
//! energy by less than energy_tol (eV) in two successive iterations.
//! The cycle and the mixing rule are the ones the campaign runs: iteration 1 takes the new
//! self-energy unchanged, afterwards Σ ← Σ_prev + α (Σ_new − Σ_prev).

use anyhow::{bail, Result};
use model_solid::io::Density;
use model_solid::model::{Model, DEMO};
use model_solid::project::{project, Window};
use model_solid::solve::{run_solver, SolverInput, SolverKind};
use model_solid::{band, update};
use num_complex::Complex64;
use rondo_numerics::units::beta_from_kelvin;

struct Settings {
    u: f64,
    kmesh: usize,
    nw: usize,
    electrons: f64,
    alpha: f64,
    temps: Vec<f64>,
    volumes: Vec<f64>,
    max_iter: usize,
    energy_tol: f64,
}

fn list(v: &str) -> Result<Vec<f64>> {
    v.split(',')
        .map(|x| x.parse::<f64>().map_err(|e| anyhow::anyhow!("{x}: {e}")))
        .collect()
}

fn main() -> Result<()> {
    let mut m: Model = DEMO;
    let mut s = Settings {
        u: 6.0,
        kmesh: 12,
        nw: 512,
        electrons: 1.8,
        alpha: 0.5,
        temps: vec![300.0, 1200.0],
        volumes: vec![26.0, 27.0, 28.0, 29.0, 30.0],
        max_iter: 40,
        energy_tol: 1e-7,
    };
    for arg in std::env::args().skip(1) {
        let Some((k, v)) = arg.split_once('=') else {
            bail!("argument '{arg}': expected name=value");
        };
        let x = || v.parse::<f64>();
        match k {
            "core_a" => m.core_a = x()?,
            "p_core" => m.p_core = x()?,
            "eps_f0" => m.eps_f0 = x()?,
            "feedback" => m.feedback = x()?,
            "n_ref" => m.n_ref = x()?,
            "t0" => m.t0 = x()?,
            "hyb0" => m.hyb0 = x()?,
            "p_t" => m.p_t = x()?,
            "p_v" => m.p_v = x()?,
            "u" => s.u = x()?,
            "kmesh" => s.kmesh = v.parse()?,
            "nw" => s.nw = v.parse()?,
            "electrons" => s.electrons = x()?,
            "alpha" => s.alpha = x()?,
            "max_iter" => s.max_iter = v.parse()?,
            "energy_tol" => s.energy_tol = x()?,
            "temps" => s.temps = list(v)?,
            "volumes" => s.volumes = list(v)?,
            _ => bail!("unknown name '{k}'"),
        }
    }
    println!("{m:?}");
    for &t in &s.temps {
        let mut energies = Vec::new();
        for &vol in &s.volumes {
            let (it, e, d, conv) = point(&m, &s, vol, t)?;
            println!(
                "T = {t:6.0} K  V = {vol:5.2}  iterations {it:3}  converged {conv}  E = {e:.9}  n_f = {:.6}  mu = {:.5}",
                d.n_f, d.mu
            );
            energies.push(e);
        }
        let (imin, emin) =
            energies.iter().enumerate().fold(
                (0, f64::INFINITY),
                |a, (i, &e)| if e < a.1 { (i, e) } else { a },
            );
        println!(
            "T = {t} K: lowest energy {emin:.6} at V = {} (interior: {})",
            s.volumes[imin],
            imin > 0 && imin + 1 < energies.len()
        );
    }
    Ok(())
}

/// One point to convergence; returns (iterations, energy, density, converged).
fn point(m: &Model, s: &Settings, volume: f64, t: f64) -> Result<(usize, f64, Density, bool)> {
    let beta = beta_from_kelvin(t).ok_or_else(|| anyhow::anyhow!("bad temperature"))?;
    let n_f0 = s.electrons.min(1.0);
    let mut density = Density {
        n_f: n_f0,
        n_c: s.electrons - n_f0,
        mu: 0.0,
        energy: None,
    };
    let mut sigma = vec![Complex64::new(0.0, 0.0); s.nw];
    let mut quiet = 0;
    for it in 1..=s.max_iter {
        let b = band::band(m, volume, s.kmesh, &density, false);
        let p = project(&b.mesh, &sigma, density.mu, beta, Window::default())?;
        let sol = run_solver(
            SolverKind::HubbardI,
            &SolverInput {
                delta: &p.delta,
                level: p.eps_f - density.mu,
                u: s.u,
                beta,
                seed: 0,
                sweeps: None,
            },
        )?;
        if it == 1 {
            sigma = sol.sigma;
        } else {
            for (old, new) in sigma.iter_mut().zip(&sol.sigma) {
                *old += (new - *old) * s.alpha;
            }
        }
        let up = update::update(m, &b.mesh, &sigma, beta, s.electrons, volume, &density)?;
        let change = (up.density.n_f - density.n_f).abs();
        let de = match (up.density.energy, density.energy) {
            (Some(a), Some(b)) => (a - b).abs(),
            _ => f64::INFINITY,
        };
        density = up.density;
        quiet = if change < 1e-6 && de < s.energy_tol {
            quiet + 1
        } else {
            0
        };
        if quiet >= 2 {
            return Ok((it, density.energy.unwrap_or(f64::NAN), density, true));
        }
    }
    Ok((
        s.max_iter,
        density.energy.unwrap_or(f64::NAN),
        density,
        false,
    ))
}
