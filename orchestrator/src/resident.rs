//! The rondo side of resident programs (docs/resident.md): the hand-off protocol
//! `rondo-handoff-1` — the files of a resident program's folder, the order rondo writes its
//! own (a hand-off's inputs complete before its `go`), reading `ready` and `done`, and
//! checking a `done` against the outputs the stage declares — and the program's process:
//! started under a keeper in `follow` mode (so that it ends within half a second when rondo
//! is gone), watched, and ended by a `stop` file or, when it does not listen, by SIGTERM, the
//! grace period and SIGKILL.

use std::collections::BTreeMap;
use std::ffi::OsString;
use std::io::Write as _;
use std::path::{Path, PathBuf};
use std::process::Stdio;
use std::time::Duration;

use chrono::{DateTime, Utc};
use rondo_adapters::local::{keeper, sys, ATTEMPT_VAR, WORKSPACE_VAR};
use tokio::io::{AsyncBufReadExt, BufReader};

/// The protocol's name, first line of `ready` and of every `done`.
pub const PROTOCOL: &str = "rondo-handoff-1";

/// The hand-off folder inside a resident program's folder.
pub const HANDOFF_DIR: &str = "handoff";

/// The variable that gives the program the hand-off folder's absolute path.
pub const HANDOFF_VAR: &str = "RONDO_HANDOFF";

/// How often rondo looks for `ready` and `done`.
pub const POLL: Duration = Duration::from_millis(20);

/// How long a keeper that was sent SIGTERM may take to end its program and itself.
const KEEPER_END: Duration = Duration::from_secs(10);

/// Write `bytes` to `dir/name` as the protocol asks: a temporary name in the same folder,
/// fsync, rename, fsync of the folder.
pub fn publish(dir: &Path, name: &str, bytes: &[u8]) -> std::io::Result<()> {
    let tmp = dir.join(format!(".{name}.tmp"));
    let mut f = std::fs::File::create(&tmp)?;
    f.write_all(bytes)?;
    f.sync_all()?;
    drop(f);
    std::fs::rename(&tmp, dir.join(name))?;
    std::fs::File::open(dir)?.sync_all()
}

/// Hand-off `n`'s folder under the program's folder `root`.
pub fn handoff_dir(root: &Path, n: u64) -> PathBuf {
    root.join(HANDOFF_DIR).join(n.to_string())
}

/// Key and value of a protocol line (`key value`; the value may hold spaces).
fn field(line: &str) -> (&str, &str) {
    match line.split_once(' ') {
        Some((k, v)) => (k, v.trim()),
        None => (line.trim(), ""),
    }
}

/// `ready` as the program wrote it: `Ok(false)` while it is absent, an error when it does
/// not start with this protocol's line.
pub fn read_ready(root: &Path) -> Result<bool, String> {
    let path = root.join(HANDOFF_DIR).join("ready");
    let Ok(text) = std::fs::read_to_string(&path) else {
        return Ok(false);
    };
    match text.lines().next().map(field) {
        Some(("protocol", PROTOCOL)) => Ok(true),
        _ => Err(format!(
            "{}: the first line must be `protocol {PROTOCOL}`, found `{}`",
            path.display(),
            text.lines().next().unwrap_or_default()
        )),
    }
}

/// What a `done` says about its hand-off.
#[derive(Debug, Clone, PartialEq, Eq)]
pub enum Status {
    /// The outputs are complete.
    Ok,
    /// The program could not do the hand-off (its message).
    Error(String),
    /// The program refused the hand-off (its message).
    Rejected(String),
}

/// A `done` file, read.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct Done {
    /// The hand-off it answers.
    pub handoff: u64,
    /// How it went.
    pub status: Status,
    /// `output PATH SIZE` lines: paths relative to the hand-off's folder, sizes in bytes.
    pub outputs: Vec<(String, u64)>,
}

/// Read a `done` text: `None` while its last line is not `end` (so a program that writes it
/// in place rather than by rename is read once it is whole), else the marker or what is
/// wrong with it.
pub fn parse_done(text: &str) -> Option<Result<Done, String>> {
    let lines: Vec<&str> = text.lines().collect();
    if lines.last().map(|l| l.trim()) != Some("end") {
        return None;
    }
    Some(parse_done_lines(&lines[..lines.len() - 1]))
}

fn parse_done_lines(lines: &[&str]) -> Result<Done, String> {
    if lines.first().map(|l| field(l)) != Some(("protocol", PROTOCOL)) {
        return Err(format!("the first line must be `protocol {PROTOCOL}`"));
    }
    let (mut handoff, mut status, mut message) = (None, None, String::new());
    let mut outputs = Vec::new();
    for (i, line) in lines.iter().enumerate().skip(1) {
        let bad = |what: &str| format!("line {}: {what}: `{line}`", i + 1);
        match field(line) {
            ("handoff", n) => handoff = Some(n.parse::<u64>().map_err(|_| bad("not a number"))?),
            ("status", s) => status = Some(s.to_string()),
            ("message", m) => message = m.to_string(),
            ("output", rest) => {
                let (path, size) = rest
                    .rsplit_once(' ')
                    .ok_or_else(|| bad("write `output PATH SIZE`"))?;
                let size = size.parse().map_err(|_| bad("the size is not a number"))?;
                outputs.push((path.trim().to_string(), size));
            }
            ("", _) => {}
            _ => return Err(bad("unknown line")),
        }
    }
    let handoff = handoff.ok_or("no `handoff N` line")?;
    let status = match status.as_deref() {
        Some("ok") => Status::Ok,
        Some("error") => Status::Error(message),
        Some("rejected") => Status::Rejected(message),
        Some(s) => return Err(format!("status `{s}` is none of ok, error, rejected")),
        None => return Err("no `status` line".into()),
    };
    Ok(Done {
        handoff,
        status,
        outputs,
    })
}

