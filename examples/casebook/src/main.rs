//! `casebook` command-line entry point: the invented model solid of model-solid (same
//! physics, through its library) with the plumbing of real codes: a case folder whose files
//! the sub-steps read and rewrite in place, a text log in rydberg, an HDF5 archive for the
//! impurity data, a restart file of a chosen size and a resident mode for the band sub-step
//! (docs/casebook.md). Bad input ends the program with `casebook: error: file: what is
//! wrong` and a non-zero exit status.

mod archive;
mod case;
mod restart;
mod serve;
mod steps;
mod textlog;

use anyhow::Result;
use clap::{CommandFactory, FromArgMatches, Parser, Subcommand};
use std::path::PathBuf;
use std::process::ExitCode;
use std::time::Duration;

use crate::case::Case;

/// Sub-steps of a charge self-consistent DMFT of an invented model f-electron solid, laid
/// out in a case folder.
#[derive(Debug, Parser)]
#[command(name = "casebook")]
struct Cli {
    #[command(subcommand)]
    command: Command,
}

#[derive(Debug, Subcommand)]
enum Command {
    /// Make a case folder from start files (model-solid's density.json and sigma.npy).
    Init {
        /// The case folder to make (its name prefixes every file in it).
        case: PathBuf,
        /// Start density (density.json).
        #[arg(long)]
        density: PathBuf,
        /// Start self-energy Σ(iω_n): a complex128 .npy, or an archive's /impurity/sigma.
        #[arg(long)]
        sigma: PathBuf,
        /// Volume per site in Å³.
        #[arg(long, allow_negative_numbers = true)]
        volume: f64,
        /// k mesh size L (L×L×L points, irreducible wedge).
        #[arg(long, value_parser = clap::value_parser!(u16).range(1..=200))]
        kmesh: u16,
        /// Temperature in kelvin.
        #[arg(long, allow_negative_numbers = true, value_name = "KELVIN")]
        temperature: f64,
        /// Electrons per site.
        #[arg(long, allow_negative_numbers = true)]
        electrons: f64,
        /// Hubbard U in eV.
        #[arg(long, allow_negative_numbers = true)]
        u: f64,
        /// Impurity solver: hubbard-i or ctqmc.
        #[arg(long, default_value = "hubbard-i")]
        solver: String,
        /// Random seed (stochastic solvers).
        #[arg(long, default_value_t = 0)]
        seed: u64,
        /// Monte Carlo sweeps (ctqmc).
        #[arg(long)]
        sweeps: Option<u64>,
        /// Lower edge of the projection window relative to μ in eV (default: open).
        #[arg(long, allow_negative_numbers = true)]
        emin: Option<f64>,
        /// Upper edge of the projection window relative to μ in eV (default: open).
        #[arg(long, allow_negative_numbers = true)]
        emax: Option<f64>,
        /// Size of the restart file in MiB (0: header and state only).
        #[arg(long, default_value_t = 1, value_name = "N")]
        restart_mib: u64,
        /// Start an existing case folder again (its files are replaced; handoff/ is kept).
        #[arg(long)]
        force: bool,
        /// Keep a case folder made with the same settings and only take the density and Σ
        /// given into it (how an orchestrator hands a mixed state back each iteration).
        #[arg(long, conflicts_with = "force")]
        reuse: bool,
    },
    /// H(k) for the current density; rewrites hamiltonian.npy, eigen, levels.
    Band {
        /// The case folder.
        case: PathBuf,
    },
    /// Δ(iω_n), G_loc and the levels into the HDF5 archive; rewrites projectors.
    Project {
        /// The case folder.
        case: PathBuf,
    },
    /// Impurity solver: Σ(iω_n), G and the density matrix into the HDF5 archive.
    Solve {
        /// The case folder.
        case: PathBuf,
        /// Random seed for this run (default: the control file's).
        #[arg(long)]
        seed: Option<u64>,
        /// Monte Carlo sweeps for this run (default: the control file's).
        #[arg(long)]
        sweeps: Option<u64>,
    },
    /// μ, charges and energy; rewrites density, density.prev, energies and the restart file.
    Update {
        /// The case folder.
        case: PathBuf,
        /// Size of the restart file in MiB for this run (default: the control file's).
        #[arg(long, value_name = "N")]
        restart_mib: Option<u64>,
    },
    /// Put the density and Σ(iω_n) of the restart file back into the case; band runs next.
    Restore {
        /// The case folder.
        case: PathBuf,
    },
    /// Resident band sub-step: take hand-offs (protocol rondo-handoff-1) until a stop file
    /// appears.
    Serve {
        /// The case folder.
        case: PathBuf,
        /// The hand-off folder (default: CASE/handoff).
        #[arg(long, value_name = "DIR")]
        handoff: Option<PathBuf>,
        /// How often to look for new hand-offs, in milliseconds.
        #[arg(long, default_value_t = 20, value_parser = clap::value_parser!(u64).range(1..=60_000))]
        poll_ms: u64,
    },
}

fn main() -> ExitCode {
    let version: &'static str = Box::leak(
        format!(
            "{} (model {}, physics of model-solid)",
            env!("CARGO_PKG_VERSION"),
            model_solid::model::DEMO_NAME
        )
        .into_boxed_str(),
    );
    let matches = Cli::command().version(version).get_matches();
    let cli = match Cli::from_arg_matches(&matches) {
        Ok(c) => c,
        Err(e) => e.exit(),
    };
    match run(cli) {
        Ok(()) => ExitCode::SUCCESS,
        Err(e) => {
            eprintln!("casebook: error: {e:#}");
            ExitCode::FAILURE
        }
    }
}

fn run(cli: Cli) -> Result<()> {
    match cli.command {
        Command::Init {
            case,
            density,
            sigma,
            volume,
            kmesh,
            temperature,
            electrons,
            u,
            solver,
            seed,
            sweeps,
            emin,
            emax,
            restart_mib,
            force,
            reuse,
        } => steps::init(
            &case,
            &steps::InitArgs {
                density,
                sigma,
                volume,
                kmesh,
                temperature,
                electrons,
                u,
                solver,
                seed,
                sweeps,
                emin,
                emax,
                restart_mib,
                force,
                reuse,
            },
        ),
        Command::Band { case } => {
            let c = Case::open(&case)?;
            steps::band(&c, &steps::band_setup(&c)?, false)
        }
        Command::Project { case } => steps::project(&Case::open(&case)?),
        Command::Solve { case, seed, sweeps } => steps::solve(&Case::open(&case)?, seed, sweeps),
        Command::Update { case, restart_mib } => steps::update(&Case::open(&case)?, restart_mib),
        Command::Restore { case } => steps::restore(&Case::open(&case)?),
        Command::Serve {
            case,
            handoff,
            poll_ms,
        } => {
            let c = Case::open(&case)?;
            let root = handoff.unwrap_or_else(|| c.handoff());
            serve::serve(&c, &root, Duration::from_millis(poll_ms))
        }
    }
}
