//! Settling attempts: what an executor's outcome means, the output checks, storing outputs as
//! artifacts, and recording successes (in group commits) and failures.

use super::*;

/// Start time, host and process group of an ended attempt, as its final row records them:
/// from its completion where it says, else from its launch not yet written.
pub(super) fn launch_fields(
    started: Option<DateTime<Utc>>,
    host: Option<String>,
    launch: Option<UnrecordedLaunch>,
) -> LaunchFields {
    let (l_started, l_host, l_handle) = match launch {
        Some(l) => (Some(l.started_at), Some(l.host), Some(l.handle_id)),
        None => (None, None, None),
    };
    LaunchFields {
        started: started.map(store::time_text).or(l_started),
        host: host.or(l_host),
        handle: l_handle,
    }
}

pub(super) fn first_line(s: &str) -> &str {
    s.lines().next().unwrap_or("")
}

/// The last lines of the attempt's stderr, for failure messages.
pub(super) fn stderr_tail(workdir: &Path) -> String {
    let Ok(text) = std::fs::read_to_string(workdir.join("stderr.txt")) else {
        return String::new();
    };
    let lines: Vec<&str> = text.lines().filter(|l| !l.trim().is_empty()).collect();
    if lines.is_empty() {
        return String::new();
    }
    let tail = lines[lines.len().saturating_sub(5)..].join("\n");
    format!(
        "; stderr ends: {}",
        tail.chars().take(1500).collect::<String>()
    )
}

