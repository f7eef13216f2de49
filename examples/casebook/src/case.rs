//! The case folder: the names of its files, the `key = value` text format that most of them
//! use, and the small typed files (control, lattice, k points, density, status) read by more
//! than one sub-step. Owns file naming and parsing; the physics stays in `model-solid`.

use anyhow::{bail, Context, Result};
use model_solid::io::Density;
use std::fmt::Write as _;
use std::path::{Path, PathBuf};

/// Every file of a case folder, as suffixes of `<name>.` where `<name>` is the folder's
/// own name (docs/casebook.md, "The case folder").
pub const FILES: [&str; 23] = [
    "control",
    "lattice",
    "orbitals",
    "kpoints",
    "version",
    "density",
    "density.json",
    "density.prev",
    "status",
    "levels",
    "hamiltonian.npy",
    "eigen",
    "projectors",
    "impurity.h5",
    "atomic",
    "energies",
    "log",
    "journal",
    "restart",
    "band.out",
    "project.out",
    "solve.out",
    "update.out",
];

/// A case folder.
#[derive(Debug, Clone)]
pub struct Case {
    /// The folder.
    pub dir: PathBuf,
    /// Its name: the prefix of every file in it.
    pub name: String,
}

impl Case {
    /// A case folder by path (it need not exist yet).
    pub fn at(dir: &Path) -> Result<Case> {
        let name = dir
            .file_name()
            .and_then(|n| n.to_str())
            .filter(|n| !n.is_empty() && *n != "." && *n != "..")
            .with_context(|| {
                format!(
                    "{}: a case folder needs a plain UTF-8 name (it prefixes every file in it)",
                    dir.display()
                )
            })?;
        Ok(Case {
            dir: dir.to_path_buf(),
            name: name.to_string(),
        })
    }

    /// An existing case folder (made by `casebook init`).
    pub fn open(dir: &Path) -> Result<Case> {
        let case = Case::at(dir)?;
        if !case.file("control").is_file() {
            bail!(
                "{}: not a case folder (no {}); make one with `casebook init`",
                dir.display(),
                case.file("control").display()
            );
        }
        Ok(case)
    }

    /// Path of the case file with this suffix.
    pub fn file(&self, suffix: &str) -> PathBuf {
        self.dir.join(format!("{}.{suffix}", self.name))
    }

    /// The hand-off folder of the resident mode.
    pub fn handoff(&self) -> PathBuf {
        self.dir.join("handoff")
    }
}

/// Format an f64 so that reading it back gives the same double (shortest round trip).
pub fn exact(x: f64) -> String {
    format!("{x:e}")
}

/// The `key = value` lines of a text file, with their line numbers.
#[derive(Debug, Clone)]
pub struct Kv {
    path: PathBuf,
    entries: Vec<(String, String, usize)>,
}

impl Kv {
    /// Read a `key = value` file; `#` starts a comment, blank lines are skipped.
    pub fn read(path: &Path) -> Result<Kv> {
        let text = std::fs::read_to_string(path)
            .with_context(|| format!("{}: cannot read", path.display()))?;
        let mut entries = Vec::new();
        for (i, line) in text.lines().enumerate() {
            let line = line.split('#').next().unwrap_or("").trim();
            if line.is_empty() {
                continue;
            }
            let Some((k, v)) = line.split_once('=') else {
                bail!(
                    "{}:{}: expected `key = value`, found `{line}`",
                    path.display(),
                    i + 1
                );
            };
            entries.push((k.trim().to_string(), v.trim().to_string(), i + 1));
        }
        Ok(Kv {
            path: path.to_path_buf(),
            entries,
        })
    }

    /// The raw value of a key, if present.
    pub fn opt_str(&self, key: &str) -> Option<(&str, usize)> {
        self.entries
            .iter()
            .rev()
            .find(|(k, _, _)| k == key)
            .map(|(_, v, l)| (v.as_str(), *l))
    }

    /// The raw value of a required key.
    pub fn str(&self, key: &str) -> Result<&str> {
        self.opt_str(key).map(|(v, _)| v).with_context(|| {
            format!(
                "{}: the key `{key}` is missing; add a line `{key} = ...`",
                self.path.display()
            )
        })
    }

    /// A finite f64, if present.
    pub fn opt_f64(&self, key: &str) -> Result<Option<f64>> {
        let Some((v, line)) = self.opt_str(key) else {
            return Ok(None);
        };
        match v.parse::<f64>() {
            Ok(x) if x.is_finite() => Ok(Some(x)),
            _ => bail!(
                "{}:{line}: `{key}` must be a finite number, found `{v}`",
                self.path.display()
            ),
        }
    }

    /// A required finite f64.
    pub fn f64(&self, key: &str) -> Result<f64> {
        self.str(key)?;
        self.opt_f64(key).map(|x| x.unwrap_or_default())
    }

    /// A non-negative integer, if present.
    pub fn opt_u64(&self, key: &str) -> Result<Option<u64>> {
        let Some((v, line)) = self.opt_str(key) else {
            return Ok(None);
        };
        v.parse::<u64>().map(Some).map_err(|_| {
            anyhow::anyhow!(
                "{}:{line}: `{key}` must be a non-negative integer, found `{v}`",
                self.path.display()
            )
        })
    }

