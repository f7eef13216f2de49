//! Replays fuzz inputs outside the fuzzer: `rondo-fuzz-replay FILE_OR_FOLDER...` runs each
//! file through `rondo_fuzz::run` and names the one that panics (for a crash AFL found, or
//! to check the seed corpus on a plain build).

use std::path::{Path, PathBuf};

fn files(p: &Path, out: &mut Vec<PathBuf>) {
    if p.is_dir() {
        let mut entries: Vec<PathBuf> = match std::fs::read_dir(p) {
            Ok(rd) => rd.filter_map(|e| e.ok().map(|e| e.path())).collect(),
            Err(e) => {
                eprintln!("cannot list {}: {e}", p.display());
                std::process::exit(2);
            }
        };
        entries.sort();
        for e in entries {
            files(&e, out);
        }
    } else if p.is_file() {
        out.push(p.to_path_buf());
    }
}

fn main() {
    let mut all = Vec::new();
    for a in std::env::args_os().skip(1) {
        files(Path::new(&a), &mut all);
    }
    let mut failed = 0;
    for f in &all {
        let data = match std::fs::read(f) {
            Ok(d) => d,
            Err(e) => {
                eprintln!("cannot read {}: {e}", f.display());
                std::process::exit(2);
            }
        };
        if std::panic::catch_unwind(|| rondo_fuzz::run(&data)).is_err() {
            eprintln!("FAILED: {}", f.display());
            failed += 1;
        }
    }
    println!("replayed {} inputs, {failed} failed", all.len());
    if failed > 0 {
        std::process::exit(1);
    }
}