impl Engine<'_> {
    pub(super) async fn on_completion(&mut self, c: Completion) -> Result<()> {
        failpoint::hit(Failpoint::ChildEnded);
        let Some(fl) = self.inflight.get(&c.attempt_id).cloned() else {
            tracing::warn!(
                attempt = c.attempt_id,
                "completion for an attempt not in flight"
            );
            return Ok(());
        };
        if let Some(u) = &c.usage {
            self.usage.insert(c.attempt_id, u.clone());
        }
        let stage = self.campaign.stages[fl.stage].clone();
        let failed = |kind: &str,
                      message: String,
                      exit_status: Option<i32>,
                      free: bool,
                      state: AttemptState| Ended::Failed {
            kind: kind.to_string(),
            message,
            exit_status,
            started: c.started_at,
            ended: c.ended_at,
            host: c.host.clone(),
            free,
            state,
        };
        let ended = match &c.outcome {
            Outcome::Exited { code: 0 } => {
                // Checked and stored on the blocking pool; the result comes back to the loop.
                let job = OutputJob {
                    id: c.attempt_id,
                    stage: stage.clone(),
                    workdir: fl.workdir.clone(),
                    artifacts: self.artifacts.clone(),
                    keep_scratch: self.opts.keep_scratch,
                    case_root: None,
                };
                let tx = self.checked_tx.clone();
                let (started, ended, host) = (c.started_at, c.ended_at, c.host.clone());
                self.storing.insert(c.attempt_id);
                tokio::task::spawn_blocking(move || {
                    let ended = check_outputs(&job.stage, &job.workdir, None, started, ended, host);
                    let _ = tx.send(job.store(ended));
                });
                return Ok(());
            }
            Outcome::Exited { code } => failed(
                "exit-status",
                format!("exited with status {code}{}", stderr_tail(&fl.workdir)),
                Some(*code),
                false,
                AttemptState::Failed,
            ),
            Outcome::Signaled { signal } => failed(
                "signal",
                format!("killed by signal {signal}{}", stderr_tail(&fl.workdir)),
                None,
                false,
                AttemptState::Failed,
            ),
            Outcome::TimedOut => failed(
                "timeout",
                format!(
                    "exceeded its time limit{}",
                    stage
                        .time_limit
                        .map(|d| format!(" of {} s", d.as_secs()))
                        .unwrap_or_default()
                ),
                None,
                false,
                AttemptState::Failed,
            ),
            Outcome::Cancelled { by } if by == "rondo" => failed(
                "cancelled",
                "stopped by rondo".into(),
                None,
                true,
                AttemptState::Cancelled,
            ),
            Outcome::Cancelled { by } => failed(
                "cancelled",
                format!("cancelled by {by}"),
                None,
                false,
                AttemptState::Failed,
            ),
            Outcome::NodeFailure => failed(
                "node-failure",
                "its node failed".into(),
                None,
                false,
                AttemptState::Failed,
            ),
            Outcome::Preempted => failed(
                "preempted",
                "preempted by the scheduler".into(),
                None,
                false,
                AttemptState::Failed,
            ),
            Outcome::LaunchFailed { message } => failed(
                "launch-failed",
                message.clone(),
                None,
                false,
                AttemptState::Failed,
            ),
            Outcome::Lost { reason } => {
                failed("lost", reason.clone(), None, true, AttemptState::Lost)
            }
        };
        self.settle(c.attempt_id, Some(&fl), ended).await
    }

    /// An attempt's outputs were checked and stored on the blocking pool (or refused).
    pub(super) async fn on_checked(&mut self, c: Checked) -> Result<()> {
        self.storing.remove(&c.id);
        self.handoff_settled(&c).await;
        let ended = c.result?;
        let Some(fl) = self.inflight.get(&c.id).cloned() else {
            tracing::warn!(
                attempt = c.id,
                "checked outputs of an attempt not in flight"
            );
            return Ok(());
        };
        self.settle(c.id, Some(&fl), ended).await
    }

    /// Record the end of an attempt and move its point on.
    pub(super) async fn settle(
        &mut self,
        id: i64,
        fl: Option<&InFlight>,
        ended: Ended,
    ) -> Result<()> {
        self.inflight.remove(&id);
        match ended {
            Ended::Ok(done) => {
                let Some(fl) = fl else {
                    bail!("internal: success without a stage");
                };
                self.settle_success(id, fl, done).await
            }
            Ended::Failed {
                kind,
                message,
                exit_status,
                started,
                ended,
                host,
                free,
                state,
            } => {
                let failure = store::attempts::Failure {
                    state,
                    kind: &kind,
                    message: &message,
                    exit_status,
                    ended: store::time_text(ended.unwrap_or_else(Utc::now)),
                };
                let launch = launch_fields(started, host, self.unrecorded.remove(&id));
                self.settle_failure(id, fl, &failure, launch, free).await
            }
        }
    }

    /// A success: its outputs (stored already), metrics and, for the iteration's last stage,
    /// the verdict, in one script; held back for a group commit when the attempt was short.
    async fn settle_success(&mut self, id: i64, fl: &InFlight, done: Success) -> Result<()> {
        let stage = self.campaign.stages[fl.stage].clone();
        let point_id = self.points[fl.point].spec.id.clone();
        let launch = launch_fields(done.started, done.host, self.unrecorded.remove(&id));
        // The iteration's last stage: its verdict goes into the same transaction.
        let last = fl.stage + 1 == self.campaign.cycle_end();
        if last {
            self.ensure_history(fl.point).await?;
        }
        let metrics: Vec<(String, f64, Option<f64>)> = done
            .metrics
            .iter()
            .map(|m| (format!("{}.{}", stage.name, m.name), m.value, m.error))
            .collect();
        if let Some(h) = self.points[fl.point].history.as_mut() {
            let at = h.entry(fl.iteration).or_default();
            for (name, value, error) in &metrics {
                at.insert(
                    name.clone(),
                    Sample {
                        value: *value,
                        error: *error,
                    },
                );
            }
        }
        let verdict = if last {
            Some(self.judge(fl.point)?)
        } else {
            None
        };
        // Everything of this success (and the iteration's verdict) in one script, after
        // the records held back (this attempt's planned row among them, if it was short).
        let (mut script, held) = self.ledger.begin();
        script.attempt_outputs(id, &done.outs, &store::now());
        script.folder_members(&done.folders);
        script.attempt_metrics(id, &metrics);
        if let Some(u) = self.usage.remove(&id) {
            script.attempt_usage(id, &u, &u.source);
        }
        script.attempt_succeeded(
            id,
            store::time_text(done.ended.unwrap_or_else(Utc::now)),
            launch,
        );
        if let Some(v) = &verdict {
            record_verdict(
                &mut script,
                &point_id,
                v,
                serde_json::to_string(&v.decision)?,
            );
        }
        if let Some(ev) = &done.event {
            script.event("mixer", Some(&point_id), Some(fl.iteration), Some(id), ev);
        }
        let short = match (done.started, done.ended) {
            (Some(a), Some(b)) => (b - a).to_std().is_ok_and(|d| d < SHORT_ATTEMPT),
            _ => false,
        };
        if short && held + 1 < BATCH_MAX {
            self.ledger.hold(script, held + 1);
            failpoint::hit(Failpoint::SuccessRecorded);
        } else {
            self.ledger
                .commit(script, Failpoint::SuccessRecorded)
                .await?;
        }
        if let Some(v) = &verdict {
            verdict_failpoints(v);
        }
        if let Some(ev) = done.event {
            self.progress
                .line(format!("{point_id} iteration {}: {ev}", fl.iteration));
        }
        if !self.opts.keep_scratch {
            self.scratch.recycle(&fl.workdir);
        }
        let pr = &mut self.points[fl.point];
        pr.outstanding = None;
        pr.next_stage = fl.stage + 1;
        pr.built[fl.stage] = Some(BuiltWith {
            iteration: fl.iteration,
            ..fl.built.clone()
        });
        if let Some(v) = verdict {
            self.apply_verdict(fl.point, v);
            self.retain(fl.point).await?;
        }
        if self.points[fl.point].phase != PointPhase::Done {
            self.ready.push_back(fl.point);
        }
        Ok(())
    }

    /// A failure (or a loss, or a cancel): recorded at once with its event; a real failure
    /// uses up one of the stage's retries, and the last one fails the point.
    async fn settle_failure(
        &mut self,
        id: i64,
        fl: Option<&InFlight>,
        f: &store::attempts::Failure<'_>,
        launch: LaunchFields,
        free: bool,
    ) -> Result<()> {
        let what = format!("{}: {}", f.kind, f.message);
        let point = fl.map(|fl| (fl, self.points[fl.point].spec.id.clone()));
        let usage = self.usage.remove(&id);
        self.ledger
            .write(Failpoint::AttemptFailed, |s| {
                s.attempt_ended_badly(id, f, launch);
                if let Some(u) = &usage {
                    s.attempt_usage(id, u, &u.source);
                }
                if let Some((fl, point_id)) = &point {
                    s.event(
                        &format!("attempt-{}", f.state),
                        Some(point_id),
                        Some(fl.iteration),
                        Some(id),
                        &what,
                    );
                }
            })
            .await?;
        let Some((fl, point_id)) = point else {
            return Ok(());
        };
        let stage = &self.campaign.stages[fl.stage];
        self.points[fl.point].outstanding = None;
        if free {
            self.ready.push_back(fl.point);
            return Ok(());
        }
        self.progress.line(format!(
            "{point_id} iteration {} stage {} attempt {} failed ({}): {}",
            fl.iteration,
            stage.name,
            fl.attempt,
            f.kind,
            first_line(f.message)
        ));
        let failures = self
            .ledger
            .flush()
            .await?
            .failed_attempts(&point_id, fl.iteration, &stage.name)
            .await?;
        if failures > i64::from(stage.retries) && stage.section == Section::AfterPoint {
            // The point converged (or was capped) already: it stays so; the stage runs
            // again at the next `rondo run`.
            let why = format!(
                "after-point stage `{}` failed after {failures} attempt(s); last: {}: {}; \
                 `rondo run` runs it again",
                stage.name,
                f.kind,
                first_line(f.message)
            );
            self.event(
                "after-point-failed",
                Some(&point_id),
                Some(fl.iteration),
                Some(id),
                &why,
            )
            .await?;
            self.progress.line(format!("{point_id}: {why}"));
            self.after_failed += 1;
            self.points[fl.point].phase = PointPhase::Done;
        } else if failures > i64::from(stage.retries) {
            let reason = format!(
                "stage `{}` failed at iteration {} after {failures} attempt(s); last: {}: {}",
                stage.name,
                fl.iteration,
                f.kind,
                first_line(f.message)
            );
            self.fail_point(fl.point, fl.iteration, Some(id), &reason, None)
                .await?;
        } else {
            self.ready.push_back(fl.point);
        }
        Ok(())
    }

    /// Write the launches of local attempts still running (see [`UnrecordedLaunch`]), with
    /// everything held back.
    pub(super) async fn record_launches(&mut self) -> Result<()> {
        if self.unrecorded.is_empty() && self.ledger.is_idle() {
            return Ok(());
        }
        let launches: Vec<(i64, UnrecordedLaunch)> = self.unrecorded.drain().collect();
        self.ledger
            .write(Failpoint::LaunchesRecorded, |s| {
                for (id, l) in launches {
                    s.attempt_running(id, l.handle_id, l.host, l.started_at);
                }
            })
            .await
    }
}

