//! Resident stages (docs/resident.md): one program per point and stage, started in the state
//! of the stage's last good iteration and kept alive across iterations. Each attempt is one
//! hand-off: its row is written first (as a built-in's), its inputs are placed in the
//! hand-off's `in/` folder, `go` is written, and `done` is awaited within the stage's time
//! limit while the program is watched; the outputs are then checked against the `done` and
//! stored like any attempt's, and the case folder is recorded from the program's folder. A
//! failed hand-off (an error, a refused output, a death, a hang) ends the program: whatever
//! it holds may be half-way, so the next attempt starts a fresh one from the last good state.
//! Programs end when their point stops and when rondo stops; after a SIGKILL of rondo their
//! keepers end them, and the next run starts them again.

use super::*;
use crate::resident::{self, Status};

/// A hand-off being awaited.
#[derive(Debug)]
pub(super) struct Handoff {
    point: usize,
    stage: usize,
    task: tokio::task::JoinHandle<()>,
}

/// What the task awaiting one `done` needs.
struct Awaited {
    id: i64,
    root: PathBuf,
    number: u64,
    pid: i32,
    limit: Option<Duration>,
    job: OutputJob,
    started: DateTime<Utc>,
    host: String,
    tx: mpsc::UnboundedSender<Checked>,
}

