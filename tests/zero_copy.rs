//! Large outputs enter the store without a copy and inputs are placed without one: through
//! the real binary, a stage writes an 8 MiB file and its stdout, the next stage reads the
//! file. The stored artifacts carry the right BLAKE3, are read-only, and no second copy is
//! left once the scratch folders are recycled; a log that is also an output keeps its
//! content (recycling must not truncate the shared inode). Run as an unprivileged user the
//! input is a hard link to the stored file (root gets a clone or a copy instead, since
//! read-only permissions do not stop root). A stage that lists an input under
//! `writable-inputs` gets its own copy and may rewrite it; one that does not, and tries,
//! is refused by the file system and changes nothing in the store.

mod common;

use std::os::unix::fs::{MetadataExt, PermissionsExt};
use std::path::Path;
use std::process::Command;

use common::*;

fn campaign(dir: &Path) {
    let text = r#"campaign: zero-copy
about: test campaign (not physics)
programs:
  sh: { path: /bin/sh }
sweep:
  product:
    x: [1, 2]
cycle:
  w:
    run: [sh, -c, 'yes "{{param:x}}" | head -c 8388608 > big.bin; echo "wrote big.bin"; echo "{\"x\": {{param:x}}}" > metrics.json']
    outputs: { big: big.bin, log: stdout.txt }
    metrics: [x]
  r:
    run: [sh, -c, 'printf "{\"size\": %s, \"links\": %s}\n" $(wc -c < "$1") $(stat -c %h "$1") > metrics.json', sh, "{{input:big}}"]
    inputs: { big: w.big }
    metrics: [size, links]
  m:
    run: [sh, -c, 'printf tail >> "$1"; printf "{\"grown\": %s}\n" $(wc -c < "$1") > metrics.json', sh, "{{input:big}}"]
    inputs: { big: w.big }
    writable-inputs: [big]
    metrics: [grown]
stop:
  when:
    - { metric: w.x, change-below: 0.5, for: 1 }
  max-iterations: 3
"#;
    std::fs::write(dir.join("c.yaml"), text).unwrap_or_else(|e| panic!("{e}"));
}

fn check(dir: &Path, expect_linked: bool) {
    let ws = dir.join("c.rondo");
    let s = status_json(dir, &ws);
    let points = s["points"].as_array().cloned().unwrap_or_default();
    assert_eq!(points.len(), 2, "{s}");
    for p in &points {
        assert_eq!(p["state"], "converged", "{p}");
        assert_eq!(p["metrics"]["r.size"].as_f64(), Some(8_388_608.0), "{p}");
        // A writable input is the stage's own copy: it grew there, not in the store
        // (every stored artifact's content is checked against its hash below).
        assert_eq!(p["metrics"]["m.grown"].as_f64(), Some(8_388_612.0), "{p}");
        let links = p["metrics"]["r.links"].as_f64().unwrap_or(0.0);
        if expect_linked {
            // The store's name and the input's name (the output's scratch name may be
            // recycled already or not: at least two).
            assert!(links >= 2.0, "the input is a hard link: {p}");
        } else {
            assert_eq!(links, 1.0, "root gets its own inode: {p}");
        }
    }
    let rows = strings(
        &ws,
        "SELECT o.role || ' ' || o.artifact FROM attempt_outputs o JOIN attempts a \
         ON a.id = o.attempt_id WHERE a.state = 'succeeded' AND a.stage = 'w' ORDER BY 1",
    );
    // 2 points × 2 iterations × (big, log, metrics).
    assert_eq!(rows.len(), 2 * 2 * 3, "{rows:?}");
    for row in rows {
        let (role, hash) = row.split_once(' ').unwrap_or_default();
        let path = ws.join("store").join(&hash[..2]).join(&hash[2..]);
        let bytes = std::fs::read(&path).unwrap_or_else(|e| panic!("{}: {e}", path.display()));
        assert_eq!(blake3::hash(&bytes).to_hex().as_str(), hash, "{role}");
        let m = std::fs::metadata(&path).unwrap_or_else(|e| panic!("{e}"));
        assert_eq!(
            m.permissions().mode() & 0o222,
            0,
            "stored read-only: {role}"
        );
        match role {
            "big" => assert_eq!(bytes.len(), 8_388_608),
            "log" => assert_eq!(bytes, b"wrote big.bin\n", "the log kept its content"),
            _ => {}
        }
        // Once the scratch folders are recycled, the store holds the only name.
        assert_eq!(m.nlink(), 1, "no second name left for {role}");
    }
}