/// An attempt's outputs to check and store, off the engine's thread.
pub(super) struct OutputJob {
    pub(super) id: i64,
    pub(super) stage: Stage,
    pub(super) workdir: PathBuf,
    pub(super) artifacts: ArtifactStore,
    pub(super) keep_scratch: bool,
    /// A resident stage's folder, which holds its case folder (stored from there as a copy:
    /// the program goes on rewriting its files).
    pub(super) case_root: Option<PathBuf>,
}

/// What the blocking pool hands back to the loop.
pub(super) struct Checked {
    id: i64,
    /// The attempt's end (with its outputs stored, if it succeeded), or why storing failed
    /// (which ends the run: the store cannot take files).
    result: Result<Ended>,
}

impl Checked {
    /// An attempt that ended without outputs to store (a failed hand-off).
    pub(super) fn ended(id: i64, ended: Ended) -> Checked {
        Checked {
            id,
            result: Ok(ended),
        }
    }

    /// Whether the attempt succeeded with its outputs stored.
    pub(super) fn succeeded(&self) -> bool {
        matches!(self.result, Ok(Ended::Ok(_)))
    }

    /// The attempt.
    pub(super) fn id(&self) -> i64 {
        self.id
    }
}

impl OutputJob {
    /// Store the outputs of a checked success (linked in, no copy, read-only from then on,
    /// unless the user keeps the scratch folders to work in them).
    pub(super) fn store(self, ended: Ended) -> Checked {
        let result = match ended {
            Ended::Ok(done) => match self.store_files() {
                Ok(Stored::All(outs, folders)) => Ok(Ended::Ok(Success {
                    outs,
                    folders,
                    ..done
                })),
                // A folder the store does not take (a link out of it, a FIFO, a glob with
                // no match): the attempt failed, the run goes on.
                Ok(Stored::Refused(message)) => Ok(Ended::Failed {
                    kind: "refused-output".into(),
                    message,
                    exit_status: Some(0),
                    started: done.started,
                    ended: done.ended,
                    host: done.host,
                    free: false,
                    state: AttemptState::Failed,
                }),
                Err(e) => Err(e),
            },
            failed => Ok(failed),
        };
        Checked {
            id: self.id,
            result,
        }
    }

