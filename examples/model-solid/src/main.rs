//! `model-solid` command-line entry point: one subcommand per stage of the charge
//! self-consistent cycle (band, project, solve, update) plus `init` for starting files.
//!
//! Every subcommand reads its input files, computes everything in memory, then writes its
//! outputs (each through a temporary file and a rename) and finally `metrics.json`: a flat
//! JSON object whose values are numbers, or `{"value": x, "error": e}` for the statistical
//! estimates of a Monte Carlo solver. Any bad input ends the program with a message of the form
//! `file: what is wrong` and a non-zero exit status, before any output is written.

use anyhow::{bail, Context, Result};
use clap::{CommandFactory, FromArgMatches, Parser, Subcommand};
use num_complex::Complex64;
use std::collections::BTreeMap;
use std::path::{Path, PathBuf};
use std::process::ExitCode;

use model_solid::io::{self, Density, Levels};
use model_solid::model::{DEMO, DEMO_NAME};
use model_solid::project::Window;
use model_solid::solve::{run_solver, SolverInput, SolverKind};
use model_solid::{band, project, update};

/// Stages of a charge self-consistent DMFT of an invented model f-electron solid.
#[derive(Debug, Parser)]
#[command(name = "model-solid")]
struct Cli {
    /// Where to write the metrics of the stage (a flat JSON object of numbers and
    /// {"value", "error"} objects).
    #[arg(
        long,
        global = true,
        value_name = "PATH",
        default_value = "metrics.json"
    )]
    metrics: PathBuf,
    #[command(subcommand)]
    command: Command,
}

#[derive(Debug, Subcommand)]
enum Command {
    /// H(k) of the model for a volume and the current density.
    Band {
        /// Volume per site in Å³.
        #[arg(long, allow_negative_numbers = true, value_parser = positive_f64)]
        volume: f64,
        /// k mesh size L (L×L×L points).
        #[arg(long, value_parser = clap::value_parser!(u16).range(1..=200))]
        kmesh: u16,
        /// Current density (density.json).
        #[arg(long)]
        density: PathBuf,
        /// Output H(k) array (.npy, float64, shape (nk, 5)).
        #[arg(long)]
        out: PathBuf,
        /// Write the full mesh instead of the irreducible wedge.
        #[arg(long)]
        full_mesh: bool,
    },
    /// Projectors, local Green's function and hybridization function Δ(iω_n).
    Project {
        /// H(k) from `band`.
        #[arg(long)]
        hk: PathBuf,
        /// Self-energy Σ(iω_n) of the correlated orbital (complex128, length n_w).
        #[arg(long)]
        sigma: PathBuf,
        /// Current density; its chemical potential is used.
        #[arg(long)]
        density: PathBuf,
        /// Temperature in kelvin.
        #[arg(long, allow_negative_numbers = true, value_name = "KELVIN")]
        temperature: f64,
        /// Lower edge of the projection window relative to μ in eV (default: open).
        #[arg(long, allow_negative_numbers = true)]
        emin: Option<f64>,
        /// Upper edge of the projection window relative to μ in eV (default: open).
        #[arg(long, allow_negative_numbers = true)]
        emax: Option<f64>,
        /// Output Δ(iω_n) (.npy, complex128).
        #[arg(long)]
        out_delta: PathBuf,
        /// Output local levels (levels.json).
        #[arg(long)]
        out_levels: PathBuf,
        /// Also write G_loc(iω_n) (.npy, complex128).
        #[arg(long)]
        out_gloc: Option<PathBuf>,
    },
    /// Impurity solver: self-energy and Green's function of the correlated orbital.
    Solve {
        /// Δ(iω_n) from `project`.
        #[arg(long)]
        delta: PathBuf,
        /// levels.json from `project`.
        #[arg(long)]
        levels: PathBuf,
        /// Hubbard U in eV.
        #[arg(long, allow_negative_numbers = true)]
        u: f64,
        /// Impurity solver.
        #[arg(long, default_value = "hubbard-i")]
        solver: SolverKind,
        /// Random seed (stochastic solvers).
        #[arg(long, default_value_t = 0)]
        seed: u64,
        /// Monte Carlo sweeps (stochastic solvers; ignored by hubbard-i).
        #[arg(long)]
        sweeps: Option<u64>,
        /// Output Σ(iω_n) (.npy, complex128).
        #[arg(long)]
        out_sigma: PathBuf,
        /// Also write the impurity G(iω_n) (.npy, complex128).
        #[arg(long)]
        out_g: Option<PathBuf>,
        /// Also write the Legendre coefficients G_l (.npy, float64, shape (n_l, 2): value,
        /// standard error; ctqmc only).
        #[arg(long)]
        out_gl: Option<PathBuf>,
        /// Also write the binned G(τ) (.npy, float64, shape (n_τ, 3): bin centre τ, value,
        /// standard error; ctqmc only).
        #[arg(long)]
        out_gtau: Option<PathBuf>,
    },
    /// Density update: μ at fixed electron count, occupations, f-level feedback, energy.
    Update {
        /// H(k) from `band`.
        #[arg(long)]
        hk: PathBuf,
        /// The (mixed) self-energy Σ(iω_n).
        #[arg(long)]
        sigma: PathBuf,
        /// The density of the previous iteration (μ guess and change metrics).
        #[arg(long)]
        density: PathBuf,
        /// Temperature in kelvin.
        #[arg(long, allow_negative_numbers = true, value_name = "KELVIN")]
        temperature: f64,
        /// Electrons per site.
        #[arg(long, allow_negative_numbers = true)]
        electrons: f64,
        /// Volume per site in Å³ (for the core energy).
        #[arg(long, allow_negative_numbers = true, value_parser = positive_f64)]
        volume: f64,
        /// Output density (density.json).
        #[arg(long)]
        out: PathBuf,
    },
    /// Starting files: a density guess and a zero self-energy.
    Init {
        /// Number of positive Matsubara frequencies of the self-energy.
        #[arg(long, value_parser = clap::value_parser!(u32).range(4..=1_000_000))]
        nw: u32,
        /// Electrons per site.
        #[arg(long, allow_negative_numbers = true)]
        electrons: f64,
        /// Output density (density.json).
        #[arg(long)]
        out_density: PathBuf,
        /// Output self-energy (.npy, complex128, zeros).
        #[arg(long)]
        out_sigma: PathBuf,
    },
}