/// Check an `ok` done of hand-off `n` against its folder `dir`: it answers `n`, it lists
/// every declared file output (`out/NAME`) and the `out/metrics.json` the program wrote, and
/// every file it lists is there, a regular file, with the listed size. This is how rondo
/// refuses an output the program had not finished when it wrote `done`.
pub fn check_done(done: &Done, n: u64, dir: &Path, files: &[&str]) -> Result<(), String> {
    if done.handoff != n {
        return Err(format!(
            "it answers hand-off {} instead of {n}",
            done.handoff
        ));
    }
    let listed = |p: &str| done.outputs.iter().any(|(q, _)| q == p);
    let metrics = format!("out/{}", crate::validate::METRICS_FILE);
    let mut wanted: Vec<String> = files.iter().map(|f| format!("out/{f}")).collect();
    if dir.join(&metrics).exists() {
        wanted.push(metrics);
    }
    if let Some(missing) = wanted.iter().find(|p| !listed(p)) {
        return Err(format!(
            "it does not list `{missing}`; list every output as `output {missing} SIZE`"
        ));
    }
    for (path, size) in &done.outputs {
        if path.split('/').any(|c| c == ".." || c.is_empty()) {
            return Err(format!("output `{path}` is not a path inside the hand-off"));
        }
        let file = dir.join(path);
        match std::fs::symlink_metadata(&file) {
            Ok(m) if m.is_file() && m.len() == *size => {}
            Ok(m) if m.is_file() => {
                return Err(format!(
                    "output `{path}` has {} bytes, the done lists {size}: it was not complete \
                     when the program wrote done",
                    m.len()
                ))
            }
            Ok(_) => return Err(format!("output `{path}` is not a regular file")),
            Err(_) => return Err(format!("output `{path}` is listed but missing")),
        }
    }
    Ok(())
}

/// A resident program's process, under its keeper.
#[derive(Debug)]
pub struct Process {
    keeper: tokio::process::Child,
    /// The program's pid, which is also its process group.
    pub pid: i32,
    /// Its folder (the keeper's too: logs and exit marker).
    pub dir: PathBuf,
    /// The argument list that started it.
    pub argv: Vec<String>,
    /// When it started.
    pub started_at: DateTime<Utc>,
    /// The attempt that started it (its processes carry that attempt's tag).
    pub started_by: i64,
    /// The number of its last hand-off (0 before the first).
    pub last: u64,
}

/// What starting a resident program needs.
#[derive(Debug)]
pub struct Start<'a> {
    /// Its folder: the hand-off folder and the case folder are in it.
    pub dir: &'a Path,
    /// Program and arguments.
    pub argv: &'a [String],
    /// Its variables (the stage's and rondo's).
    pub env: &'a BTreeMap<String, String>,
    /// The workspace tag.
    pub workspace_id: &'a str,
    /// The attempt that starts it.
    pub attempt_id: i64,
    /// Between SIGTERM and SIGKILL.
    pub grace: Duration,
}

/// Start the program under a keeper that ends it when rondo is gone; returns once it runs.
pub async fn start(s: Start<'_>) -> Result<Process, String> {
    let cfg = keeper::Config {
        outlive: false,
        grace: s.grace,
        limit: None,
        argv: s.argv.iter().map(OsString::from).collect(),
    };
    let mut cmd = rondo_adapters::local::keeper_command(&cfg)
        .ok_or("resident programs run under rondo's keeper, which this binary does not provide")?;
    let handoff = s.dir.join(HANDOFF_DIR);
    cmd.current_dir(s.dir)
        .envs(s.env)
        .env(HANDOFF_VAR, &handoff)
        .env(WORKSPACE_VAR, s.workspace_id)
        .env(ATTEMPT_VAR, s.attempt_id.to_string())
        .stdin(Stdio::null())
        .stdout(Stdio::piped())
        .stderr(Stdio::null())
        .process_group(0)
        .kill_on_drop(false);
    let started_at = Utc::now();
    let mut keeper = cmd
        .spawn()
        .map_err(|e| format!("cannot start the keeper of the resident program: {e}"))?;
    let line = match keeper.stdout.take() {
        Some(out) => BufReader::new(out).lines().next_line().await.ok().flatten(),
        None => None,
    };
    let pid = match line.as_deref().and_then(|l| l.strip_prefix("pid ")) {
        Some(p) => p.trim().parse::<i32>().unwrap_or(0),
        None => {
            let _ = keeper.wait().await;
            return Err(match line {
                Some(l) => l.strip_prefix("error ").unwrap_or(&l).to_string(),
                None => "the keeper ended before it started the program".into(),
            });
        }
    };
    Ok(Process {
        keeper,
        pid,
        dir: s.dir.to_path_buf(),
        argv: s.argv.to_vec(),
        started_at,
        started_by: s.attempt_id,
        last: 0,
    })
}

