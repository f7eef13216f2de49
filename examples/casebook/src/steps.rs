//! The sub-steps of one iteration (band, project, solve, update) and `init`, each reading
//! case files and rewriting some of them in place. The physics is model-solid's: every
//! number comes from its library functions with the same inputs, so the results are bit
//! for bit those of model-solid's stages. Owns which file each sub-step reads and writes.

use anyhow::{bail, Context, Result};
use model_solid::io::{self as msio, Density};
use model_solid::model::{DEMO, DEMO_NAME};
use model_solid::project::Window;
use model_solid::solve::{run_solver, SolverInput, SolverKind};
use model_solid::{band, project, update};
use num_complex::Complex64;
use rondo_numerics::lattice::irreducible_mesh;
use std::fmt::Write as _;
use std::path::{Path, PathBuf};

use crate::archive::Archive;
use crate::case::{self, exact, write_kv, write_text, Case, Kv, Status};
use crate::restart;
use crate::textlog::{journal, Block, Unit, RYDBERG_EV};

/// What `init` needs besides the case folder.
#[derive(Debug, Clone)]
pub struct InitArgs {
    /// Start density (model-solid's density.json).
    pub density: PathBuf,
    /// Start self-energy (model-solid's complex128 .npy).
    pub sigma: PathBuf,
    /// Volume per site (Å³).
    pub volume: f64,
    /// k mesh L.
    pub kmesh: u16,
    /// Temperature (K).
    pub temperature: f64,
    /// Electrons per site.
    pub electrons: f64,
    /// Hubbard U (eV).
    pub u: f64,
    /// Impurity solver name.
    pub solver: String,
    /// Random seed.
    pub seed: u64,
    /// Monte Carlo sweeps.
    pub sweeps: Option<u64>,
    /// Projection window (eV relative to μ).
    pub emin: Option<f64>,
    /// Projection window (eV relative to μ).
    pub emax: Option<f64>,
    /// Restart file size in MiB.
    pub restart_mib: u64,
    /// Replace an existing case of the same folder.
    pub force: bool,
    /// Keep an existing case of the same settings; take in only the density and Σ.
    pub reuse: bool,
}

/// The control file's settings.
#[derive(Debug, Clone)]
pub struct Control {
    /// β (1/eV) from the temperature.
    pub beta: f64,
    /// Electrons per site.
    pub electrons: f64,
    /// Hubbard U (eV).
    pub u: f64,
    /// Solver.
    pub solver: SolverKind,
    /// Seed.
    pub seed: u64,
    /// Sweeps.
    pub sweeps: Option<u64>,
    /// Window.
    pub window: Window,
    /// Restart size (MiB).
    pub restart_mib: u64,
}

/// Read `<name>.control`.
pub fn read_control(case: &Case) -> Result<Control> {
    let path = case.file("control");
    let kv = Kv::read(&path)?;
    let temperature = kv.f64("temperature")?;
    let beta = msio::beta_from_temperature(temperature)
        .with_context(|| format!("{}: `temperature`", path.display()))?;
    let solver: SolverKind = kv
        .str("solver")?
        .parse()
        .map_err(|e| anyhow::anyhow!("{}: `solver`: {e}", path.display()))?;
    Ok(Control {
        beta,
        electrons: kv.f64("electrons")?,
        u: kv.f64("u")?,
        solver,
        seed: kv.u64("seed")?,
        sweeps: kv.opt_u64("sweeps")?,
        window: Window {
            emin: kv.opt_f64("emin")?,
            emax: kv.opt_f64("emax")?,
        },
        restart_mib: kv.u64("restart_mib")?,
    })
}

fn write_control(case: &Case, a: &InitArgs) -> Result<()> {
    let mut e = vec![
        ("temperature", exact(a.temperature)),
        ("electrons", exact(a.electrons)),
        ("u", exact(a.u)),
        ("solver", a.solver.clone()),
        ("seed", a.seed.to_string()),
        ("restart_mib", a.restart_mib.to_string()),
    ];
    if let Some(s) = a.sweeps {
        e.push(("sweeps", s.to_string()));
    }
    if let Some(x) = a.emin {
        e.push(("emin", exact(x)));
    }
    if let Some(x) = a.emax {
        e.push(("emax", exact(x)));
    }
    write_kv(
        &case.file("control"),
        "control file of the case: temperature (K), electrons per site, U (eV), impurity\n\
         solver, seed, Monte Carlo sweeps, projection window (eV from mu), restart size (MiB)",
        &e,
    )
}

