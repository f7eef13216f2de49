//! Which program an attempt runs: hashes and version texts of the campaign's programs
//! (cached by file identity), rondo's own hash for built-ins, and the rule that a point stops
//! when a stage's program changes between its iterations.

use super::*;

/// Hashes and version texts of programs, recomputed when the file changes.
#[derive(Default)]
pub(super) struct ProgramCache {
    map: HashMap<PathBuf, (FileKey, String, Option<String>)>,
}

pub(super) type FileKey = (u64, u64, i64, i64);

pub(super) fn file_key(path: &Path) -> Option<FileKey> {
    use std::os::unix::fs::MetadataExt;
    let m = std::fs::metadata(path).ok()?;
    Some((m.dev(), m.ino(), m.mtime(), m.mtime_nsec()))
}

impl ProgramCache {
    pub(super) async fn get(
        &mut self,
        path: &Path,
        version_flag: Option<&str>,
    ) -> (String, Option<String>) {
        let key = file_key(path).unwrap_or((0, 0, 0, 0));
        if let Some((k, h, v)) = self.map.get(path) {
            if *k == key {
                return (h.clone(), v.clone());
            }
        }
        // A program can be a large file: hashed on the blocking pool.
        let owned = path.to_path_buf();
        let hash = match tokio::task::spawn_blocking(move || hash_file(&owned)).await {
            Ok(Ok((h, _))) => h,
            Ok(Err(e)) => format!("unreadable: {e}"),
            Err(e) => format!("unreadable: the hashing task failed: {e}"),
        };
        let version = match version_flag {
            Some(flag) => Some(version_text(path, flag).await),
            None => None,
        };
        self.map
            .insert(path.to_path_buf(), (key, hash.clone(), version.clone()));
        (hash, version)
    }
}

pub(super) async fn version_text(path: &Path, flag: &str) -> String {
    let run = tokio::process::Command::new(path)
        .arg(flag)
        .stdin(std::process::Stdio::null())
        .kill_on_drop(true)
        .output();
    match tokio::time::timeout(Duration::from_secs(30), run).await {
        Ok(Ok(out)) => {
            let mut text = String::from_utf8_lossy(&out.stdout).trim().to_string();
            if text.is_empty() {
                text = String::from_utf8_lossy(&out.stderr).trim().to_string();
            }
            text.chars().take(2000).collect()
        }
        Ok(Err(e)) => format!("(could not run `{} {flag}`: {e})", path.display()),
        Err(_) => format!("(`{} {flag}` did not answer within 30 s)", path.display()),
    }
}