fn positive_f64(s: &str) -> Result<f64, String> {
    let v: f64 = s.parse().map_err(|_| format!("'{s}' is not a number"))?;
    if v.is_finite() && v > 0.0 {
        Ok(v)
    } else {
        Err(format!("must be a finite positive number, got {s}"))
    }
}

fn main() -> ExitCode {
    // The version line names the parameter set, so provenance shows which invented model ran.
    let version: &'static str =
        Box::leak(format!("{} (model {DEMO_NAME})", env!("CARGO_PKG_VERSION")).into_boxed_str());
    let matches = Cli::command().version(version).get_matches();
    let cli = match Cli::from_arg_matches(&matches) {
        Ok(c) => c,
        Err(e) => e.exit(),
    };
    match run(cli) {
        Ok(()) => ExitCode::SUCCESS,
        Err(e) => {
            eprintln!("model-solid: error: {e:#}");
            ExitCode::FAILURE
        }
    }
}

fn run(cli: Cli) -> Result<()> {
    let metrics = match cli.command {
        Command::Band {
            volume,
            kmesh,
            density,
            out,
            full_mesh,
        } => {
            let d = io::read_density(&density)?;
            let res = band::band(&DEMO, volume, usize::from(kmesh), &d, full_mesh);
            io::write_hk(&out, &res.mesh)?;
            io::exact_metrics(res.metrics)
        }
        Command::Project {
            hk,
            sigma,
            density,
            temperature,
            emin,
            emax,
            out_delta,
            out_levels,
            out_gloc,
        } => {
            let beta = beta_arg(temperature)?;
            if let (Some(lo), Some(hi)) = (emin, emax) {
                if lo >= hi {
                    bail!("--emin ({lo}) must lie below --emax ({hi})");
                }
            }
            for (name, v) in [("--emin", emin), ("--emax", emax)] {
                if v.is_some_and(|x| !x.is_finite()) {
                    bail!("{name} must be a finite number of eV");
                }
            }
            let mesh = io::read_hk(&hk)?;
            let sig = io::read_matsubara(&sigma, "the self-energy")?;
            let d = io::read_density(&density)?;
            let res = project::project(&mesh, &sig, d.mu, beta, Window { emin, emax })
                .with_context(|| format!("{}: projection failed", hk.display()))?;
            let levels = Levels {
                eps_f: res.eps_f,
                mu: d.mu,
                beta,
            };
            io::write_matsubara(&out_delta, &res.delta)?;
            if let Some(g) = &out_gloc {
                io::write_matsubara(g, &res.gloc)?;
            }
            io::write_json(&out_levels, &levels)?;
            let mut m = res.metrics;
            m.insert("mu", d.mu);
            m.insert("n_w", sig.len() as f64);
            io::exact_metrics(m)
        }
        Command::Solve {
            delta,
            levels,
            u,
            solver,
            seed,
            sweeps,
            out_sigma,
            out_g,
            out_gl,
            out_gtau,
        } => {
            if (out_gl.is_some() || out_gtau.is_some()) && solver != SolverKind::Ctqmc {
                bail!("--out-gl and --out-gtau need a Monte Carlo solver (--solver ctqmc)");
            }
            if !u.is_finite() || u < 0.0 {
                bail!("--u must be a finite non-negative number of eV, got {u}");
            }
            let dl = io::read_matsubara(&delta, "the hybridization function")?;
            let lv = io::read_levels(&levels)?;
            let input = SolverInput {
                delta: &dl,
                level: lv.eps_f - lv.mu,
                u,
                beta: lv.beta,
                seed,
                sweeps,
            };
            let res = run_solver(solver, &input)
                .with_context(|| format!("{}: impurity solver failed", delta.display()))?;
            check_finite(&out_sigma, &res.sigma)?;
            io::write_matsubara(&out_sigma, &res.sigma)?;
            if let Some(g) = &out_g {
                check_finite(g, &res.g)?;
                io::write_matsubara(g, &res.g)?;
            }
            if let Some(it) = &res.imaginary_time {
                if let Some(p) = &out_gl {
                    let flat: Vec<f64> = it
                        .gl
                        .iter()
                        .zip(&it.gl_err)
                        .flat_map(|(v, e)| [*v, *e])
                        .collect();
                    write_table(p, 2, &flat)?;
                }
                if let Some(p) = &out_gtau {
                    let flat: Vec<f64> = it
                        .tau
                        .iter()
                        .zip(&it.g_tau)
                        .zip(&it.g_tau_err)
                        .flat_map(|((t, v), e)| [*t, *v, *e])
                        .collect();
                    write_table(p, 3, &flat)?;
                }
            }
            res.metrics
        }
        Command::Update {
            hk,
            sigma,
            density,
            temperature,
            electrons,
            volume,
            out,
        } => {
            let beta = beta_arg(temperature)?;
            electrons_arg(electrons)?;
            let mesh = io::read_hk(&hk)?;
            let sig = io::read_matsubara(&sigma, "the self-energy")?;
            if sig.len() < 4 {
                bail!(
                    "{}: the self-energy needs at least 4 Matsubara frequencies for its tail, found {}",
                    sigma.display(),
                    sig.len()
                );
            }
            let prev = io::read_density(&density)?;
            let res = update::update(&DEMO, &mesh, &sig, beta, electrons, volume, &prev)
                .with_context(|| {
                    format!(
                        "{}, {}: density update failed",
                        hk.display(),
                        sigma.display()
                    )
                })?;
            io::write_json(&out, &res.density)?;
            io::exact_metrics(res.metrics)
        }
        Command::Init {
            nw,
            electrons,
            out_density,
            out_sigma,
        } => {
            electrons_arg(electrons)?;
            // One f electron when there are enough (the correlated orbital half filled),
            // the rest in the conduction band.
            let n_f = electrons.min(1.0).max(electrons - 2.0);
            let density = Density {
                n_f,
                n_c: electrons - n_f,
                mu: 0.0,
                energy: None,
            };
            let sigma = vec![Complex64::new(0.0, 0.0); nw as usize];
            io::write_matsubara(&out_sigma, &sigma)?;
            io::write_json(&out_density, &density)?;
            let mut m = BTreeMap::new();
            m.insert("n_f", density.n_f);
            m.insert("n_c", density.n_c);
            m.insert("n_w", f64::from(nw));
            io::exact_metrics(m)
        }
    };
    io::write_metrics(&cli.metrics, &metrics)
}

