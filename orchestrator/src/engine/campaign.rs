//! `after-campaign:` stages: once per campaign (or per group of the `group-by` axes) after
//! every point stopped, over the selected points' last good outputs or final values. Each
//! run happens in its own folder `analysis/STAGE[.AXIS=VALUE…]` (emptied first) and is
//! recorded as a generation — argv, program and its hash, host, times, the attempts whose
//! outputs or metrics it read, and its outputs as artifacts — in one transaction at its end.
//! A crash before that transaction leaves nothing recorded, and the next `rondo run` ends
//! the leftover program (it carries the workspace's tag) and runs the stage again; a
//! recorded stage and group never runs again. The built-in `eos` stage records its fit as
//! before (`query::analysis::record_eos`).

use std::process::Stdio;

use serde_json::{json, Map, Value};

use super::*;
use crate::spec::{PointSelection, PointsRead};
use crate::store::reads::{attempts, points, reports};
use rondo_adapters::template::Template;

/// One group of an `after-campaign:` stage: the `group-by` axes' values and its points.
struct Group {
    values: Map<String, Value>,
    /// (point id, sweep values, state) of every point of the group, in sweep order.
    points: Vec<PointRow>,
    /// Every point of the campaign (what `points: all` and `points: converged` select from).
    every: std::sync::Arc<Vec<PointRow>>,
}

/// (point id, sweep values, state).
type PointRow = (String, Map<String, Value>, PointState);

/// What a campaign-level run read and how it is laid out.
#[derive(Default)]
struct Gathered {
    /// Role → path relative to the run's folder.
    inputs: Vec<(String, String)>,
    /// Attempts whose outputs or metrics it read.
    sources: Vec<i64>,
}