    /// A required non-negative integer.
    pub fn u64(&self, key: &str) -> Result<u64> {
        self.str(key)?;
        self.opt_u64(key).map(|x| x.unwrap_or_default())
    }
}

/// Write a `key = value` file atomically (temporary name, fsync, rename).
pub fn write_kv(path: &Path, header: &str, entries: &[(&str, String)]) -> Result<()> {
    let mut text = String::new();
    for line in header.lines() {
        let _ = writeln!(text, "# {line}");
    }
    for (k, v) in entries {
        let _ = writeln!(text, "{k} = {v}");
    }
    write_text(path, &text)
}

/// Write a text file atomically (temporary name, fsync, rename).
pub fn write_text(path: &Path, text: &str) -> Result<()> {
    rondo_numerics::npy::write_atomic(path, text.as_bytes())
        .with_context(|| format!("{}: cannot write", path.display()))
}

/// The structure file: the volume per site of the simple cubic lattice.
pub fn read_volume(case: &Case) -> Result<f64> {
    let path = case.file("lattice");
    let kv = Kv::read(&path)?;
    let lattice = kv.str("lattice")?;
    if lattice != "simple-cubic" {
        bail!(
            "{}: lattice `{lattice}` is not supported (only simple-cubic)",
            path.display()
        );
    }
    let v = kv.f64("volume")?;
    if v <= 0.0 {
        bail!("{}: volume must be positive, found {v}", path.display());
    }
    Ok(v)
}

/// The k-point file: mesh size L and the number of irreducible points listed.
pub fn read_kmesh(case: &Case) -> Result<(usize, usize)> {
    let path = case.file("kpoints");
    let kv = Kv::read(&path)?;
    let l = kv.u64("mesh")?;
    let n = kv.u64("points")?;
    if !(1..=200).contains(&l) {
        bail!("{}: mesh must lie in 1..=200, found {l}", path.display());
    }
    Ok((l as usize, n as usize))
}

/// Read a density file (`<name>.density` or `.density.prev`, eV), validated as in model-solid.
pub fn read_density(path: &Path) -> Result<Density> {
    let kv = Kv::read(path)?;
    let d = Density {
        n_f: kv.f64("n_f")?,
        n_c: kv.f64("n_c")?,
        mu: kv.f64("mu")?,
        energy: kv.opt_f64("energy")?,
    };
    if !(0.0..=2.0).contains(&d.n_f) || !(0.0..=2.0).contains(&d.n_c) {
        bail!(
            "{}: occupations must lie in [0, 2] per orbital, found n_f = {}, n_c = {}",
            path.display(),
            d.n_f,
            d.n_c
        );
    }
    Ok(d)
}

/// Write a density file (eV, every number exact).
pub fn write_density(path: &Path, d: &Density) -> Result<()> {
    let mut e = vec![
        ("n_f", exact(d.n_f)),
        ("n_c", exact(d.n_c)),
        ("mu", exact(d.mu)),
    ];
    if let Some(x) = d.energy {
        e.push(("energy", exact(x)));
    }
    write_kv(
        path,
        "density of the case: f and c charge per site (both spins), chemical potential and\n\
         total energy per site in eV",
        &e,
    )
}

/// Write the case's density: `<name>.density` and the same numbers as
/// `<name>.density.json` (model-solid's density.json, the same bytes), the form a mixer
/// of the orchestrator reads and writes.
pub fn write_case_density(case: &Case, d: &Density) -> Result<()> {
    write_density(&case.file("density"), d)?;
    model_solid::io::write_json(&case.file("density.json"), d)
}

/// Which sub-step ran last, in which iteration (`<name>.status`).
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct Status {
    /// Iteration number (0 after init; band starts the next one).
    pub iteration: u64,
    /// The last sub-step that completed: init, band, project, solve or update.
    pub last: String,
}

/// Read the status file.
pub fn read_status(case: &Case) -> Result<Status> {
    let kv = Kv::read(&case.file("status"))?;
    Ok(Status {
        iteration: kv.u64("iteration")?,
        last: kv.str("last")?.to_string(),
    })
}

/// Write the status file.
pub fn write_status(case: &Case, s: &Status) -> Result<()> {
    write_kv(
        &case.file("status"),
        "last sub-step completed and its iteration",
        &[
            ("iteration", s.iteration.to_string()),
            ("last", s.last.clone()),
        ],
    )
}

/// Refuse a sub-step whose predecessor has not run in this iteration.
pub fn require_after(case: &Case, step: &str, allowed: &[&str]) -> Result<Status> {
    let s = read_status(case)?;
    if !allowed.contains(&s.last.as_str()) {
        bail!(
            "{}: `{step}` cannot run now: the last sub-step was `{}` (iteration {}); `{step}` runs after {}",
            case.file("status").display(),
            s.last,
            s.iteration,
            allowed.join(" or ")
        );
    }
    Ok(s)
}