impl Engine<'_> {
    /// The folder a resident program of a point and stage runs in.
    pub(super) fn resident_dir(&self, point: &str, stage: &str) -> PathBuf {
        self.paths
            .root
            .join("resident")
            .join(format!("{point}.{stage}"))
    }

    /// One attempt of a resident stage: the program started if it is not running, its
    /// inputs placed, `go`, and a task that awaits `done` and hands the attempt back.
    pub(super) async fn run_handoff(
        &mut self,
        row: NewAttempt,
        fl: InFlight,
        stage: &Stage,
        argv: Vec<String>,
        inputs: Vec<(String, String, PathBuf)>,
    ) -> Result<()> {
        let id = row.id;
        let started = Utc::now();
        let host = self.host.clone();
        self.ledger
            .write(Failpoint::HandoffStarted, |s| {
                s.new_attempts(vec![row]);
                s.builtin_started(id, store::time_text(started), host.clone());
            })
            .await?;
        self.storing.insert(id);
        let key = (fl.point, fl.stage);
        let stale = self
            .residents
            .get(&key)
            .is_some_and(|p| p.argv != argv || resident::gone(&p.dir, p.pid).is_some());
        if stale {
            let why = "it ended by itself, or its command changed, since its last hand-off";
            self.end_resident(key, false, why).await?;
        }
        if !self.residents.contains_key(&key) {
            if let Err(message) = self.start_resident(&fl, stage, &argv, &inputs, id).await {
                let ended = handoff_failed("launch-failed", message, started, &host);
                return self.on_checked(Checked::ended(id, ended)).await;
            }
        }
        let Some(process) = self.residents.get_mut(&key) else {
            bail!("internal: no resident program for attempt {id}");
        };
        process.last += 1;
        let (number, pid, root) = (process.last, process.pid, process.dir.clone());
        let detail = format!(
            "hand-off {number} to resident process {pid} (started by attempt {} at {}: {})",
            process.started_by,
            store::time_text(process.started_at),
            serde_json::to_string(&process.argv)?
        );
        let point_id = self.points[fl.point].spec.id.clone();
        let (by, at) = (process.started_by, store::time_text(process.started_at));
        self.ledger
            .write(Failpoint::HandoffRecorded, |s| {
                s.handoff(id, number, pid, by, at.clone());
                s.event(
                    "handoff",
                    Some(&point_id),
                    Some(fl.iteration),
                    Some(id),
                    &detail,
                );
            })
            .await?;
        if let Err(e) = self.place_handoff(&root, number, &inputs).await {
            let why = "the hand-off's inputs could not be placed";
            self.end_resident(key, false, why).await?;
            let ended = handoff_failed("launch-failed", format!("{e:#}"), started, &host);
            return self.on_checked(Checked::ended(id, ended)).await;
        }
        let (limit, _) = self.limits_for_retry(id, &fl, stage, &point_id).await?;
        let awaited = Awaited {
            id,
            root: root.clone(),
            number,
            pid,
            limit,
            job: OutputJob {
                id,
                stage: stage.clone(),
                workdir: fl.workdir.clone(),
                artifacts: self.artifacts.clone(),
                keep_scratch: self.opts.keep_scratch,
                case_root: Some(root),
            },
            started,
            host,
            tx: self.checked_tx.clone(),
        };
        let task = tokio::spawn(await_done(awaited));
        self.handoffs.insert(
            id,
            Handoff {
                point: fl.point,
                stage: fl.stage,
                task,
            },
        );
        Ok(())
    }

    /// Start the resident program of an attempt's point and stage in a fresh folder: its
    /// case folder laid out from the snapshot the attempt records (the last good
    /// iteration's; at iteration 1 `initially` or nothing), an empty hand-off folder.
    async fn start_resident(
        &mut self,
        fl: &InFlight,
        stage: &Stage,
        argv: &[String],
        inputs: &[(String, String, PathBuf)],
        id: i64,
    ) -> Result<(), String> {
        let point_id = self.points[fl.point].spec.id.clone();
        let dir = self.resident_dir(&point_id, &stage.name);
        let snapshot = inputs
            .iter()
            .find(|(role, _, _)| role == crate::spec::CASE_FOLDER_ROLE)
            .map(|(_, hash, _)| hash.clone());
        let case = stage.case_folder.as_ref().map(|cf| dir.join(&cf.path));
        let artifacts = self.artifacts.clone();
        let folder = dir.clone();
        tokio::task::spawn_blocking(move || -> Result<(), String> {
            let io =
                |what: &str, p: &Path, e: std::io::Error| format!("{}: {what}: {e}", p.display());
            if folder.exists() {
                std::fs::remove_dir_all(&folder).map_err(|e| io("cannot clear", &folder, e))?;
            }
            let handoffs = folder.join(resident::HANDOFF_DIR);
            std::fs::create_dir_all(&handoffs).map_err(|e| io("cannot create", &handoffs, e))?;
            match (case, snapshot) {
                (Some(case), Some(hash)) => artifacts
                    .place_folder(&hash, &case, true)
                    .map(|_| ())
                    .map_err(|e| io("cannot lay out the case folder", &case, e)),
                (Some(case), None) => {
                    std::fs::create_dir_all(&case).map_err(|e| io("cannot create", &case, e))
                }
                (None, _) => Ok(()),
            }
        })
        .await
        .map_err(|e| format!("internal: laying out the resident folder panicked: {e}"))??;
        let mut env: BTreeMap<String, String> = stage.env.iter().cloned().collect();
        env.insert("RONDO_POINT".to_string(), point_id.clone());
        env.insert("RONDO_STAGE".to_string(), stage.name.clone());
        let process = resident::start(resident::Start {
            dir: &dir,
            argv,
            env: &env,
            workspace_id: &self.workspace_id,
            attempt_id: id,
            grace: self.opts.grace,
        })
        .await?;
        let detail = format!(
            "process {} in {}: {}",
            process.pid,
            dir.display(),
            serde_json::to_string(argv).unwrap_or_default()
        );
        self.event(
            "resident-started",
            Some(&point_id),
            Some(fl.iteration),
            Some(id),
            &detail,
        )
        .await
        .map_err(|e| format!("{e:#}"))?;
        self.residents.insert((fl.point, fl.stage), process);
        Ok(())
    }

    /// A hand-off's inputs, each as `in/ROLE` (a read-only link to the stored file, or a
    /// folder of them), then `go`: the inputs are complete before `go` exists.
    async fn place_handoff(
        &mut self,
        root: &Path,
        number: u64,
        inputs: &[(String, String, PathBuf)],
    ) -> Result<()> {
        let dir = resident::handoff_dir(root, number);
        let mut places = Vec::new();
        let flushed = self.ledger.flush().await?;
        for (role, hash, _) in inputs {
            if role == crate::spec::CASE_FOLDER_ROLE {
                continue;
            }
            // A folder artifact is stored under a name ending with '/'.
            let folder = flushed.artifact_name(hash).await?.ends_with('/');
            places.push((hash.clone(), dir.join("in").join(role), folder));
        }
        let store = self.artifacts.clone();
        tokio::task::spawn_blocking(move || -> Result<()> {
            let inbox = dir.join("in");
            std::fs::create_dir_all(&inbox)
                .with_context(|| format!("{}: cannot create", inbox.display()))?;
            for (hash, dest, folder) in places {
                let placed = if folder {
                    store.place_folder(&hash, &dest, false)
                } else {
                    store.place(&hash, &dest, false)
                };
                placed.with_context(|| {
                    format!("cannot place artifact {hash} as {}", dest.display())
                })?;
            }
            std::fs::File::open(&inbox)
                .and_then(|d| d.sync_all())
                .with_context(|| format!("{}: cannot sync", inbox.display()))?;
            resident::publish(&dir, "go", b"")
                .with_context(|| format!("{}: cannot write go", dir.display()))
        })
        .await
        .context("internal: placing the hand-off's inputs panicked")?
    }

    /// A hand-off came back: a failed one ends its program (it may hold a half-done state).
    pub(super) async fn handoff_settled(&mut self, c: &Checked) {
        let Some(h) = self.handoffs.remove(&c.id()) else {
            return;
        };
        if !c.succeeded() {
            let why = "a hand-off failed, so its state may be half-way";
            if let Err(e) = self.end_resident((h.point, h.stage), false, why).await {
                tracing::warn!(%e, "could not record the end of a resident program");
            }
        }
    }

    /// End the resident program of a point and stage, if one runs (`ask`: by its `stop`
    /// file first); `why` goes into the `resident-ended` event.
    pub(super) async fn end_resident(
        &mut self,
        key: (usize, usize),
        ask: bool,
        why: &str,
    ) -> Result<()> {
        let Some(process) = self.residents.remove(&key) else {
            return Ok(());
        };
        let pid = process.pid;
        process.stop(ask, self.opts.grace).await;
        let point_id = self.points[key.0].spec.id.clone();
        let detail = format!(
            "process {pid} of stage `{}` ended: {why}",
            self.campaign.stages[key.1].name
        );
        self.event("resident-ended", Some(&point_id), None, None, &detail)
            .await
    }

    /// End the programs of points that stopped.
    pub(super) async fn end_idle_residents(&mut self) -> Result<()> {
        let idle: Vec<(usize, usize)> = self
            .residents
            .keys()
            .filter(|(p, _)| self.points[*p].phase == PointPhase::Done)
            .copied()
            .collect();
        for key in idle {
            self.end_resident(key, true, "its point stopped").await?;
        }
        Ok(())
    }

    /// rondo stops: hand-offs being awaited are recorded as stopped by rondo (they use up no
    /// retry), and every resident program is ended.
    pub(super) async fn stop_residents(&mut self, why: &str) -> Result<()> {
        let ids: Vec<i64> = self.handoffs.keys().copied().collect();
        for id in ids {
            if let Some(h) = self.handoffs.remove(&id) {
                h.task.abort();
            }
            self.storing.remove(&id);
            let fl = self.inflight.get(&id).cloned();
            let ended = Ended::Failed {
                kind: "cancelled".into(),
                message: why.to_string(),
                exit_status: None,
                started: None,
                ended: Some(Utc::now()),
                host: Some(self.host.clone()),
                free: true,
                state: AttemptState::Cancelled,
            };
            self.settle(id, fl.as_ref(), ended).await?;
        }
        let keys: Vec<(usize, usize)> = self.residents.keys().copied().collect();
        for key in keys {
            self.end_resident(key, true, why).await?;
        }
        Ok(())
    }
}