#[test]
fn large_outputs_and_inputs_move_without_copies() {
    let d = tempfile::tempdir().unwrap_or_else(|e| panic!("{e}"));
    campaign(d.path());
    let o = run_rondo(d.path(), &["run", "c.yaml", "-q"]);
    assert_eq!(o.status.code(), Some(0), "{}", shown(&o));
    // SAFETY: geteuid cannot fail.
    let root = unsafe { libc::geteuid() } == 0;
    check(d.path(), !root);

    if !root {
        return;
    }
    // As root, run the same campaign again as `nobody` to see the hard-link path.
    let have_setpriv = Command::new("setpriv").arg("--version").output().is_ok();
    assert!(
        have_setpriv,
        "setpriv (util-linux) is needed to run the unprivileged half of this test"
    );
    let n = tempfile::tempdir().unwrap_or_else(|e| panic!("{e}"));
    campaign(n.path());
    let chown = Command::new("chown")
        .args(["-R", "65534:65534"])
        .arg(n.path())
        .status()
        .unwrap_or_else(|e| panic!("chown: {e}"));
    assert!(chown.success());
    let o = Command::new("setpriv")
        .args(["--reuid=65534", "--regid=65534", "--clear-groups"])
        .arg(rondo())
        .args(["run", "c.yaml", "-q"])
        .current_dir(n.path())
        .env("PATH", path_with_binaries())
        .env("HOME", n.path())
        .output()
        .unwrap_or_else(|e| panic!("setpriv rondo: {e}"));
    assert_eq!(o.status.code(), Some(0), "{}", shown(&o));
    check(n.path(), true);
}

/// Without `writable-inputs`, a program that rewrites its input in place is refused by the
/// file system (the input is a read-only link to the stored file), its attempt fails, and
/// the stored content is unchanged. Run unprivileged: root is never given a link.
#[test]
fn an_input_rewritten_in_place_without_asking_is_refused_and_the_store_is_untouched() {
    // SAFETY: geteuid cannot fail.
    let root = unsafe { libc::geteuid() } == 0;
    let d = tempfile::tempdir().unwrap_or_else(|e| panic!("{e}"));
    let text = r#"campaign: no-write
about: test campaign (not physics)
programs:
  sh: { path: /bin/sh }
cycle:
  w:
    run: [sh, -c, 'echo original > f.txt; echo "{\"x\": 1}" > metrics.json']
    outputs: { f: f.txt }
    metrics: [x]
  m:
    run: [sh, -c, 'echo changed > "$1"', sh, "{{input:f}}"]
    inputs: { f: w.f }
stop:
  max-iterations: 1
"#;
    std::fs::write(d.path().join("c.yaml"), text).unwrap_or_else(|e| panic!("{e}"));
    let mut cmd = if root {
        let chown = Command::new("chown")
            .args(["-R", "65534:65534"])
            .arg(d.path())
            .status()
            .unwrap_or_else(|e| panic!("chown: {e}"));
        assert!(chown.success());
        let mut c = Command::new("setpriv");
        c.args(["--reuid=65534", "--regid=65534", "--clear-groups"])
            .arg(rondo());
        c
    } else {
        Command::new(rondo())
    };
    let o = cmd
        .args(["run", "c.yaml", "-q"])
        .current_dir(d.path())
        .env("PATH", path_with_binaries())
        .env("HOME", d.path())
        .output()
        .unwrap_or_else(|e| panic!("rondo run: {e}"));
    // exit 3: a point did not converge (it failed).
    assert_eq!(o.status.code(), Some(3), "the point fails: {}", shown(&o));
    let ws = d.path().join("c.rondo");
    let failed = strings(
        &ws,
        "SELECT failure_message FROM attempts WHERE stage = 'm' AND state = 'failed'",
    );
    assert_eq!(failed.len(), 1, "stage m failed once: {failed:?}");
    assert!(failed[0].contains("Permission denied"), "{failed:?}");
    let stored = strings(&ws, "SELECT artifact FROM attempt_outputs WHERE role = 'f'");
    assert_eq!(stored.len(), 1);
    let h = &stored[0];
    let bytes = std::fs::read(ws.join("store").join(&h[..2]).join(&h[2..]))
        .unwrap_or_else(|e| panic!("{e}"));
    assert_eq!(bytes, b"original\n", "the store is untouched");
    assert_eq!(blake3::hash(&bytes).to_hex().as_str(), h);
}

