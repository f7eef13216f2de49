//! Folder artifacts and kept case folders, through the real rondo binary and real child
//! processes: a stage keeps a case folder of 20 files (one of them large) across iterations,
//! a first attempt rewrites half of two files in place and crashes, rondo is SIGKILLed at
//! 50 seeded instants (`RONDO_CRASH_KILLS`), and the end result — every artifact hash (folder manifests and so every
//! file inside them) and every metric — is bit-identical to an uninterrupted run without the
//! crash. Also: a glob output that matches nothing, a symlink out of the folder, a misspelled
//! key under `case-folder:`.

mod common;

use std::collections::BTreeSet;
use std::path::{Path, PathBuf};

use common::*;

/// The large file of the start folder (4 MiB of seeded bytes).
const BIG: usize = 4 << 20;

/// A campaign around tests/fixtures/casestep.sh with a start folder of 20 files.
fn campaign(dir: &Path, mode: &str) -> PathBuf {
    let seed = dir.join("seed-case");
    std::fs::create_dir_all(seed.join("tables")).unwrap_or_else(|e| panic!("{e}"));
    std::fs::create_dir_all(dir.join("counters")).unwrap_or_else(|e| panic!("{e}"));
    std::fs::write(seed.join("state.txt"), format!("{:<32}\n", "0"))
        .unwrap_or_else(|e| panic!("{e}"));
    std::fs::write(seed.join("history.txt"), "").unwrap_or_else(|e| panic!("{e}"));
    for i in 0..17 {
        std::fs::write(
            seed.join("tables").join(format!("t{i:02}.txt")),
            format!("table {i}\n"),
        )
        .unwrap_or_else(|e| panic!("{e}"));
    }
    let mut rng = rondo_numerics::rng::SplitMix64::new(11);
    let big: Vec<u8> = (0..BIG / 8)
        .flat_map(|_| rng.next_u64().to_le_bytes())
        .collect();
    std::fs::write(seed.join("big.bin"), big).unwrap_or_else(|e| panic!("{e}"));
    let text = format!(
        r#"campaign: folders
about: test campaign (invented numbers, not physics)
programs:
  step: {{ path: {prog} }}
parameters:
  mode: {mode}
  counters: {counters}
sweep:
  product:
    a: [1.0, 2.0, 4.0]
start:
  seed: seed-case
cycle:
  step:
    run: [step, "{{{{param:mode}}}}", "{{{{param:counters}}}}", "{{{{param:a}}}}"]
    case-folder: {{ initially: start.seed }}
    outputs: {{ bands: "band-*.dat" }}
    metrics: [x, lines]
    retries: 1
  look:
    shell: true
    run: "cat {{{{input:case}}}}/state.txt {{{{input:case}}}}/history.txt > seen.txt"
    inputs: {{ case: step.folder }}
    outputs: {{ seen: seen.txt }}
stop:
  when:
    - {{ metric: step.x, change-below: 1.0e-4, for: 2 }}
  max-iterations: 30
"#,
        prog = fixture("casestep.sh").display(),
        counters = dir.join("counters").display(),
    );
    let f = dir.join("c.yaml");
    std::fs::write(&f, text).unwrap_or_else(|e| panic!("{e}"));
    f
}

fn tmp() -> tempfile::TempDir {
    tempfile::tempdir().unwrap_or_else(|e| panic!("tempdir: {e}"))
}

/// (folder, path, member hash) of every folder the workspace recorded.
fn members(ws: &Path) -> BTreeSet<String> {
    strings(
        ws,
        "SELECT folder || ' ' || path || ' ' || artifact FROM folder_members",
    )
    .into_iter()
    .collect()
}

/// The bytes of a stored artifact.
fn stored(ws: &Path, hash: &str) -> Vec<u8> {
    std::fs::read(ws.join("store").join(&hash[..2]).join(&hash[2..]))
        .unwrap_or_else(|e| panic!("artifact {hash}: {e}"))
}