/// How many polls the exit marker of a program that is gone is waited for.
const MARKER_WAIT: u32 = 100;

/// A failed hand-off as its attempt records it.
fn handoff_failed(kind: &str, message: String, started: DateTime<Utc>, host: &str) -> Ended {
    Ended::Failed {
        kind: kind.to_string(),
        message,
        exit_status: None,
        started: Some(started),
        ended: Some(Utc::now()),
        host: Some(host.to_string()),
        free: false,
        state: AttemptState::Failed,
    }
}

/// The last lines the program wrote to its stderr (its keeper's `stderr.txt`).
fn program_stderr(root: &Path) -> String {
    settle::stderr_tail(root)
}

/// Await hand-off `number`'s `done` (or the program's end, or the limit), then check and
/// store its outputs on the blocking pool and hand the attempt back to the loop.
async fn await_done(a: Awaited) {
    let dir = resident::handoff_dir(&a.root, a.number);
    let deadline = a.limit.map(|l| tokio::time::Instant::now() + l);
    let fail = |kind: &str, message: String| handoff_failed(kind, message, a.started, &a.host);
    let done = loop {
        if let Ok(text) = std::fs::read_to_string(dir.join("done")) {
            if let Some(d) = resident::parse_done(&text) {
                break d;
            }
        }
        if let Some(mut why) = resident::gone(&a.root, a.pid) {
            // The keeper writes its exit marker, which says how the program ended, just
            // after the program's processes are gone: give it a moment.
            for _ in 0..MARKER_WAIT {
                if let Some(how) = resident::ended_how(&a.root) {
                    why = how;
                    break;
                }
                tokio::time::sleep(resident::POLL).await;
            }
            let message = format!(
                "{why} before it answered hand-off {}{}",
                a.number,
                program_stderr(&a.root)
            );
            let _ =
                a.tx.send(Checked::ended(a.id, fail("resident-died", message)));
            return;
        }
        if deadline.is_some_and(|d| tokio::time::Instant::now() >= d) {
            let secs = a.limit.map_or(0, |l| l.as_secs());
            let message = format!(
                "the resident program did not answer hand-off {} within its time limit of {secs} s",
                a.number
            );
            let _ = a.tx.send(Checked::ended(a.id, fail("timeout", message)));
            return;
        }
        tokio::time::sleep(resident::POLL).await;
    };
    let at = dir.join("done");
    let ended = match done {
        Err(e) => Some(fail("malformed-output", format!("{}: {e}", at.display()))),
        Ok(d) => match &d.status {
            Status::Error(m) => Some(fail(
                "resident-error",
                format!("{}: error: {m}", at.display()),
            )),
            Status::Rejected(m) => Some(fail(
                "resident-error",
                format!("{}: rejected: {m}", at.display()),
            )),
            Status::Ok => match resident::read_ready(&a.root) {
                Ok(true) => {
                    let tx = a.tx.clone();
                    let (number, started, host) = (a.number, a.started, a.host.clone());
                    let job = a.job;
                    tokio::task::spawn_blocking(move || {
                        let checked = collect(job, &dir, number, &d, started, host);
                        let _ = tx.send(checked);
                    });
                    None
                }
                Ok(false) => Some(fail(
                    "malformed-output",
                    format!("{}: done written before ready", at.display()),
                )),
                Err(e) => Some(fail("malformed-output", e)),
            },
        },
    };
    if let Some(ended) = ended {
        let _ = a.tx.send(Checked::ended(a.id, ended));
    }
}

