//! Planning and launching attempts: the next stage of ready points, its scratch folder and
//! inputs, its parameters and argv, its planned row, and the hand-over to the executor (or the
//! blocking pool, for built-ins).

use super::*;
use crate::spec::Initial;
use rondo_adapters::executor::{ExecError, Resources};
use rondo_adapters::slurm::lengthen_time;

impl Engine<'_> {
    /// Start work for ready points while slots are free.
    pub(super) async fn schedule(&mut self) -> Result<()> {
        // Slots of the executor and of the host executor (none without one), and how many
        // children each runs (attempts whose outputs are being stored hold no slot).
        let capacity = [
            self.executor.slots().max(1),
            self.on_host.as_ref().map_or(0, |e| e.slots().max(1)),
        ];
        let mut busy = [0usize; 2];
        for (id, f) in &self.inflight {
            if !self.storing.contains(id) {
                busy[usize::from(f.on_host)] += 1;
            }
        }
        let mut waiting = VecDeque::new();
        while let Some(p) = self.ready.pop_front() {
            if self.points[p].phase == PointPhase::Done || self.points[p].outstanding.is_some() {
                continue;
            }
            let after = self.points[p].phase == PointPhase::After;
            if !after && self.points[p].next_stage >= self.campaign.cycle_end() {
                self.finish_iteration(p).await?;
                if self.points[p].phase != PointPhase::Done {
                    self.ready.push_back(p);
                }
                continue;
            }
            if after && self.points[p].next_stage >= self.campaign.stages.len() {
                self.points[p].phase = PointPhase::Done;
                continue;
            }
            let stage = &self.campaign.stages[self.points[p].next_stage];
            // Built-ins and hand-offs to resident programs hold no executor slot.
            if !stage.kind.is_builtin() && !stage.resident {
                let on_host = self.runs_on_host(stage);
                if busy[usize::from(on_host)] >= capacity[usize::from(on_host)] {
                    waiting.push_back(p);
                    if busy[0] >= capacity[0] && busy[1] >= capacity[1] {
                        // Every slot is taken: the rest wait for the next completion as they
                        // are (scanning them all on every event would cost O(points) per
                        // attempt).
                        waiting.extend(self.ready.drain(..));
                        break;
                    }
                    continue;
                }
                busy[usize::from(on_host)] += 1;
            }
            self.start_attempt(p).await?;
            if self.points[p].outstanding.is_none() && self.points[p].phase != PointPhase::Done {
                // A built-in ran to its end, or a launch failed at once: go on with this point.
                self.ready.push_back(p);
            }
        }
        self.ready = waiting;
        Ok(())
    }

    /// Plan, record and launch (or hand to the blocking pool, for built-ins) the next
    /// attempt of a point.
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
        let workdir = self.fresh_workdir(&point.id, iteration, &stage, attempt)?;
        let inputs = self
            .place_inputs(&point.id, iteration, &stage, &workdir)
            .await?;
        let seed = rondo_numerics::rng::derive_seed(
            self.campaign.seed,
            &[
                &self.campaign.name,
                &point.id,
                &iteration.to_string(),
                &stage.name,
            ],
        );
        let scheduled = self.schedule_values(p, iteration).await?;
        // A resident program's `{{workdir}}` is its own folder, which outlives the attempt.
        let argv_dir = if stage.resident {
            self.resident_dir(&point.id, &stage.name)
        } else {
            workdir.clone()
        };
        let ctx = ArgvContext {
            stage: &stage,
            point: &point,
            iteration,
            inputs: &inputs,
            scheduled: &scheduled,
            seed,
            workdir: &argv_dir,
        };
        let (argv, uses_seed, executor_kind) = self.attempt_argv(&ctx, &built)?;
        // The planned row: written now (one store call) for built-ins and batch jobs, whose
        // later updates need it; for a local child it rides along with the store call that
        // records the attempt's end (see `NewAttempt`).
        let local_host = matches!(executor_kind, "local" | "builtin").then(|| self.host.clone());
        let id = self.next_id;
        self.next_id += 1;
        let row = NewAttempt {
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
            parameters_json: self.attempt_parameters(&point, &scheduled).to_string(),
            seed: uses_seed.then(|| seed.to_string()),
            revision: self.revision,
            created_at: store::now(),
            host: local_host,
            env_json: Some(if stage.env.is_empty() {
                self.env_json.clone()
            } else {
                crate::environment::with_stage(&self.env_json, &stage.env)
            }),
            inputs: inputs
                .iter()
                .map(|(role, hash, _)| (role.clone(), hash.clone()))
                .collect(),
        };
        self.points[p].attempts[sidx] = attempt;
        let fl = InFlight {
            point: p,
            stage: sidx,
            iteration,
            attempt,
            workdir: workdir.clone(),
            built,
            on_host: self.runs_on_host(&stage),
        };
        self.points[p].outstanding = Some(id);
        self.inflight.insert(id, fl.clone());
        failpoint::hit(Failpoint::AttemptPlanned);
        if stage.resident {
            self.run_handoff(row, fl, &stage, argv, inputs).await
        } else if stage.kind.is_builtin() {
            self.run_builtin(row, fl, &stage, argv).await
        } else {
            self.launch_command(row, fl, &stage, argv).await
        }
    }

    /// An empty scratch folder for an attempt (with `inputs/` when it has inputs).
    fn fresh_workdir(
        &mut self,
        point: &str,
        iteration: u32,
        stage: &Stage,
        attempt: u32,
    ) -> Result<PathBuf> {
        let workdir =
            scratch::attempt_dir(&self.paths.scratch, point, iteration, &stage.name, attempt);
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
        Ok(workdir)
    }

    /// Resolve every input of the attempt to an artifact and place it under `inputs/`
    /// (linked or cloned read-only, a private copy for `writable-inputs`; on the blocking
    /// pool). Returns (role, hash, path relative to the scratch folder) per input placed.
    async fn place_inputs(
        &mut self,
        point: &str,
        iteration: u32,
        stage: &Stage,
        workdir: &Path,
    ) -> Result<Vec<(String, String, PathBuf)>> {
        let mut inputs: Vec<(String, String, PathBuf)> = Vec::new();
        let mix = matches!(stage.kind, StageKind::Mix(_));
        if stage.inputs.is_empty() && !mix && stage.case_folder.is_none() {
            return Ok(inputs);
        }
        let store = self.ledger.flush().await?;
        // (hash, where, private, a folder)
        let mut places: Vec<(String, PathBuf, bool, bool)> = Vec::new();
        for (role, src) in &stage.inputs {
            let Some(hash) = input_hash(&store, point, iteration, src).await? else {
                if stage.kind.is_builtin() || iteration == 1 {
                    continue;
                }
                bail!(
                    "internal: input `{role}` of stage `{}` at {point} iteration {iteration} has \
                     no artifact",
                    stage.name
                );
            };
            let name = store.artifact_name(&hash).await?;
            // A folder artifact is stored under a name ending with '/'.
            let folder = name.ends_with('/');
            let ext = Path::new(&name)
                .extension()
                .filter(|_| !folder)
                .map(|e| format!(".{}", e.to_string_lossy()))
                .unwrap_or_default();
            let rel = PathBuf::from(format!("inputs/{role}{ext}"));
            places.push((
                hash.clone(),
                workdir.join(&rel),
                stage.writable_inputs.contains(role),
                folder,
            ));
            inputs.push((role.clone(), hash, rel));
        }
        // The mixer's own history: the state of the previous iteration's attempt.
        if mix && iteration > 1 {
            let src = Source::Previous {
                stage: stage.name.clone(),
                role: "state".into(),
                initially: None,
            };
            if let Some(h) = input_hash(&store, point, iteration, &src).await? {
                let rel = PathBuf::from("inputs/state.json");
                places.push((h.clone(), workdir.join(&rel), false, false));
                inputs.push(("state".into(), h, rel));
            }
        }
        // The kept working folder: the snapshot of this stage's last good iteration (the
        // one before: a point only goes on after a good iteration), never what a failed or
        // killed attempt left (each attempt has a fresh scratch folder); at iteration 1 the
        // start folder or nothing. Every file a private writable copy (clone where it can).
        if let Some(cf) = &stage.case_folder {
            let src = Source::Previous {
                stage: stage.name.clone(),
                role: crate::spec::CASE_FOLDER_ROLE.into(),
                initially: cf.initially.clone().map(crate::spec::Initial::Start),
            };
            let rel = PathBuf::from(&cf.path);
            match input_hash(&store, point, iteration, &src).await? {
                // A resident program's case folder is laid out where the program runs, when
                // it is started (engine::handoff); its attempts record the snapshot.
                Some(h) if stage.resident => {
                    inputs.push((crate::spec::CASE_FOLDER_ROLE.into(), h, rel));
                }
                None if stage.resident => {}
                Some(h) => {
                    places.push((h.clone(), workdir.join(&rel), true, true));
                    inputs.push((crate::spec::CASE_FOLDER_ROLE.into(), h, rel));
                }
                None if iteration == 1 => {
                    let dir = workdir.join(&rel);
                    std::fs::create_dir_all(&dir)
                        .with_context(|| format!("{}: cannot create", dir.display()))?;
                }
                None => bail!(
                    "internal: the case folder of stage `{}` at {point} iteration {} has no \
                     snapshot",
                    stage.name,
                    iteration - 1
                ),
            }
        }
        let artifacts = self.artifacts.clone();
        tokio::task::spawn_blocking(move || -> Result<()> {
            for (hash, dest, private, folder) in places {
                let placed = if folder {
                    artifacts.place_folder(&hash, &dest, private)
                } else {
                    artifacts.place(&hash, &dest, private)
                };
                placed.with_context(|| {
                    format!("cannot place artifact {hash} as {}", dest.display())
                })?;
            }
            Ok(())
        })
        .await
        .context("internal: the input placement task panicked")??;
        Ok(inputs)
    }

    /// The parameters an attempt records: the campaign's, the point's sweep values, and the
    /// loop-driven ones of this iteration.
    fn attempt_parameters(
        &self,
        point: &PointSpec,
        scheduled: &[(String, String)],
    ) -> serde_json::Value {
        let mut params = self.parameters.clone();
        for (k, v) in &point.values {
            params.insert(k.clone(), v.to_json());
        }
        for (k, v) in scheduled {
            let value = v
                .parse::<i64>()
                .map(serde_json::Value::from)
                .or_else(|_| v.parse::<f64>().map(serde_json::Value::from))
                .unwrap_or_else(|_| serde_json::Value::from(v.clone()));
            params.insert(k.clone(), value);
        }
        serde_json::Value::Object(params)
    }

    /// The argument list an attempt runs, whether it uses `{{seed}}`, and the executor kind
    /// its row records.
    fn attempt_argv(
        &self,
        ctx: &ArgvContext<'_>,
        built: &BuiltWith,
    ) -> Result<(Vec<String>, bool, &'static str)> {
        let stage = ctx.stage;
        let (template, shell) = match &stage.kind {
            StageKind::Filter(_) | StageKind::Mix(_) | StageKind::Eos(_) => {
                // The `rondo builtin` command that reruns it in this scratch layout.
                let argv = builtins::BuiltinCommand::for_stage(
                    &stage.kind,
                    ctx.inputs.iter().map(|(r, _, f)| (r.as_str(), f.as_path())),
                    &stage.outputs,
                )
                .map(|c| c.to_argv(&self.rondo_exe.0))
                .ok_or_else(|| anyhow::anyhow!("internal: `{}` is no built-in", stage.name))?;
                return Ok((argv, false, "builtin"));
            }
            StageKind::Command { template, .. } => (template, false),
            StageKind::Shell { template, .. } => (template, true),
        };
        let lookup = |ns: Option<&str>, name: &str| self.placeholder(ctx, shell, ns, name);
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
        let kind = if stage.resident {
            "resident"
        } else if self.runs_on_host(stage) {
            "local"
        } else {
            self.opts.executor.kind()
        };
        Ok((argv, uses_seed, kind))
    }

    /// The value of one `{{namespace:name}}` placeholder of a command template.
    fn placeholder(
        &self,
        ctx: &ArgvContext<'_>,
        shell: bool,
        ns: Option<&str>,
        name: &str,
    ) -> Option<String> {
        let find = |list: &[(String, String)], n: &str| {
            list.iter().find(|(k, _)| k == n).map(|(_, v)| v.clone())
        };
        match (ns, name) {
            (Some("param"), n) => ctx
                .point
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
                .or_else(|| find(ctx.scheduled, n)),
            (Some("input"), n) => ctx
                .inputs
                .iter()
                .find(|(r, _, _)| r == n)
                .map(|(_, _, f)| f.display().to_string()),
            (Some("output"), n) => find(&ctx.stage.outputs, n),
            (Some("program"), n) if shell => self
                .campaign
                .programs
                .get(n)
                .map(|r| r.path.display().to_string()),
            (Some("point"), "id") => Some(ctx.point.id.clone()),
            (Some("point"), "index") => Some(ctx.point.index.to_string()),
            (None, "iteration") => Some(ctx.iteration.to_string()),
            (None, "cpus") => Some(ctx.stage.resources.cpus().to_string()),
            (None, "tasks") => Some(ctx.stage.resources.ntasks.unwrap_or(1).to_string()),
            (None, "seed") => Some(ctx.seed.to_string()),
            (None, "stage") => Some(ctx.stage.name.clone()),
            (None, "campaign") => Some(self.campaign.name.clone()),
            (None, "workdir") => Some(ctx.workdir.display().to_string()),
            _ => None,
        }
    }

    /// A built-in attempt: its row is written first (it runs in this process), then it runs
    /// exactly the recorded argument list in the scratch folder on the blocking pool, which
    /// also checks and stores its outputs; the result comes back to the loop.
    async fn run_builtin(
        &mut self,
        row: NewAttempt,
        fl: InFlight,
        stage: &Stage,
        argv: Vec<String>,
    ) -> Result<()> {
        let id = row.id;
        let started = Utc::now();
        let host = self.host.clone();
        self.ledger
            .write(Failpoint::BuiltinStarted, |s| {
                s.new_attempts(vec![row]);
                s.builtin_started(id, store::time_text(started), host.clone());
            })
            .await?;
        let job = OutputJob {
            id,
            stage: stage.clone(),
            workdir: fl.workdir.clone(),
            artifacts: self.artifacts.clone(),
            keep_scratch: self.opts.keep_scratch,
            case_root: None,
        };
        let tx = self.checked_tx.clone();
        self.storing.insert(id);
        tokio::task::spawn_blocking(move || {
            let ended = match builtins::run_argv(&argv, &job.workdir) {
                Ok(report) => {
                    let mut ended = check_outputs(
                        &job.stage,
                        &job.workdir,
                        Some(report.metrics),
                        Some(started),
                        Some(Utc::now()),
                        Some(host.clone()),
                    );
                    if let Ended::Ok(done) = &mut ended {
                        done.event = report.event;
                    }
                    ended
                }
                Err(message) => Ended::Failed {
                    kind: "builtin-failed".into(),
                    message,
                    exit_status: None,
                    started: Some(started),
                    ended: Some(Utc::now()),
                    host: Some(host),
                    free: false,
                    state: AttemptState::Failed,
                },
            };
            let _ = tx.send(job.store(ended));
        });
        Ok(())
    }

    /// The time limit and resources of an attempt: the stage's, except for a retry after
    /// time-limit kills of the same iteration, which asks for `timeout-factor` times the limit
    /// per earlier kill (a batch job's `--time` rounded up to whole minutes, Slurm's
    /// resolution; an event says so).
    /// Counted from the store, so a resumed run asks for the same limit.
    pub(super) async fn limits_for_retry(
        &mut self,
        id: i64,
        fl: &InFlight,
        stage: &Stage,
        point: &str,
    ) -> Result<(Option<Duration>, Resources)> {
        let limited = stage.time_limit.is_some() || stage.resources.time.is_some();
        if fl.attempt <= 1 || !limited || stage.timeout_factor <= 1.0 {
            return Ok((stage.time_limit, stage.resources.clone()));
        }
        let kills = self
            .ledger
            .flush()
            .await?
            .timed_out_attempts(point, fl.iteration, &stage.name)
            .await?;
        if kills == 0 {
            return Ok((stage.time_limit, stage.resources.clone()));
        }
        let factor = stage
            .timeout_factor
            .powi(i32::try_from(kills).unwrap_or(i32::MAX));
        let time_limit = stage.time_limit.map(|t| {
            Duration::try_from_secs_f64(t.as_secs_f64() * factor).unwrap_or(Duration::MAX)
        });
        let resources = lengthen_time(&stage.resources, factor);
        let limits: Vec<String> = time_limit
            .map(|t| format!("{} s", t.as_secs()))
            .into_iter()
            .chain(resources.time.as_ref().map(|t| format!("batch --time {t}")))
            .collect();
        let detail = format!(
            "after {kills} time-limit kill(s) the limit is {} (timeout-factor {})",
            limits.join(", "),
            stage.timeout_factor
        );
        self.ledger
            .write(Failpoint::TimeLimitLengthened, |s| {
                s.event(
                    "time-limit-lengthened",
                    Some(point),
                    Some(fl.iteration),
                    Some(id),
                    &detail,
                )
            })
            .await?;
        Ok((time_limit, resources))
    }

    /// A command or shell stage: hand it to the executor.
    async fn launch_command(
        &mut self,
        row: NewAttempt,
        fl: InFlight,
        stage: &Stage,
        argv: Vec<String>,
    ) -> Result<()> {
        let id = row.id;
        let local = fl.on_host || self.opts.executor.kind() == "local";
        if local {
            self.ledger.plan_later(row);
        } else {
            self.ledger
                .write(Failpoint::BatchPlanned, |s| s.new_attempts(vec![row]))
                .await?;
        }
        let point = &self.points[fl.point].spec;
        // The stage's own variables first; rondo's (RONDO_*, which `env:` may not set) last.
        let mut env: BTreeMap<String, String> = stage.env.iter().cloned().collect();
        env.insert("RONDO_POINT".to_string(), point.id.clone());
        env.insert("RONDO_ITERATION".to_string(), fl.iteration.to_string());
        env.insert("RONDO_STAGE".to_string(), stage.name.clone());
        let point_id = point.id.clone();
        let (time_limit, resources) = self.limits_for_retry(id, &fl, stage, &point_id).await?;
        let req = LaunchRequest {
            attempt_id: id,
            job_name: format!(
                "{}.{}.i{}.{}",
                self.campaign.name, point_id, fl.iteration, stage.name
            ),
            argv,
            workdir: fl.workdir.clone(),
            env,
            time_limit,
            resources,
            outlive: stage.outlive_rondo,
        };
        match self.executor_for(fl.on_host).launch(req).await {
            Ok(handle) if local => {
                failpoint::hit(Failpoint::ChildStarted);
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
                failpoint::hit(Failpoint::ChildStarted);
                self.ledger
                    .write(Failpoint::JobSubmitted, |s| {
                        s.attempt_submitted(id, handle.id, handle.host, store::now())
                    })
                    .await?;
            }
            Err(e) => {
                // A scheduler that does not answer (controller down or restarting) after the
                // executor's own retries is no fault of the stage: the attempt is recorded
                // as failed to launch but uses up none of the stage's retries, and the point
                // queues again, so a campaign waits out an outage of any length (each
                // round of the executor's backoff is a few calls, minutes apart).
                let outage = matches!(e, ExecError::Unavailable { .. });
                if outage {
                    self.progress.line(format!(
                        "{} iteration {} stage {}: the scheduler does not answer ({e}); \
                         trying again",
                        self.points[fl.point].spec.id,
                        fl.iteration,
                        self.campaign.stages[fl.stage].name
                    ));
                }
                let ended = Ended::Failed {
                    kind: "launch-failed".into(),
                    message: e.to_string(),
                    exit_status: None,
                    started: None,
                    ended: Some(Utc::now()),
                    host: None,
                    free: outage,
                    state: AttemptState::Failed,
                };
                self.settle(id, Some(&fl), ended).await?;
            }
        }
        Ok(())
    }
}