#[test]
fn a_crash_mid_rewrite_and_kills_of_rondo_end_bit_identical_to_a_clean_run() {
    // Reference: no crash, no kill.
    let a = tmp();
    campaign(a.path(), "ok");
    let o = run_rondo(a.path(), &["run", "c.yaml", "--max-running", "2", "-q"]);
    assert_eq!(o.status.code(), Some(0), "{}", shown(&o));
    let ws_a = a.path().join("c.rondo");
    let reference = record(&ws_a);

    // The case folder: 20 files, big.bin stored once for all snapshots, state and history
    // follow the iterations, and the last snapshot's history has one line per iteration.
    let big: BTreeSet<String> = members(&ws_a)
        .into_iter()
        .filter(|m| m.contains(" big.bin "))
        .map(|m| m.rsplit(' ').next().unwrap_or_default().to_string())
        .collect();
    assert_eq!(
        big.len(),
        1,
        "the unchanged large file is one artifact: {big:?}"
    );
    let last = strings(
        &ws_a,
        "SELECT o.artifact FROM attempt_outputs o JOIN attempts a ON a.id = o.attempt_id \
         WHERE a.state = 'succeeded' AND a.stage = 'step' AND o.role = 'folder' \
         AND a.point = 'p003' ORDER BY a.iteration DESC LIMIT 1",
    );
    let manifest: serde_json::Value = serde_json::from_slice(&stored(&ws_a, &last[0]))
        .unwrap_or_else(|e| panic!("manifest: {e}"));
    assert_eq!(manifest["format"], "rondo-folder/1");
    let entries = manifest["entries"].as_array().cloned().unwrap_or_default();
    let files: Vec<&serde_json::Value> = entries.iter().filter(|e| e["kind"] == "file").collect();
    assert_eq!(files.len(), 20, "{manifest}");
    let paths: Vec<&str> = entries.iter().filter_map(|e| e["path"].as_str()).collect();
    let mut sorted = paths.clone();
    sorted.sort_unstable();
    assert_eq!(paths, sorted, "entries sorted by path");
    let history = files
        .iter()
        .find(|e| e["path"] == "history.txt")
        .and_then(|e| e["blake3"].as_str())
        .map(|h| String::from_utf8_lossy(&stored(&ws_a, h)).into_owned())
        .unwrap_or_default();
    let s = status_json(a.path(), &ws_a);
    let p3 = &s["points"][2];
    let iterations = p3["iteration"].as_u64().unwrap_or(0) as usize;
    assert_eq!(history.lines().count(), iterations, "{history}");
    assert_eq!(
        p3["metrics"]["step.lines"].as_f64(),
        Some(iterations as f64),
        "{p3}"
    );
    let x = p3["metrics"]["step.x"].as_f64().unwrap_or(f64::NAN);
    assert!(
        (x - 4.0 * (1.0 - 0.5f64.powi(iterations as i32))).abs() < 1e-12,
        "{p3}"
    );

    trace_and_prov(a.path(), &last[0], &big);

    // A crash after a partial in-place rewrite at iteration 2: the retry starts from the
    // clean snapshot, so the record is the reference's.
    let b = tmp();
    campaign(b.path(), "crash");
    let o = run_rondo(b.path(), &["run", "c.yaml", "--max-running", "2", "-q"]);
    assert_eq!(o.status.code(), Some(0), "{}", shown(&o));
    let ws_b = b.path().join("c.rondo");
    let crashed = strings(
        &ws_b,
        "SELECT point || ' ' || failure_message FROM attempts WHERE state = 'failed' \
         ORDER BY point",
    );
    assert_eq!(crashed.len(), 3, "one crash per point: {crashed:?}");
    assert!(
        crashed.iter().all(|m| m.contains("partial rewrite")),
        "{crashed:?}"
    );
    assert_same_record(&reference, &record(&ws_b), 0);
    assert_eq!(
        members(&ws_a),
        members(&ws_b),
        "every file inside every folder"
    );

    // The same with seeded SIGKILLs of rondo: a resume also starts from the clean snapshot.
    let c = tmp();
    campaign(c.path(), "crash");
    let ws_c = c.path().join("c.rondo");
    let seed = crash_seed(20_261_204);
    let kills = crash_kills(50);
    kill_and_finish(
        c.path(),
        "c.yaml",
        seed,
        kills,
        reference.len(),
        (0.05, 0.9),
        0,
    );
    assert_same_record(&reference, &record(&ws_c), seed);
    assert_eq!(
        members(&ws_a),
        members(&ws_c),
        "every file inside every folder (seed {seed})"
    );
    assert_resume_was_clean(&ws_c, seed);
}

