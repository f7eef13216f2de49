//! `env:` and `also-runs:` of a stage: the environment variables its program gets (thread
//! counts, library paths, a code's own settings) and the further programs a wrapper runs,
//! whose hashes and version texts join the stage's recorded program. Both apply to command
//! and shell stages only: a built-in runs inside rondo.

use std::collections::{BTreeMap, BTreeSet};

use super::{loc, Validator};
use crate::spec::model::{ResolvedProgram, StageKind};
use crate::spec::raw::StageSpec;

/// Whether `name` is a portable environment variable name (POSIX: letters, digits and `_`,
/// not starting with a digit).
fn portable_name(name: &str) -> bool {
    let mut chars = name.chars();
    chars
        .next()
        .is_some_and(|c| c.is_ascii_alphabetic() || c == '_')
        && chars.all(|c| c.is_ascii_alphanumeric() || c == '_')
}

impl Validator<'_> {
    /// The checked `env:` of a stage, name → value, in file order.
    pub(super) fn stage_env(
        &mut self,
        sname: &str,
        st: &StageSpec,
        kind: &StageKind,
    ) -> Vec<(String, String)> {
        let mut out = Vec::new();
        for (k, v) in &st.env.0 {
            let name = k.value.as_str();
            let at = loc(k);
            if kind.is_builtin() {
                self.push(
                    at,
                    format!("built-in stage `{sname}` takes no `env`: it runs inside rondo"),
                    "remove `env:` from this stage",
                );
                return Vec::new();
            }
            if !portable_name(name) {
                self.push(
                    at,
                    format!("stage `{sname}`: `env` names `{name}`, which is not a variable name"),
                    "use letters, digits and `_`, not starting with a digit (OMP_NUM_THREADS)",
                );
                continue;
            }
            if name.starts_with("RONDO_") {
                self.push(
                    at,
                    format!("stage `{sname}`: `env` sets `{name}`; names starting with RONDO_ are rondo's"),
                    "choose another name; rondo sets RONDO_POINT, RONDO_ITERATION, RONDO_STAGE and the workspace tags itself",
                );
                continue;
            }
            let upper = name.to_ascii_uppercase();
            if crate::environment::NEVER.iter().any(|n| upper.contains(n)) {
                self.push(
                    at,
                    format!("stage `{sname}`: `env` sets `{name}`, whose name marks a secret; the campaign file is recorded in the workspace"),
                    "set it in the environment rondo runs in instead (it is passed on to the stage, and never recorded)",
                );
                continue;
            }
            out.push((name.to_string(), v.value.to_string()));
        }
        out
    }

    /// The checked `also-runs:` of a stage: names of `programs:`, sorted, without repeats.
    pub(super) fn also_runs(
        &mut self,
        sname: &str,
        st: &StageSpec,
        kind: &StageKind,
        declared: &BTreeSet<String>,
        programs: &BTreeMap<String, ResolvedProgram>,
    ) -> Vec<String> {
        let mut out: Vec<String> = Vec::new();
        for name in &st.also_runs {
            if kind.is_builtin() {
                self.push(
                    loc(name),
                    format!("built-in stage `{sname}` takes no `also-runs`: it runs inside rondo"),
                    "remove `also-runs:` from this stage",
                );
                return Vec::new();
            }
            if !declared.contains(&name.value) {
                let known: Vec<&str> = declared.iter().map(String::as_str).collect();
                self.push(
                    loc(name),
                    format!(
                        "stage `{sname}`: `also-runs` names `{}`, which is not under `programs:`",
                        name.value
                    ),
                    if known.is_empty() {
                        "declare it under `programs:` with its path".to_string()
                    } else {
                        format!(
                            "declare it under `programs:` (declared: {})",
                            known.join(", ")
                        )
                    },
                );
                continue;
            }
            // A declared program that could not be resolved was reported at its entry.
            if programs.contains_key(&name.value) && !out.contains(&name.value) {
                out.push(name.value.clone());
            }
        }
        out.sort();
        out
    }
}
