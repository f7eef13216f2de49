//! The keeper: a small process of rondo's own (the `rondo` binary started again with
//! [`KEEPER_ARG`]) that holds one local attempt's program, so that the program does not
//! depend on the orchestrator staying alive.
//!
//! The keeper starts the program in a process group of its own (the keeper is in another),
//! reads its stdout and stderr through pipes into the capped `stdout.txt` / `stderr.txt`
//! (see [`super::logs`]), waits for it with `wait4(2)` (which also gives its CPU time and
//! maximum RSS), ends what the program left behind in its group or tagged with the attempt's
//! variables, and writes the exit marker [`MARKER`] atomically (a temporary file and a
//! rename) as its last act. Since the keeper, not the orchestrator, holds the pipes, a
//! SIGKILL of the orchestrator does not end the program; the next orchestrator watches the
//! keeper again or adopts the result from the marker.
//!
//! The keeper's protocol with the orchestrator that starts it:
//! - its first stdout line is `pid N` once the program runs (N is also its process group),
//!   or `error MESSAGE` when the program cannot be started; then its stdout is closed;
//! - SIGTERM asks it to end the program: TERM to the group, the grace period, KILL;
//! - it enforces the time limit itself, so a limit holds while no orchestrator runs;
//! - in `follow` mode (a stage with `outlive-rondo: false`) it checks every
//!   [`PARENT_CHECK`] whether the orchestrator that started it is still its parent and ends
//!   the program when it is not.
//!
//! Its own environment carries [`KEEPER_VAR`] (the mode) besides the attempt's two
//! variables; the program's environment does not, which is how the keeper is told apart
//! from the attempt's other processes.
//!
//! CPU time and RSS are those `wait4` reports for the program: they include its
//! descendants only when they were waited for (a shell's children are; a daemon that
//! detached is not).

use std::ffi::OsString;
use std::fs::File;
use std::io::Write;
use std::path::Path;
use std::process::{ExitCode, Stdio};
use std::time::{Duration, Instant};

use chrono::{DateTime, Utc};
use serde::{Deserialize, Serialize};

use super::{sys, KeptLog};
use crate::executor::Usage;

/// First argument that turns the `rondo` binary into a keeper.
pub const KEEPER_ARG: &str = "__keep";

/// Variable in the keeper's own environment: its mode (`outlive` or `follow`).
pub const KEEPER_VAR: &str = "RONDO_KEEPER";

/// The exit marker a keeper writes into the attempt's directory as its last act.
pub const MARKER: &str = ".rondo-local-exit.json";

/// How often a `follow` keeper checks that its orchestrator is alive.
pub const PARENT_CHECK: Duration = Duration::from_millis(500);

/// What the marker records.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Marker {
    /// The attempt (its `RONDO_ATTEMPT_ID`).
    pub attempt: i64,
    /// The program's pid (and process group); 0 when it could not be started.
    pub pid: i32,
    /// Exit status, when it exited.
    pub code: Option<i32>,
    /// Signal that ended it, when one did.
    pub signal: Option<i32>,
    /// Why the keeper ended it, if it did: `time-limit`, `cancel` or `orchestrator-gone`.
    pub ended_by: Option<String>,
    /// Why it could not be started, if it could not.
    pub error: Option<String>,
    /// When it started and ended.
    pub started_at: DateTime<Utc>,
    /// When it ended.
    pub ended_at: DateTime<Utc>,
    /// What it cost.
    pub usage: Option<Usage>,
}

/// Read the marker in `workdir`, if one is there and well-formed.
pub fn read_marker(workdir: &Path) -> Option<Marker> {
    let text = std::fs::read(workdir.join(MARKER)).ok()?;
    serde_json::from_slice(&text).ok()
}

/// What the keeper was asked to do.
#[derive(Debug, Clone, PartialEq)]
pub struct Config {
    /// `true` for `outlive`, `false` for `follow`.
    pub outlive: bool,
    /// Grace period between TERM and KILL.
    pub grace: Duration,
    /// Time limit, if any.
    pub limit: Option<Duration>,
    /// Program and arguments.
    pub argv: Vec<OsString>,
}