/// `rondo trace` of a file inside a folder output (by reference and as a file on disk), of
/// the folder, and the PROV-JSON export of a folder with its members.
fn trace_and_prov(dir: &Path, folder: &str, big: &BTreeSet<String>) {
    let o = run_rondo(
        dir,
        &["trace", "p003/last/step.folder/history.txt", "--json"],
    );
    assert_eq!(o.status.code(), Some(0), "{}", shown(&o));
    let t: serde_json::Value =
        serde_json::from_slice(&o.stdout).unwrap_or_else(|e| panic!("{e}: {}", shown(&o)));
    assert!(
        t.to_string().contains(folder),
        "the trace starts at the folder: {t}"
    );
    let o = run_rondo(dir, &["trace", "p003/last/step.folder/nope.txt"]);
    assert_ne!(o.status.code(), Some(0), "{}", shown(&o));
    assert!(
        shown(&o).contains("has no file `nope.txt`"),
        "{}",
        shown(&o)
    );
    // The large file on disk (as extracted from the store): traced through the first
    // folder that held it.
    let h = big.iter().next().cloned().unwrap_or_default();
    let on_disk = dir.join("big-copy.bin");
    std::fs::copy(
        dir.join("c.rondo/store").join(&h[..2]).join(&h[2..]),
        &on_disk,
    )
    .unwrap_or_else(|e| panic!("{e}"));
    let o = run_rondo(dir, &["trace", "big-copy.bin"]);
    assert_eq!(o.status.code(), Some(0), "{}", shown(&o));

    let prov = dir.join("prov.json");
    let o = run_rondo(
        dir,
        &[
            "export",
            "--prov",
            &prov.display().to_string(),
            "p003/last/step.folder",
        ],
    );
    assert_eq!(o.status.code(), Some(0), "{}", shown(&o));
    let doc: serde_json::Value =
        serde_json::from_slice(&std::fs::read(&prov).unwrap_or_else(|e| panic!("{e}")))
            .unwrap_or_else(|e| panic!("{e}"));
    let id = format!("art:{folder}");
    assert_eq!(
        doc["entity"][&id]["prov:type"]["$"], "prov:Collection",
        "{}",
        doc["entity"][&id]
    );
    let members: Vec<&serde_json::Value> = doc["hadMember"]
        .as_object()
        .map(|m| {
            m.values()
                .filter(|r| r["prov:collection"] == id.as_str())
                .collect()
        })
        .unwrap_or_default();
    assert_eq!(
        members.len(),
        20,
        "one prov:hadMember per file: {}",
        doc["hadMember"]
    );
    for m in members {
        let e = m["prov:entity"].as_str().unwrap_or_default();
        assert!(doc["entity"].get(e).is_some(), "member entity {e}");
    }
}

