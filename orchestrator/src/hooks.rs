//! Hooks: the programs a campaign names under `hooks:`, run when a point fails, converges or
//! is capped, when a run ends with every point stopped, and when the workspace's file system
//! runs low. Each gets a JSON description of the event on stdin (docs/campaign-file.md,
//! "Hooks") and the `RONDO_HOOK_*` environment variables.
//!
//! Owns the queue of events, the hook processes (tokio child processes in their own process
//! group, each with a time limit) and the free-space watch. A hook never stops or slows the
//! campaign: it runs as a task beside the engine's loop, never inside a store transaction;
//! a hook that fails, hangs past its limit (its process group is killed) or cannot be started
//! is written down as a `hook-failed` event at the next tick.
//!
//! The engine calls [`Hooks::point_stopped`] where a verdict is applied or a point fails,
//! [`Hooks::tick`] at its tick and [`Hooks::finish`] at the end of a run; the store is
//! touched only through the engine's ledger (flushed first, so an event's records are
//! committed before its hook runs). Knows no executor and no SQL.

use std::path::{Path, PathBuf};
use std::process::Stdio;
use std::time::{Duration, Instant};

use anyhow::Result;
use serde_json::{json, Map, Value};
use tokio::io::{AsyncReadExt, AsyncWriteExt};
use tokio::task::JoinSet;

use crate::spec::{Campaign, PointSpec};
use crate::store::{self, reads, PointState};

/// How often the free space of the workspace's file system is looked at.
pub const DISK_CHECK_EVERY: Duration = Duration::from_secs(30);

/// Most bytes of a failed hook's stderr kept in its `hook-failed` event.
const STDERR_KEPT: usize = 2000;

/// A point's stop, waiting for the next tick (its records may still be held back).
#[derive(Debug, Clone)]
struct Pending {
    event: &'static str,
    point: String,
    values: Value,
    iteration: u32,
    reason: String,
}

/// A hook that did not end well.
#[derive(Debug, Clone)]
struct Failure {
    event: String,
    point: Option<String>,
    reason: String,
}

/// The hooks of one run.
pub struct Hooks {
    spec: crate::spec::Hooks,
    campaign: String,
    workspace: PathBuf,
    pending: Vec<Pending>,
    running: JoinSet<Option<Failure>>,
    last_disk_check: Option<Instant>,
    disk_low: bool,
}

impl Hooks {
    /// The hooks of `campaign` run on workspace `workspace`.
    pub fn new(campaign: &Campaign, workspace: &Path) -> Hooks {
        Hooks {
            spec: campaign.hooks.clone(),
            campaign: campaign.name.clone(),
            workspace: workspace.to_path_buf(),
            pending: Vec::new(),
            running: JoinSet::new(),
            last_disk_check: None,
            disk_low: false,
        }
    }

    /// A point stopped in `state` at `iteration` because of `reason`: its hook (if any) runs
    /// at the next tick, once the stop is committed.
    pub fn point_stopped(
        &mut self,
        point: &PointSpec,
        state: PointState,
        iteration: u32,
        reason: &str,
    ) {
        let event = match state {
            PointState::Failed => "point-failed",
            PointState::Converged => "point-converged",
            PointState::Capped => "point-capped",
            _ => return,
        };
        if !self.spec.commands.contains_key(event) {
            return;
        }
        self.pending.push(Pending {
            event,
            point: point.id.clone(),
            values: crate::engine::values_json(point),
            iteration,
            reason: reason.to_string(),
        });
    }

    /// At the engine's tick: start the hooks of points that stopped, look at the free space
    /// (every [`DISK_CHECK_EVERY`]), and write down hooks that failed.
    pub async fn tick(&mut self, ledger: &mut store::Ledger) -> Result<()> {
        if self.spec.commands.is_empty() {
            return Ok(());
        }
        self.start_pending(ledger).await?;
        self.watch_disk();
        let mut failures = Vec::new();
        while let Some(done) = self.running.try_join_next() {
            failures.extend(joined(done));
        }
        record(ledger, &failures).await
    }

    /// At the end of a run: start what is pending and, when every point stopped
    /// (`counts` of the points per state), `campaign-done`; then wait for every hook (each
    /// within its time limit) and write down those that failed.
    pub async fn finish(
        &mut self,
        ledger: &mut store::Ledger,
        counts: Option<&std::collections::BTreeMap<&'static str, usize>>,
    ) -> Result<()> {
        if self.spec.commands.is_empty() {
            return Ok(());
        }
        self.start_pending(ledger).await?;
        if let Some(counts) = counts {
            let mut doc = self.base("campaign-done");
            doc.insert("counts".into(), json!(counts));
            self.start("campaign-done", None, doc);
        }
        let mut failures = Vec::new();
        while let Some(done) = self.running.join_next().await {
            failures.extend(joined(done));
        }
        record(ledger, &failures).await
    }

