//! The case folder as real codes lay it out: at least 20 files, sub-steps that read and
//! rewrite them in place (the log appended, the HDF5 archive and the restart file rewritten
//! as the same files), the order of sub-steps enforced, a restart file of the chosen size
//! whose content follows from the state alone, and `restore` from it.

mod common;

use common::*;
use std::os::unix::fs::MetadataExt;
use std::path::Path;

fn inode(p: &Path) -> u64 {
    std::fs::metadata(p)
        .unwrap_or_else(|e| panic!("{}: {e}", p.display()))
        .ino()
}

fn bytes(p: &Path) -> Vec<u8> {
    std::fs::read(p).unwrap_or_else(|e| panic!("{}: {e}", p.display()))
}

const SMALL: Setup = Setup { kmesh: "6", ..DEMO };

#[test]
fn the_case_folder_holds_twenty_files_and_sub_steps_rewrite_them_in_place() {
    let tmp = tempfile::tempdir().unwrap_or_else(|e| panic!("{e}"));
    let case = init_case(tmp.path(), "fold", &SMALL, &[]);
    let files: Vec<_> = std::fs::read_dir(&case)
        .unwrap_or_else(|e| panic!("{e}"))
        .flatten()
        .filter(|e| e.path().is_file())
        .collect();
    assert!(
        files.len() >= 20,
        "the case folder holds {} files",
        files.len()
    );
    for f in &files {
        let name = f.file_name().to_string_lossy().into_owned();
        assert!(
            name.starts_with("fold."),
            "{name} is not prefixed by the case name"
        );
    }
    assert_eq!(
        std::fs::metadata(file(&case, "restart"))
            .map(|m| m.len())
            .ok(),
        Some(1 << 20)
    );

    let cb = casebook();
    let (log, h5, restart) = (
        file(&case, "log"),
        file(&case, "impurity.h5"),
        file(&case, "restart"),
    );
    let (log_ino, h5_ino, restart_ino) = (inode(&log), inode(&h5), inode(&restart));
    let mut log_before = bytes(&log);
    let step = |name: &str, rewritten: &[&str]| {
        let before: Vec<Vec<u8>> = rewritten.iter().map(|s| bytes(&file(&case, s))).collect();
        ok(&cb, tmp.path(), &[name, "fold"]);
        for (s, b) in rewritten.iter().zip(before) {
            assert_ne!(bytes(&file(&case, s)), b, "{name} did not rewrite {s}");
        }
    };
    for (name, rewritten) in [
        (
            "band",
            &["hamiltonian.npy", "eigen", "levels", "status", "band.out"][..],
        ),
        (
            "project",
            &["impurity.h5", "projectors", "status", "project.out"][..],
        ),
        (
            "solve",
            &["impurity.h5", "atomic", "status", "solve.out"][..],
        ),
        (
            "update",
            &["density", "energies", "restart", "update.out"][..],
        ),
    ] {
        step(name, rewritten);
        // the log grows in place: same file, old text kept as its start, one block added
        let now = bytes(&log);
        assert_eq!(inode(&log), log_ino, "{name} replaced the log");
        assert!(
            now.starts_with(&log_before),
            "{name} changed earlier log lines"
        );
        let added = String::from_utf8_lossy(&now[log_before.len()..]).into_owned();
        assert!(
            added.starts_with(&format!("== {name} iteration 1\n")),
            "{added}"
        );
        assert!(added.ends_with(&format!("== end {name}\n")), "{added}");
        log_before = now;
    }
    // the archive and the restart file are rewritten as the same files
    assert_eq!(
        inode(&h5),
        h5_ino,
        "the archive was replaced, not rewritten"
    );
    assert_eq!(
        inode(&restart),
        restart_ino,
        "the restart file was replaced, not rewritten"
    );
    assert_eq!(
        std::fs::metadata(&restart).map(|m| m.len()).ok(),
        Some(1 << 20)
    );
    // the previous density is the start density
    assert_eq!(kv(&file(&case, "density.prev"), "n_f"), 1.0);
    // a second band is a warm start from the eigenvalue file
    ok(&cb, tmp.path(), &["band", "fold"]);
    let text = String::from_utf8_lossy(&bytes(&log)).into_owned();
    let changes = log_values(&text, "eigenvalue change");
    assert_eq!(
        changes.len(),
        1,
        "one warm start logged (the first band is cold)"
    );
    assert!(changes[0].0 > 0.0 && changes[0].1 == "Ry", "{changes:?}");
    assert!(text.contains("== band iteration 2\n"));
}