impl Engine<'_> {
    /// Run the `after-campaign:` stages not recorded yet, in file order; true when a stop
    /// signal interrupted them.
    pub(super) async fn after_campaign(&mut self) -> Result<bool> {
        if self.campaign.after_campaign.is_empty() {
            return Ok(false);
        }
        if self.after_failed > 0 {
            self.progress.line(
                "after-campaign stages wait: an after-point stage failed (`rondo run` runs it again)"
                    .to_string(),
            );
            return Ok(false);
        }
        let rows = points::all(self.ledger.flush().await?.pool()).await?;
        let all: Vec<_> = rows
            .into_iter()
            .map(|r| {
                let v: Map<String, Value> =
                    serde_json::from_str(&r.values_json).unwrap_or_default();
                (r.id, v, r.state)
            })
            .collect();
        for (k, stage) in self.campaign.after_campaign.iter().enumerate() {
            if let StageKind::Eos(e) = &stage.kind {
                let store = self.ledger.flush().await?;
                let doc = crate::query::analysis::record_eos(
                    store.pool(),
                    &self.paths.root,
                    &self.artifacts,
                    e,
                    false,
                )
                .await?;
                for line in crate::query::analysis::eos_lines(&doc) {
                    self.progress.line(line);
                }
                continue;
            }
            for g in groups(&stage.group_by, &all) {
                if !self.campaign_stage(k, stage, &g).await? {
                    return Ok(true);
                }
            }
        }
        Ok(false)
    }

    /// One stage for one group, unless recorded already; its attempts up to its retries.
    /// False when a stop signal ended it.
    async fn campaign_stage(&mut self, k: usize, stage: &Stage, g: &Group) -> Result<bool> {
        let options = json!({"stage": stage.name, "group": g.values}).to_string();
        let pool = self.ledger.flush().await?.pool().clone();
        if reports::generation_with_options(&pool, &options)
            .await?
            .is_some()
        {
            return Ok(true);
        }
        let label = folder_name(&stage.name, &g.values);
        let dir = self.paths.root.join("analysis").join(&label);
        let mut last = String::new();
        for attempt in 1..=stage.retries + 1 {
            match self.campaign_attempt(k, stage, g, &dir, &options).await {
                Ok(false) => return Ok(false),
                Ok(true) => {
                    self.progress
                        .line(format!("after-campaign stage {label} succeeded"));
                    return Ok(true);
                }
                Err(e) => {
                    last = format!("{e:#}");
                    let why = format!("{label}: attempt {attempt} failed: {last}");
                    self.event("campaign-stage-failed", None, None, None, &why)
                        .await?;
                }
            }
        }
        self.after_failed += 1;
        self.progress.line(format!(
            "after-campaign stage {label} failed after {} attempt(s); last: {last}; `rondo run` runs it again",
            stage.retries + 1
        ));
        Ok(true)
    }

    /// Lay out the inputs, run the program, store and record the outputs; false when a stop
    /// signal ended it (nothing recorded).
    async fn campaign_attempt(
        &mut self,
        k: usize,
        stage: &Stage,
        g: &Group,
        dir: &Path,
        options: &str,
    ) -> Result<bool> {
        let started = store::now();
        if dir.exists() {
            std::fs::remove_dir_all(dir)
                .with_context(|| format!("{}: cannot empty", dir.display()))?;
        }
        std::fs::create_dir_all(dir.join("inputs"))
            .with_context(|| format!("{}: cannot create", dir.display()))?;
        let pool = self.ledger.flush().await?.pool().clone();
        let got = self.gather(&pool, stage, g, dir).await?;
        let (argv, program) = self.campaign_argv(stage, g, &got)?;
        let (blake3, unknown) = match crate::artifacts::hash_file(Path::new(&program)) {
            Ok((h, _)) => (Some(h), None),
            Err(e) => (None, Some(format!("{program}: {e}"))),
        };
        let tag = (
            self.workspace_id.as_str(),
            -1 - k as i64,
            stage.name.as_str(),
        );
        if let Ran::Interrupted =
            run_program(&argv, dir, tag, stage.time_limit, self.opts.grace).await?
        {
            return Ok(false);
        }
        let mut outs = Vec::new();
        for (role, file) in &stage.outputs {
            let path = dir.join(file);
            if !std::fs::symlink_metadata(&path).is_ok_and(|m| m.is_file()) {
                bail!("output `{role}` ({file}) was not written as a regular file");
            }
            let (hash, size) = self
                .artifacts
                .put_file(&path)
                .with_context(|| format!("{}: cannot store", path.display()))?;
            outs.push((format!("{}.{role}", stage.name), file.clone(), hash, size));
        }
        let argv_json = serde_json::to_string(&argv)?;
        let (out_dir, host, ended) = (dir.display().to_string(), store::hostname(), store::now());
        let mut tx = pool.begin().await?;
        for (_, file, hash, size) in &outs {
            reports::insert_artifact(&mut tx, hash, *size, file, &ended).await?;
        }
        let generation = reports::NewGeneration {
            argv_json: &argv_json,
            out_dir: &out_dir,
            options_json: options,
            program_path: &program,
            program_blake3: blake3.as_deref(),
            program_unknown: unknown.as_deref(),
            host: &host,
            started_at: &started,
            ended_at: &ended,
            rondo_version: env!("CARGO_PKG_VERSION"),
        };
        let id = reports::insert_generation(&mut tx, &generation).await?;
        for (role, _, hash, _) in &outs {
            reports::insert_output(&mut tx, id, role, hash).await?;
            for a in &got.sources {
                reports::insert_source(&mut tx, id, role, *a).await?;
            }
        }
        let detail = format!(
            "{}: {}",
            folder_name(&stage.name, &g.values),
            outs.iter()
                .map(|(r, _, h, _)| format!("{r} {}", &h[..12]))
                .collect::<Vec<_>>()
                .join(", ")
        );
        store::event(&mut *tx, "campaign-stage", None, None, None, &detail).await?;
        tx.commit().await?;
        failpoint::hit(Failpoint::CampaignStageRecorded);
        Ok(true)
    }

    /// Place every input of the stage under `dir/inputs`.
    async fn gather(
        &self,
        pool: &sqlx::SqlitePool,
        stage: &Stage,
        g: &Group,
        dir: &Path,
    ) -> Result<Gathered> {
        let mut got = Gathered::default();
        for (role, src) in &stage.inputs {
            let rel = match src {
                Source::Points { read, points } => {
                    let from = match points {
                        PointSelection::Group => &g.points,
                        PointSelection::All | PointSelection::Converged => g.every.as_ref(),
                    };
                    let chosen: Vec<_> = from
                        .iter()
                        .filter(|(_, _, st)| selected(*points, *st))
                        .collect();
                    match read {
                        PointsRead::Output { stage: s, role: r } => {
                            let rel = format!("inputs/{role}");
                            std::fs::create_dir_all(dir.join(&rel))?;
                            for (id, _, _) in chosen {
                                let (hash, attempt) = last_output(pool, id, s, r).await?;
                                let ext = self.extension_of(pool, &hash).await?;
                                let to = dir.join(&rel).join(format!("{id}{ext}"));
                                std::fs::copy(self.artifacts.path_of(&hash), &to)
                                    .with_context(|| format!("{}: cannot place", to.display()))?;
                                got.sources.push(attempt);
                            }
                            rel
                        }
                        PointsRead::Finals(names) => {
                            let mut list = Vec::new();
                            for (id, values, state) in chosen {
                                let mut finals = Map::new();
                                for n in names {
                                    if let Some(f) =
                                        crate::query::analysis::final_value(pool, id, n).await?
                                    {
                                        got.sources.extend(f.attempts.iter().copied());
                                        finals.insert(
                                            n.clone(),
                                            json!({"value": f.value, "error": f.error}),
                                        );
                                    }
                                }
                                list.push(json!({"point": id, "values": values,
                                    "state": state.to_string(), "finals": finals}));
                            }
                            let rel = format!("inputs/{role}.json");
                            let mut text = serde_json::to_string_pretty(&json!({"points": list}))?;
                            text.push('\n');
                            std::fs::write(dir.join(&rel), text)?;
                            rel
                        }
                    }
                }
                Source::Start(name) => {
                    let hash = self
                        .ledger_start(pool, name)
                        .await?
                        .with_context(|| format!("start file `{name}` is not recorded"))?;
                    let ext = self.extension_of(pool, &hash).await?;
                    let rel = format!("inputs/{role}{ext}");
                    std::fs::copy(self.artifacts.path_of(&hash), dir.join(&rel))?;
                    rel
                }
                other => bail!(
                    "stage `{}`: input `{role}` ({other:?}) cannot be read by an after-campaign stage",
                    stage.name
                ),
            };
            got.inputs.push((role.clone(), rel));
        }
        got.sources.sort_unstable();
        got.sources.dedup();
        Ok(got)
    }

    /// The recorded artifact of start file `name`.
    async fn ledger_start(&self, pool: &sqlx::SqlitePool, name: &str) -> Result<Option<String>> {
        Ok(crate::store::reads::artifacts::start_files(pool)
            .await?
            .into_iter()
            .find(|(n, _)| n == name)
            .map(|(_, h)| h))
    }

    /// The extension (with its dot) of an artifact's first recorded name, or none.
    async fn extension_of(&self, pool: &sqlx::SqlitePool, hash: &str) -> Result<String> {
        let name = crate::store::reads::artifacts::original_name(pool, hash).await?;
        Ok(Path::new(&name)
            .extension()
            .map(|e| format!(".{}", e.to_string_lossy()))
            .unwrap_or_default())
    }

    /// The argument list (the program first, as its resolved path) and the program's path.
    fn campaign_argv(
        &self,
        stage: &Stage,
        g: &Group,
        got: &Gathered,
    ) -> Result<(Vec<String>, String)> {
        let (template, shell, program): (&Template, bool, Option<&String>) = match &stage.kind {
            StageKind::Command { template, program } => (template, false, Some(program)),
            StageKind::Shell { template, .. } => (template, true, None),
            _ => bail!("internal: `{}` is no program stage", stage.name),
        };
        let find = |list: &[(String, String)], n: &str| {
            list.iter().find(|(k, _)| k == n).map(|(_, v)| v.clone())
        };
        let lookup = |ns: Option<&str>, name: &str| -> Option<String> {
            match (ns, name) {
                (Some("param"), n) => self
                    .campaign
                    .parameters
                    .iter()
                    .find(|(k, _)| k == n)
                    .map(|(_, v)| v.to_string()),
                (Some("group"), n) => g.values.get(n).map(|v| match v {
                    Value::String(s) => s.clone(),
                    v => v.to_string(),
                }),
                (Some("input"), n) => find(&got.inputs, n),
                (Some("output"), n) => find(&stage.outputs, n),
                (Some("program"), n) if shell => self
                    .campaign
                    .programs
                    .get(n)
                    .map(|r| r.path.display().to_string()),
                (None, "cpus") => Some(stage.resources.cpus().to_string()),
                (None, "tasks") => Some(stage.resources.ntasks.unwrap_or(1).to_string()),
                (None, "stage") => Some(stage.name.clone()),
                _ => None,
            }
        };
        let mut argv = if shell {
            template.render_shell(lookup)
        } else {
            template.render(lookup)
        }
        .map_err(|e| anyhow::anyhow!("stage `{}`: {e}", stage.name))?;
        let path = match program {
            Some(p) => self
                .campaign
                .programs
                .get(p)
                .map(|r| r.path.display().to_string())
                .with_context(|| format!("program `{p}` is not declared"))?,
            None => "/bin/sh".to_string(),
        };
        if !shell {
            if let Some(first) = argv.first_mut() {
                first.clone_from(&path);
            }
        }
        Ok((argv, path))
    }
}