#[test]
fn a_glob_matching_nothing_and_a_symlink_out_of_the_folder_fail_the_attempt_clearly() {
    let d = tmp();
    let text = r#"campaign: bad-folders
cycle:
  tables:
    run: [/bin/true]
    outputs: { tables: "*.dat" }
  link:
    shell: true
    run: "ln -s ../../../outside case/escape"
    case-folder: {}
stop: { max-iterations: 1 }
"#;
    std::fs::write(d.path().join("c.yaml"), text).unwrap_or_else(|e| panic!("{e}"));
    let o = run_rondo(d.path(), &["run", "c.yaml", "-q"]);
    assert_eq!(o.status.code(), Some(3), "{}", shown(&o));
    let ws = d.path().join("c.rondo");
    let msgs = strings(
        &ws,
        "SELECT stage || ': ' || failure_kind || ': ' || failure_message FROM attempts \
         WHERE state = 'failed' ORDER BY id",
    );
    assert_eq!(
        msgs.len(),
        1,
        "the point fails at its first stage: {msgs:?}"
    );
    assert!(
        msgs[0].starts_with(
            "tables: refused-output: output `tables`: the output glob `*.dat` \
                             matched no file in "
        ) && msgs[0].contains("scratch"),
        "{msgs:?}"
    );

    let e = tmp();
    std::fs::write(
        e.path().join("c.yaml"),
        text.replace("    outputs: { tables: \"*.dat\" }\n", ""),
    )
    .unwrap_or_else(|e| panic!("{e}"));
    let o = run_rondo(e.path(), &["run", "c.yaml", "-q"]);
    assert_eq!(o.status.code(), Some(3), "{}", shown(&o));
    let msgs = strings(
        &e.path().join("c.rondo"),
        "SELECT stage || ': ' || failure_message FROM attempts WHERE state = 'failed'",
    );
    assert_eq!(msgs.len(), 1, "{msgs:?}");
    assert!(
        msgs[0].starts_with("link: output `folder`: ")
            && msgs[0].contains("the symlink `escape` points outside the folder"),
        "{msgs:?}"
    );
}

#[test]
fn a_misspelled_case_folder_key_is_reported_at_its_place() {
    let d = tmp();
    std::fs::write(
        d.path().join("c.yaml"),
        "campaign: t\ncycle:\n  s:\n    run: [/bin/true]\n    case-folder: { pth: case }\nstop: { max-iterations: 1 }\n",
    )
    .unwrap_or_else(|e| panic!("{e}"));
    let o = run_rondo(d.path(), &["check", "c.yaml"]);
    assert_eq!(o.status.code(), Some(2), "{}", shown(&o));
    let err = String::from_utf8_lossy(&o.stderr);
    assert!(
        err.contains("c.yaml:5:20") && err.contains("unknown field `pth`"),
        "{err}"
    );
}

/// One measured run: (private layout s, how, shared layout s, how, next store s, bytes added).
type Row = (
    f64,
    rondo::artifacts::Placement,
    f64,
    rondo::artifacts::Placement,
    f64,
    u64,
);

