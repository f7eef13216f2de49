//! `programs:` and the first element of a stage's `run`: every program a stage runs
//! resolves to an executable file.

use std::collections::{BTreeMap, BTreeSet};
use std::path::{Path, PathBuf};

use serde_saphyr::Spanned;

use super::{loc, Validator};
use crate::spec::model::ResolvedProgram;
use crate::spec::raw::CampaignFile;

/// Whether this process may execute `path` (`access(2)` with `X_OK`).
pub fn is_executable(path: &Path) -> bool {
    use std::os::unix::ffi::OsStrExt;
    let Ok(c) = std::ffi::CString::new(path.as_os_str().as_bytes()) else {
        return false;
    };
    // SAFETY: a valid NUL-terminated path; access only reads it.
    path.is_file() && unsafe { libc::access(c.as_ptr(), libc::X_OK) == 0 }
}

/// Find a program file: absolute, relative to `base` (contains '/'), or a bare name on PATH
/// and then beside the running executable.
pub fn resolve_program(name: &str, base: &Path) -> Option<PathBuf> {
    let p = Path::new(name);
    if p.is_absolute() {
        return p.is_file().then(|| p.to_path_buf());
    }
    if name.contains('/') {
        let q = base.join(p);
        return q.is_file().then(|| std::path::absolute(&q).unwrap_or(q));
    }
    if let Some(path) = std::env::var_os("PATH") {
        for dir in std::env::split_paths(&path) {
            let q = dir.join(name);
            // As the shell does: a file on PATH that cannot be executed is passed over.
            if is_executable(&q) {
                return Some(std::path::absolute(&q).unwrap_or(q));
            }
        }
    }
    let exe = std::env::current_exe().ok()?;
    let q = exe.parent()?.join(name);
    q.is_file().then_some(q)
}

impl Validator<'_> {
    /// `programs:`: each entry resolves (relative to `base`) to an executable file.
    pub(super) fn programs(
        &mut self,
        raw: &CampaignFile,
        base: &Path,
    ) -> BTreeMap<String, ResolvedProgram> {
        let mut programs = BTreeMap::new();
        for (k, p) in &raw.programs.0 {
            match resolve_program(&p.path.value, base) {
                Some(path) if !is_executable(&path) => self.push(
                    loc(&p.path),
                    format!("program `{}` ({}) is not executable", p.path.value, path.display()),
                    format!("make it executable (chmod +x {}) or name another program", path.display()),
                ),
                Some(path) => {
                    programs.insert(
                        k.value.clone(),
                        ResolvedProgram { path, version_flag: p.version_flag.clone() },
                    );
                }
                None => self.push(
                    loc(&p.path),
                    format!("program `{}` not found", p.path.value),
                    "give an absolute path, a path relative to the campaign file, or a name on PATH",
                ),
            }
        }
        programs
    }

    /// The program of an argument-list stage (`run[0]`, `first`): a placeholder is refused;
    /// a name of `programs:` (`declared`) was resolved (or reported) there; any other name
    /// is looked up like a program path and, when found, added to `programs` under it.
    pub(super) fn run_program(
        &mut self,
        first: &Spanned<String>,
        programs: &mut BTreeMap<String, ResolvedProgram>,
        declared: &BTreeSet<String>,
        base: &Path,
    ) {
        let program = first.value.clone();
        if program.contains("{{") {
            self.push(
                loc(first),
                "the program (first element of `run`) cannot be a placeholder",
                "name a program from `programs:` or a path",
            );
        } else if declared.contains(&program) {
            // Declared under `programs:`: resolved there (or reported there, once).
        } else if !programs.contains_key(&program) {
            match resolve_program(&program, base) {
                Some(path) if !is_executable(&path) => self.push(
                    loc(first),
                    format!("program `{program}` ({}) is not executable", path.display()),
                    format!(
                        "make it executable (chmod +x {}) or name another program",
                        path.display()
                    ),
                ),
                Some(path) => {
                    programs.insert(
                        program.clone(),
                        ResolvedProgram {
                            path,
                            version_flag: None,
                        },
                    );
                }
                None => self.push(
                    loc(first),
                    format!("program `{program}` not found"),
                    "declare it under `programs:` or give a path relative to the campaign file",
                ),
            }
        }
    }
}

#[cfg(test)]
mod tests {
    use super::super::testing::*;
    use super::*;

    fn with_program(path: &str) -> CampaignFile {
        raw(&format!(
            "campaign: t
programs:
  engine: {{ path: {path}, version-flag: --version }}
cycle:
  s: {{ run: [engine] }}
stop: {{ max-iterations: 1 }}
"
        ))
    }

    #[test]
    fn a_program_on_an_absolute_path_resolves_with_its_version_flag() {
        let mut v = validator();
        let p = v.programs(&with_program("/bin/sh"), Path::new("."));
        assert!(v.diags.is_empty(), "{:?}", found(&v));
        let e = p
            .get("engine")
            .map(|r| (r.path.clone(), r.version_flag.clone()));
        assert_eq!(
            e,
            Some((PathBuf::from("/bin/sh"), Some("--version".to_string())))
        );
    }

    #[test]
    fn a_missing_program_is_reported_at_its_path() {
        let mut v = validator();
        let p = v.programs(&with_program("no-such-program-anywhere"), Path::new("."));
        assert!(p.is_empty());
        assert_eq!(
            found(&v),
            vec![(
                3,
                19,
                "program `no-such-program-anywhere` not found".to_string()
            )]
        );
    }

    #[test]
    fn a_program_file_without_the_execute_bit_is_reported_with_chmod() {
        let d = tempfile::tempdir().unwrap_or_else(|e| panic!("{e}"));
        std::fs::write(d.path().join("prog"), "#!/bin/sh\n").unwrap_or_else(|e| panic!("{e}"));
        let mut v = validator();
        let p = v.programs(&with_program("./prog"), d.path());
        assert!(p.is_empty());
        let f = found(&v);
        assert_eq!((f.len(), f[0].0, f[0].1), (1, 3, 19), "{f:?}");
        assert!(
            f[0].2.starts_with("program `./prog` (") && f[0].2.ends_with(") is not executable"),
            "{f:?}"
        );
        assert!(hints(&v)[0].starts_with("make it executable (chmod +x "));
    }

    #[test]
    fn a_run_program_that_is_a_placeholder_or_missing_is_reported_at_run0() {
        let raw = raw("campaign: t
cycle:
  s: { run: [\"{{param:x}}\"] }
  u: { run: [nowhere-to-be-found] }
  w: { run: [/bin/sh] }
stop: { max-iterations: 1 }
");
        let mut v = validator();
        let mut programs = BTreeMap::new();
        let declared = BTreeSet::new();
        for (_, st) in &raw.cycle.0 {
            let Some(Spanned {
                value: crate::spec::raw::RunSpec::List(list),
                ..
            }) = &st.run
            else {
                panic!("an argument list")
            };
            v.run_program(&list[0], &mut programs, &declared, Path::new("."));
        }
        assert_eq!(
            found(&v),
            vec![
                (
                    3,
                    14,
                    "the program (first element of `run`) cannot be a placeholder".to_string()
                ),
                (4, 14, "program `nowhere-to-be-found` not found".to_string()),
            ]
        );
        assert_eq!(programs.keys().collect::<Vec<_>>(), ["/bin/sh"]);
    }
}
