//! Shared helpers of the casebook tests: the two real binaries (casebook and model-solid),
//! making a case folder from the shipped start files, and readers for the files an
//! orchestrator would read (the text log, `key = value` files, the HDF5 archive, .npy).
#![allow(dead_code)]

use hdf5_metno as hdf5;
use num_complex::Complex64;
use std::path::{Path, PathBuf};
use std::process::{Command, Output};
use std::sync::{Mutex, MutexGuard, OnceLock};

/// The Rydberg energy in eV used by the log (CODATA 2018), as a reader of the log has it.
pub const RYDBERG_EV: f64 = 13.605_693_122_994;

/// The casebook binary built for these tests.
pub fn casebook() -> PathBuf {
    PathBuf::from(env!("CARGO_BIN_EXE_casebook"))
}

/// The model-solid binary beside casebook in the same target directory and profile; built
/// once (with the cargo running these tests) when `cargo test -p casebook` did not build it.
pub fn model_solid() -> PathBuf {
    static BUILT: OnceLock<PathBuf> = OnceLock::new();
    BUILT
        .get_or_init(|| {
            let bin = casebook().with_file_name("model-solid");
            let profile_dir = bin.parent().map(Path::to_path_buf).unwrap_or_default();
            let target = profile_dir
                .parent()
                .map(Path::to_path_buf)
                .unwrap_or_default();
            let profile = profile_dir
                .file_name()
                .and_then(|n| n.to_str())
                .unwrap_or("debug")
                .to_string();
            let profile = if profile == "debug" {
                "dev".into()
            } else {
                profile
            };
            let manifest = repo().join("Cargo.toml");
            let _quiet = no_fork_now();
            let out = Command::new(env!("CARGO"))
                .args([
                    "build",
                    "-p",
                    "model-solid",
                    "--bin",
                    "model-solid",
                    "--profile",
                ])
                .arg(&profile)
                .arg("--manifest-path")
                .arg(&manifest)
                .arg("--target-dir")
                .arg(&target)
                .output()
                .unwrap_or_else(|e| panic!("cannot run cargo to build model-solid: {e}"));
            assert!(
                out.status.success() && bin.is_file(),
                "building model-solid failed: {}",
                String::from_utf8_lossy(&out.stderr)
            );
            bin
        })
        .clone()
}

/// The repository root.
pub fn repo() -> PathBuf {
    PathBuf::from(env!("CARGO_MANIFEST_DIR"))
        .join("../..")
        .canonicalize()
        .unwrap_or_else(|e| panic!("repository root: {e}"))
}

/// The shipped start files (examples/start).
pub fn start() -> PathBuf {
    repo().join("examples").join("start")
}

/// Held while this test process has an HDF5 file open, and while it starts a child. The
/// HDF5 library opens files without close-on-exec and locks them (flock): a child forked by
/// another test thread while a file is open inherits the descriptor and its lock, and
/// holds it for as long as it runs, so a casebook step that opens that archive for writing
/// fails with "unable to lock file" (seen once in CI).
pub fn no_fork_now() -> MutexGuard<'static, ()> {
    static LOCK: Mutex<()> = Mutex::new(());
    LOCK.lock()
        .unwrap_or_else(std::sync::PoisonError::into_inner)
}

/// Start `cmd` while no HDF5 file of this process is open (see [`no_fork_now`]).
pub fn spawn(cmd: &mut Command) -> std::process::Child {
    let _quiet = no_fork_now();
    cmd.spawn()
        .unwrap_or_else(|e| panic!("cannot start {:?}: {e}", cmd.get_program()))
}

/// Run a program in `dir`.
pub fn run(bin: &Path, dir: &Path, args: &[&str]) -> Output {
    let mut cmd = Command::new(bin);
    cmd.args(args)
        .current_dir(dir)
        .stdout(std::process::Stdio::piped())
        .stderr(std::process::Stdio::piped());
    spawn(&mut cmd)
        .wait_with_output()
        .unwrap_or_else(|e| panic!("cannot run {}: {e}", bin.display()))
}

/// Run a program in `dir` and require success.
pub fn ok(bin: &Path, dir: &Path, args: &[&str]) {
    let out = run(bin, dir, args);
    assert!(
        out.status.success(),
        "{} {args:?} failed: {}",
        bin.display(),
        String::from_utf8_lossy(&out.stderr)
    );
}

/// The physical settings of a test case.
#[derive(Debug, Clone)]
pub struct Setup {
    pub volume: &'static str,
    pub kmesh: &'static str,
    pub temperature: &'static str,
    pub electrons: &'static str,
    pub u: &'static str,
    pub solver: &'static str,
    pub seed: &'static str,
    pub sweeps: Option<&'static str>,
}

/// The demo's settings at one point (examples/model-sweep.yaml, 28 Å³, 300 K).
pub const DEMO: Setup = Setup {
    volume: "28",
    kmesh: "12",
    temperature: "300",
    electrons: "1.8",
    u: "6.0",
    solver: "hubbard-i",
    seed: "0",
    sweeps: None,
};

/// `casebook init` of `dir/name` from the start files.
pub fn init_case(dir: &Path, name: &str, s: &Setup, extra: &[&str]) -> PathBuf {
    let st = start();
    let density = st.join("density.json");
    let sigma = st.join("sigma.npy");
    let mut args = vec![
        "init",
        name,
        "--density",
        density.to_str().unwrap_or_default(),
        "--sigma",
        sigma.to_str().unwrap_or_default(),
        "--volume",
        s.volume,
        "--kmesh",
        s.kmesh,
        "--temperature",
        s.temperature,
        "--electrons",
        s.electrons,
        "--u",
        s.u,
        "--solver",
        s.solver,
        "--seed",
        s.seed,
        "--emin",
        "-10",
        "--emax",
        "10",
    ];
    if let Some(sw) = s.sweeps {
        args.extend(["--sweeps", sw]);
    }
    args.extend_from_slice(extra);
    ok(&casebook(), dir, &args);
    dir.join(name)
}