/// The restart state: density fields then Σ (re, im) pairs.
fn restart_state(d: &Density, sigma: &[Complex64]) -> Vec<f64> {
    let mut s = vec![d.n_f, d.n_c, d.mu, d.energy.unwrap_or(f64::NAN)];
    s.extend(sigma.iter().flat_map(|z| [z.re, z.im]));
    s
}

/// `casebook init`: make the case folder from start files.
pub fn init(dir: &Path, a: &InitArgs) -> Result<()> {
    let case = Case::at(dir)?;
    a.solver
        .parse::<SolverKind>()
        .map_err(|e| anyhow::anyhow!("--solver: {e}"))?;
    if !(a.volume.is_finite() && a.volume > 0.0) {
        bail!(
            "--volume must be a finite positive number of Å³, got {}",
            a.volume
        );
    }
    if !(a.electrons.is_finite() && a.electrons > 0.0 && a.electrons < 4.0) {
        bail!(
            "--electrons must lie in (0, 4) per site, got {}",
            a.electrons
        );
    }
    if !(a.u.is_finite() && a.u >= 0.0) {
        bail!(
            "--u must be a finite non-negative number of eV, got {}",
            a.u
        );
    }
    msio::beta_from_temperature(a.temperature).context("--temperature")?;
    if a.restart_mib > restart::MAX_MIB {
        bail!("--restart-mib: at most {} MiB", restart::MAX_MIB);
    }
    let density = msio::read_density(&a.density)?;
    let sigma = read_start_sigma(&a.sigma)?;
    if case.file("control").exists() {
        if a.reuse {
            return take_state(&case, a, &density, &sigma);
        }
        if !a.force {
            bail!(
                "{}: already a case folder (it has {}); pass --force to start it again, or \
                 --reuse to keep it and take in the density and self-energy given",
                dir.display(),
                case.file("control").display()
            );
        }
    }
    std::fs::create_dir_all(dir).with_context(|| format!("{}: cannot create", dir.display()))?;
    write_control(&case, a)?;
    write_kv(
        &case.file("lattice"),
        "structure of the case: an invented model solid, one site per cell",
        &[
            ("lattice", "simple-cubic".into()),
            ("volume", exact(a.volume)),
            ("constant", exact(a.volume.cbrt())),
            ("site", "0 0 0".into()),
        ],
    )?;
    write_text(
        &case.file("orbitals"),
        "# orbitals of the site: index, name, correlated\n0 c no\n1 f yes\n",
    )?;
    let mesh = irreducible_mesh(usize::from(a.kmesh));
    let mut k = format!(
        "# irreducible k points of the {0}x{0}x{0} mesh; k = m1 m2 m3 weight (k = 2 pi m / L)\nmesh = {0}\npoints = {1}\n",
        a.kmesh,
        mesh.len()
    );
    for p in &mesh {
        let _ = writeln!(
            k,
            "k = {} {} {} {}",
            p.m[0],
            p.m[1],
            p.m[2],
            exact(p.weight)
        );
    }
    write_text(&case.file("kpoints"), &k)?;
    write_text(
        &case.file("version"),
        &format!(
            "casebook {} (model {DEMO_NAME}, physics of model-solid)\n",
            env!("CARGO_PKG_VERSION")
        ),
    )?;
    case::write_case_density(&case, &density)?;
    case::write_density(&case.file("density.prev"), &density)?;
    let ar = Archive::create(&case.file("impurity.h5"), &sigma)?;
    ar.flush()?;
    restart::write(
        &case.file("restart"),
        a.restart_mib,
        0,
        &restart_state(&density, &sigma),
    )?;
    for step in ["band", "project", "solve", "update"] {
        write_text(
            &case.file(&format!("{step}.out")),
            &format!("{step}: not run yet\n"),
        )?;
    }
    write_text(&case.file("levels"), "# written by band\n")?;
    write_text(&case.file("eigen"), "# written by band\n")?;
    write_text(&case.file("projectors"), "# written by project\n")?;
    write_text(&case.file("atomic"), "# written by solve\n")?;
    write_text(&case.file("energies"), "# written by update\n")?;
    write_text(&case.file("hamiltonian.npy"), "")?;
    let mut b = Block::new("init", 0);
    b.val("volume", a.volume, Unit::Ang3)
        .count("k mesh", u64::from(a.kmesh))
        .count("k points", mesh.len() as u64)
        .val("f charge", density.n_f, Unit::One)
        .val("c charge", density.n_c, Unit::One)
        .val("chemical potential", density.mu, Unit::Ry)
        .count("matsubara frequencies", sigma.len() as u64);
    b.append(&case.file("log"))?;
    case::write_status(
        &case,
        &Status {
            iteration: 0,
            last: "init".into(),
        },
    )?;
    journal(&case.file("journal"), "init", "ok")?;
    if let Some(missing) = case::FILES.iter().find(|f| !case.file(f).is_file()) {
        bail!("{}: init did not make {missing}", dir.display());
    }
    Ok(())
}

