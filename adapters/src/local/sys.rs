//! Linux process plumbing for the local executor: the only place that reads `/proc` or
//! calls `kill(2)`/`killpg(2)`.
//!
//! Attempts are recognised by two environment variables every child inherits,
//! `RONDO_WORKSPACE_ID` and `RONDO_ATTEMPT_ID`, read from `/proc/<pid>/environ` (which
//! holds the environment the process was started with; see proc(5)). A process-group id
//! alone is never trusted after its leader is gone: ids are recycled, so a group is only
//! signalled when a live member of it carries our two variables, or while we still hold
//! its unreaped leader.
//!
//! `/proc/<pid>/environ` is readable only for processes of the same user (or with
//! `CAP_SYS_PTRACE`), which is exactly the set an orchestrator may signal anyway; others
//! are skipped silently.

use std::fs;
use std::io;

/// Environment variable naming the workspace an attempt belongs to.
pub const WORKSPACE_VAR: &str = "RONDO_WORKSPACE_ID";
/// Environment variable naming the attempt (the store's attempt id).
pub const ATTEMPT_VAR: &str = "RONDO_ATTEMPT_ID";

/// A live (non-zombie) process that carries a `RONDO_WORKSPACE_ID`.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct TaggedProcess {
    /// Process id.
    pub pid: i32,
    /// Process-group id.
    pub pgrp: i32,
    /// Value of `RONDO_WORKSPACE_ID`.
    pub workspace: String,
    /// Value of `RONDO_ATTEMPT_ID`, if set.
    pub attempt: Option<String>,
    /// Value of `RONDO_KEEPER` (the keeper's mode) when the process is an attempt's keeper.
    pub keeper: Option<String>,
}

/// State letter and process group from `/proc/<pid>/stat` (proc(5): fields 3 and 5).
fn stat(pid: i32) -> Option<(char, i32)> {
    let text = fs::read_to_string(format!("/proc/{pid}/stat")).ok()?;
    // The command name (field 2) is in parentheses and may itself contain ") ".
    let rest = &text[text.rfind(')')? + 1..];
    let mut fields = rest.split_ascii_whitespace();
    let state = fields.next()?.chars().next()?;
    let _ppid = fields.next()?;
    let pgrp = fields.next()?.parse().ok()?;
    Some((state, pgrp))
}

/// The rondo variables from `/proc/<pid>/environ` (workspace, attempt, keeper mode), if
/// the workspace one is present.
fn rondo_env(pid: i32) -> Option<(String, Option<String>, Option<String>)> {
    let raw = fs::read(format!("/proc/{pid}/environ")).ok()?;
    let mut workspace = None;
    let mut attempt = None;
    let mut keeper = None;
    for entry in raw.split(|b| *b == 0) {
        if let Some(v) = entry
            .strip_prefix(super::keeper::KEEPER_VAR.as_bytes())
            .and_then(|r| r.strip_prefix(b"="))
        {
            keeper = Some(String::from_utf8_lossy(v).into_owned());
            continue;
        }
        if let Some(v) = entry
            .strip_prefix(WORKSPACE_VAR.as_bytes())
            .and_then(|r| r.strip_prefix(b"="))
        {
            workspace = Some(String::from_utf8_lossy(v).into_owned());
        } else if let Some(v) = entry
            .strip_prefix(ATTEMPT_VAR.as_bytes())
            .and_then(|r| r.strip_prefix(b"="))
        {
            attempt = Some(String::from_utf8_lossy(v).into_owned());
        }
    }
    Some((workspace?, attempt, keeper))
}

/// Every live process (zombies excluded, this process excluded) with a
/// `RONDO_WORKSPACE_ID` equal to `workspace`.
pub fn tagged_processes(workspace: &str) -> Vec<TaggedProcess> {
    let own = std::process::id() as i32;
    let Ok(dir) = fs::read_dir("/proc") else {
        return Vec::new();
    };
    let mut found = Vec::new();
    for entry in dir.flatten() {
        let Some(pid) = entry
            .file_name()
            .to_str()
            .and_then(|s| s.parse::<i32>().ok())
        else {
            continue;
        };
        if pid == own {
            continue;
        }
        let Some((ws, attempt, keeper)) = rondo_env(pid) else {
            continue;
        };
        if ws != workspace {
            continue;
        }
        // Read the state after the environment: a process that became a zombie in between
        // is dropped here.
        let Some((state, pgrp)) = stat(pid) else {
            continue;
        };
        if state == 'Z' || state == 'X' {
            continue;
        }
        found.push(TaggedProcess {
            pid,
            pgrp,
            workspace: ws,
            attempt,
            keeper,
        });
    }
    found
}

