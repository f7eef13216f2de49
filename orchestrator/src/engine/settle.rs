//! Settling attempts: what an executor's outcome means, the output checks, storing outputs as
//! artifacts, and recording successes (in group commits) and failures.

use super::*;

/// Start time, host and process group of an ended attempt, as its final row records them:
/// from its completion where it says, else from its launch not yet written.
pub(super) fn launch_fields(
    started: Option<DateTime<Utc>>,
    host: Option<String>,
    launch: Option<UnrecordedLaunch>,
) -> (Option<String>, Option<String>, Option<String>) {
    let (l_started, l_host, l_handle) = match launch {
        Some(l) => (Some(l.started_at), Some(l.host), Some(l.handle_id)),
        None => (None, None, None),
    };
    (
        started.map(store::time_text).or(l_started),
        host.or(l_host),
        l_handle,
    )
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
    /// Output checks after a clean exit (or a built-in's end).
    pub(super) fn check_outputs(
        &self,
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
            if let Err(inv) =
                validate::check_output(&workdir.join(file), role, stage.allow_nonfinite)
            {
                return fail(inv);
            }
        }
        let metrics = match builtin_metrics {
            Some(m) => m,
            None => match validate::read_metrics(
                workdir,
                &stage.required_metrics,
                stage.allow_nonfinite,
            ) {
                Ok(m) => m,
                Err(inv) => return fail(inv),
            },
        };
        Ended::Ok {
            metrics,
            started,
            ended,
            host,
            event: None,
        }
    }

    pub(super) async fn on_completion(&mut self, c: Completion) -> Result<()> {
        let Some(fl) = self.inflight.get(&c.attempt_id).cloned() else {
            tracing::warn!(
                attempt = c.attempt_id,
                "completion for an attempt not in flight"
            );
            return Ok(());
        };
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
            Outcome::Exited { code: 0 } => self.check_outputs(
                &stage,
                &fl.workdir,
                None,
                c.started_at,
                c.ended_at,
                c.host.clone(),
            ),
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

    /// Record the end of an attempt and move its point on.
    pub(super) async fn settle(
        &mut self,
        id: i64,
        fl: Option<&InFlight>,
        ended: Ended,
    ) -> Result<()> {
        self.inflight.remove(&id);
        let stage = fl.map(|f| self.campaign.stages[f.stage].clone());
        match ended {
            Ended::Ok {
                metrics,
                started,
                ended,
                host,
                event,
            } => {
                let (Some(fl), Some(stage)) = (fl, stage) else {
                    bail!("internal: success without a stage");
                };
                // Artifacts into the store first, then one transaction.
                let mut outs: Vec<(String, String, u64, String)> = Vec::new();
                let mut files: Vec<(String, String)> = stage.outputs.clone();
                if matches!(stage.kind, StageKind::Mix(_)) {
                    files.push(("state".into(), builtins::STATE_FILE.into()));
                }
                if fl.workdir.join(validate::METRICS_FILE).is_file() {
                    files.push(("metrics".into(), validate::METRICS_FILE.into()));
                }
                for (role, file) in &files {
                    let path = fl.workdir.join(file);
                    // Linked into the store (no copy; read-only from now on) unless the
                    // user keeps the scratch folders to work in them.
                    let stored = if self.opts.keep_scratch {
                        self.artifacts.put_file(&path)
                    } else {
                        self.artifacts.put_file_linked(&path)
                    };
                    let (h, size) = stored
                        .with_context(|| format!("{}: cannot store the output", path.display()))?;
                    outs.push((role.clone(), h, size, file.clone()));
                }
                let point_id = self.points[fl.point].spec.id.clone();
                let (launch_started, launch_host, launch_handle) =
                    launch_fields(started, host, self.unrecorded.remove(&id));
                // The iteration's last stage: its verdict goes into the same transaction.
                let last = fl.stage + 1 == self.campaign.stages.len();
                if last {
                    self.ensure_history(fl.point).await?;
                }
                if let Some(h) = self.points[fl.point].history.as_mut() {
                    let at = h.entry(fl.iteration).or_default();
                    for m in &metrics {
                        at.insert(
                            format!("{}.{}", stage.name, m.name),
                            Sample {
                                value: m.value,
                                error: m.error,
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
                // the planned rows not yet written (this attempt's among them, if it was short).
                let (mut script, held) = self.held_back();
                if !outs.is_empty() {
                    let now = store::now();
                    script.stmt(&format!(
                        "INSERT INTO artifacts(hash, size, original_name, created_at) VALUES {} \
                         ON CONFLICT(hash) DO NOTHING",
                        store::rows(outs.len(), 4)
                    ));
                    for (_, h, size, file) in &outs {
                        script
                            .bind(h.clone())
                            .bind(i64::try_from(*size).unwrap_or(i64::MAX))
                            .bind(file.clone())
                            .bind(now.clone());
                    }
                    script.stmt(&format!(
                        "INSERT INTO attempt_outputs(attempt_id, role, artifact) VALUES {}",
                        store::rows(outs.len(), 3)
                    ));
                    for (role, h, _, _) in &outs {
                        script.bind(id).bind(role.clone()).bind(h.clone());
                    }
                }
                for chunk in metrics.chunks(200) {
                    script.stmt(&format!(
                        "INSERT INTO metrics(attempt_id, name, value, error) VALUES {}",
                        store::rows(chunk.len(), 4)
                    ));
                    for m in chunk {
                        script
                            .bind(id)
                            .bind(format!("{}.{}", stage.name, m.name))
                            .bind(m.value)
                            .bind(m.error);
                    }
                }
                script
                    .stmt(
                        "UPDATE attempts SET state = ?, exit_status = 0, ended_at = ?, \
                         started_at = coalesce(?, started_at), host = coalesce(?, host), \
                         handle_id = coalesce(?, handle_id) WHERE id = ?",
                    )
                    .bind(AttemptState::Succeeded)
                    .bind(store::time_text(ended.unwrap_or_else(Utc::now)))
                    .bind(launch_started)
                    .bind(launch_host)
                    .bind(launch_handle)
                    .bind(id);
                if let Some(v) = &verdict {
                    record_verdict(&mut script, &point_id, v)?;
                }
                if let Some(ev) = &event {
                    store::event_stmt(
                        &mut script,
                        "mixer",
                        Some(&point_id),
                        Some(fl.iteration),
                        Some(id),
                        ev,
                    );
                }
                let short = match (started, ended) {
                    (Some(a), Some(b)) => (b - a).to_std().is_ok_and(|d| d < SHORT_ATTEMPT),
                    _ => false,
                };
                if short && held + 1 < BATCH_MAX {
                    self.batch = script;
                    self.batched = held + 1;
                } else {
                    script.commit(&self.pool).await?;
                }
                if let Some(ev) = event {
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
                }
                if self.points[fl.point].phase == PointPhase::Active {
                    self.ready.push_back(fl.point);
                }
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
                self.flush().await?;
                let (launch_started, launch_host, launch_handle) =
                    launch_fields(started, host, self.unrecorded.remove(&id));
                sqlx::query(
                    "UPDATE attempts SET state = ?, failure_kind = ?, failure_message = ?, exit_status = ?, \
                     ended_at = ?, started_at = coalesce(?, started_at), host = coalesce(?, host), \
                     handle_id = coalesce(?, handle_id) WHERE id = ?",
                )
                .bind(state)
                .bind(&kind)
                .bind(&message)
                .bind(exit_status)
                .bind(store::time_text(ended.unwrap_or_else(Utc::now)))
                .bind(launch_started)
                .bind(launch_host)
                .bind(launch_handle)
                .bind(id)
                .execute(&self.pool)
                .await?;
                let Some(fl) = fl else { return Ok(()) };
                let Some(stage) = stage else { return Ok(()) };
                let point_id = self.points[fl.point].spec.id.clone();
                store::event(
                    &self.pool,
                    &format!("attempt-{state}"),
                    Some(&point_id),
                    Some(fl.iteration),
                    Some(id),
                    &format!("{kind}: {message}"),
                )
                .await?;
                if free {
                    let pr = &mut self.points[fl.point];
                    pr.outstanding = None;
                    self.ready.push_back(fl.point);
                    return Ok(());
                }
                self.progress.line(format!(
                    "{point_id} iteration {} stage {} attempt {} failed ({kind}): {}",
                    fl.iteration,
                    stage.name,
                    fl.attempt,
                    first_line(&message)
                ));
                let failures: i64 = sqlx::query_scalar(
                    "SELECT count(*) FROM attempts WHERE point = ? AND iteration = ? AND stage = ? AND state = ?",
                )
                .bind(&point_id)
                .bind(i64::from(fl.iteration))
                .bind(&stage.name)
                .bind(AttemptState::Failed)
                .fetch_one(&self.pool)
                .await?;
                let pr = &mut self.points[fl.point];
                pr.outstanding = None;
                if failures > i64::from(stage.retries) {
                    let reason = format!(
                        "stage `{}` failed at iteration {} after {failures} attempt(s); last: {kind}: {}",
                        stage.name,
                        fl.iteration,
                        first_line(&message)
                    );
                    self.fail_point(fl.point, fl.iteration, Some(id), &reason, None)
                        .await?;
                } else {
                    self.ready.push_back(fl.point);
                }
            }
        }
        Ok(())
    }

    /// Write the launches of local attempts still running (see [`UnrecordedLaunch`]).
    pub(super) async fn record_launches(&mut self) -> Result<()> {
        if self.unrecorded.is_empty() && self.planned.is_empty() && self.batch.is_empty() {
            return Ok(());
        }
        let (mut script, _) = self.held_back();
        for (id, l) in self.unrecorded.drain() {
            script
                .stmt(
                    "UPDATE attempts SET state = ?, handle_id = ?, host = ?, \
                     started_at = coalesce(started_at, ?) WHERE id = ? AND state = ?",
                )
                .bind(AttemptState::Running)
                .bind(l.handle_id)
                .bind(l.host)
                .bind(l.started_at)
                .bind(id)
                .bind(AttemptState::Planned);
        }
        script.commit(&self.pool).await
    }

    /// Commit what is held back: grouped successes and planned rows not yet written. Called
    /// before the engine reads the store, so it always reads what it has decided.
    pub(super) async fn flush(&mut self) -> Result<()> {
        let (script, _) = self.held_back();
        script.commit(&self.pool).await
    }

    /// Take what is held back as the start of a new script: the grouped successes (and how
    /// many), then the planned rows not yet written. The caller commits it or holds it again.
    pub(super) fn held_back(&mut self) -> (store::Script, usize) {
        let mut script = std::mem::take(&mut self.batch);
        push_planned(&mut script, std::mem::take(&mut self.planned));
        (script, std::mem::take(&mut self.batched))
    }
}