impl Engine<'_> {
    /// The BLAKE3 of rondo's executable, or why it cannot be computed; computed once.
    pub(super) async fn rondo_hash(&mut self) -> Result<String, String> {
        if let Some(h) = &self.rondo_exe.1 {
            return h.clone();
        }
        let path = self.rondo_exe.0.clone();
        let h = tokio::task::spawn_blocking(move || {
            hash_file(&path)
                .map(|(h, _)| h)
                .map_err(|e| format!("cannot read {}: {e}", path.display()))
        })
        .await
        .unwrap_or_else(|e| Err(format!("the hashing task failed: {e}")));
        self.rondo_exe.1 = Some(h.clone());
        h
    }

    /// The program a stage's next attempt runs: path, BLAKE3 and version text. Built-ins
    /// run inside rondo; a command stage runs its program; a shell stage runs `/bin/sh`, and
    /// its hash is the BLAKE3 of the list `NAME<tab>PATH<tab>BLAKE3<newline>` of the programs
    /// its script names as `{{program:NAME}}` (sorted by name), each listed in the version
    /// text; the shell itself and other tools the script calls are not hashed.
    pub(super) async fn program_identity(
        &mut self,
        stage: &Stage,
        iteration: u32,
    ) -> Result<BuiltWith> {
        let built = |path: &Path, hash: Result<String, String>, version: Option<String>| {
            let (hash, unknown) = match hash {
                Ok(h) if h.starts_with("unreadable") => (String::new(), Some(h)),
                Ok(h) => (h, None),
                Err(why) => (String::new(), Some(why)),
            };
            BuiltWith {
                iteration,
                path: path.display().to_string(),
                hash,
                unknown,
                version,
            }
        };
        Ok(match &stage.kind {
            StageKind::Filter(_) | StageKind::Mix(_) | StageKind::Eos(_) => {
                let exe = self.rondo_exe.0.clone();
                built(
                    &exe,
                    self.rondo_hash().await,
                    Some(format!("rondo {RONDO_VERSION}")),
                )
            }
            StageKind::Command { program, .. } if stage.also_runs.is_empty() => {
                let Some(resolved) = self.campaign.programs.get(program).cloned() else {
                    bail!("internal: program `{program}` was not resolved");
                };
                let (hash, version) = self
                    .programs
                    .get(&resolved.path, resolved.version_flag.as_deref())
                    .await;
                built(&resolved.path, Ok(hash), version)
            }
            StageKind::Command { program, .. } => {
                // A wrapper and the programs it runs (`also-runs`): one hash over all of
                // them, as for a shell stage, with the wrapper's path as the program.
                let Some(resolved) = self.campaign.programs.get(program).cloned() else {
                    bail!("internal: program `{program}` was not resolved");
                };
                let mut names = vec![program.clone()];
                names.extend(stage.also_runs.iter().filter(|n| *n != program).cloned());
                names.sort();
                let (hash, text) = self.program_list(&names).await?;
                built(
                    &resolved.path,
                    Ok(hash),
                    Some(format!("program and what it runs: {text}")),
                )
            }
            StageKind::Shell { programs, .. } => {
                let mut names = programs.clone();
                names.extend(stage.also_runs.iter().cloned());
                names.sort();
                names.dedup();
                let (hash, text) = self.program_list(&names).await?;
                let text = if names.is_empty() {
                    "shell script naming no program of `programs:`".to_string()
                } else {
                    format!("shell script; programs: {text}")
                };
                built(Path::new("/bin/sh"), Ok(hash), Some(text))
            }
        })
    }

    /// The BLAKE3 of the list `NAME<tab>PATH<tab>BLAKE3<newline>` of programs (in the
    /// order given), and a text naming each with its path, hash and version.
    async fn program_list(&mut self, names: &[String]) -> Result<(String, String)> {
        let mut list = String::new();
        let mut described = Vec::new();
        for name in names {
            let Some(resolved) = self.campaign.programs.get(name).cloned() else {
                bail!("internal: program `{name}` was not resolved");
            };
            let (hash, version) = self
                .programs
                .get(&resolved.path, resolved.version_flag.as_deref())
                .await;
            let path = resolved.path.display().to_string();
            list.push_str(&format!("{name}\t{path}\t{hash}\n"));
            described.push(format!(
                "{name} = {path} (BLAKE3 {hash}{})",
                version
                    .map(|v| format!("; version {v}"))
                    .unwrap_or_default()
            ));
        }
        Ok((
            blake3::hash(list.as_bytes()).to_hex().to_string(),
            described.join("; "),
        ))
    }

    /// The program of a stage changed since an earlier iteration of this point ran it: stop
    /// the point (failed) before anything of the new build runs, saying what to do.
    pub(super) async fn stop_for_changed_program(
        &mut self,
        p: usize,
        stage: &Stage,
        before: &BuiltWith,
        now: &BuiltWith,
    ) -> Result<()> {
        let iteration = self.points[p].iteration;
        let listed = matches!(stage.kind, StageKind::Shell { .. }) || !stage.also_runs.is_empty();
        let what = match &stage.kind {
            _ if listed => format!(
                "the programs of stage `{}` changed between iterations: iteration {} ran \
                 with {} (BLAKE3 {} over them), now {} (BLAKE3 {})",
                stage.name,
                before.iteration,
                before.version.as_deref().unwrap_or("?"),
                before.hash,
                now.version.as_deref().unwrap_or("?"),
                now.hash
            ),
            _ => format!(
                "program {} of stage `{}` changed between iterations: BLAKE3 {} ran iteration {}{}, \
                 the file now has BLAKE3 {}",
                now.path,
                stage.name,
                before.hash,
                before.iteration,
                if before.path == now.path {
                    String::new()
                } else {
                    format!(" (as {})", before.path)
                },
                now.hash
            ),
        };
        let reason = format!(
            "{what}; the point stops so that its iterations do not mix two builds. To go on, put \
             back the build that ran and run again with --retry-failed; to use the new build, \
             run the campaign in a new workspace (--workspace)"
        );
        self.fail_point(p, iteration, None, &reason, Some("program-changed"))
            .await
    }
}