/// What rendering an attempt's argv needs to know.
struct ArgvContext<'a> {
    stage: &'a Stage,
    point: &'a PointSpec,
    iteration: u32,
    inputs: &'a [(String, String, PathBuf)],
    scheduled: &'a [(String, String)],
    seed: u64,
    workdir: &'a Path,
}

/// Resolve the artifact feeding one input of a stage.
async fn input_hash(
    store: &store::Flushed<'_>,
    point: &str,
    iteration: u32,
    src: &Source,
) -> Result<Option<String>> {
    match src {
        Source::Same { stage, role } => store.output_artifact(point, iteration, stage, role).await,
        Source::Start(name) => store.start_artifact(name).await,
        // A `before:` stage ran once, in iteration 1.
        Source::Before { stage, role } => store.output_artifact(point, 1, stage, role).await,
        Source::Points { .. } => {
            bail!("internal: a per-point stage has an input of several points")
        }
        Source::Previous {
            stage,
            role,
            initially,
        } => {
            if iteration > 1 {
                store
                    .output_artifact(point, iteration - 1, stage, role)
                    .await
            } else {
                // A point warm-started by a revision: the blend of the two converged points
                // around it, else its nearest neighbour's last good output.
                if let Some(a) = store.warm_blend(point, stage, role).await? {
                    return Ok(Some(a));
                }
                if let Some((source, it)) = store.warm_source(point).await? {
                    if let Some(a) = store.output_artifact(&source, it, stage, role).await? {
                        return Ok(Some(a));
                    }
                }
                match initially {
                    Some(Initial::Start(name)) => store.start_artifact(name).await,
                    Some(Initial::Before { stage, role }) => {
                        store.output_artifact(point, 1, stage, role).await
                    }
                    None => Ok(None),
                }
            }
        }
    }
}