    /// Start the hooks of the points that stopped, after committing their records.
    async fn start_pending(&mut self, ledger: &mut store::Ledger) -> Result<()> {
        if self.pending.is_empty() {
            return Ok(());
        }
        let pending = std::mem::take(&mut self.pending);
        let store = ledger.flush().await?;
        for p in pending {
            let mut doc = self.base(p.event);
            doc.insert("point".into(), json!({ "id": p.point, "values": p.values }));
            doc.insert("iteration".into(), json!(p.iteration));
            doc.insert("reason".into(), json!(p.reason));
            if p.event == "point-converged" {
                match final_values(store.pool(), &p.point).await {
                    Ok(finals) => doc.insert("final".into(), Value::Object(finals)),
                    Err(e) => doc.insert("final_error".into(), json!(format!("{e:#}"))),
                };
            }
            self.start(p.event, Some(p.point), doc);
        }
        Ok(())
    }

    /// `disk-low` once per crossing of the threshold.
    fn watch_disk(&mut self) {
        if !self.spec.commands.contains_key("disk-low")
            || self
                .last_disk_check
                .is_some_and(|t| t.elapsed() < DISK_CHECK_EVERY)
        {
            return;
        }
        self.last_disk_check = Some(Instant::now());
        let Ok((free, total)) = free_space(&self.workspace) else {
            return;
        };
        let low = self.spec.disk_free_below.is_low(free, total);
        if crossed(&mut self.disk_low, low) {
            let mut doc = self.base("disk-low");
            doc.insert("free_bytes".into(), json!(free));
            doc.insert("total_bytes".into(), json!(total));
            doc.insert(
                "reason".into(),
                json!(format!(
                    "{} bytes free of {} on the workspace's file system",
                    free, total
                )),
            );
            self.start("disk-low", None, doc);
        }
    }

    /// What every event document holds.
    fn base(&self, event: &str) -> Map<String, Value> {
        let mut m = Map::new();
        m.insert("event".into(), json!(event));
        m.insert("campaign".into(), json!(self.campaign));
        m.insert(
            "workspace".into(),
            json!(self.workspace.display().to_string()),
        );
        m.insert("time".into(), json!(store::now()));
        m
    }

    /// Start the hook of `event` as a task.
    fn start(&mut self, event: &str, point: Option<String>, doc: Map<String, Value>) {
        let Some(argv) = self.spec.commands.get(event).cloned() else {
            return;
        };
        let call = Call {
            argv,
            event: event.to_string(),
            point,
            stdin: format!("{}\n", Value::Object(doc)),
            campaign: self.campaign.clone(),
            workspace: self.workspace.clone(),
            limit: self.spec.time_limit,
        };
        self.running.spawn(call.run());
    }
}

/// Whether the free space just fell below the threshold (`low` now, not at the last look);
/// remembers `low` in `was_low`, so the event fires once per crossing.
fn crossed(was_low: &mut bool, low: bool) -> bool {
    let fire = low && !*was_low;
    *was_low = low;
    fire
}

/// The final values of every metric of a point's last good iteration.
async fn final_values(pool: &sqlx::SqlitePool, point: &str) -> Result<Map<String, Value>> {
    let mut out = Map::new();
    let Some(last) = reads::points::last_good_iteration(pool, point).await? else {
        return Ok(out);
    };
    for name in reads::metrics::names_at(pool, point, last).await? {
        if let Some(f) = crate::query::analysis::final_value(pool, point, &name).await? {
            out.insert(
                name,
                json!({ "value": f.value, "error": f.error, "how": f.how, "iterations": f.iterations }),
            );
        }
    }
    Ok(out)
}

/// A finished task's failure, if any (a task that panicked is a failure too).
fn joined(done: Result<Option<Failure>, tokio::task::JoinError>) -> Option<Failure> {
    match done {
        Ok(f) => f,
        Err(e) => Some(Failure {
            event: "unknown".into(),
            point: None,
            reason: format!("the hook's task ended: {e}"),
        }),
    }
}

/// Write each failure down as a `hook-failed` event.
async fn record(ledger: &mut store::Ledger, failures: &[Failure]) -> Result<()> {
    if failures.is_empty() {
        return Ok(());
    }
    for f in failures {
        tracing::warn!("hook {} failed: {}", f.event, f.reason);
    }
    ledger
        .write(crate::failpoint::Failpoint::HookFailed, |s| {
            for f in failures {
                let detail = json!({ "hook": f.event, "reason": f.reason }).to_string();
                s.event("hook-failed", f.point.as_deref(), None, None, &detail);
            }
        })
        .await
}

/// One hook call.
struct Call {
    argv: Vec<String>,
    event: String,
    point: Option<String>,
    stdin: String,
    campaign: String,
    workspace: PathBuf,
    limit: Duration,
}