    /// Store every output: files linked in, folders (`name/`), globs and the case folder as
    /// folder artifacts (each member by content, then the manifest).
    fn store_files(&self) -> Result<Stored> {
        let mut files: Vec<(String, String)> = self.stage.outputs.clone();
        if matches!(self.stage.kind, StageKind::Mix(_)) {
            files.push(("state".into(), builtins::STATE_FILE.into()));
        }
        if let Some(cf) = &self.stage.case_folder {
            files.push((
                crate::spec::CASE_FOLDER_ROLE.into(),
                format!("{}/", cf.path),
            ));
        }
        if self.workdir.join(validate::METRICS_FILE).is_file() {
            files.push(("metrics".into(), validate::METRICS_FILE.into()));
        }
        let linked = !self.keep_scratch;
        let mut outs = Vec::with_capacity(files.len());
        let mut folders = Vec::new();
        for (role, file) in files {
            let resident_case = role == crate::spec::CASE_FOLDER_ROLE && self.case_root.is_some();
            let folder = if let (true, Some(root)) = (resident_case, &self.case_root) {
                let name = file.trim_end_matches('/');
                Some(self.artifacts.put_folder(&root.join(name), false))
            } else if let Some(name) = file.strip_suffix('/') {
                Some(self.artifacts.put_folder(&self.workdir.join(name), linked))
            } else if crate::artifacts::folder::is_glob(&file) {
                Some(self.artifacts.put_glob(&self.workdir, &file, linked))
            } else {
                None
            };
            if let Some(stored) = folder {
                let f = match stored {
                    Ok(f) => f,
                    Err(crate::artifacts::FolderError::Refused(m)) => {
                        return Ok(Stored::Refused(format!("output `{role}`: {m}")));
                    }
                    Err(crate::artifacts::FolderError::Io(e)) => {
                        return Err(anyhow::Error::new(e).context(format!(
                            "{}: cannot store the folder output `{role}`",
                            self.workdir.join(&file).display()
                        )));
                    }
                };
                let name = if file.ends_with('/') {
                    file.clone()
                } else {
                    format!("{role}/")
                };
                folders.push((f.hash.clone(), members(&f.manifest)));
                outs.push((role, f.hash, f.size, name));
                continue;
            }
            let path = self.workdir.join(&file);
            let stored = if self.keep_scratch {
                self.artifacts.put_file(&path)
            } else {
                self.artifacts.put_file_linked(&path)
            };
            let (h, size) =
                stored.with_context(|| format!("{}: cannot store the output", path.display()))?;
            outs.push((role, h, size, file));
        }
        failpoint::hit(Failpoint::OutputStored);
        Ok(Stored::All(outs, folders))
    }
}