#[test]
fn sub_steps_run_in_order_and_say_what_to_run() {
    let tmp = tempfile::tempdir().unwrap_or_else(|e| panic!("{e}"));
    let case = init_case(tmp.path(), "order", &SMALL, &[]);
    let before = bytes(&file(&case, "impurity.h5"));
    let out = run(&casebook(), tmp.path(), &["solve", "order"]);
    let err = String::from_utf8_lossy(&out.stderr);
    assert!(!out.status.success());
    assert!(
        err.contains("order.status") && err.contains("`init`") && err.contains("after project"),
        "{err}"
    );
    assert_eq!(
        bytes(&file(&case, "impurity.h5")),
        before,
        "a refused step wrote the archive"
    );
    // init does not overwrite a case unless told to
    let st = start().join("density.json");
    let sg = start().join("sigma.npy");
    #[rustfmt::skip]
    let again = ["init", "order", "--density", st.to_str().unwrap_or_default(), "--sigma",
        sg.to_str().unwrap_or_default(), "--volume", "27", "--kmesh", "4", "--temperature",
        "300", "--electrons", "1.8", "--u", "6"];
    let out = run(&casebook(), tmp.path(), &again);
    let err = String::from_utf8_lossy(&out.stderr);
    assert!(!out.status.success() && err.contains("--force"), "{err}");
    assert_eq!(kv(&file(&case, "lattice"), "volume"), 28.0);
    ok(
        &casebook(),
        tmp.path(),
        &[&again[..], &["--force"]].concat(),
    );
    assert_eq!(kv(&file(&case, "lattice"), "volume"), 27.0);
    let out = run(&casebook(), tmp.path(), &["band", "missing"]);
    let err = String::from_utf8_lossy(&out.stderr);
    assert!(
        !out.status.success() && err.contains("not a case folder"),
        "{err}"
    );
}

#[test]
fn restart_files_have_the_chosen_size_follow_from_the_state_and_restore_it() {
    let tmp = tempfile::tempdir().unwrap_or_else(|e| panic!("{e}"));
    let cases: Vec<_> = ["r1", "r2"]
        .iter()
        .map(|n| {
            let c = init_case(tmp.path(), n, &SMALL, &["--restart-mib", "3"]);
            for s in ["band", "project", "solve", "update"] {
                ok(&casebook(), tmp.path(), &[s, n]);
            }
            c
        })
        .collect();
    let (a, b) = (
        bytes(&file(&cases[0], "restart")),
        bytes(&file(&cases[1], "restart")),
    );
    assert_eq!(a.len(), 3 << 20);
    assert!(
        a == b,
        "two runs from the same start wrote different restart files"
    );
    assert_eq!(&a[..8], b"CBRSTRT1");
    // a smaller size for one run, rewriting the same file
    ok(
        &casebook(),
        tmp.path(),
        &["update", "r1", "--restart-mib", "0"],
    );
    let small = bytes(&file(&cases[0], "restart"));
    assert!(
        small.len() < 1 << 20 && small[..8] == a[..8],
        "{}",
        small.len()
    );
    // restore: the density of the restart file comes back
    let c = &cases[0];
    let want = std::fs::read_to_string(file(c, "density")).unwrap_or_default();
    std::fs::write(file(c, "density"), "n_f = 0.5\nn_c = 1.3\nmu = 0.1\n")
        .unwrap_or_else(|e| panic!("{e}"));
    ok(&casebook(), tmp.path(), &["restore", "r1"]);
    assert_eq!(
        std::fs::read_to_string(file(c, "density")).unwrap_or_default(),
        want
    );
    ok(&casebook(), tmp.path(), &["band", "r1"]);
}

/// The arguments of `init` for `name` with the SMALL settings and the given start files.
fn init_args<'a>(name: &'a str, density: &'a str, sigma: &'a str, volume: &'a str) -> Vec<&'a str> {
    vec![
        "init",
        name,
        "--density",
        density,
        "--sigma",
        sigma,
        "--volume",
        volume,
        "--kmesh",
        SMALL.kmesh,
        "--temperature",
        SMALL.temperature,
        "--electrons",
        SMALL.electrons,
        "--u",
        SMALL.u,
        "--solver",
        SMALL.solver,
        "--emin",
        "-10",
        "--emax",
        "10",
        "--reuse",
    ]
}