impl Call {
    /// Run the hook to its end or its time limit; `Some` when it did not end well.
    async fn run(self) -> Option<Failure> {
        let reason = self.outcome().await.err()?;
        Some(Failure {
            event: self.event,
            point: self.point,
            reason,
        })
    }

    async fn outcome(&self) -> Result<(), String> {
        let mut cmd = tokio::process::Command::new(&self.argv[0]);
        cmd.args(&self.argv[1..])
            .stdin(Stdio::piped())
            .stdout(Stdio::null())
            .stderr(Stdio::piped())
            .env("RONDO_HOOK_EVENT", &self.event)
            .env("RONDO_HOOK_CAMPAIGN", &self.campaign)
            .env("RONDO_HOOK_WORKSPACE", &self.workspace)
            .env("RONDO_HOOK_POINT", self.point.as_deref().unwrap_or(""))
            .process_group(0)
            .kill_on_drop(true);
        let mut child = cmd
            .spawn()
            .map_err(|e| format!("cannot start {}: {e}", self.argv[0]))?;
        let pid = child.id();
        let mut stdin = child.stdin.take();
        let mut stderr = child.stderr.take();
        let talk = async {
            if let Some(mut w) = stdin.take() {
                // A hook that does not read its stdin is fine.
                let _ = w.write_all(self.stdin.as_bytes()).await;
            }
            let mut err = Vec::new();
            if let Some(r) = stderr.as_mut() {
                let _ = r.take(STDERR_KEPT as u64 * 4).read_to_end(&mut err).await;
                // The rest is read and dropped, so a talkative hook never blocks on a full pipe.
                let _ = tokio::io::copy(r, &mut tokio::io::sink()).await;
            }
            (child.wait().await, err)
        };
        match tokio::time::timeout(self.limit, talk).await {
            Ok((Ok(status), _)) if status.success() => Ok(()),
            Ok((Ok(status), err)) => Err(format!(
                "{} ended with {status}{}",
                self.argv[0],
                stderr_text(&err)
            )),
            Ok((Err(e), _)) => Err(format!("cannot wait for {}: {e}", self.argv[0])),
            Err(_) => {
                if let Some(pid) = pid {
                    // SAFETY: kill(2) on the hook's own process group (it was started as
                    // its leader); no memory is shared.
                    unsafe {
                        libc::kill(-(pid as i32), libc::SIGKILL);
                    }
                }
                let _ = child.wait().await;
                Err(format!(
                    "{} ran longer than its time limit of {} s and was killed",
                    self.argv[0],
                    self.limit.as_secs_f64()
                ))
            }
        }
    }
}

/// `: <last line of stderr>` when the hook said something.
fn stderr_text(err: &[u8]) -> String {
    let text = String::from_utf8_lossy(err);
    let text = text.trim();
    if text.is_empty() {
        return String::new();
    }
    let start = text.len().saturating_sub(STDERR_KEPT);
    let start = (start..text.len())
        .find(|i| text.is_char_boundary(*i))
        .unwrap_or(text.len());
    format!(": {}", &text[start..])
}

/// Free and total bytes of the file system holding `path` (for an unprivileged user).
pub fn free_space(path: &Path) -> std::io::Result<(u64, u64)> {
    use std::os::unix::ffi::OsStrExt;
    let c = std::ffi::CString::new(path.as_os_str().as_bytes())
        .map_err(|e| std::io::Error::new(std::io::ErrorKind::InvalidInput, e))?;
    // SAFETY: `c` is a valid NUL-terminated path; `buf` is a zeroed statvfs that the call
    // fills in; no pointer outlives the call.
    let mut buf: libc::statvfs = unsafe { std::mem::zeroed() };
    let r = unsafe { libc::statvfs(c.as_ptr(), &mut buf) };
    if r != 0 {
        return Err(std::io::Error::last_os_error());
    }
    #[allow(clippy::unnecessary_cast)]
    let frsize = buf.f_frsize as u64;
    #[allow(clippy::unnecessary_cast)]
    Ok((buf.f_bavail as u64 * frsize, buf.f_blocks as u64 * frsize))
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn the_free_space_of_the_current_folder_is_known() {
        let (free, total) = free_space(Path::new(".")).unwrap_or((u64::MAX, 0));
        assert!(free <= total, "{free} of {total}");
    }

    #[test]
    fn disk_low_fires_once_per_crossing() {
        let mut was = false;
        let fired: Vec<bool> = [true, true, false, false, true, true]
            .into_iter()
            .map(|low| crossed(&mut was, low))
            .collect();
        assert_eq!(fired, [true, false, false, false, true, false]);
    }

    #[test]
    fn a_long_stderr_keeps_its_end() {
        let long = "x".repeat(5000) + "the end";
        let t = stderr_text(long.as_bytes());
        assert!(t.ends_with("the end") && t.len() <= STDERR_KEPT + 2);
        assert_eq!(stderr_text(b"  \n"), "");
    }
}