/// Whether a point in `state` is read by a selection.
fn selected(sel: PointSelection, state: PointState) -> bool {
    match sel {
        PointSelection::Converged => state == PointState::Converged,
        PointSelection::All | PointSelection::Group => {
            matches!(state, PointState::Converged | PointState::Capped)
        }
    }
}

/// The groups of `all` by the `by` axes, in order of first appearance (one group of every
/// point when `by` is empty).
fn groups(by: &[String], all: &[PointRow]) -> Vec<Group> {
    let every = std::sync::Arc::new(all.to_vec());
    let mut out: Vec<Group> = Vec::new();
    for p in all {
        let key: Map<String, Value> = by
            .iter()
            .filter_map(|a| p.1.get(a).map(|v| (a.clone(), v.clone())))
            .collect();
        match out.iter_mut().find(|g| g.values == key) {
            Some(g) => g.points.push(p.clone()),
            None => out.push(Group {
                values: key,
                points: vec![p.clone()],
                every: every.clone(),
            }),
        }
    }
    out
}

/// `STAGE` or `STAGE.AXIS=VALUE…`: the run's folder under `analysis/`.
fn folder_name(stage: &str, group: &Map<String, Value>) -> String {
    let mut s = stage.to_string();
    for (k, v) in group {
        let v = match v {
            Value::String(t) => t.clone(),
            v => v.to_string(),
        };
        s.push_str(&format!(".{k}={}", v.replace('/', "_")));
    }
    s
}