impl Config {
    /// The keeper's arguments after [`KEEPER_ARG`].
    pub fn to_args(&self) -> Vec<OsString> {
        let mut a: Vec<OsString> = vec![
            "--grace-ms".into(),
            self.grace.as_millis().to_string().into(),
            "--limit-ms".into(),
            self.limit
                .map_or("-".to_string(), |l| l.as_millis().to_string())
                .into(),
            "--mode".into(),
            if self.outlive { "outlive" } else { "follow" }.into(),
            "--".into(),
        ];
        a.extend(self.argv.iter().cloned());
        a
    }

    /// Parse the arguments written by [`Config::to_args`].
    pub fn from_args(args: &[OsString]) -> Result<Config, String> {
        let mut grace = None;
        let mut limit = None;
        let mut outlive = None;
        let mut it = args.iter();
        while let Some(a) = it.next() {
            let a = a.to_string_lossy();
            if a == "--" {
                break;
            }
            let v = it
                .next()
                .map(|v| v.to_string_lossy().into_owned())
                .ok_or_else(|| format!("keeper: {a} needs a value"))?;
            let ms = |v: &str| {
                v.parse::<u64>()
                    .map(Duration::from_millis)
                    .map_err(|e| format!("keeper: {a} {v}: {e}"))
            };
            match a.as_ref() {
                "--grace-ms" => grace = Some(ms(&v)?),
                "--limit-ms" if v == "-" => limit = None,
                "--limit-ms" => limit = Some(ms(&v)?),
                "--mode" => outlive = Some(v == "outlive"),
                _ => return Err(format!("keeper: unknown argument {a}")),
            }
        }
        let argv: Vec<OsString> = it.cloned().collect();
        if argv.is_empty() {
            return Err("keeper: no program given".into());
        }
        Ok(Config {
            outlive: outlive.ok_or("keeper: --mode missing")?,
            grace: grace.ok_or("keeper: --grace-ms missing")?,
            limit,
            argv,
        })
    }
}

/// The keeper's `main`, when this process was started as one (first argument
/// [`KEEPER_ARG`] and [`KEEPER_VAR`] set); `None` otherwise. Call it first thing in the
/// binary's `main`.
pub fn run_if_asked() -> Option<ExitCode> {
    let args: Vec<OsString> = std::env::args_os().skip(1).collect();
    if args.first().map(|a| a.as_os_str()) != Some(KEEPER_ARG.as_ref())
        || std::env::var_os(KEEPER_VAR).is_none()
    {
        return None;
    }
    let cfg = match Config::from_args(&args[1..]) {
        Ok(c) => c,
        Err(e) => {
            println!("error {e}");
            return Some(ExitCode::from(2));
        }
    };
    let rt = match tokio::runtime::Builder::new_current_thread()
        .enable_all()
        .build()
    {
        Ok(rt) => rt,
        Err(e) => {
            println!("error keeper: cannot start its runtime: {e}");
            return Some(ExitCode::from(2));
        }
    };
    Some(rt.block_on(keep(cfg)))
}

/// The program as it was started.
struct Started {
    child: std::process::Child,
    pid: i32,
    started_at: DateTime<Utc>,
    clock: Instant,
}

fn start(cfg: &Config) -> Result<Started, String> {
    let (program, args) = cfg.argv.split_first().ok_or("no program given")?;
    let mut cmd = std::process::Command::new(program);
    use std::os::unix::process::CommandExt;
    cmd.args(args)
        .stdin(Stdio::null())
        .stdout(Stdio::piped())
        .stderr(Stdio::piped())
        .env_remove(KEEPER_VAR)
        .process_group(0);
    let started_at = Utc::now();
    let clock = Instant::now();
    let child = cmd.spawn().map_err(|e| {
        let here = std::env::current_dir().unwrap_or_default();
        format!(
            "cannot start program `{}` in {}: {e}",
            program.to_string_lossy(),
            here.display()
        )
    })?;
    let pid = child.id() as i32;
    Ok(Started {
        child,
        pid,
        started_at,
        clock,
    })
}