/// β in 1/eV from `--temperature` in kelvin.
fn beta_arg(t_kelvin: f64) -> Result<f64> {
    io::beta_from_temperature(t_kelvin).map_err(|_| {
        anyhow::anyhow!("--temperature: must be a finite positive number of kelvin, got {t_kelvin}")
    })
}

/// `--electrons`: the two spin-degenerate orbitals hold between 0 and 4 electrons per site.
fn electrons_arg(x: f64) -> Result<()> {
    if x.is_finite() && x > 0.0 && x < 4.0 {
        Ok(())
    } else {
        bail!("--electrons: the electron count must lie in (0, 4) per site, got {x}")
    }
}

/// Write a float64 table of `cols` columns (atomically), refusing non-finite values.
fn write_table(path: &Path, cols: usize, flat: &[f64]) -> Result<()> {
    if let Some(i) = flat.iter().position(|x| !x.is_finite()) {
        bail!(
            "{}: refusing to write: row {} is not finite",
            path.display(),
            i / cols
        );
    }
    rondo_numerics::npy::write_real(path, &[flat.len() / cols, cols], flat)
        .with_context(|| format!("{}: cannot write the table", path.display()))?;
    Ok(())
}

/// Refuse to write a non-finite array (a solver that produced NaN is a failed stage).
fn check_finite(path: &Path, data: &[Complex64]) -> Result<()> {
    if let Some(i) = data
        .iter()
        .position(|z| !(z.re.is_finite() && z.im.is_finite()))
    {
        bail!(
            "{}: refusing to write: value {i} is not finite ({})",
            path.display(),
            data[i]
        );
    }
    Ok(())
}