/// The HDF5 file signature (the first 8 bytes of a file that starts with its superblock).
const HDF5_SIGNATURE: &[u8; 8] = b"\x89HDF\r\n\x1a\n";

/// Σ(iω_n) for init: a complex128 .npy, or /impurity/sigma of an archive (recognised by
/// the HDF5 signature, whatever the file name).
fn read_start_sigma(path: &Path) -> Result<Vec<Complex64>> {
    let mut head = [0u8; 8];
    let is_hdf5 = std::fs::File::open(path)
        .and_then(|mut f| std::io::Read::read_exact(&mut f, &mut head))
        .is_ok()
        && &head == HDF5_SIGNATURE;
    if is_hdf5 {
        return Archive::open_read(path)?.read_complex("sigma");
    }
    msio::read_matsubara(path, "the start self-energy")
}

/// `init --reuse` of an existing case: the settings must be the case's; the density and
/// Σ given replace `<name>.density` (and its JSON twin) and `/impurity/sigma` in place;
/// everything else (log, journal, eigenvalues, restart file) stays. Band runs next.
fn take_state(case: &Case, a: &InitArgs, density: &Density, sigma: &[Complex64]) -> Result<()> {
    same_settings(case, a)?;
    let status = case::read_status(case)?;
    let archive = case.file("impurity.h5");
    let ar = Archive::open(&archive)?;
    let n_w = ar.read_complex("sigma")?.len();
    if n_w != sigma.len() {
        bail!(
            "{}: the self-energy given has {} Matsubara frequencies, the case's /impurity/sigma {n_w}",
            a.sigma.display(),
            sigma.len()
        );
    }
    ar.write_complex("sigma", sigma)?;
    ar.flush()?;
    case::write_case_density(case, density)?;
    let mut b = Block::new("load", status.iteration);
    b.val("f charge", density.n_f, Unit::One)
        .val("c charge", density.n_c, Unit::One)
        .val("chemical potential", density.mu, Unit::Ry)
        .count("matsubara frequencies", sigma.len() as u64);
    b.append(&case.file("log"))?;
    case::write_status(
        case,
        &Status {
            iteration: status.iteration,
            last: if status.iteration == 0 {
                "init"
            } else {
                "update"
            }
            .into(),
        },
    )?;
    journal(
        &case.file("journal"),
        "init",
        "reuse: density and sigma taken in",
    )
}

/// The settings of `init` against those the case was made with: the same values, or an
/// error naming the file and the first one that differs.
fn same_settings(case: &Case, a: &InitArgs) -> Result<()> {
    let control = Kv::read(&case.file("control"))?;
    let lattice = Kv::read(&case.file("lattice"))?;
    let kpoints = Kv::read(&case.file("kpoints"))?;
    let given = [
        (&control, "control", "temperature", exact(a.temperature)),
        (&control, "control", "electrons", exact(a.electrons)),
        (&control, "control", "u", exact(a.u)),
        (&control, "control", "solver", a.solver.clone()),
        (&lattice, "lattice", "volume", exact(a.volume)),
        (&kpoints, "kpoints", "mesh", a.kmesh.to_string()),
    ];
    for (kv, file, key, want) in given {
        let have = kv.str(key)?;
        if have != want {
            bail!(
                "{}: `{key}` is {have}, but init --reuse was given {want}; a case is reused only \
                 with the settings it was made with (pass --force to start it again)",
                case.file(file).display()
            );
        }
    }
    Ok(())
}