/// Tell the orchestrator one line, then close stdout so that no later write can hit a
/// dead reader.
fn tell(line: &str) {
    let mut out = std::io::stdout();
    let _ = writeln!(out, "{line}");
    let _ = out.flush();
    if let Ok(null) = File::options().write(true).open("/dev/null") {
        use std::os::fd::AsRawFd;
        // SAFETY: dup2(2) on two open descriptors; fd 1 is replaced by /dev/null.
        unsafe { libc::dup2(null.as_raw_fd(), 1) };
    }
}

/// `wait4` on the program: its wait status and what it used.
fn wait4(pid: i32) -> (Option<i32>, Usage) {
    let mut status: libc::c_int = 0;
    // SAFETY: an all-zero rusage is a valid value of this plain C struct.
    let mut ru: libc::rusage = unsafe { std::mem::zeroed() };
    loop {
        // SAFETY: wait4(2) writes only into the two out-parameters we own; pid > 0 is our
        // own child, which nobody else waits for.
        let rc = unsafe { libc::wait4(pid, &mut status, 0, &mut ru) };
        if rc == pid {
            return (Some(status), usage_of(&ru));
        }
        if rc < 0 && std::io::Error::last_os_error().raw_os_error() == Some(libc::EINTR) {
            continue;
        }
        return (None, usage_of(&ru));
    }
}

fn usage_of(ru: &libc::rusage) -> Usage {
    let secs = |t: libc::timeval| t.tv_sec as f64 + t.tv_usec as f64 * 1e-6;
    Usage {
        user_s: secs(ru.ru_utime),
        system_s: secs(ru.ru_stime),
        // Linux reports ru_maxrss in KiB (getrusage(2)).
        max_rss_kib: Some(ru.ru_maxrss.max(0) as u64),
        wall_s: None,
        source: "wait4".to_string(),
    }
}

/// Why the program is to be ended, if it is.
async fn reason_to_end(
    cfg: &Config,
    parent: i32,
    term: Option<&mut tokio::signal::unix::Signal>,
) -> &'static str {
    let limit = async {
        match cfg.limit {
            Some(d) => tokio::time::sleep(d).await,
            None => std::future::pending().await,
        }
    };
    let orphaned = async {
        if cfg.outlive {
            return std::future::pending().await;
        }
        loop {
            tokio::time::sleep(PARENT_CHECK).await;
            // SAFETY: getppid(2) has no preconditions and cannot fail.
            if unsafe { libc::getppid() } != parent {
                return;
            }
        }
    };
    let term = async {
        match term {
            Some(s) => {
                s.recv().await;
            }
            None => std::future::pending().await,
        }
    };
    tokio::select! {
        () = limit => "time-limit",
        () = orphaned => "orchestrator-gone",
        () = term => "cancel",
    }
}

