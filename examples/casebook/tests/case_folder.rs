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