/// Why the program in `dir` (process group `pid`) is gone, if it is: from the exit marker
/// its keeper wrote, or because no process of its group is left.
pub fn gone(dir: &Path, pid: i32) -> Option<String> {
    ended_how(dir).or_else(|| {
        (!sys::group_exists(pid)).then(|| "the resident program's processes are gone".into())
    })
}

/// How the program in `dir` ended, from its keeper's exit marker (written just after the
/// program's group is gone), if the marker is there.
pub fn ended_how(dir: &Path) -> Option<String> {
    let m = keeper::read_marker(dir)?;
    Some(match (m.code, m.signal, m.error) {
        (_, _, Some(e)) => e,
        (Some(c), _, _) => format!("the resident program exited with status {c}"),
        (_, Some(s), _) => format!("the resident program was killed by signal {s}"),
        _ => "the resident program ended".into(),
    })
}

impl Process {
    /// End the program: with `ask`, a `stop` file and up to `grace` to exit by itself; then
    /// SIGTERM to its keeper (which ends the program's group: TERM, grace, KILL), and SIGKILL
    /// to both when even that does not end them. Returns once the keeper is reaped.
    pub async fn stop(mut self, ask: bool, grace: Duration) {
        if ask && gone(&self.dir, self.pid).is_none() {
            let _ = publish(&self.dir.join(HANDOFF_DIR), "stop", b"");
            if tokio::time::timeout(grace, self.keeper.wait())
                .await
                .is_ok()
            {
                return;
            }
        }
        if let Some(k) = self.keeper.id() {
            let _ = sys::signal_process(k as i32, libc::SIGTERM);
        }
        let patience = grace + KEEPER_END;
        if tokio::time::timeout(patience, self.keeper.wait())
            .await
            .is_ok()
        {
            return;
        }
        tracing::warn!(pid = self.pid, "resident program did not end; killing it");
        let _ = sys::signal_group(self.pid, libc::SIGKILL);
        let _ = self.keeper.kill().await;
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn a_done_is_read_once_it_ends_and_names_what_is_wrong() {
        assert!(parse_done("protocol rondo-handoff-1\nhandoff 2\nstatus ok\n").is_none());
        let d =
            parse_done("protocol rondo-handoff-1\nhandoff 2\nstatus ok\noutput out/a b 7\nend\n")
                .unwrap()
                .unwrap();
        assert_eq!(d.handoff, 2);
        assert_eq!(d.status, Status::Ok);
        assert_eq!(d.outputs, vec![("out/a b".to_string(), 7)]);
        let e = parse_done(
            "protocol rondo-handoff-1\nhandoff 1\nstatus error\nmessage no density\nend",
        )
        .unwrap()
        .unwrap();
        assert_eq!(e.status, Status::Error("no density".into()));
        let wrong = parse_done("protocol other-1\nhandoff 1\nstatus ok\nend\n").unwrap();
        assert!(wrong.unwrap_err().contains("rondo-handoff-1"));
        let size =
            parse_done("protocol rondo-handoff-1\nhandoff 1\nstatus ok\noutput out/x y\nend")
                .unwrap();
        assert!(size.unwrap_err().contains("size is not a number"));
    }

    #[test]
    fn a_done_must_list_complete_outputs() {
        let dir = tempfile::tempdir().unwrap();
        std::fs::create_dir(dir.path().join("out")).unwrap();
        std::fs::write(dir.path().join("out/x.json"), b"{\"a\":1}").unwrap();
        let done = |outputs: Vec<(&str, u64)>| Done {
            handoff: 3,
            status: Status::Ok,
            outputs: outputs
                .into_iter()
                .map(|(p, n)| (p.to_string(), n))
                .collect(),
        };
        assert!(check_done(&done(vec![("out/x.json", 7)]), 3, dir.path(), &["x.json"]).is_ok());
        let short = check_done(&done(vec![("out/x.json", 9)]), 3, dir.path(), &["x.json"]);
        assert!(short.unwrap_err().contains("was not complete"));
        let unlisted = check_done(&done(vec![]), 3, dir.path(), &["x.json"]);
        assert!(unlisted.unwrap_err().contains("does not list `out/x.json`"));
        let other = check_done(&done(vec![("out/x.json", 7)]), 4, dir.path(), &["x.json"]);
        assert!(other.unwrap_err().contains("instead of 4"));
        std::fs::write(dir.path().join("out/metrics.json"), b"{}").unwrap();
        let metrics = check_done(&done(vec![("out/x.json", 7)]), 3, dir.path(), &["x.json"]);
        assert!(metrics.unwrap_err().contains("out/metrics.json"));
    }
}
