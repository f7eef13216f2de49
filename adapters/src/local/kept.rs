//! The orchestrator's side of kept attempts (see [`super::keeper`]): starting an attempt's
//! keeper, waiting for it, watching one that an earlier orchestrator started, and turning
//! its exit marker into a [`Completion`].
//!
//! The keeper is this process's own binary (`/proc/self/exe`, so a binary replaced on disk
//! during a run still starts the same keeper) when the binary called
//! [`use_this_binary`]; else attempts run as plain children (see the module docs of
//! [`super`]) and end with the orchestrator.

use std::ffi::OsString;
use std::path::PathBuf;
use std::sync::OnceLock;

use tokio::io::{AsyncBufReadExt, BufReader};

use super::keeper::{self, Config, Marker, KEEPER_ARG, KEEPER_VAR, MARKER};
use super::*;

/// Why an attempt of a stage with `outlive-rondo: false` is run again.
const ENDED_WITH_RONDO: &str = "ended with the orchestrator that started it (outlive-rondo: false)";

/// How often the keeper of an attempt started by an earlier orchestrator is looked at.
const WATCH: Duration = Duration::from_millis(200);

/// How long a keeper may take to report that its program started.
const REPORT: Duration = Duration::from_secs(60);

/// The program started as keeper, and its first arguments.
#[derive(Debug, Clone)]
pub struct KeeperProgram {
    program: PathBuf,
    args: Vec<OsString>,
}

static KEEPER: OnceLock<KeeperProgram> = OnceLock::new();

/// Make this binary the keeper of every local attempt started from now on. The binary's
/// `main` must call [`keeper::run_if_asked`] first thing.
pub fn use_this_binary() {
    let _ = KEEPER.set(KeeperProgram {
        program: PathBuf::from("/proc/self/exe"),
        args: vec![KEEPER_ARG.into()],
    });
}

/// The keeper set by [`use_this_binary`], if any.
pub(super) fn keeper_program() -> Option<KeeperProgram> {
    KEEPER.get().cloned()
}

/// A command that starts a keeper for a program that is no attempt of an executor (a
/// resident program of the orchestrator): `None` unless [`use_this_binary`] was called. The
/// keeper's mode variable is set; the caller adds the folder, the workspace and attempt tags
/// and a process group, and reads the keeper's first stdout line (`pid N` or `error M`).
pub fn keeper_command(cfg: &Config) -> Option<Command> {
    let kp = keeper_program()?;
    let mut cmd = Command::new(&kp.program);
    cmd.args(&kp.args)
        .args(cfg.to_args())
        .env(KEEPER_VAR, if cfg.outlive { "outlive" } else { "follow" });
    Some(cmd)
}

/// A keeper started by this orchestrator, and what its supervising task needs.
struct KeptRun {
    keeper: Child,
    keeper_pid: i32,
    pgid: i32,
    attempt_id: i64,
    workdir: PathBuf,
    grace: Duration,
    stop: mpsc::UnboundedReceiver<Stop>,
    shared: Arc<Shared>,
    _permit: Option<OwnedSemaphorePermit>,
}

/// The longest a keeper may take to end its program after SIGTERM before it is killed
/// together with the program's processes.
fn keeper_deadline(grace: Duration) -> Duration {
    grace + AFTER_KILL + LOG_DRAIN + Duration::from_secs(5)
}