#[test]
fn init_reuse_keeps_the_case_and_takes_in_a_mixed_density_and_sigma() {
    let tmp = tempfile::tempdir().unwrap_or_else(|e| panic!("{e}"));
    let cb = casebook();
    let case = init_case(tmp.path(), "re", &SMALL, &[]);
    for s in ["band", "project", "solve", "update"] {
        ok(&cb, tmp.path(), &[s, "re"]);
    }
    let (log, eigen, h5) = (
        file(&case, "log"),
        file(&case, "eigen"),
        file(&case, "impurity.h5"),
    );
    let (log_before, eigen_before, h5_ino) = (bytes(&log), bytes(&eigen), inode(&h5));
    // the density.json twin holds the density's numbers
    assert_same(
        "n_f",
        json(&file(&case, "density.json"), "n_f"),
        kv(&file(&case, "density"), "n_f"),
    );
    // a "mixed" state: a density.json and an archive (read only, as an orchestrator places it)
    let mixed = tmp.path().join("mixed.h5");
    std::fs::copy(&h5, &mixed).unwrap_or_else(|e| panic!("{e}"));
    let mut perm = std::fs::metadata(&mixed)
        .unwrap_or_else(|e| panic!("{e}"))
        .permissions();
    perm.set_readonly(true);
    std::fs::set_permissions(&mixed, perm).unwrap_or_else(|e| panic!("{e}"));
    let sigma_mixed = h5_complex(&case, "sigma");
    let dj = tmp.path().join("mixed.json");
    std::fs::write(
        &dj,
        "{\"n_f\": 0.95, \"n_c\": 0.85, \"mu\": -0.25, \"energy\": -1.7}\n",
    )
    .unwrap_or_else(|e| panic!("{e}"));
    let (d, m) = (dj.display().to_string(), mixed.display().to_string());
    // first the start's (zero) Σ from a .npy, then the archive's
    let st = start();
    let (d0, s0) = (st.join("density.json"), st.join("sigma.npy"));
    let (d0, s0) = (d0.display().to_string(), s0.display().to_string());
    ok(&cb, tmp.path(), &init_args("re", &d0, &s0, SMALL.volume));
    assert_bits_eq(
        "sigma from the .npy",
        &h5_complex(&case, "sigma"),
        &npy_complex(&st.join("sigma.npy")),
    );
    ok(&cb, tmp.path(), &init_args("re", &d, &m, SMALL.volume));
    assert_eq!(kv(&file(&case, "density"), "n_f"), 0.95);
    assert_eq!(kv(&file(&case, "density"), "mu"), -0.25);
    assert_bits_eq("sigma taken in", &h5_complex(&case, "sigma"), &sigma_mixed);
    assert_eq!(inode(&h5), h5_ino, "the archive is rewritten in place");
    assert_eq!(
        bytes(&eigen),
        eigen_before,
        "the eigenvalues stay for the warm start"
    );
    let after = bytes(&log);
    assert!(
        after.starts_with(&log_before) && after.len() > log_before.len(),
        "the log is appended"
    );
    ok(&cb, tmp.path(), &["band", "re"]);
    // the settings must be the case's
    let out = run(&cb, tmp.path(), &init_args("re", &d0, &s0, "29"));
    let err = String::from_utf8_lossy(&out.stderr);
    assert_eq!(out.status.code(), Some(1), "{err}");
    assert!(
        err.contains("re.lattice") && err.contains("`volume` is 2.8e1"),
        "{err}"
    );
    // without --reuse an existing case is refused
    let mut plain = init_args("re", &d0, &s0, SMALL.volume);
    plain.pop();
    let out = run(&cb, tmp.path(), &plain);
    assert!(
        String::from_utf8_lossy(&out.stderr).contains("--reuse"),
        "{out:?}"
    );
}

#[test]
fn with_source_date_epoch_the_same_steps_give_byte_identical_case_folders() {
    let tmp = tempfile::tempdir().unwrap_or_else(|e| panic!("{e}"));
    let cb = casebook();
    for name in ["e1", "e2"] {
        init_case(tmp.path(), name, &SMALL, &["--restart-mib", "0"]);
        for s in ["band", "project", "solve", "update"] {
            let mut cmd = std::process::Command::new(&cb);
            cmd.args([s, name])
                .current_dir(tmp.path())
                .env("SOURCE_DATE_EPOCH", "0")
                .stdout(std::process::Stdio::piped())
                .stderr(std::process::Stdio::piped());
            let out = spawn(&mut cmd)
                .wait_with_output()
                .unwrap_or_else(|e| panic!("{e}"));
            assert!(out.status.success(), "{out:?}");
        }
    }
    // init ran without the variable: its journal line differs; every later one is the same
    let (j1, j2) = (
        bytes(&file(&tmp.path().join("e1"), "journal")),
        bytes(&file(&tmp.path().join("e2"), "journal")),
    );
    let tail = |j: &[u8]| {
        String::from_utf8_lossy(j)
            .lines()
            .skip(1)
            .map(str::to_string)
            .collect::<Vec<_>>()
    };
    assert_eq!(tail(&j1), tail(&j2));
    assert!(
        tail(&j1)
            .iter()
            .all(|l| l.starts_with("0.000 ") && l.contains(" pid=- ")),
        "{:?}",
        tail(&j1)
    );
    for suffix in [
        "log",
        "impurity.h5",
        "density",
        "density.json",
        "eigen",
        "energies",
    ] {
        assert_eq!(
            bytes(&file(&tmp.path().join("e1"), suffix)),
            bytes(&file(&tmp.path().join("e2"), suffix)),
            "{suffix}"
        );
    }
}