/// Every number of the log lines `:: LABEL = value unit` (in order), with the unit; lines
/// that carry a word instead (unit `-`) are left out.
pub fn log_values(log: &str, label: &str) -> Vec<(f64, String)> {
    log.lines()
        .filter_map(|l| l.strip_prefix(":: "))
        .filter_map(|l| l.split_once('='))
        .filter(|(k, v)| k.trim() == label && !v.trim_end().ends_with(" -"))
        .map(|(_, v)| {
            let toks: Vec<&str> = v.split_whitespace().collect();
            let x: f64 = toks
                .first()
                .and_then(|t| t.parse().ok())
                .unwrap_or_else(|| panic!("log line `{label}`: no number in `{v}`"));
            (x, toks.last().map(|u| u.to_string()).unwrap_or_default())
        })
        .collect()
}

/// The last value of a log label, converted to eV when its unit is Ry.
pub fn log_last(case: &Path, label: &str) -> (f64, String) {
    let name = case
        .file_name()
        .and_then(|n| n.to_str())
        .unwrap_or_default();
    let text = std::fs::read_to_string(case.join(format!("{name}.log")))
        .unwrap_or_else(|e| panic!("read the log: {e}"));
    log_values(&text, label)
        .pop()
        .unwrap_or_else(|| panic!("no log line `{label}`"))
}

/// A case file by suffix.
pub fn file(case: &Path, suffix: &str) -> PathBuf {
    let name = case
        .file_name()
        .and_then(|n| n.to_str())
        .unwrap_or_default();
    case.join(format!("{name}.{suffix}"))
}

/// A value of a `key = value` file.
pub fn kv(path: &Path, key: &str) -> f64 {
    let text = std::fs::read_to_string(path).unwrap_or_else(|e| panic!("{}: {e}", path.display()));
    text.lines()
        .filter(|l| !l.starts_with('#'))
        .filter_map(|l| l.split_once('='))
        .find(|(k, _)| k.trim() == key)
        .and_then(|(_, v)| v.trim().parse().ok())
        .unwrap_or_else(|| panic!("{}: no number `{key}`", path.display()))
}

/// A number of a model-solid JSON file (metrics, density.json, levels.json).
pub fn json(path: &Path, key: &str) -> f64 {
    let text = std::fs::read_to_string(path).unwrap_or_else(|e| panic!("{}: {e}", path.display()));
    let v: serde_json::Value =
        serde_json::from_str(&text).unwrap_or_else(|e| panic!("{}: {e}", path.display()));
    v[key]
        .as_f64()
        .or_else(|| v[key]["value"].as_f64())
        .unwrap_or_else(|| panic!("{}: no number `{key}`", path.display()))
}

/// A complex128 .npy array.
pub fn npy_complex(path: &Path) -> Vec<Complex64> {
    let a =
        rondo_numerics::npy::read_any(path).unwrap_or_else(|e| panic!("{}: {e}", path.display()));
    a.as_complex()
        .unwrap_or_else(|| panic!("{}: not complex", path.display()))
        .to_vec()
}

/// A complex function stored as an (n, 2) dataset of the archive.
pub fn h5_complex(case: &Path, name: &str) -> Vec<Complex64> {
    let _quiet = no_fork_now();
    let f = hdf5::File::open(file(case, "impurity.h5")).unwrap_or_else(|e| panic!("{e}"));
    let ds = f
        .dataset(&format!("impurity/{name}"))
        .unwrap_or_else(|e| panic!("/impurity/{name}: {e}"));
    assert_eq!(ds.shape().get(1), Some(&2), "/impurity/{name} shape");
    let flat: Vec<f64> = ds.read_raw().unwrap_or_else(|e| panic!("{e}"));
    flat.chunks_exact(2)
        .map(|c| Complex64::new(c[0], c[1]))
        .collect()
}

/// A real dataset of the archive (row-major).
pub fn h5_real(case: &Path, name: &str) -> Vec<f64> {
    let _quiet = no_fork_now();
    let f = hdf5::File::open(file(case, "impurity.h5")).unwrap_or_else(|e| panic!("{e}"));
    f.dataset(&format!("impurity/{name}"))
        .and_then(|d| d.read_raw())
        .unwrap_or_else(|e| panic!("/impurity/{name}: {e}"))
}

/// A scalar attribute of /impurity.
pub fn h5_attr(case: &Path, name: &str) -> f64 {
    let _quiet = no_fork_now();
    let f = hdf5::File::open(file(case, "impurity.h5")).unwrap_or_else(|e| panic!("{e}"));
    f.group("impurity")
        .and_then(|g| g.attr(name))
        .and_then(|a| a.read_scalar())
        .unwrap_or_else(|e| panic!("attribute {name}: {e}"))
}

/// Assert two complex arrays are bit for bit equal.
pub fn assert_bits_eq(what: &str, a: &[Complex64], b: &[Complex64]) {
    assert_eq!(a.len(), b.len(), "{what}: lengths differ");
    for (i, (x, y)) in a.iter().zip(b).enumerate() {
        assert!(
            x.re.to_bits() == y.re.to_bits() && x.im.to_bits() == y.im.to_bits(),
            "{what}[{i}]: {x} != {y}"
        );
    }
}

/// Assert two doubles are the same double.
pub fn assert_same(what: &str, a: f64, b: f64) {
    assert_eq!(a.to_bits(), b.to_bits(), "{what}: {a:e} != {b:e}");
}
