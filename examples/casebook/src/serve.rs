//! The resident mode (`casebook serve CASE [--handoff DIR]`): the band sub-step as a process
//! that stays alive across iterations and takes its work through files under the hand-off
//! folder (`CASE/handoff/` unless `--handoff` names another), in rondo's hand-off protocol
//! `rondo-handoff-1` (docs/resident.md; casebook's part in docs/casebook.md, "Resident
//! mode"). Owns the program side of that protocol: hand-off numbering, the order of writes
//! (outputs complete and synced before the done marker), the ready and stop files.

use anyhow::{bail, Context, Result};
use std::fmt::Write as _;
use std::io::Write as _;
use std::path::{Path, PathBuf};
use std::time::Duration;

use crate::case::{self, Case};
use crate::steps::{self, BandSetup, BAND_OUTPUTS};
use crate::textlog::journal;

/// Protocol name and version written into `ready` and every `done`.
pub const PROTOCOL: &str = "rondo-handoff-1";

/// The input file of a hand-off (in `handoff/N/in/`).
pub const INPUT: &str = "density";

/// Write `bytes` to `dir/name` through a temporary name: write, fsync, rename, fsync dir.
fn publish(dir: &Path, name: &str, bytes: &[u8]) -> Result<()> {
    let tmp = dir.join(format!(".{name}.tmp"));
    let dest = dir.join(name);
    let mut f =
        std::fs::File::create(&tmp).with_context(|| format!("{}: cannot create", tmp.display()))?;
    f.write_all(bytes)
        .and_then(|_| f.sync_all())
        .with_context(|| format!("{}: cannot write", tmp.display()))?;
    drop(f);
    std::fs::rename(&tmp, &dest)
        .with_context(|| format!("{}: cannot rename into place", dest.display()))?;
    sync_dir(dir)
}

fn sync_dir(dir: &Path) -> Result<()> {
    std::fs::File::open(dir)
        .and_then(|d| d.sync_all())
        .with_context(|| format!("{}: cannot sync the folder", dir.display()))
}

/// A hand-off folder name: a positive decimal number without leading zeros.
fn handoff_number(name: &str) -> Option<u64> {
    let n: u64 = name.parse().ok()?;
    (n > 0 && n.to_string() == name).then_some(n)
}

/// Hand-off numbers present under `root`, sorted, with whether `go` and `done` exist.
fn scan(root: &Path) -> Result<Vec<(u64, bool, bool)>> {
    let mut out = Vec::new();
    let entries =
        std::fs::read_dir(root).with_context(|| format!("{}: cannot list", root.display()))?;
    for e in entries.flatten() {
        let name = e.file_name();
        let Some(n) = name.to_str().and_then(handoff_number) else {
            continue;
        };
        let p = e.path();
        out.push((n, p.join("go").exists(), p.join("done").exists()));
    }
    out.sort_unstable();
    Ok(out)
}

fn pid_alive(pid: i32) -> bool {
    // SAFETY: kill with signal 0 only checks that the process exists; it sends nothing.
    pid > 0 && unsafe { libc::kill(pid, 0) } == 0
}

fn ready_pid(path: &Path) -> Option<i32> {
    let text = std::fs::read_to_string(path).ok()?;
    text.lines()
        .find_map(|l| l.strip_prefix("pid "))
        .and_then(|p| p.trim().parse().ok())
}

/// The done marker's text.
fn done_text(n: u64, status: &str, message: Option<&str>, outputs: &[(String, u64)]) -> String {
    let mut t = format!("protocol {PROTOCOL}\nhandoff {n}\nstatus {status}\n");
    if let Some(m) = message {
        let _ = writeln!(t, "message {}", m.replace('\n', " | "));
    }
    for (name, size) in outputs {
        let _ = writeln!(t, "output {name} {size}");
    }
    t.push_str("end\n");
    t
}

/// Do hand-off `n`: take its input density, run band, publish the outputs, return them.
fn handle(case: &Case, setup: &BandSetup, dir: &Path) -> Result<Vec<(String, u64)>> {
    let input = dir.join("in").join(INPUT);
    let density = case::read_density(&input)
        .with_context(|| format!("{}: the hand-off input", input.display()))?;
    case::write_case_density(case, &density)?;
    steps::band(case, setup, true)?;
    let out = dir.join("out");
    std::fs::create_dir_all(&out).with_context(|| format!("{}: cannot create", out.display()))?;
    let mut listed = Vec::new();
    for suffix in BAND_OUTPUTS {
        let bytes = std::fs::read(case.file(suffix))
            .with_context(|| format!("{}: cannot read", case.file(suffix).display()))?;
        publish(&out, suffix, &bytes)?;
        listed.push((format!("out/{suffix}"), bytes.len() as u64));
    }
    Ok(listed)
}

/// Run the server until a `stop` file appears in the hand-off folder `root`.
pub fn serve(case: &Case, root: &Path, poll: Duration) -> Result<()> {
    let setup = steps::band_setup(case)?;
    let root = root.to_path_buf();
    std::fs::create_dir_all(&root).with_context(|| format!("{}: cannot create", root.display()))?;
    let ready = root.join("ready");
    if let Some(pid) = ready_pid(&ready) {
        if pid_alive(pid) && pid != std::process::id() as i32 {
            bail!(
                "{}: the case is already served by process {pid}; stop it first (create {})",
                ready.display(),
                root.join("stop").display()
            );
        }
    }
    let mut last = scan(&root)?
        .iter()
        .filter(|(_, _, done)| *done)
        .map(|(n, _, _)| *n)
        .max()
        .unwrap_or(0);
    let ready_text = format!(
        "protocol {PROTOCOL}\npid {}\nlast {last}\n",
        std::process::id()
    );
    publish(&root, "ready", ready_text.as_bytes())?;
    journal(
        &case.file("journal"),
        "serve",
        &format!("ready, last hand-off {last}"),
    )?;
    let stop = root.join("stop");
    loop {
        if stop.exists() {
            let _ = std::fs::remove_file(&ready);
            let _ = std::fs::remove_file(&stop);
            sync_dir(&root)?;
            return journal(
                &case.file("journal"),
                "serve",
                &format!("stopped after {last}"),
            );
        }
        for (n, go, done) in scan(&root)? {
            if !go || done {
                continue;
            }
            let dir: PathBuf = root.join(n.to_string());
            let text = if n <= last {
                let m = format!("hand-off {n} is not above the last one handled ({last})");
                done_text(n, "rejected", Some(&m), &[])
            } else {
                last = n;
                match handle(case, &setup, &dir) {
                    Ok(outputs) => done_text(n, "ok", None, &outputs),
                    Err(e) => done_text(n, "error", Some(&format!("{e:#}")), &[]),
                }
            };
            publish(&dir, "done", text.as_bytes())?;
            let status = text.lines().nth(2).unwrap_or_default().to_string();
            journal(
                &case.file("journal"),
                "serve",
                &format!("hand-off {n} {status}"),
            )?;
        }
        std::thread::sleep(poll);
    }
}