/// Eigenvalues of H(k), two per point.
fn eigenvalues(mesh: &msio::HkMesh) -> Vec<[f64; 2]> {
    mesh.h.iter().map(|h| h.eigen().0).collect()
}

fn read_eigen(path: &Path) -> Option<Vec<[f64; 2]>> {
    let text = std::fs::read_to_string(path).ok()?;
    let mut out = Vec::new();
    for line in text.lines().filter(|l| !l.starts_with('#')) {
        let v: Vec<f64> = line
            .split_whitespace()
            .skip(1)
            .filter_map(|t| t.parse().ok())
            .collect();
        if v.len() != 2 {
            return None;
        }
        out.push([v[0], v[1]]);
    }
    (!out.is_empty()).then_some(out)
}

/// Files the band sub-step writes (the outputs of a resident hand-off too).
pub const BAND_OUTPUTS: [&str; 3] = ["hamiltonian.npy", "eigen", "levels"];

/// What the band sub-step needs that stays fixed across iterations (kept by `serve`).
#[derive(Debug, Clone, Copy)]
pub struct BandSetup {
    /// Volume per site.
    pub volume: f64,
    /// k mesh L.
    pub kmesh: usize,
    /// Irreducible points listed in the k-point file.
    pub points: usize,
}

/// Read the structure and k-point files.
pub fn band_setup(case: &Case) -> Result<BandSetup> {
    let volume = case::read_volume(case)?;
    let (kmesh, points) = case::read_kmesh(case)?;
    Ok(BandSetup {
        volume,
        kmesh,
        points,
    })
}

/// `casebook band`: H(k) for the current density; rewrites hamiltonian, eigen, levels.
/// A repeated one-shot band stays in its iteration; every resident hand-off starts a new one.
pub fn band(case: &Case, setup: &BandSetup, resident: bool) -> Result<()> {
    let status = case::require_after(case, "band", &["init", "update", "band"])?;
    let iteration = if status.last == "band" && !resident {
        status.iteration
    } else {
        status.iteration + 1
    };
    let density = case::read_density(&case.file("density"))?;
    let res = band::band(&DEMO, setup.volume, setup.kmesh, &density, false);
    if res.mesh.h.len() != setup.points {
        bail!(
            "{}: lists {} irreducible points, the {}-mesh has {}",
            case.file("kpoints").display(),
            setup.points,
            setup.kmesh,
            res.mesh.h.len()
        );
    }
    let eig = eigenvalues(&res.mesh);
    let previous = read_eigen(&case.file("eigen")).filter(|p| p.len() == eig.len());
    let change = previous.map(|p| {
        p.iter()
            .zip(&eig)
            .flat_map(|(a, b)| [(a[0] - b[0]).abs(), (a[1] - b[1]).abs()])
            .fold(0.0_f64, f64::max)
    });
    msio::write_hk(&case.file("hamiltonian.npy"), &res.mesh)?;
    let mut text = format!(
        "# eigenvalues of H(k) in eV at the irreducible points (warm start of the next band)\n# iteration {iteration}\n"
    );
    for (i, e) in eig.iter().enumerate() {
        let _ = writeln!(text, "{i} {} {}", exact(e[0]), exact(e[1]));
    }
    write_text(&case.file("eigen"), &text)?;
    let m = &res.metrics;
    let keys = [
        "hopping",
        "hybridization",
        "eps_f",
        "bandwidth",
        "band_energy",
    ];
    let entries: Vec<(&str, String)> = keys.iter().map(|k| (*k, exact(m[k]))).collect();
    write_kv(
        &case.file("levels"),
        "levels and potentials of the band sub-step, eV",
        &entries,
    )?;
    let mut b = Block::new("band", iteration);
    b.val("volume", setup.volume, Unit::Ang3)
        .count("k points", res.mesh.h.len() as u64)
        .val("hopping", m["hopping"], Unit::Ry)
        .val("hybridization", m["hybridization"], Unit::Ry)
        .val("f level", m["eps_f"], Unit::Ry)
        .val("bandwidth", m["bandwidth"], Unit::Ry)
        .val("band energy", m["band_energy"], Unit::Ry);
    match change {
        Some(c) => b.val("eigenvalue change", c, Unit::Ry),
        None => b.word("eigenvalue change", "cold-start"),
    };
    b.append(&case.file("log"))?;
    let summary: String = keys
        .iter()
        .map(|k| format!("{k:<16} {:>24} eV\n", exact(m[k])))
        .collect();
    write_text(
        &case.file("band.out"),
        &format!("band, iteration {iteration}\n{summary}"),
    )?;
    case::write_status(
        case,
        &Status {
            iteration,
            last: "band".into(),
        },
    )?;
    journal(&case.file("journal"), "band", "ok")
}