/// Storing a large output does not stall the engine: while point `a`'s 4 GiB output (a
/// sparse file, so the test costs no disk) is hashed and linked into the store on the
/// blocking pool, point `b`'s short stages keep being settled and launched. Measured in the
/// store: attempts of `b` planned between the end of `a`'s big attempt and the plan of
/// `a`'s next stage (which waits for the big output to be recorded). With the hashing on
/// the engine's own thread there were none.
#[test]
fn other_points_go_on_while_a_large_output_is_stored() {
    let d = tempfile::tempdir().unwrap_or_else(|e| panic!("{e}"));
    let text = r#"campaign: big-and-small
about: test campaign (not physics)
programs:
  sh: { path: /bin/sh }
sweep:
  product:
    size: [4294967296, 0]
cycle:
  w:
    run: [sh, -c, 'if [ {{iteration}} = 1 ]; then truncate -s "$1" big.bin; else : > big.bin; fi', sh, "{{param:size}}"]
    outputs: { big: big.bin }
  t:
    run: [sh, -c, 'n={{iteration}}; [ $n -gt 30 ] && n=30; echo "{\"n\": $n}" > metrics.json']
    metrics: [n]
stop:
  when:
    - { metric: t.n, change-below: 0.5, for: 1 }
  max-iterations: 40
"#;
    std::fs::write(d.path().join("c.yaml"), text).unwrap_or_else(|e| panic!("{e}"));
    let o = run_rondo(d.path(), &["run", "c.yaml", "-q"]);
    assert!(o.status.success(), "{}", shown(&o));
    let ws = d.path().join("c.rondo");
    let times = strings(
        &ws,
        "SELECT a.ended_at || ' ' || n.created_at FROM attempts a JOIN attempts n \
         ON n.point = a.point AND n.iteration = 1 AND n.stage = 't' \
         JOIN points p ON p.id = a.point \
         WHERE a.stage = 'w' AND a.iteration = 1 AND p.idx = 1",
    );
    let (big_ended, next_planned) = times
        .first()
        .and_then(|t| t.split_once(' '))
        .map(|(a, b)| (a.to_string(), b.to_string()))
        .unwrap_or_else(|| panic!("no big attempt: {times:?}"));
    let others = strings(
        &ws,
        "SELECT a.created_at FROM attempts a JOIN points p ON p.id = a.point WHERE p.idx = 2",
    );
    let during = others
        .iter()
        .filter(|t| **t > big_ended && **t < next_planned)
        .count();
    eprintln!(
        "big output: child ended {big_ended}, next stage planned {next_planned}; \
         {during} attempts of the other point planned in between"
    );
    assert!(
        during >= 3,
        "the other point stalled while the big output was stored: {during} attempts planned \
         between {big_ended} and {next_planned}"
    );
}
