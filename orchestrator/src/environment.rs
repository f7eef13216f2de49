//! The environment recorded with each attempt: the allow-listed variables of the
//! environment rondo passes on to its children (docs/provenance.md, "Environment"). Only
//! names on the allow-list are kept, and of those never one whose name says it holds a
//! secret: a token, password or key never reaches the store, an export or a report.
//!
//! Owns the allow-list and the filter; knows nothing of the store or the engine.

use std::collections::BTreeMap;

/// Variables recorded by exact name.
pub const RECORDED: &[&str] = &[
    "PATH",
    "LD_LIBRARY_PATH",
    "LD_PRELOAD",
    "HOSTNAME",
    "LANG",
    "LC_ALL",
    "LC_NUMERIC",
    "TZ",
    "CUDA_VISIBLE_DEVICES",
    "HDF5_USE_FILE_LOCKING",
];

/// Variables recorded by prefix: threading of the numerical libraries, the batch job.
pub const RECORDED_PREFIXES: &[&str] = &[
    "OMP_",
    "MKL_",
    "OPENBLAS_",
    "BLIS_",
    "GOTO_",
    "VECLIB_",
    "SLURM_",
    "PBS_",
];

/// Parts of a name that mark a secret (compared without regard to case): such a variable
/// is never recorded, even when the allow-list would take it.
pub const NEVER: &[&str] = &[
    "TOKEN",
    "SECRET",
    "PASSWORD",
    "PASSWD",
    "KEY",
    "CREDENTIAL",
    "AUTH",
    "COOKIE",
    "SESSION",
    "PRIVATE",
];

/// Whether a variable of this name is recorded.
pub fn recorded(name: &str) -> bool {
    let upper = name.to_ascii_uppercase();
    if NEVER.iter().any(|n| upper.contains(n)) {
        return false;
    }
    RECORDED.contains(&name) || RECORDED_PREFIXES.iter().any(|p| name.starts_with(p))
}

/// The recorded part of `vars`, by name.
pub fn filter<I: IntoIterator<Item = (String, String)>>(vars: I) -> BTreeMap<String, String> {
    vars.into_iter().filter(|(k, _)| recorded(k)).collect()
}

/// The recorded part of this process's environment (what its children inherit), as the
/// JSON object stored in `attempts.env_json`. Variables that are not valid UTF-8 are left
/// out.
pub fn recorded_json() -> String {
    let kept = filter(
        std::env::vars_os()
            .filter_map(|(k, v)| Some((k.into_string().ok()?, v.into_string().ok()?))),
    );
    serde_json::to_string(&kept).unwrap_or_else(|_| "{}".to_string())
}

/// The recorded environment of an attempt of a stage that sets `env:`: the recorded part of
/// rondo's environment (`base`, as [`recorded_json`] made it) with every variable the stage
/// sets, whatever its name (the campaign file names them, and refuses names that mark a
/// secret), over it.
pub fn with_stage(base: &str, stage_env: &[(String, String)]) -> String {
    let mut vars: BTreeMap<String, String> = serde_json::from_str(base).unwrap_or_default();
    for (k, v) in stage_env {
        vars.insert(k.clone(), v.clone());
    }
    serde_json::to_string(&vars).unwrap_or_else(|_| "{}".to_string())
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn the_allow_list_keeps_threads_and_paths_and_never_a_secret() {
        let vars = [
            ("OMP_NUM_THREADS", "4"),
            ("PATH", "/usr/bin"),
            ("SLURM_JOB_ID", "17"),
            ("GITLAB_TOKEN", "x"),
            ("SLURM_AUTH_KEY", "x"),
            ("MY_PASSWORD", "x"),
            ("aws_secret_access_key", "x"),
            ("HOME", "/root"),
            ("OMP_api_key", "x"),
        ]
        .map(|(k, v)| (k.to_string(), v.to_string()));
        let kept = filter(vars);
        assert_eq!(
            kept.keys().map(String::as_str).collect::<Vec<_>>(),
            ["OMP_NUM_THREADS", "PATH", "SLURM_JOB_ID"]
        );
    }
}