/// `casebook project`: Δ, G_loc and the levels into the archive; rewrites projectors.
pub fn project(case: &Case) -> Result<()> {
    let status = case::require_after(case, "project", &["band", "project"])?;
    let ctl = read_control(case)?;
    let hk = case.file("hamiltonian.npy");
    let mesh = msio::read_hk(&hk)?;
    let density = case::read_density(&case.file("density"))?;
    let ar = Archive::open(&case.file("impurity.h5"))?;
    let sigma = ar.read_complex("sigma")?;
    let res = project::project(&mesh, &sigma, density.mu, ctl.beta, ctl.window)
        .with_context(|| format!("{}: projection failed", hk.display()))?;
    ar.write_complex("delta", &res.delta)?;
    ar.write_complex("gloc", &res.gloc)?;
    let iw = rondo_numerics::matsubara::fermionic_grid(ctl.beta, sigma.len());
    ar.write_real("iw", &[iw.len()], &iw)?;
    ar.write_real("levels", &[2], &[res.eps_f, density.mu])?;
    ar.set_attr("beta", ctl.beta)?;
    ar.set_attr("mu", density.mu)?;
    ar.set_attr("eps_f", res.eps_f)?;
    ar.flush()?;
    let (proj, _) = project::projectors(&mesh, density.mu, ctl.window);
    let mut text = String::from("# f projectors: k index, overlap O(k), then P~_n per band kept\n");
    for (i, p) in proj.iter().enumerate() {
        let ps: Vec<String> = p.p.iter().map(|x| exact(*x)).collect();
        let _ = writeln!(text, "{i} {} {}", exact(p.overlap), ps.join(" "));
    }
    write_text(&case.file("projectors"), &text)?;
    let m = &res.metrics;
    let mut b = Block::new("project", status.iteration);
    b.val("chemical potential", density.mu, Unit::Ry)
        .val("local f level", res.eps_f, Unit::Ry)
        .val("local f charge", m["n_f_loc"], Unit::One)
        .val("overlap min", m["overlap_min"], Unit::One)
        .val("overlap max", m["overlap_max"], Unit::One)
        .count("dropped k points", m["dropped_k"] as u64)
        .count("matsubara frequencies", sigma.len() as u64);
    b.append(&case.file("log"))?;
    let summary: String = m
        .iter()
        .map(|(k, v)| format!("{k:<16} {:>24}\n", exact(*v)))
        .collect();
    write_text(
        &case.file("project.out"),
        &format!("project, iteration {}\n{summary}", status.iteration),
    )?;
    case::write_status(
        case,
        &Status {
            iteration: status.iteration,
            last: "project".into(),
        },
    )?;
    journal(&case.file("journal"), "project", "ok")
}

/// Metrics of the solvers that are energies (logged in Ry).
const ENERGY_METRICS: [&str; 6] = [
    "level",
    "delta_static",
    "sigma_inf",
    "energy_atomic",
    "sigma_iw0_re",
    "sigma_iw0_im",
];