/// Live processes of one attempt of one workspace.
pub fn attempt_processes(workspace: &str, attempt_id: i64) -> Vec<TaggedProcess> {
    let id = attempt_id.to_string();
    tagged_processes(workspace)
        .into_iter()
        .filter(|p| p.attempt.as_deref() == Some(id.as_str()))
        .collect()
}

/// The live keeper of an attempt, as `(pid, mode)`, if there is one.
pub fn keeper_of(workspace: &str, attempt_id: i64) -> Option<(i32, String)> {
    attempt_processes(workspace, attempt_id)
        .into_iter()
        .find_map(|p| Some((p.pid, p.keeper?)))
}

/// Whether `pid` is still the live keeper of this attempt (its environment is read again,
/// so a recycled pid is never taken for it).
pub fn is_keeper(pid: i32, workspace: &str, attempt_id: i64) -> bool {
    let id = attempt_id.to_string();
    matches!(rondo_env(pid), Some((ws, Some(a), Some(_))) if ws == workspace && a == id)
        && stat(pid).is_some_and(|(state, _)| state != 'Z' && state != 'X')
}

/// Whether the process group `pgid` has any member at all (zombies included).
pub fn group_exists(pgid: i32) -> bool {
    // SAFETY: kill(2) with signal 0 sends nothing; it only checks for existence and
    // permission. A negative pid addresses the process group `pgid` (pgid > 0 checked).
    pgid > 0 && unsafe { libc::kill(-pgid, 0) } == 0
}

/// Send `signal` to the process group `pgid`. A group that no longer exists is not an
/// error. Refuses this process's own group and non-positive ids.
pub fn signal_group(pgid: i32, signal: i32) -> io::Result<()> {
    // SAFETY: getpgrp(2) has no preconditions and cannot fail.
    let own = unsafe { libc::getpgrp() };
    if pgid <= 1 || pgid == own {
        return Err(io::Error::new(
            io::ErrorKind::InvalidInput,
            format!("refusing to signal process group {pgid}"),
        ));
    }
    // SAFETY: killpg(2) takes plain integers and touches no memory of ours; pgid > 1 and is
    // not our own group, so neither every process (pid -1 semantics) nor we are addressed.
    let rc = unsafe { libc::killpg(pgid, signal) };
    check(rc)
}

/// Send `signal` to one process. A process that no longer exists is not an error.
pub fn signal_process(pid: i32, signal: i32) -> io::Result<()> {
    if pid <= 1 || pid == std::process::id() as i32 {
        return Err(io::Error::new(
            io::ErrorKind::InvalidInput,
            format!("refusing to signal process {pid}"),
        ));
    }
    // SAFETY: kill(2) takes plain integers and touches no memory of ours; pid > 1 addresses
    // exactly one process, never a group or every process.
    let rc = unsafe { libc::kill(pid, signal) };
    check(rc)
}

fn check(rc: i32) -> io::Result<()> {
    if rc == 0 {
        return Ok(());
    }
    let err = io::Error::last_os_error();
    if err.raw_os_error() == Some(libc::ESRCH) {
        Ok(())
    } else {
        Err(err)
    }
}

/// Signal every live process of an attempt: each one directly, and each process group
/// whose leader is one of them (members that dropped their environment, e.g. via
/// `env -i`, are reached that way). Returns how many processes were found.
pub fn signal_attempt(workspace: &str, attempt_id: i64, signal: i32) -> usize {
    let procs = attempt_processes(workspace, attempt_id);
    for p in &procs {
        if p.pid == p.pgrp {
            if let Err(err) = signal_group(p.pgrp, signal) {
                tracing::warn!(pgid = p.pgrp, %err, "could not signal process group");
            }
        }
        if let Err(err) = signal_process(p.pid, signal) {
            tracing::warn!(pid = p.pid, %err, "could not signal process");
        }
    }
    procs.len()
}

/// This machine's host name (`/proc/sys/kernel/hostname`, falling back to `localhost`).
pub fn hostname() -> String {
    fs::read_to_string("/proc/sys/kernel/hostname")
        .map(|s| s.trim().to_string())
        .ok()
        .filter(|s| !s.is_empty())
        .unwrap_or_else(|| "localhost".to_string())
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn stat_of_self_has_our_group() {
        let (state, pgrp) = stat(std::process::id() as i32).unwrap();
        assert!(matches!(state, 'R' | 'S' | 'D'), "state {state}");
        // SAFETY: getpgrp(2) has no preconditions.
        assert_eq!(pgrp, unsafe { libc::getpgrp() });
    }

    #[test]
    fn refuses_own_group_and_init() {
        // SAFETY: getpgrp(2) has no preconditions.
        let own = unsafe { libc::getpgrp() };
        assert!(signal_group(own, 0).is_err());
        assert!(signal_group(1, 0).is_err());
        assert!(signal_process(1, 0).is_err());
        assert!(signal_process(std::process::id() as i32, 0).is_err());
    }
}