async fn keep(cfg: Config) -> ExitCode {
    // SAFETY: getppid(2) has no preconditions and cannot fail.
    let parent = unsafe { libc::getppid() };
    // Before anything else: a SIGTERM from here on is a request, not the end of the keeper.
    let mut term = tokio::signal::unix::signal(tokio::signal::unix::SignalKind::terminate()).ok();
    let workdir = std::env::current_dir().unwrap_or_default();
    let attempt: i64 = std::env::var(super::ATTEMPT_VAR)
        .ok()
        .and_then(|v| v.parse().ok())
        .unwrap_or(-1);
    let _ = std::fs::remove_file(workdir.join(MARKER));
    let files = (File::create("stdout.txt"), File::create("stderr.txt"));
    let (Ok(out_file), Ok(err_file)) = files else {
        tell(&format!(
            "error cannot create the logs in {}",
            workdir.display()
        ));
        return ExitCode::from(2);
    };
    let mut st = match start(&cfg) {
        Ok(s) => s,
        Err(e) => {
            let now = Utc::now();
            write_marker(
                &workdir,
                &Marker {
                    attempt,
                    pid: 0,
                    code: None,
                    signal: None,
                    ended_by: None,
                    error: Some(e.clone()),
                    started_at: now,
                    ended_at: now,
                    usage: None,
                },
            );
            tell(&format!("error {}", e.replace('\n', " ")));
            return ExitCode::from(2);
        }
    };
    tell(&format!("pid {}", st.pid));
    let pipes = (st.child.stdout.take(), st.child.stderr.take());
    let logs: Vec<KeptLog> = [
        KeptLog::start(
            pipes
                .0
                .and_then(|p| tokio::process::ChildStdout::from_std(p).ok()),
            out_file,
        ),
        KeptLog::start(
            pipes
                .1
                .and_then(|p| tokio::process::ChildStderr::from_std(p).ok()),
            err_file,
        ),
    ]
    .into_iter()
    .flatten()
    .collect();
    let pid = st.pid;
    let mut waiter = tokio::task::spawn_blocking(move || wait4(pid));
    let (waited, ended_by, deadline) = tokio::select! {
        w = &mut waiter => (w.ok(), None, None),
        why = reason_to_end(&cfg, parent, term.as_mut()) => {
            let _ = sys::signal_group(pid, libc::SIGTERM);
            let deadline = tokio::time::Instant::now() + cfg.grace;
            let w = match tokio::time::timeout_at(deadline, &mut waiter).await {
                Ok(w) => w.ok(),
                Err(_) => {
                    let _ = sys::signal_group(pid, libc::SIGKILL);
                    waiter.await.ok()
                }
            };
            (w, Some(why), Some(deadline))
        }
    };
    let wall = st.clock.elapsed().as_secs_f64();
    let ws = std::env::var(super::WORKSPACE_VAR).unwrap_or_default();
    let grace = deadline.map_or(cfg.grace, |d| {
        d.saturating_duration_since(tokio::time::Instant::now())
    });
    super::end_leftovers(&ws, attempt, pid, ended_by.is_some(), grace).await;
    for log in logs {
        log.finish(attempt).await;
    }
    let (status, usage) = match waited {
        Some((status, mut usage)) => {
            usage.wall_s = Some(wall);
            (status, Some(usage))
        }
        None => (None, None),
    };
    let marker = Marker {
        attempt,
        pid,
        code: status
            .filter(|s| libc::WIFEXITED(*s))
            .map(|s| libc::WEXITSTATUS(s)),
        signal: status
            .filter(|s| libc::WIFSIGNALED(*s))
            .map(|s| libc::WTERMSIG(s)),
        ended_by: ended_by.map(str::to_string),
        error: status
            .is_none()
            .then(|| "waiting for the program failed".to_string()),
        started_at: st.started_at,
        ended_at: Utc::now(),
        usage,
    };
    write_marker(&workdir, &marker);
    ExitCode::SUCCESS
}

/// Write the marker through a temporary file and a rename, so that a reader sees the whole
/// marker or none. Not fsynced: it only has to outlive the orchestrator, not the machine;
/// after a machine crash a marker that lost its content does not parse and counts as none
/// (the attempt runs again, as its program died with the machine anyway).
fn write_marker(workdir: &Path, marker: &Marker) {
    let tmp = workdir.join(format!("{MARKER}.tmp"));
    let write = || -> std::io::Result<()> {
        let text = serde_json::to_vec(marker).map_err(std::io::Error::other)?;
        std::fs::write(&tmp, text)?;
        std::fs::rename(&tmp, workdir.join(MARKER))
    };
    if let Err(e) = write() {
        eprintln!(
            "keeper: cannot write {}: {e}",
            workdir.join(MARKER).display()
        );
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn config_round_trips_through_arguments() {
        for (outlive, limit) in [(true, None), (false, Some(Duration::from_millis(1500)))] {
            let cfg = Config {
                outlive,
                grace: Duration::from_millis(250),
                limit,
                argv: vec!["sh".into(), "-c".into(), "echo --mode".into()],
            };
            assert_eq!(Config::from_args(&cfg.to_args()), Ok(cfg));
        }
        assert!(Config::from_args(&["--mode".into()]).is_err());
        assert!(Config::from_args(&["--".into()]).is_err());
    }
}