/// What storing an attempt's outputs came to.
enum Stored {
    /// Every output stored, with the members of its folders.
    All(Vec<StoredOutput>, Vec<FolderMembers>),
    /// A folder output the store refuses (why, naming the output).
    Refused(String),
}

/// A manifest's files as the store records them: (path, hash, size, mode).
fn members(m: &crate::artifacts::Manifest) -> Vec<(String, String, u64, String)> {
    m.files()
        .map(|(p, h, n, mode)| (p.to_string(), h.to_string(), n, mode.to_string()))
        .collect()
}

/// Output checks after a clean exit (or a built-in's end).
pub(super) fn check_outputs(
    stage: &Stage,
    workdir: &Path,
    builtin_metrics: Option<Vec<Metric>>,
    started: Option<DateTime<Utc>>,
    ended: Option<DateTime<Utc>>,
    host: Option<String>,
) -> Ended {
    let fail = |inv: validate::Invalid| Ended::Failed {
        kind: inv.kind.to_string(),
        message: inv.message,
        exit_status: Some(0),
        started,
        ended,
        host: host.clone(),
        free: false,
        state: AttemptState::Failed,
    };
    for (role, file) in &stage.outputs {
        if crate::artifacts::folder::is_glob(file) {
            continue; // checked when stored: a glob must match at least one file
        }
        if let Some(name) = file.strip_suffix('/') {
            if !workdir.join(name).is_dir() {
                return fail(validate::Invalid {
                    kind: "missing-output",
                    message: format!(
                        "output `{role}`: the folder {} was not written",
                        workdir.join(name).display()
                    ),
                });
            }
            continue;
        }
        if let Err(inv) = validate::check_output(&workdir.join(file), role, stage.allow_nonfinite) {
            return fail(inv);
        }
    }
    for (role, datasets) in &stage.hdf5_outputs {
        let Some((_, file)) = stage.outputs.iter().find(|(r, _)| r == role) else {
            continue;
        };
        let path = workdir.join(file);
        if let Err(inv) =
            crate::metrics::check_datasets(&path, role, datasets, stage.allow_nonfinite)
        {
            return fail(inv);
        }
    }
    let metrics = match builtin_metrics {
        Some(m) => m,
        None => match stage_metrics(stage, workdir) {
            Ok(m) => m,
            Err(inv) => return fail(inv),
        },
    };
    Ended::Ok(Success {
        metrics,
        outs: Vec::new(),
        folders: Vec::new(),
        started,
        ended,
        host,
        event: None,
    })
}

/// A command or shell stage's metrics: those of `metrics.json` (required there unless
/// `read-metrics` names them) and those `read-metrics` reads, which take the place of a
/// `metrics.json` metric of the same name.
fn stage_metrics(stage: &Stage, workdir: &Path) -> Result<Vec<Metric>, validate::Invalid> {
    let sourced = |n: &str| stage.metric_sources.iter().any(|s| s.name == n);
    let required: std::collections::BTreeSet<String> = stage
        .required_metrics
        .iter()
        .filter(|n| !sourced(n))
        .cloned()
        .collect();
    let mut metrics = validate::read_metrics(workdir, &required, stage.allow_nonfinite)?;
    if stage.metric_sources.is_empty() {
        return Ok(metrics);
    }
    let read = crate::metrics::read_sources(workdir, &stage.metric_sources, stage.allow_nonfinite)?;
    metrics.retain(|m| !sourced(&m.name));
    metrics.extend(read);
    Ok(metrics)
}
