//! Campaign files (`rondo::spec::parse`): never a panic; every problem carries a location in
//! the text (`line:col`, 1-based, within the file; `0:0` only for the problems that concern
//! the whole file); and every stage of a campaign that passes renders its template into
//! exactly as many arguments as it has, with no placeholder inside shell quotes.

use std::collections::BTreeSet;
use std::path::{Path, PathBuf};
use std::sync::OnceLock;

use rondo::spec::{parse, Campaign, SpecErrors, StageKind};

use crate::template;

/// Messages that concern the whole file and may stand at `0:0`.
const WHOLE_FILE: &[&str] = &["the cycle has no stages"];

/// The folder the fuzzed campaign file stands in: the start files and programs that the
/// seed campaigns name exist there (`start/density.json`, `x.json`, `bin/engine`, ...), so
/// that valid campaigns reach the later checks. Its `bin` is put first on PATH.
pub fn base() -> &'static Path {
    static BASE: OnceLock<PathBuf> = OnceLock::new();
    BASE.get_or_init(|| {
        let base = std::env::temp_dir().join("rondo-fuzz-base");
        let made = (|| -> std::io::Result<()> {
            std::fs::create_dir_all(base.join("start"))?;
            std::fs::create_dir_all(base.join("bin"))?;
            for f in [
                "start/density.json",
                "start/sigma.npy",
                "start/gtau.npy",
                "x.json",
                "density.json",
            ] {
                std::fs::write(base.join(f), b"{}\n")?;
            }
            for p in ["engine", "model-solid", "solver", "prog"] {
                let path = base.join("bin").join(p);
                std::fs::write(&path, b"#!/bin/sh\nexit 0\n")?;
                use std::os::unix::fs::PermissionsExt;
                std::fs::set_permissions(&path, std::fs::Permissions::from_mode(0o755))?;
            }
            Ok(())
        })();
        if let Err(e) = made {
            panic!("cannot lay out the fuzz folder {}: {e}", base.display());
        }
        let path = std::env::var_os("PATH").unwrap_or_default();
        let mut dirs = vec![base.join("bin")];
        dirs.extend(std::env::split_paths(&path));
        if let Ok(joined) = std::env::join_paths(dirs) {
            std::env::set_var("PATH", joined);
        }
        base
    })
}

/// Check one campaign text.
pub fn check(text: &str) {
    let file = base().join("c.yaml");
    match parse(&file, text) {
        Ok(c) => check_campaign(&c, text),
        Err(e) => check_errors(&e, &file, text),
    }
}

/// The lines of `text` as YAML counts them: CR LF, LF and a lone CR each end one.
fn yaml_lines(text: &str) -> Vec<&str> {
    let mut lines = Vec::new();
    let (b, mut start, mut i) = (text.as_bytes(), 0, 0);
    while i < b.len() {
        if b[i] == b'\n' || b[i] == b'\r' {
            lines.push(&text[start..i]);
            i += if b[i] == b'\r' && b.get(i + 1) == Some(&b'\n') {
                2
            } else {
                1
            };
            start = i;
        } else {
            i += 1;
        }
    }
    if start < b.len() {
        lines.push(&text[start..]);
    }
    lines
}

/// Every problem is placed in the text and printed as `file:line:col: what; hint: ...`.
fn check_errors(e: &SpecErrors, file: &Path, text: &str) {
    assert!(!e.diagnostics.is_empty(), "an error without a diagnostic");
    assert_eq!(e.file, file);
    // The parser may point one past the last line (end of input).
    let lines = yaml_lines(text).len() as u64 + 1;
    let printed = e.to_string();
    for d in &e.diagnostics {
        assert!(
            !d.message.is_empty(),
            "a diagnostic without a message: {d:?}"
        );
        assert!(!d.hint.is_empty(), "a diagnostic without a hint: {d:?}");
        if (d.line, d.column) == (0, 0) {
            assert!(
                WHOLE_FILE.contains(&d.message.as_str()),
                "a diagnostic without a location: {d:?}\n--- text:\n{text}"
            );
        } else {
            assert!(
                d.line >= 1 && d.column >= 1 && d.line <= lines,
                "a diagnostic outside the file ({lines} lines): {d:?}\n--- text:\n{text}"
            );
        }
        let at = format!("{}:{}:{}: ", file.display(), d.line, d.column);
        assert!(printed.contains(&at), "`{at}` not printed in:\n{printed}");
    }
    let places: Vec<(u64, u64)> = e.diagnostics.iter().map(|d| (d.line, d.column)).collect();
    assert!(
        places.windows(2).all(|w| w[0] <= w[1]),
        "diagnostics not sorted by place: {places:?}"
    );
}

/// A campaign that passed: its stages render, its points are numbered, its warnings placed.
fn check_campaign(c: &Campaign, text: &str) {
    assert!(!c.stages.is_empty(), "a campaign without stages passed");
    assert!(!c.points.is_empty(), "a campaign without points passed");
    assert!(c.max_iterations >= 1, "max-iterations 0 passed");
    let ids: BTreeSet<&str> = c.points.iter().map(|p| p.id.as_str()).collect();
    assert_eq!(ids.len(), c.points.len(), "point ids repeat");
    let lines = yaml_lines(text);
    for w in &c.warnings {
        assert!(
            w.line >= 1 && w.column >= 1 && w.line as usize <= lines.len(),
            "a warning without a location: {w:?}\n--- text:\n{text}"
        );
        // Placed on `stop:` when a line starts with it.
        if w.message.starts_with("no stopping rule") && w.column == 1 {
            let line = lines[w.line as usize - 1];
            assert!(
                line.starts_with("stop:") || !lines.iter().any(|l| l.starts_with("stop:")),
                "the no-rule warning names line {} `{line}`, not `stop:`\n--- text:\n{text}",
                w.line
            );
        }
    }
    let values: Vec<String> = ["1.5", "a b", "it's", "$(x)"].map(String::from).into();
    for st in c.stages.iter().chain(&c.after_campaign) {
        match &st.kind {
            StageKind::Command { template, .. } => {
                assert!(!template.is_empty(), "stage `{}`: empty run list", st.name);
                let argv = template.render(|_, _| Some("v w".to_string()));
                match argv {
                    Ok(argv) => assert_eq!(argv.len(), template.len()),
                    Err(e) => panic!("stage `{}`: {e}", st.name),
                }
                // The run list as written, through the template properties too.
                let args: Vec<String> = template.to_string().split(' ').map(String::from).collect();
                if args.iter().all(|a| !a.is_empty()) {
                    template::check_args(&args, &values);
                }
            }
            StageKind::Shell { template, .. } => {
                let quoted = template.placeholders_in_shell_quotes();
                assert!(
                    quoted.is_empty(),
                    "stage `{}`: a shell stage passed with placeholders in quotes: {quoted:?}",
                    st.name
                );
                match template.render_shell(|_, _| Some("it's $x".to_string())) {
                    Ok(argv) => assert_eq!(argv.len(), 3),
                    Err(e) => panic!("stage `{}`: {e}", st.name),
                }
            }
            StageKind::Mix(_) | StageKind::Filter(_) | StageKind::Eos(_) => {}
        }
        for (role, name) in &st.outputs {
            assert!(
                !name.is_empty() && !name.contains('/') && name != "metrics.json",
                "stage `{}`: output `{role}` has file name `{name:?}`",
                st.name
            );
        }
    }
}
