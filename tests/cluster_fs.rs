//! The store on a file system that other hosts share: there rondo uses SQLite's rollback
//! journal instead of the write-ahead log (whose index lives in one host's shared memory).
//! This machine has no network file system, so the test forces the choice the way a user
//! can (`RONDO_JOURNAL=rollback`) and shows that the demo converges with it, the database is
//! really in rollback mode, and crash equivalence holds under it: seeded SIGKILLs, then a
//! resume, give every output hash and metric bit of an uninterrupted run. The detection
//! itself (statfs magic numbers) is unit-tested in `rondo::fsinfo`.
//!
//! One test in its own binary: it sets an environment variable that every child inherits.

mod common;

use common::*;

/// Bytes 18 and 19 of an SQLite database header are the file format's write and read
/// versions: 1 for a rollback journal, 2 for WAL (SQLite's "Database File Format",
/// section 1.3.3).
fn format_versions(db: &std::path::Path) -> (u8, u8) {
    let bytes = std::fs::read(db).unwrap_or_else(|e| panic!("{}: {e}", db.display()));
    assert!(bytes.len() >= 100, "an SQLite header is 100 bytes");
    assert_eq!(&bytes[..16], b"SQLite format 3\0");
    (bytes[18], bytes[19])
}

#[test]
fn the_rollback_journal_for_shared_file_systems_keeps_crash_equivalence() {
    // SAFETY (edition 2021: not unsafe, but racy): this binary has one test; nothing else
    // reads the environment while it is set.
    std::env::set_var("RONDO_JOURNAL", "rollback");
    let _ = model_solid();
    let a = tempfile::tempdir().unwrap_or_else(|e| panic!("{e}"));
    let b = tempfile::tempdir().unwrap_or_else(|e| panic!("{e}"));
    demo_in(a.path(), "model-sweep.yaml");
    demo_in(b.path(), "model-sweep.yaml");

    let o = run_rondo(
        a.path(),
        &["run", "model-sweep.yaml", "--max-running", "2", "-q"],
    );
    assert_eq!(o.status.code(), Some(0), "{}", shown(&o));
    let wa = a.path().join("model-sweep.rondo");
    assert_eq!(
        format_versions(&wa.join("rondo.db")),
        (1, 1),
        "rollback journal"
    );
    assert!(!wa.join("rondo.db-wal").exists());
    let reference = record(&wa);
    let s = status_json(a.path(), &wa);
    let points = s["points"].as_array().cloned().unwrap_or_default();
    assert_eq!(points.len(), 10, "5 volumes x 2 temperatures");
    assert!(points.iter().all(|p| p["state"] == "converged"), "{s}");
    // Five stages per iteration and at least one iteration per point were recorded.
    assert!(reference.len() >= 50, "{} successes", reference.len());

    let wb = b.path().join("model-sweep.rondo");
    let seed = crash_seed(20_261_203);
    kill_and_finish(
        b.path(),
        "model-sweep.yaml",
        seed,
        4,
        reference.len(),
        (0.05, 0.85),
        0,
    );
    assert_eq!(
        format_versions(&wb.join("rondo.db")),
        (1, 1),
        "rollback journal"
    );
    assert_same_record(&reference, &record(&wb), seed);
    assert_resume_was_clean(&wb, seed);
}