/// The artifact of `stage.role` at a point's last good iteration and the attempt that made it.
async fn last_output(
    pool: &sqlx::SqlitePool,
    point: &str,
    stage: &str,
    role: &str,
) -> Result<(String, i64)> {
    let it = points::last_good_iteration(pool, point)
        .await?
        .with_context(|| format!("point {point} has no good iteration"))?;
    attempts::succeeded_output_with_attempt(pool, point, it, stage, role)
        .await?
        .with_context(|| {
            format!("point {point}: no output `{stage}.{role}` at its last good iteration {it}")
        })
}

/// How a campaign-level program ended.
enum Ran {
    /// It exited 0.
    Ok,
    /// SIGINT, SIGTERM or SIGHUP reached rondo: the program's group was ended.
    Interrupted,
}

/// Run `argv` in `dir` in its own process group, tagged with the workspace (so that the
/// next `rondo run` ends it if this one is killed), stdout and stderr into files there.
/// An error unless it exits 0 within `limit`; a stop signal to rondo ends its group (TERM,
/// `grace`, KILL).
async fn run_program(
    argv: &[String],
    dir: &Path,
    tag: (&str, i64, &str),
    limit: Option<Duration>,
    grace: Duration,
) -> Result<Ran> {
    use tokio::signal::unix::{signal, SignalKind};
    let (workspace_id, attempt, stage) = tag;
    let (first, rest) = argv.split_first().context("empty argument list")?;
    let out = std::fs::File::create(dir.join("stdout.txt"))?;
    let err = std::fs::File::create(dir.join("stderr.txt"))?;
    let mut child = tokio::process::Command::new(first)
        .args(rest)
        .current_dir(dir)
        .env(rondo_adapters::local::WORKSPACE_VAR, workspace_id)
        .env(rondo_adapters::local::ATTEMPT_VAR, attempt.to_string())
        .env("RONDO_STAGE", stage)
        .stdin(Stdio::null())
        .stdout(Stdio::from(out))
        .stderr(Stdio::from(err))
        .process_group(0)
        .kill_on_drop(true)
        .spawn()
        .with_context(|| format!("cannot start {first}"))?;
    let pgid = child.id().map_or(0, |p| p as i32);
    let (mut int, mut term, mut hup) = (
        signal(SignalKind::interrupt())?,
        signal(SignalKind::terminate())?,
        signal(SignalKind::hangup())?,
    );
    let limit_reached = async {
        match limit {
            Some(l) => tokio::time::sleep(l).await,
            None => std::future::pending::<()>().await,
        }
    };
    let why = tokio::select! {
        s = child.wait() => {
            let status = s?;
            if !status.success() {
                bail!("{first} ended with {status} (see stderr.txt)");
            }
            return Ok(Ran::Ok);
        }
        _ = limit_reached => None,
        _ = int.recv() => Some(Ran::Interrupted),
        _ = term.recv() => Some(Ran::Interrupted),
        _ = hup.recv() => Some(Ran::Interrupted),
    };
    let _ = rondo_adapters::local::sys::signal_group(pgid, libc::SIGTERM);
    if tokio::time::timeout(grace, child.wait()).await.is_err() {
        let _ = rondo_adapters::local::sys::signal_group(pgid, libc::SIGKILL);
        let _ = child.wait().await;
    }
    match why {
        Some(r) => Ok(r),
        None => bail!("time limit {} s reached", limit.map_or(0, |l| l.as_secs())),
    }
}