/// `casebook solve`: Σ, G and the density matrix into the archive; rewrites atomic.
pub fn solve(case: &Case, seed: Option<u64>, sweeps: Option<u64>) -> Result<()> {
    let status = case::require_after(case, "solve", &["project", "solve"])?;
    let ctl = read_control(case)?;
    let ar = Archive::open(&case.file("impurity.h5"))?;
    let delta = ar.read_complex("delta")?;
    let (shape, lv) = ar.read_real("levels")?;
    if shape != [2] {
        bail!(
            "{}: /impurity/levels must have shape (2,) = (eps_f, mu), found {shape:?}",
            case.file("impurity.h5").display()
        );
    }
    let beta = ar.attr("beta")?;
    let input = SolverInput {
        delta: &delta,
        level: lv[0] - lv[1],
        u: ctl.u,
        beta,
        seed: seed.unwrap_or(ctl.seed),
        sweeps: sweeps.or(ctl.sweeps),
    };
    let res = run_solver(ctl.solver, &input).with_context(|| {
        format!(
            "{}: impurity solver failed",
            case.file("impurity.h5").display()
        )
    })?;
    ar.write_complex("sigma", &res.sigma)?;
    ar.write_complex("g", &res.g)?;
    let n_f = res.metrics.get("n_f").map(|m| m.0).unwrap_or(f64::NAN);
    let half = |k: &str| res.metrics.get(k).map(|m| m.0).unwrap_or(0.5 * n_f);
    ar.write_real(
        "density_matrix",
        &[2, 2],
        &[half("n_up"), 0.0, 0.0, half("n_dn")],
    )?;
    if let Some(it) = &res.imaginary_time {
        let gl: Vec<f64> = it
            .gl
            .iter()
            .zip(&it.gl_err)
            .flat_map(|(v, e)| [*v, *e])
            .collect();
        ar.write_real("gl", &[it.gl.len(), 2], &gl)?;
        let gt: Vec<f64> = (0..it.tau.len())
            .flat_map(|i| [it.tau[i], it.g_tau[i], it.g_tau_err[i]])
            .collect();
        ar.write_real("gtau", &[it.tau.len(), 3], &gt)?;
    }
    ar.set_attr("n_f", n_f)?;
    ar.set_attr("u", ctl.u)?;
    ar.flush()?;
    let mut b = Block::new("solve", status.iteration);
    let mut text = format!(
        "# impurity metrics of iteration {}: name value [error]\n",
        status.iteration
    );
    for (k, (v, e)) in &res.metrics {
        let unit = if ENERGY_METRICS.contains(k) {
            Unit::Ry
        } else {
            Unit::One
        };
        let label = format!("impurity {k}");
        match e {
            Some(e) => b.val_err(&label, *v, *e, unit),
            None => b.val(&label, *v, unit),
        };
        let _ = writeln!(
            text,
            "{k} {}{}",
            exact(*v),
            e.map(|e| format!(" {}", exact(e))).unwrap_or_default()
        );
    }
    b.append(&case.file("log"))?;
    write_text(&case.file("atomic"), &text)?;
    write_text(
        &case.file("solve.out"),
        &format!(
            "solve ({:?}), iteration {}\n{text}",
            ctl.solver, status.iteration
        ),
    )?;
    case::write_status(
        case,
        &Status {
            iteration: status.iteration,
            last: "solve".into(),
        },
    )?;
    journal(&case.file("journal"), "solve", "ok")
}