impl LocalExecutor {
    /// Start `req` under a keeper (the slot is held in `permit`).
    pub(super) async fn launch_kept(
        &self,
        kp: &KeeperProgram,
        req: LaunchRequest,
        permit: OwnedSemaphorePermit,
    ) -> Result<Handle, ExecError> {
        let cfg = Config {
            outlive: req.outlive,
            grace: self.grace,
            limit: req.time_limit,
            argv: req.argv.iter().map(OsString::from).collect(),
        };
        let _ = std::fs::remove_file(req.workdir.join(MARKER));
        let mut env: BTreeMap<String, String> = req.env.clone();
        env.insert(WORKSPACE_VAR.to_string(), self.shared.workspace_id.clone());
        env.insert(ATTEMPT_VAR.to_string(), req.attempt_id.to_string());
        let mode = if req.outlive { "outlive" } else { "follow" };
        env.insert(KEEPER_VAR.to_string(), mode.to_string());
        let mut cmd = Command::new(&kp.program);
        cmd.args(&kp.args)
            .args(cfg.to_args())
            .current_dir(&req.workdir)
            .stdin(Stdio::null())
            .stdout(Stdio::piped())
            .stderr(Stdio::null())
            .envs(&env)
            .process_group(0)
            .kill_on_drop(false);
        let mut child = match cmd.spawn() {
            Ok(c) => c,
            Err(err) => {
                let message = format!("cannot start the keeper {}: {err}", kp.program.display());
                return Ok(self.launch_failed(req.attempt_id, message));
            }
        };
        let keeper_pid = child.id().map_or(0, |p| p as i32);
        let line = read_report(&mut child).await;
        let pgid = match line.as_deref().and_then(|l| l.strip_prefix("pid ")) {
            Some(pid) => pid.trim().parse::<i32>().unwrap_or(0),
            None => {
                let _ = child.wait().await;
                let message = match line {
                    Some(l) => l.strip_prefix("error ").unwrap_or(&l).to_string(),
                    None => "the keeper ended before it started the program".to_string(),
                };
                return Ok(self.launch_failed(req.attempt_id, message));
            }
        };
        let refused = {
            let mut running = self.shared.running();
            if self.closed.load(Ordering::SeqCst) || running.contains_key(&req.attempt_id) {
                Some(child)
            } else {
                let (stop_tx, stop_rx) = mpsc::unbounded_channel();
                let task = tokio::spawn(supervise_kept(KeptRun {
                    keeper: child,
                    keeper_pid,
                    pgid,
                    attempt_id: req.attempt_id,
                    workdir: req.workdir.clone(),
                    grace: self.grace,
                    stop: stop_rx,
                    shared: Arc::clone(&self.shared),
                    _permit: Some(permit),
                }));
                running.insert(
                    req.attempt_id,
                    Running {
                        stop: stop_tx,
                        task,
                    },
                );
                None
            }
        };
        if let Some(mut child) = refused {
            let _ = sys::signal_process(keeper_pid, libc::SIGTERM);
            let _ = child.wait().await;
            return Err(ExecError::Unavailable {
                what: format!("launch attempt {}", req.attempt_id),
                message: "the local executor is shutting down".to_string(),
            });
        }
        Ok(Handle {
            executor: "local".to_string(),
            id: pgid.to_string(),
            host: self.shared.host.clone(),
        })
    }

    /// Reattach to a kept attempt of an earlier orchestrator, if it has a keeper alive or
    /// left a marker; `None` when neither (the caller then ends what is left, as for a
    /// plain child).
    pub(super) async fn reattach_kept(
        &self,
        attempt_id: i64,
        handle: &Handle,
        workdir: &Path,
    ) -> Option<Reattached> {
        let ws = &self.shared.workspace_id;
        if let Some((keeper_pid, mode)) = sys::keeper_of(ws, attempt_id) {
            if mode != "outlive" {
                // `outlive-rondo: false`: it ends with the orchestrator that started it. A
                // program that ended by itself before still counts.
                terminate_attempt(ws, attempt_id, handle.id.parse().ok(), self.grace).await;
                return Some(match self.marker_of(attempt_id, workdir) {
                    Some(m) if m.ended_by.is_none() => {
                        Reattached::Finished(completion_of(&m, &self.shared.host, false))
                    }
                    _ => Reattached::Gone {
                        reason: ENDED_WITH_RONDO.to_string(),
                    },
                });
            }
            // The program leads its own group; the recorded handle names it, or (a launch
            // not recorded yet) the live group leader among the attempt's processes.
            let pgid = handle
                .id
                .parse::<i32>()
                .ok()
                .or_else(|| {
                    sys::attempt_processes(ws, attempt_id)
                        .into_iter()
                        .find(|p| p.keeper.is_none() && p.pid == p.pgrp)
                        .map(|p| p.pgrp)
                })
                .unwrap_or(0);
            self.watch(attempt_id, keeper_pid, pgid, workdir.to_path_buf());
            return Some(if handle.id.is_empty() {
                Reattached::Found(Handle {
                    executor: "local".to_string(),
                    id: pgid.to_string(),
                    host: self.shared.host.clone(),
                })
            } else {
                Reattached::Active
            });
        }
        let m = self.marker_of(attempt_id, workdir)?;
        Some(if m.ended_by.as_deref() == Some("orchestrator-gone") {
            Reattached::Gone {
                reason: ENDED_WITH_RONDO.to_string(),
            }
        } else {
            Reattached::Finished(completion_of(&m, &self.shared.host, false))
        })
    }

    /// The attempt's exit marker in `workdir`, if its keeper left one.
    fn marker_of(&self, attempt_id: i64, workdir: &Path) -> Option<Marker> {
        keeper::read_marker(workdir).filter(|m| m.attempt == attempt_id)
    }

