//! Resume: rebuilding each point's place from the store, reconciling attempts an earlier
//! orchestrator left outstanding, and ending children no record accounts for.

use super::*;

impl Engine<'_> {
    /// Rebuild each point's place from the store.
    pub(super) async fn restore(&mut self) -> Result<()> {
        // Three reads for all points and one transaction, whatever the number of points: a
        // sweep of thousands of points resumes in a handful of statements.
        let states: HashMap<String, PointState> =
            sqlx::query_as::<_, (String, PointState)>("SELECT id, state FROM points")
                .fetch_all(&self.pool)
                .await
                .context("reading the points' states")?
                .into_iter()
                .collect();
        // SQLite's bare-column rule: with max(), `state` comes from the row holding the max.
        let lasts: HashMap<String, (i64, IterationState)> =
            sqlx::query_as::<_, (String, i64, IterationState)>(
                "SELECT point, max(iteration), state FROM iterations GROUP BY point",
            )
            .fetch_all(&self.pool)
            .await
            .context("reading the iterations' states")?
            .into_iter()
            .map(|(p, it, st)| (p, (it, st)))
            .collect();
        // Per point and stage of its last iteration: attempts so far and whether one succeeded.
        let mut tried: HashMap<(String, String), (u32, bool)> = HashMap::new();
        for (point, stage, max_attempt, succeeded) in
            sqlx::query_as::<_, (String, String, i64, bool)>(
                "SELECT a.point, a.stage, max(a.attempt), max(a.state = ?) FROM attempts a \
             JOIN (SELECT point, max(iteration) AS it FROM iterations GROUP BY point) l \
             ON l.point = a.point AND a.iteration = l.it GROUP BY a.point, a.stage",
            )
            .bind(AttemptState::Succeeded)
            .fetch_all(&self.pool)
            .await?
        {
            tried.insert((point, stage), (max_attempt as u32, succeeded));
        }
        // Per point and stage: the program of the last succeeded attempt (bare columns come
        // from the row holding max(iteration)).
        let mut built: HashMap<(String, String), BuiltWith> = HashMap::new();
        for (point, stage, it, path, hash, version) in sqlx::query_as::<
            _,
            (
                String,
                String,
                i64,
                Option<String>,
                Option<String>,
                Option<String>,
            ),
        >(
            "SELECT point, stage, max(iteration), program_path, program_blake3, program_version \
             FROM attempts WHERE state = ? GROUP BY point, stage",
        )
        .bind(AttemptState::Succeeded)
        .fetch_all(&self.pool)
        .await?
        {
            built.insert(
                (point, stage),
                BuiltWith {
                    iteration: it as u32,
                    path: path.unwrap_or_default(),
                    hash: hash.unwrap_or_default(),
                    unknown: None,
                    version,
                },
            );
        }
        let nstages = self.campaign.stages.len();
        let mut new_iterations: Vec<(String, i64)> = Vec::new();
        let mut tx = self.pool.begin().await?;
        for spec in &self.campaign.points {
            let Some(state) = states.get(&spec.id) else {
                bail!(
                    "internal: point {} is not in the workspace database",
                    spec.id
                );
            };
            let mut run = PointRun::new(spec, nstages);
            let resumable = match *state {
                PointState::Converged | PointState::Capped => false,
                PointState::Failed => self.opts.retry_failed,
                PointState::Planned | PointState::Running | PointState::Cancelled => true,
            };
            if !resumable {
                run.phase = PointPhase::Done;
                self.points.push(run);
                continue;
            }
            for (k, st) in self.campaign.stages.iter().enumerate() {
                run.built[k] = built.remove(&(spec.id.clone(), st.name.clone()));
            }
            let mut fresh_iteration = true;
            match lasts.get(&spec.id) {
                None => {
                    // A point that never ran has no history to read: keep it in memory from
                    // its first metric on.
                    let mut h = History::new();
                    h.entry(1).or_default();
                    run.history = Some(h);
                    new_iterations.push((spec.id.clone(), 1));
                }
                Some((it, st)) => {
                    run.iteration = *it as u32;
                    if *st == IterationState::Good {
                        // The decision after a good iteration is committed with it; a good
                        // last iteration of a resumable point means the next one is due.
                        run.iteration = *it as u32 + 1;
                        new_iterations.push((spec.id.clone(), it + 1));
                    } else {
                        fresh_iteration = false;
                        if matches!(st, IterationState::Failed | IterationState::Cancelled) {
                            // Only reached with --retry-failed or after a cancel: run it again.
                            sqlx::query("UPDATE iterations SET state = ?, ended_at = NULL WHERE point = ? AND iteration = ?")
                                .bind(IterationState::Running)
                                .bind(&spec.id)
                                .bind(it)
                                .execute(&mut *tx)
                                .await?;
                        }
                    }
                }
            }
            if !fresh_iteration {
                for (k, st) in self.campaign.stages.iter().enumerate() {
                    if let Some((n, _)) = tried.get(&(spec.id.clone(), st.name.clone())) {
                        run.attempts[k] = *n;
                    }
                }
                run.next_stage = self
                    .campaign
                    .stages
                    .iter()
                    .position(|st| {
                        !tried
                            .get(&(spec.id.clone(), st.name.clone()))
                            .is_some_and(|(_, ok)| *ok)
                    })
                    .unwrap_or(nstages);
            }
            if !matches!(state, PointState::Planned | PointState::Running) {
                sqlx::query("UPDATE points SET state = ?, reason = NULL WHERE id = ?")
                    .bind(PointState::Running)
                    .bind(&spec.id)
                    .execute(&mut *tx)
                    .await?;
                store::event(
                    &mut *tx,
                    "point-resumed",
                    Some(&spec.id),
                    Some(run.iteration),
                    None,
                    &format!("was {state}"),
                )
                .await?;
            }
            self.points.push(run);
        }
        let now = store::now();
        for chunk in new_iterations.chunks(300) {
            let mut q = sqlx::QueryBuilder::<sqlx::Sqlite>::new(
                "INSERT INTO iterations(point, iteration, state, started_at) ",
            );
            q.push_values(chunk, |mut b, (point, it)| {
                b.push_bind(point)
                    .push_bind(*it)
                    .push_bind(IterationState::Running)
                    .push_bind(now.clone());
            });
            q.build().execute(&mut *tx).await?;
        }
        tx.commit().await?;
        Ok(())
    }

    /// Settle attempts an earlier orchestrator left planned, submitted or running.
    pub(super) async fn reconcile(&mut self) -> Result<()> {
        let sql = format!(
            "SELECT id, point, iteration, stage, attempt, executor, handle_id, host, workdir, \
             program_path, program_blake3, program_version FROM attempts \
             WHERE state IN {} ORDER BY id",
            store::rows(1, AttemptState::OUTSTANDING.len())
        );
        let mut query = sqlx::query(&sql);
        for s in AttemptState::OUTSTANDING {
            query = query.bind(s);
        }
        let rows = query.fetch_all(&self.pool).await?;
        for row in rows {
            let id: i64 = row.get("id");
            let point_id: String = row.get("point");
            let iteration = row.get::<i64, _>("iteration") as u32;
            let stage_name: String = row.get("stage");
            let executor: String = row.get("executor");
            let handle_id: Option<String> = row.get("handle_id");
            let host: Option<String> = row.get("host");
            let workdir = PathBuf::from(row.get::<String, _>("workdir"));
            let pidx = self.points.iter().position(|p| p.spec.id == point_id);
            let sidx = self
                .campaign
                .stages
                .iter()
                .position(|s| s.name == stage_name);
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
            if executor == "builtin" {
                self.settle(
                    id,
                    None,
                    lost("the orchestrator stopped during a built-in stage".into()),
                )
                .await?;
                continue;
            }
            if executor != self.opts.executor.kind() {
                bail!(
                    "attempt {id} ({point_id} iteration {iteration} stage {stage_name}) was left \
                     outstanding on the `{executor}` executor; continue with --on {executor} \
                     so it can be reconciled"
                );
            }
            let handle = Handle {
                executor: executor.clone(),
                id: handle_id.clone().unwrap_or_default(),
                host: host.clone().unwrap_or_else(|| self.host.clone()),
            };
            let answer = self
                .executor
                .reattach(id, &handle, &workdir)
                .await
                .with_context(|| format!("cannot reconcile attempt {id}"))?;
            let (Some(p), Some(s)) = (pidx, sidx) else {
                self.settle(
                    id,
                    None,
                    lost("its point or stage is not in the campaign".into()),
                )
                .await?;
                continue;
            };
            let fl = InFlight {
                point: p,
                stage: s,
                iteration,
                attempt: row.get::<i64, _>("attempt") as u32,
                workdir,
                built: BuiltWith {
                    iteration,
                    path: row
                        .get::<Option<String>, _>("program_path")
                        .unwrap_or_default(),
                    hash: row
                        .get::<Option<String>, _>("program_blake3")
                        .unwrap_or_default(),
                    unknown: None,
                    version: row.get("program_version"),
                },
            };
            match answer {
                Reattached::Found(h) => {
                    sqlx::query(
                        "UPDATE attempts SET state = ?, handle_id = ?, host = ? WHERE id = ?",
                    )
                    .bind(AttemptState::Submitted)
                    .bind(&h.id)
                    .bind(&h.host)
                    .bind(id)
                    .execute(&self.pool)
                    .await?;
                    store::event(
                        &self.pool,
                        "attempt-adopted",
                        Some(&point_id),
                        Some(iteration),
                        Some(id),
                        &format!(
                            "job {} found by its tag; its id had not been recorded",
                            h.id
                        ),
                    )
                    .await?;
                    self.points[p].outstanding = Some(id);
                    self.inflight.insert(id, fl);
                }
                Reattached::Active => {
                    store::event(
                        &self.pool,
                        "attempt-adopted",
                        Some(&point_id),
                        Some(iteration),
                        Some(id),
                        "still queued or running",
                    )
                    .await?;
                    self.points[p].outstanding = Some(id);
                    self.inflight.insert(id, fl);
                }
                Reattached::Finished(c) => {
                    store::event(
                        &self.pool,
                        "attempt-adopted",
                        Some(&point_id),
                        Some(iteration),
                        Some(id),
                        "finished while no orchestrator watched",
                    )
                    .await?;
                    self.points[p].outstanding = Some(id);
                    self.inflight.insert(id, fl);
                    self.on_completion(c).await?;
                }
                Reattached::Gone { reason } => {
                    self.settle(
                        id,
                        Some(&fl),
                        lost(format!("lost when the orchestrator stopped: {reason}")),
                    )
                    .await?;
                }
            }
        }
        // Completions that arrived during the reattach calls are processed by the main loop.
        for (i, p) in self.points.iter().enumerate() {
            if p.phase == PointPhase::Active && p.outstanding.is_none() {
                self.ready.push_back(i);
            }
        }
        Ok(())
    }

    /// Local children of this workspace left by an earlier orchestrator that no recorded
    /// attempt accounts for (started, then the orchestrator died before the row was
    /// written): end them before anything starts. Recorded attempts were reconciled already.
    pub(super) async fn end_untracked_children(&mut self) -> Result<()> {
        if self.opts.executor.kind() != "local" {
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
        store::event(
            &self.pool,
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