/// An `ok` hand-off: its `done` checked against its files, its `out/` moved into the
/// attempt's scratch folder, then the usual output checks and storing.
fn collect(
    job: OutputJob,
    dir: &Path,
    number: u64,
    done: &resident::Done,
    started: DateTime<Utc>,
    host: String,
) -> Checked {
    let ended = Some(Utc::now());
    let refuse = |message: String| Ended::Failed {
        kind: "refused-output".into(),
        message,
        exit_status: None,
        started: Some(started),
        ended,
        host: Some(host.clone()),
        free: false,
        state: AttemptState::Failed,
    };
    let files: Vec<&str> = job
        .stage
        .outputs
        .iter()
        .map(|(_, f)| f.as_str())
        .filter(|f| !f.ends_with('/') && !crate::artifacts::folder::is_glob(f))
        .collect();
    if let Err(m) = resident::check_done(done, number, dir, &files) {
        let at = dir.join("done");
        return Checked::ended(job.id, refuse(format!("{}: {m}", at.display())));
    }
    if let Err(e) = move_out(&dir.join("out"), &job.workdir) {
        return Checked::ended(job.id, refuse(e));
    }
    let ended = check_outputs(
        &job.stage,
        &job.workdir,
        None,
        Some(started),
        ended,
        Some(host),
    );
    job.store(ended)
}

/// Move every entry of a hand-off's `out/` into the attempt's scratch folder (one rename
/// each: the same file system), so the program can no longer reach what is stored.
fn move_out(out: &Path, workdir: &Path) -> Result<(), String> {
    let Ok(entries) = std::fs::read_dir(out) else {
        return Ok(());
    };
    for e in entries.flatten() {
        let dest = workdir.join(e.file_name());
        std::fs::rename(e.path(), &dest).map_err(|err| {
            format!(
                "{}: cannot move into {}: {err}",
                e.path().display(),
                dest.display()
            )
        })?;
    }
    Ok(())
}