/// The cost of a kept case folder of 20 files, one of them large (docs/performance.md,
/// "Case folders"): `cargo test -p rondo --test folders -- --ignored --nocapture
/// case_folder_costs`. Prints a Markdown table; asserts only what storing must guarantee.
#[test]
#[ignore = "a measurement: run it by name with --ignored --nocapture"]
fn case_folder_costs() {
    use rondo::artifacts::ArtifactStore;
    use std::time::Instant;
    let large: usize = std::env::var("RONDO_CASE_LARGE_MIB")
        .ok()
        .and_then(|s| s.parse().ok())
        .unwrap_or(512)
        << 20;
    let d = tmp();
    let store = ArtifactStore::open(&d.path().join("store")).unwrap_or_else(|e| panic!("{e}"));
    let du = |p: &Path| -> u64 {
        let mut n = 0;
        let mut stack = vec![p.to_path_buf()];
        while let Some(q) = stack.pop() {
            for e in std::fs::read_dir(&q)
                .unwrap_or_else(|e| panic!("{e}"))
                .flatten()
            {
                let m = e.metadata().unwrap_or_else(|e| panic!("{e}"));
                if m.is_dir() {
                    stack.push(e.path());
                } else {
                    n += m.len();
                }
            }
        }
        n
    };
    let case = d.path().join("case0");
    std::fs::create_dir_all(&case).unwrap_or_else(|e| panic!("{e}"));
    for i in 0..19 {
        std::fs::write(
            case.join(format!("f{i:02}.txt")),
            vec![b'a' + i as u8; 4096],
        )
        .unwrap_or_else(|e| panic!("{e}"));
    }
    let mut rng = rondo_numerics::rng::SplitMix64::new(3);
    let big: Vec<u8> = (0..large / 8)
        .flat_map(|_| rng.next_u64().to_le_bytes())
        .collect();
    std::fs::write(case.join("big.bin"), &big).unwrap_or_else(|e| panic!("{e}"));
    drop(big);
    let t = Instant::now();
    let first = store
        .put_folder(&case, true)
        .unwrap_or_else(|e| panic!("{e}"));
    let store_first = t.elapsed().as_secs_f64();
    let stored_first = du(&d.path().join("store"));
    let mut rows = Vec::new();
    for run in 0..3 {
        let private = d.path().join(format!("private{run}"));
        let t = Instant::now();
        let how = store
            .place_folder(&first.hash, &private, true)
            .unwrap_or_else(|e| panic!("{e}"));
        let lay_private = t.elapsed().as_secs_f64();
        let shared = d.path().join(format!("shared{run}"));
        let t = Instant::now();
        let how_shared = store
            .place_folder(&first.hash, &shared, false)
            .unwrap_or_else(|e| panic!("{e}"));
        let lay_shared = t.elapsed().as_secs_f64();
        // The stage rewrites one small file; the snapshot after it is stored.
        std::fs::write(private.join("f00.txt"), format!("run {run}\n"))
            .unwrap_or_else(|e| panic!("{e}"));
        let before = du(&d.path().join("store"));
        let t = Instant::now();
        let next = store
            .put_folder(&private, true)
            .unwrap_or_else(|e| panic!("{e}"));
        let store_next = t.elapsed().as_secs_f64();
        let added = du(&d.path().join("store")) - before;
        assert_ne!(next.hash, first.hash);
        assert!(
            added < 64 << 10,
            "only the changed file and the manifest are new: {added} B"
        );
        rows.push((lay_private, how, lay_shared, how_shared, store_next, added));
        std::fs::remove_dir_all(&private).unwrap_or_else(|e| panic!("{e}"));
        std::fs::remove_dir_all(&shared).unwrap_or_else(|e| panic!("{e}"));
    }
    // SAFETY: geteuid cannot fail.
    let root = unsafe { libc::geteuid() } == 0;
    println!(
        "20 files (19 × 4 KiB, one of {} MiB), store in {}, euid {}:\n",
        large >> 20,
        d.path().display(),
        if root { "0 (root)" } else { "not root" }
    );
    println!("| step | run 1 | run 2 | run 3 |\n| --- | --: | --: | --: |");
    println!("| first snapshot stored (hash + link in), s | {store_first:.3} | | |");
    let line = |name: &str, f: &dyn Fn(&Row) -> String| {
        println!(
            "| {name} | {} |",
            rows.iter().map(f).collect::<Vec<_>>().join(" | ")
        );
    };
    line("case folder laid out (private, writable), s", &|r| {
        format!("{:.3} ({:?})", r.0, r.1)
    });
    line("same folder as a read-only input, s", &|r| {
        format!("{:.3} ({:?})", r.2, r.3)
    });
    line("next snapshot stored (one file changed), s", &|r| {
        format!("{:.3}", r.4)
    });
    line("store bytes added by the next snapshot", &|r| {
        format!("{}", r.5)
    });
    println!("\nstore after the first snapshot: {stored_first} bytes");
}