/// `casebook update`: μ, charges and energy; rewrites density, density.prev, energies and
/// the restart file.
pub fn update(case: &Case, restart_mib: Option<u64>) -> Result<()> {
    let status = case::require_after(case, "update", &["solve", "update"])?;
    let ctl = read_control(case)?;
    let volume = case::read_volume(case)?;
    let mesh = msio::read_hk(&case.file("hamiltonian.npy"))?;
    let ar = Archive::open(&case.file("impurity.h5"))?;
    let sigma = ar.read_complex("sigma")?;
    if sigma.len() < 4 {
        bail!(
            "{}: /impurity/sigma needs at least 4 Matsubara frequencies for its tail, found {}",
            case.file("impurity.h5").display(),
            sigma.len()
        );
    }
    // A repeated update starts again from the density the first one started from.
    let prev_file = if status.last == "update" {
        "density.prev"
    } else {
        "density"
    };
    let prev = case::read_density(&case.file(prev_file))?;
    let res = update::update(&DEMO, &mesh, &sigma, ctl.beta, ctl.electrons, volume, &prev)
        .with_context(|| format!("{}: density update failed", case.dir.display()))?;
    case::write_density(&case.file("density.prev"), &prev)?;
    case::write_case_density(case, &res.density)?;
    let m = &res.metrics;
    let rows = [
        ("total", "energy"),
        ("one-body", "e_one_body"),
        ("interaction", "e_interaction"),
        ("feedback", "e_feedback"),
        ("core", "e_core"),
    ];
    let mut text = String::from("# energy per site: part, eV, Ry\n");
    for (name, k) in rows {
        let _ = writeln!(text, "{name} {} {}", exact(m[k]), exact(m[k] / RYDBERG_EV));
    }
    write_text(&case.file("energies"), &text)?;
    restart::write(
        &case.file("restart"),
        restart_mib.unwrap_or(ctl.restart_mib),
        status.iteration,
        &restart_state(&res.density, &sigma),
    )?;
    log_update(case, status.iteration, m)?;
    let summary: String = m
        .iter()
        .map(|(k, v)| format!("{k:<16} {:>24}\n", exact(*v)))
        .collect();
    write_text(
        &case.file("update.out"),
        &format!("update, iteration {}\n{summary}", status.iteration),
    )?;
    case::write_status(
        case,
        &Status {
            iteration: status.iteration,
            last: "update".into(),
        },
    )?;
    journal(&case.file("journal"), "update", "ok")
}

fn log_update(
    case: &Case,
    iteration: u64,
    m: &std::collections::BTreeMap<&'static str, f64>,
) -> Result<()> {
    let mut b = Block::new("update", iteration);
    b.val("chemical potential", m["mu"], Unit::Ry)
        .val("chemical potential plateau", m["mu_plateau"], Unit::Ry)
        .val("f charge", m["n_f"], Unit::One)
        .val("c charge", m["n_c"], Unit::One)
        .val("total charge", m["n_total"], Unit::One)
        .val("charge change", m["delta_n_f"], Unit::One)
        .val("one-body energy", m["e_one_body"], Unit::Ry)
        .val("interaction energy", m["e_interaction"], Unit::Ry)
        .val("feedback energy", m["e_feedback"], Unit::Ry)
        .val("core energy", m["e_core"], Unit::Ry)
        .val("total energy", m["energy"], Unit::Ry);
    if let Some(d) = m.get("delta_energy") {
        b.val("energy change", *d, Unit::Ry);
    }
    b.append(&case.file("log"))
}

/// `casebook restore`: put the density and Σ of the restart file back into the case (after
/// an interrupted or abandoned iteration); the next sub-step is band.
pub fn restore(case: &Case) -> Result<()> {
    let path = case.file("restart");
    let (iteration, state) = restart::read(&path)?;
    if state.len() < 4 || state.len() % 2 != 0 {
        bail!(
            "{}: restart state has {} values, expected 4 + 2 n_w",
            path.display(),
            state.len()
        );
    }
    let density = Density {
        n_f: state[0],
        n_c: state[1],
        mu: state[2],
        energy: state[3].is_finite().then_some(state[3]),
    };
    let sigma: Vec<Complex64> = state[4..]
        .chunks_exact(2)
        .map(|c| Complex64::new(c[0], c[1]))
        .collect();
    let ar = Archive::open(&case.file("impurity.h5"))?;
    ar.write_complex("sigma", &sigma)?;
    ar.flush()?;
    case::write_case_density(case, &density)?;
    let mut b = Block::new("restore", iteration);
    b.val("f charge", density.n_f, Unit::One)
        .val("chemical potential", density.mu, Unit::Ry);
    b.append(&case.file("log"))?;
    case::write_status(
        case,
        &Status {
            iteration,
            last: if iteration == 0 { "init" } else { "update" }.into(),
        },
    )?;
    journal(
        &case.file("journal"),
        "restore",
        &format!("iteration {iteration}"),
    )
}