    /// Watch a live keeper this orchestrator did not start, until it is gone.
    fn watch(&self, attempt_id: i64, keeper_pid: i32, pgid: i32, workdir: PathBuf) {
        let permit = Arc::clone(&self.semaphore).try_acquire_owned().ok();
        let (stop_tx, mut stop) = mpsc::unbounded_channel::<Stop>();
        let shared = Arc::clone(&self.shared);
        let grace = self.grace;
        let mut running = self.shared.running();
        let task = tokio::spawn(async move {
            let _permit = permit;
            let ws = shared.workspace_id.clone();
            let mut asked: Option<Instant> = None;
            let mut stop_open = true;
            while sys::is_keeper(keeper_pid, &ws, attempt_id) {
                if asked.is_some_and(|at| at.elapsed() > keeper_deadline(grace)) {
                    let _ = sys::signal_process(keeper_pid, libc::SIGKILL);
                }
                tokio::select! {
                    () = tokio::time::sleep(WATCH) => {}
                    s = stop.recv(), if stop_open => match s {
                        Some(_) if asked.is_none() => {
                            let _ = sys::signal_process(keeper_pid, libc::SIGTERM);
                            asked = Some(Instant::now());
                        }
                        Some(_) => {}
                        None => stop_open = false,
                    },
                }
            }
            finish_kept(&shared, attempt_id, pgid, &workdir, grace, asked.is_some()).await;
        });
        running.insert(
            attempt_id,
            Running {
                stop: stop_tx,
                task,
            },
        );
    }
}

/// The keeper's first line on stdout, if it wrote one within [`REPORT`].
async fn read_report(child: &mut Child) -> Option<String> {
    let out = child.stdout.take()?;
    let mut line = String::new();
    let mut reader = BufReader::new(out);
    match tokio::time::timeout(REPORT, reader.read_line(&mut line)).await {
        Ok(Ok(n)) if n > 0 => Some(line.trim_end().to_string()),
        _ => None,
    }
}

/// Wait for our own keeper (asking it to end the program on a stop), then report.
async fn supervise_kept(mut k: KeptRun) {
    let mut asked = false;
    let mut stop_open = true;
    loop {
        tokio::select! {
            _ = k.keeper.wait() => break,
            s = k.stop.recv(), if stop_open => match s {
                Some(_) => {
                    asked = true;
                    let _ = sys::signal_process(k.keeper_pid, libc::SIGTERM);
                    let limit = keeper_deadline(k.grace);
                    if tokio::time::timeout(limit, k.keeper.wait()).await.is_err() {
                        tracing::warn!(attempt_id = k.attempt_id, "the keeper did not end the \
                            program within {limit:?}; killing it");
                        let _ = k.keeper.start_kill();
                        let _ = k.keeper.wait().await;
                    }
                    break;
                }
                None => stop_open = false,
            },
        }
    }
    finish_kept(&k.shared, k.attempt_id, k.pgid, &k.workdir, k.grace, asked).await;
}

/// The keeper is gone: send the completion its marker gives, or, without a marker, end
/// what is left of the attempt and send it as lost.
async fn finish_kept(
    shared: &Shared,
    attempt_id: i64,
    pgid: i32,
    workdir: &Path,
    grace: Duration,
    asked: bool,
) {
    let marker = keeper::read_marker(workdir).filter(|m| m.attempt == attempt_id);
    let completion = match marker {
        Some(m) => completion_of(&m, &shared.host, asked),
        None => {
            terminate_attempt(&shared.workspace_id, attempt_id, Some(pgid), grace).await;
            Completion {
                attempt_id,
                outcome: Outcome::Lost {
                    reason: "its keeper process ended without writing the exit marker".to_string(),
                },
                started_at: None,
                ended_at: Some(Utc::now()),
                host: Some(shared.host.clone()),
                usage: None,
            }
        }
    };
    shared.running().remove(&attempt_id);
    let _ = shared.completions.send(completion);
}

/// A marker as a completion; `asked`: this orchestrator asked the keeper to end it.
fn completion_of(m: &Marker, host: &str, asked: bool) -> Completion {
    let outcome = match (m.ended_by.as_deref(), m.code, m.signal, &m.error) {
        (Some("time-limit"), ..) => Outcome::TimedOut,
        (Some("cancel"), ..) => Outcome::Cancelled {
            by: if asked {
                "rondo".to_string()
            } else {
                "a SIGTERM to its keeper".to_string()
            },
        },
        (Some("orchestrator-gone"), ..) => Outcome::Lost {
            reason: "ended when its orchestrator was gone (outlive-rondo: false)".to_string(),
        },
        (_, Some(code), ..) => Outcome::Exited { code },
        (_, None, Some(signal), _) => Outcome::Signaled { signal },
        (_, None, None, Some(e)) if m.pid == 0 => Outcome::LaunchFailed { message: e.clone() },
        (_, None, None, e) => Outcome::Lost {
            reason: e
                .clone()
                .unwrap_or_else(|| "no exit status recorded".to_string()),
        },
    };
    Completion {
        attempt_id: m.attempt,
        outcome,
        started_at: (m.pid != 0).then_some(m.started_at),
        ended_at: Some(m.ended_at),
        host: Some(host.to_string()),
        usage: m.usage.clone(),
    }
}
