//! Resume: rebuilding each point's place from the store, reconciling attempts an earlier
//! orchestrator left outstanding, and ending children no record accounts for.

use super::*;
use store::attempts::{LastProgram, Outstanding};

/// What the store says about every point at the start of a run, read in a handful of
/// statements whatever the number of points.
struct Recorded {
    states: HashMap<String, PointState>,
    lasts: HashMap<String, (u32, IterationState)>,
    /// Per (point, stage) of its last iteration: attempts so far and whether one succeeded.
    tried: HashMap<(String, String), (u32, bool)>,
    /// Per (point, stage): the program of the last succeeded attempt.
    built: HashMap<(String, String), LastProgram>,
}

impl Engine<'_> {
    /// Rebuild each point's place from the store.
    pub(super) async fn restore(&mut self) -> Result<()> {
        let stage_names: Vec<String> = self
            .campaign
            .stages
            .iter()
            .map(|s| s.name.clone())
            .collect();
        let store = self.ledger.flush().await?;
        let mut rec = Recorded {
            states: store.point_states().await?,
            lasts: store.last_iterations().await?,
            tried: store.last_iteration_attempts().await?,
            built: store.last_programs(&stage_names).await?,
        };
        let mut new_iterations: Vec<(String, u32)> = Vec::new();
        let mut script = store::Script::new();
        for spec in &self.campaign.points {
            let run = self.restore_point(spec, &mut rec, &mut new_iterations, &mut script)?;
            self.points.push(run);
        }
        script.iterations_begun(&new_iterations);
        self.ledger.commit(script, Failpoint::PointsRestored).await
    }

    /// One point's place: done, or where its iteration stands; the writes that resuming it
    /// needs go into `script`.
    fn restore_point(
        &self,
        spec: &PointSpec,
        rec: &mut Recorded,
        new_iterations: &mut Vec<(String, u32)>,
        script: &mut store::Script,
    ) -> Result<PointRun> {
        let nstages = self.campaign.stages.len();
        let Some(state) = rec.states.get(&spec.id).copied() else {
            bail!(
                "internal: point {} is not in the workspace database",
                spec.id
            );
        };
        let mut run = PointRun::new(spec, nstages);
        let resumable = match state {
            PointState::Converged | PointState::Capped => {
                self.restore_after_point(spec, rec, &mut run);
                return Ok(run);
            }
            PointState::Failed => self.opts.retry_failed,
            PointState::Planned | PointState::Running | PointState::Cancelled => true,
        };
        if !resumable {
            run.phase = PointPhase::Done;
            return Ok(run);
        }
        for (k, st) in self.campaign.stages.iter().enumerate() {
            run.built[k] = rec
                .built
                .remove(&(spec.id.clone(), st.name.clone()))
                .map(|b| BuiltWith {
                    iteration: b.iteration,
                    path: b.path.unwrap_or_default(),
                    hash: b.hash.unwrap_or_default(),
                    unknown: None,
                    version: b.version,
                });
        }
        let mut fresh_iteration = true;
        run.next_stage = self.campaign.first_stage(1);
        match rec.lasts.get(&spec.id) {
            None => {
                // A point that never ran has no history to read: keep it in memory from
                // its first metric on.
                let mut h = History::new();
                h.entry(1).or_default();
                run.history = Some(h);
                new_iterations.push((spec.id.clone(), 1));
            }
            Some((it, st)) => {
                run.iteration = *it;
                if *st == IterationState::Good {
                    // The decision after a good iteration is committed with it; a good
                    // last iteration of a resumable point means the next one is due.
                    run.iteration = *it + 1;
                    run.next_stage = self.campaign.first_stage(*it + 1);
                    new_iterations.push((spec.id.clone(), it + 1));
                } else {
                    fresh_iteration = false;
                    if matches!(st, IterationState::Failed | IterationState::Cancelled) {
                        // Only reached with --retry-failed or after a cancel: run it again.
                        script.iteration_reopened(&spec.id, *it);
                    }
                }
            }
        }
        if !fresh_iteration {
            let tried = |st: &Stage| rec.tried.get(&(spec.id.clone(), st.name.clone()));
            for (k, st) in self.campaign.stages.iter().enumerate() {
                if let Some((n, _)) = tried(st) {
                    run.attempts[k] = *n;
                }
            }
            let (first, end) = (
                self.campaign.first_stage(run.iteration),
                self.campaign.cycle_end(),
            );
            run.next_stage = self.campaign.stages[first..end]
                .iter()
                .position(|st| !tried(st).is_some_and(|(_, ok)| *ok))
                .map_or(end, |k| first + k);
        }
        if !matches!(state, PointState::Planned | PointState::Running) {
            script.point_state(&spec.id, PointState::Running, None);
            script.event(
                "point-resumed",
                Some(&spec.id),
                Some(run.iteration),
                None,
                &format!("was {state}"),
            );
        }
        Ok(run)
    }

    /// A converged or capped point: done, or its `after-point:` stages still to run on its
    /// last iteration (the good one it stopped at) — each that has no succeeded attempt there.
    fn restore_after_point(&self, spec: &PointSpec, rec: &Recorded, run: &mut PointRun) {
        run.phase = PointPhase::Done;
        let end = self.campaign.cycle_end();
        let Some((it, IterationState::Good)) = rec.lasts.get(&spec.id).copied() else {
            return;
        };
        let tried = |st: &Stage| rec.tried.get(&(spec.id.clone(), st.name.clone())).copied();
        let after = &self.campaign.stages[end..];
        let Some(k) = after
            .iter()
            .position(|st| !tried(st).is_some_and(|(_, ok)| ok))
        else {
            return;
        };
        run.phase = PointPhase::After;
        run.iteration = it;
        run.next_stage = end + k;
        for (j, st) in after.iter().enumerate() {
            if let Some((n, _)) = tried(st) {
                run.attempts[end + j] = n;
            }
        }
    }

    /// Settle attempts an earlier orchestrator left planned, submitted or running.
    pub(super) async fn reconcile(&mut self) -> Result<()> {
        let rows = self.ledger.flush().await?.outstanding_attempts().await?;
        for row in rows {
            self.reconcile_one(row).await?;
        }
        // Completions that arrived during the reattach calls are processed by the main loop.
        for (i, p) in self.points.iter().enumerate() {
            if p.phase != PointPhase::Done && p.outstanding.is_none() {
                self.ready.push_back(i);
            }
        }
        Ok(())
    }

    /// Ask the executor about one outstanding attempt and adopt, finish or settle it.
    async fn reconcile_one(&mut self, row: Outstanding) -> Result<()> {
        let id = row.id;
        let lost = |reason: String| Ended::Failed {
            kind: "lost".into(),
            message: reason,
            exit_status: None,
            started: None,
            ended: Some(Utc::now()),
            host: None,
            free: true,
            state: AttemptState::Lost,
        };
        if row.executor == "builtin" {
            let why = "the orchestrator stopped during a built-in stage";
            return self.settle(id, None, lost(why.into())).await;
        }
        if row.executor == "resident" {
            // Its program ended with the orchestrator (or is ended below, by its tag); the
            // next hand-off starts it again from the last good iteration.
            let why = "the orchestrator stopped during a hand-off to a resident program";
            return self.settle(id, None, lost(why.into())).await;
        }
        let on_host = row.executor == "local" && self.opts.executor.kind() != "local";
        if row.executor != self.opts.executor.kind() && !(on_host && self.on_host.is_some()) {
            bail!(
                "attempt {id} ({} iteration {} stage {}) was left outstanding on the `{ex}` \
                 executor; continue with --on {ex} so it can be reconciled",
                row.point,
                row.iteration,
                row.stage,
                ex = row.executor
            );
        }
        let handle = Handle {
            executor: row.executor.clone(),
            id: row.handle_id.clone().unwrap_or_default(),
            host: row.host.clone().unwrap_or_else(|| self.host.clone()),
        };
        let workdir = PathBuf::from(&row.workdir);
        let answer = self
            .executor_for(on_host)
            .reattach(id, &handle, &workdir)
            .await
            .with_context(|| format!("cannot reconcile attempt {id}"))?;
        let pidx = self.points.iter().position(|p| p.spec.id == row.point);
        let sidx = self
            .campaign
            .stages
            .iter()
            .position(|s| s.name == row.stage);
        let (Some(p), Some(s)) = (pidx, sidx) else {
            let why = "its point or stage is not in the campaign";
            return self.settle(id, None, lost(why.into())).await;
        };
        let fl = InFlight {
            point: p,
            stage: s,
            iteration: row.iteration,
            attempt: row.attempt,
            workdir,
            built: BuiltWith {
                iteration: row.iteration,
                path: row.program_path.clone().unwrap_or_default(),
                hash: row.program_blake3.clone().unwrap_or_default(),
                unknown: None,
                version: row.program_version.clone(),
            },
            on_host,
        };
        let (point, it) = (row.point.as_str(), Some(row.iteration));
        match answer {
            Reattached::Found(h) => {
                let detail = format!(
                    "job {} found by its tag; its id had not been recorded",
                    h.id
                );
                self.ledger
                    .write(Failpoint::AttemptAdopted, |s| {
                        s.attempt_adopted(id, h.id.clone(), h.host.clone());
                        s.event("attempt-adopted", Some(point), it, Some(id), &detail);
                    })
                    .await?;
                self.points[p].outstanding = Some(id);
                self.inflight.insert(id, fl);
            }
            Reattached::Active => {
                self.ledger
                    .write(Failpoint::AttemptAdopted, |s| {
                        s.event(
                            "attempt-adopted",
                            Some(point),
                            it,
                            Some(id),
                            "still queued or running",
                        )
                    })
                    .await?;
                self.points[p].outstanding = Some(id);
                self.inflight.insert(id, fl);
            }
            Reattached::Finished(c) => {
                let why = "finished while no orchestrator watched";
                self.ledger
                    .write(Failpoint::AttemptAdopted, |s| {
                        s.event("attempt-adopted", Some(point), it, Some(id), why)
                    })
                    .await?;
                self.points[p].outstanding = Some(id);
                self.inflight.insert(id, fl);
                self.on_completion(c).await?;
            }
            Reattached::Gone { reason } => {
                let why = format!("lost when the orchestrator stopped: {reason}");
                self.settle(id, Some(&fl), lost(why)).await?;
            }
        }
        Ok(())
    }

    /// Local children of this workspace left by an earlier orchestrator that no recorded
    /// attempt accounts for (started, then the orchestrator died before the row was
    /// written): end them before anything starts. Recorded attempts were reconciled already.
    pub(super) async fn end_untracked_children(&mut self) -> Result<()> {
        if self.opts.executor.kind() != "local" && self.on_host.is_none() {
            return Ok(());
        }
        let orphans: Vec<(i64, i32)> = rondo_adapters::local::find_orphans(&self.workspace_id)
            .into_iter()
            .filter(|(attempt, _)| !self.inflight.contains_key(attempt))
            .collect();
        if orphans.is_empty() {
            return Ok(());
        }
        let n = rondo_adapters::local::kill_orphans(&self.workspace_id, &orphans, self.opts.grace)
            .await;
        let ids: Vec<String> = orphans.iter().map(|(a, _)| a.to_string()).collect();
        self.event(
            "orphans-ended",
            None,
            None,
            None,
            &format!(
                "{n} unrecorded attempt(s) of an earlier orchestrator still running, ended: ids {}",
                ids.join(", ")
            ),
        )
        .await?;
        Ok(())
    }
}
