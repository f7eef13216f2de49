//! Planning and launching attempts: the next stage of ready points, its scratch folder and
//! inputs, its parameters and argv, its planned row, and the hand-over to the executor (or the
//! blocking pool, for built-ins).

use super::*;

impl Engine<'_> {
    /// Start work for ready points while slots are free.
    pub(super) async fn schedule(&mut self) -> Result<()> {
        let slots = self.executor.slots().max(1);
        let mut waiting = VecDeque::new();
        while let Some(p) = self.ready.pop_front() {
            if self.points[p].phase != PointPhase::Active || self.points[p].outstanding.is_some() {
                continue;
            }
            if self.points[p].next_stage >= self.campaign.stages.len() {
                self.finish_iteration(p).await?;
                if self.points[p].phase == PointPhase::Active {
                    self.ready.push_back(p);
                }
                continue;
            }
            let stage = &self.campaign.stages[self.points[p].next_stage];
            let is_builtin = stage.kind.is_builtin();
            if !is_builtin && self.inflight.len() >= slots {
                // Every slot is taken: the rest wait for the next completion as they are
                // (scanning them all on every event would cost O(points) per attempt).
                waiting.push_back(p);
                waiting.extend(self.ready.drain(..));
                break;
            }
            self.start_attempt(p).await?;
            if self.points[p].outstanding.is_none() && self.points[p].phase == PointPhase::Active {
                // A built-in ran to its end, or a launch failed at once: go on with this point.
                self.ready.push_back(p);
            }
        }
        self.ready = waiting;
        Ok(())
    }

    /// Resolve the artifact feeding one input of a stage.
    pub(super) async fn input_hash(
        &self,
        point: &str,
        iteration: u32,
        src: &Source,
    ) -> Result<Option<String>> {
        let output_of = |stage: &str, role: &str, it: u32| {
            let stage = stage.to_string();
            let role = role.to_string();
            async move {
                let h: Option<String> = sqlx::query_scalar(
                    "SELECT o.artifact FROM attempts a JOIN attempt_outputs o ON o.attempt_id = a.id \
                     WHERE a.point = ? AND a.iteration = ? AND a.stage = ? AND a.state = ? AND o.role = ?",
                )
                .bind(point)
                .bind(i64::from(it))
                .bind(&stage)
                .bind(AttemptState::Succeeded)
                .bind(&role)
                .fetch_optional(&self.pool)
                .await?;
                anyhow::Ok(h)
            }
        };
        let start = |name: &str| {
            let name = name.to_string();
            async move {
                let h: Option<String> =
                    sqlx::query_scalar("SELECT artifact FROM start_files WHERE name = ?")
                        .bind(&name)
                        .fetch_optional(&self.pool)
                        .await?;
                anyhow::Ok(h)
            }
        };
        match src {
            Source::Same { stage, role } => output_of(stage, role, iteration).await,
            Source::Start(name) => start(name).await,
            Source::Previous {
                stage,
                role,
                initially,
            } => {
                if iteration > 1 {
                    output_of(stage, role, iteration - 1).await
                } else {
                    match initially {
                        Some(name) => start(name).await,
                        None => Ok(None),
                    }
                }
            }
        }
    }

    /// Plan, record and launch (or run, for built-ins) the next attempt of a point.
    pub(super) async fn start_attempt(&mut self, p: usize) -> Result<()> {
        let sidx = self.points[p].next_stage;
        let stage = self.campaign.stages[sidx].clone();
        let point = self.points[p].spec.clone();
        let iteration = self.points[p].iteration;
        let attempt = self.points[p].attempts[sidx] + 1;
        let built = self.program_identity(&stage, iteration).await?;
        if let Some(before) = self.points[p].built[sidx].clone() {
            if before.iteration < iteration
                && before.known()
                && built.known()
                && before.hash != built.hash
            {
                return self
                    .stop_for_changed_program(p, &stage, &before, &built)
                    .await;
            }
        }
        let workdir = scratch::attempt_dir(
            &self.paths.scratch,
            &point.id,
            iteration,
            &stage.name,
            attempt,
        );
        if workdir.exists() {
            std::fs::remove_dir_all(&workdir)
                .with_context(|| format!("{}: cannot clear the scratch dir", workdir.display()))?;
        }
        self.scratch.create(&workdir)?;
        let inputs_dir = workdir.join("inputs");
        if (!stage.inputs.is_empty() || matches!(stage.kind, StageKind::Mix(_)))
            && !inputs_dir.is_dir()
        {
            std::fs::create_dir(&inputs_dir)
                .with_context(|| format!("{}: cannot create", inputs_dir.display()))?;
        }
        // Inputs: resolve and place (from the store, so held-back records go in first).
        if !stage.inputs.is_empty() || matches!(stage.kind, StageKind::Mix(_)) {
            self.flush().await?;
        }
        let mut inputs: Vec<(String, String, PathBuf)> = Vec::new();
        for (role, src) in &stage.inputs {
            let Some(hash) = self.input_hash(&point.id, iteration, src).await? else {
                if stage.kind.is_builtin() || iteration == 1 {
                    continue;
                }
                bail!(
                    "internal: input `{role}` of stage `{}` at {} iteration {iteration} has no artifact",
                    stage.name,
                    point.id
                );
            };
            let ext: String = sqlx::query_scalar::<_, String>(
                "SELECT original_name FROM artifacts WHERE hash = ?",
            )
            .bind(&hash)
            .fetch_one(&self.pool)
            .await
            .map(|n| {
                Path::new(&n)
                    .extension()
                    .map(|e| format!(".{}", e.to_string_lossy()))
                    .unwrap_or_default()
            })?;
            let dest = inputs_dir.join(format!("{role}{ext}"));
            self.artifacts
                .place(&hash, &dest, stage.writable_inputs.contains(role))
                .with_context(|| format!("cannot place artifact {hash} as {}", dest.display()))?;
            let rel = format!("inputs/{role}{ext}");
            inputs.push((role.clone(), hash, PathBuf::from(rel)));
        }
        // The mixer's own history: the state of the previous iteration's attempt.
        if matches!(stage.kind, StageKind::Mix(_)) && iteration > 1 {
            let src = Source::Previous {
                stage: stage.name.clone(),
                role: "state".into(),
                initially: None,
            };
            if let Some(h) = self.input_hash(&point.id, iteration, &src).await? {
                let dest = inputs_dir.join("state.json");
                self.artifacts.place(&h, &dest, false).with_context(|| {
                    format!("cannot place the mixer state as {}", dest.display())
                })?;
                inputs.push((
                    "state".into(),
                    h.clone(),
                    PathBuf::from("inputs/state.json"),
                ));
            }
        }
        let seed = rondo_numerics::rng::derive_seed(
            self.campaign.seed,
            &[
                &self.campaign.name,
                &point.id,
                &iteration.to_string(),
                &stage.name,
            ],
        );
        let mut params = self.parameters.clone();
        for (k, v) in &point.values {
            params.insert(k.clone(), v.to_json());
        }
        let scheduled = self.schedule_values(p, iteration).await?;
        for (k, v) in &scheduled {
            let value = v
                .parse::<i64>()
                .map(serde_json::Value::from)
                .or_else(|_| v.parse::<f64>().map(serde_json::Value::from))
                .unwrap_or_else(|_| serde_json::Value::from(v.clone()));
            params.insert(k.clone(), value);
        }
        let (argv, uses_seed, executor_kind) = match &stage.kind {
            StageKind::Filter(_) | StageKind::Mix(_) => (
                // The `rondo builtin` command that reruns it in this scratch layout.
                builtins::BuiltinCommand::for_stage(
                    &stage.kind,
                    inputs.iter().map(|(r, _, f)| (r.as_str(), f.as_path())),
                    &stage.outputs,
                )
                .map(|c| c.to_argv(&self.rondo_exe.0))
                .ok_or_else(|| anyhow::anyhow!("internal: `{}` is no built-in", stage.name))?,
                false,
                "builtin",
            ),
            StageKind::Command { template, .. } | StageKind::Shell { template, .. } => {
                let shell = matches!(stage.kind, StageKind::Shell { .. });
                let lookup = |ns: Option<&str>, name: &str| -> Option<String> {
                    match (ns, name) {
                        (Some("param"), n) => point
                            .values
                            .iter()
                            .find(|(k, _)| k == n)
                            .map(|(_, v)| v.to_string())
                            .or_else(|| {
                                self.campaign
                                    .parameters
                                    .iter()
                                    .find(|(k, _)| k == n)
                                    .map(|(_, v)| v.to_string())
                            })
                            .or_else(|| {
                                scheduled
                                    .iter()
                                    .find(|(k, _)| k == n)
                                    .map(|(_, v)| v.clone())
                            }),
                        (Some("input"), n) => inputs
                            .iter()
                            .find(|(r, _, _)| r == n)
                            .map(|(_, _, f)| f.display().to_string()),
                        (Some("output"), n) => stage
                            .outputs
                            .iter()
                            .find(|(r, _)| r == n)
                            .map(|(_, f)| f.clone()),
                        (Some("program"), n) if shell => self
                            .campaign
                            .programs
                            .get(n)
                            .map(|r| r.path.display().to_string()),
                        (Some("point"), "id") => Some(point.id.clone()),
                        (Some("point"), "index") => Some(point.index.to_string()),
                        (None, "iteration") => Some(iteration.to_string()),
                        (None, "cpus") => Some(stage.resources.cpus().to_string()),
                        (None, "tasks") => Some(stage.resources.ntasks.unwrap_or(1).to_string()),
                        (None, "seed") => Some(seed.to_string()),
                        (None, "stage") => Some(stage.name.clone()),
                        (None, "campaign") => Some(self.campaign.name.clone()),
                        (None, "workdir") => Some(workdir.display().to_string()),
                        _ => None,
                    }
                };
                let rendered = if shell {
                    template.render_shell(lookup)
                } else {
                    template.render(lookup)
                };
                let mut argv = match rendered {
                    Ok(a) => a,
                    Err(e) => bail!("stage `{}`: {e}", stage.name),
                };
                if !shell {
                    // The first element names the program: run its resolved path.
                    if let Some(first) = argv.first_mut() {
                        first.clone_from(&built.path);
                    }
                }
                if let Some(launcher) = &stage.resources.launcher {
                    let t = Template::parse(launcher)
                        .map_err(|e| anyhow::anyhow!("stage `{}`: launcher: {e}", stage.name))?;
                    let mut pre = t
                        .render(lookup)
                        .map_err(|e| anyhow::anyhow!("stage `{}`: launcher: {e}", stage.name))?;
                    pre.extend(argv);
                    argv = pre;
                }
                let uses_seed = template
                    .placeholders()
                    .any(|(ns, n, _)| ns.is_none() && n == "seed");
                (argv, uses_seed, self.opts.executor.kind())
            }
        };
        // The planned row: written now (one store call) for built-ins and batch jobs, whose
        // later updates need it; for a local child it rides along with the store call that
        // records the attempt's end (see `PlannedRow`).
        let local_host = matches!(executor_kind, "local" | "builtin").then(|| self.host.clone());
        let id = self.next_id;
        self.next_id += 1;
        let row = PlannedRow {
            id,
            point: point.id.clone(),
            iteration,
            stage: stage.name.clone(),
            attempt,
            argv_json: serde_json::to_string(&argv)?,
            workdir: workdir.display().to_string(),
            executor: executor_kind,
            program_path: built.path.clone(),
            program_blake3: (!built.hash.is_empty()).then(|| built.hash.clone()),
            program_unknown: built.unknown.clone(),
            program_version: built.version.clone(),
            parameters_json: serde_json::Value::Object(params).to_string(),
            seed: uses_seed.then(|| seed.to_string()),
            created_at: store::now(),
            host: local_host,
            inputs: inputs
                .iter()
                .map(|(role, hash, _)| (role.clone(), hash.clone()))
                .collect(),
        };
        if executor_kind == "local" && !stage.kind.is_builtin() {
            self.planned.push(row);
        } else {
            // After everything held back (its iteration's row may be among it).
            let (mut script, _) = self.held_back();
            push_planned(&mut script, vec![row]);
            script.commit(&self.pool).await?;
        }
        self.points[p].attempts[sidx] = attempt;
        let fl = InFlight {
            point: p,
            stage: sidx,
            iteration,
            attempt,
            workdir: workdir.clone(),
            built,
        };
        match &stage.kind {
            StageKind::Mix(_) | StageKind::Filter(_) => {
                let started = Utc::now();
                sqlx::query("UPDATE attempts SET state = ?, started_at = ?, host = ? WHERE id = ?")
                    .bind(AttemptState::Running)
                    .bind(store::time_text(started))
                    .bind(&self.host)
                    .bind(id)
                    .execute(&self.pool)
                    .await?;
                // Runs exactly the recorded argument list, in the scratch folder.
                let result = builtins::run_argv(&argv, &workdir);
                let ended = match result {
                    Ok(report) => {
                        let mut ended = self.check_outputs(
                            &stage,
                            &workdir,
                            Some(report.metrics),
                            Some(started),
                            Some(Utc::now()),
                            Some(self.host.clone()),
                        );
                        if let Ended::Ok { event, .. } = &mut ended {
                            *event = report.event;
                        }
                        ended
                    }
                    Err(message) => Ended::Failed {
                        kind: "builtin-failed".into(),
                        message,
                        exit_status: None,
                        started: Some(started),
                        ended: Some(Utc::now()),
                        host: Some(self.host.clone()),
                        free: false,
                        state: AttemptState::Failed,
                    },
                };
                self.settle(id, Some(&fl), ended).await?;
            }
            StageKind::Command { .. } | StageKind::Shell { .. } => {
                let mut env = BTreeMap::new();
                env.insert("RONDO_POINT".to_string(), point.id.clone());
                env.insert("RONDO_ITERATION".to_string(), iteration.to_string());
                env.insert("RONDO_STAGE".to_string(), stage.name.clone());
                let req = LaunchRequest {
                    attempt_id: id,
                    job_name: format!(
                        "{}.{}.i{}.{}",
                        self.campaign.name, point.id, iteration, stage.name
                    ),
                    argv,
                    workdir: workdir.clone(),
                    env,
                    time_limit: stage.time_limit,
                    resources: stage.resources.clone(),
                };
                self.points[p].outstanding = Some(id);
                self.inflight.insert(id, fl.clone());
                match self.executor.launch(req).await {
                    Ok(handle) if self.opts.executor.kind() == "local" => {
                        self.unrecorded.insert(
                            id,
                            UnrecordedLaunch {
                                handle_id: handle.id,
                                host: handle.host,
                                started_at: store::now(),
                            },
                        );
                    }
                    Ok(handle) => {
                        sqlx::query(
                            "UPDATE attempts SET state = ?, handle_id = ?, host = ?, started_at = coalesce(started_at, ?) \
                             WHERE id = ? AND state = ?",
                        )
                        .bind(AttemptState::Submitted)
                        .bind(&handle.id)
                        .bind(&handle.host)
                        .bind(store::now())
                        .bind(id)
                        .bind(AttemptState::Planned)
                        .execute(&self.pool)
                        .await?;
                    }
                    Err(e) => {
                        let ended = Ended::Failed {
                            kind: "launch-failed".into(),
                            message: e.to_string(),
                            exit_status: None,
                            started: None,
                            ended: Some(Utc::now()),
                            host: None,
                            free: false,
                            state: AttemptState::Failed,
                        };
                        self.settle(id, Some(&fl), ended).await?;
                    }
                }
            }
        }
        Ok(())
    }
}
