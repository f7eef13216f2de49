//! The PBS-family executor (PBS Professional / OpenPBS, with Torque's finished state `C`
//! understood): one batch job per attempt, submitted with `qsub`, watched with one
//! `qstat -f -x` call per poll interval for all outstanding jobs, cancelled with `qdel`.
//! Final status comes from the exit marker the generated script writes (shared with Slurm in
//! [`crate::slurm::batch`]); the server's `Exit_status` and `substate` decide the cases in
//! which the script could not write it (wall-time kill, deletion, node failure).
//!
//! Translation of the Slurm-named [`Resources`] into PBS terms:
//! `nodes` → number of `select` chunks; `ntasks` → `mpiprocs` (per chunk);
//! `cpus-per-task` → `ompthreads`, with `ncpus = mpiprocs × ompthreads` per chunk;
//! `mem` (per node) → `mem` per chunk in PBS units (`4G` → `4gb`); `gres=gpu:N` → `ngpus=N`;
//! `time` → `walltime`; `partition` → queue (`-q`); `account` → `-A`. `qos` and `constraint`
//! have no common PBS equivalent and are refused with a message (use `extra`).
//!
//! Formats follow the PBS Professional Reference Guide (qsub, qstat, qdel, job states) and
//! the OpenPBS source (`src/include/job.h`: `JOB_EXEC_*` exit codes, history substates). This
//! executor has not been run against a real PBS server; its tests use command output written
//! from that documentation.

use std::collections::HashMap;
use std::path::Path;
use std::time::Duration;

use tokio::sync::mpsc::UnboundedSender;

use crate::executor::{Completion, ExecError, LaunchRequest, Resources};
use crate::slurm::batch::{
    self, run_capture, run_full, BatchCore, BatchStats, BatchSystem, EndKind, JobState,
    PollSettings,
};
use crate::slurm::parse_slurm_time;

/// How the PBS executor talks to the server.
#[derive(Debug, Clone)]
pub struct PbsConfig {
    /// Time between two `qstat` calls (one call covers all outstanding jobs). Default 30 s.
    pub poll_interval: Duration,
    /// Longest wait between `qstat` calls while the server does not answer. Default 300 s.
    pub max_backoff: Duration,
    /// Time between two looks at the outstanding jobs' exit markers on the shared file
    /// system (one `stat` per job, no scheduler call). Default 1 s: a job's end is noticed
    /// about a second after it, not at the next `qstat`. `Duration::ZERO` turns it off.
    pub marker_interval: Duration,
    /// Program names (or paths) of the PBS clients.
    pub qsub: String,
    /// See [`PbsConfig::qsub`].
    pub qstat: String,
    /// See [`PbsConfig::qsub`].
    pub qdel: String,
    /// Resources used where a stage gives none.
    pub defaults: Resources,
    /// How often a submission is retried while the server does not answer.
    pub submit_retries: u32,
    /// How many jobs may be queued or running at once.
    pub max_jobs: usize,
    /// Ask for finished jobs too (`qstat -x`, needs `job_history_enable` on the server).
    /// Without history a finished job simply disappears and the exit marker decides.
    pub history: bool,
    /// Longest time one client call may take before it counts as unanswered.
    pub client_timeout: Duration,
}

impl Default for PbsConfig {
    fn default() -> Self {
        PbsConfig {
            poll_interval: Duration::from_secs(30),
            max_backoff: Duration::from_secs(300),
            marker_interval: Duration::from_secs(1),
            qsub: "qsub".into(),
            qstat: "qstat".into(),
            qdel: "qdel".into(),
            defaults: Resources::default(),
            submit_retries: 5,
            max_jobs: 100,
            history: true,
            client_timeout: Duration::from_secs(60),
        }
    }
}

/// A PBS job name: letters, digits and `_.+-` kept, `/` becomes `.`, anything else `_`;
/// starts with a letter (PBS requires it) and has at most 236 characters.
pub fn pbs_job_name(name: &str) -> String {
    let mut out: String = name
        .chars()
        .map(|c| match c {
            c if c.is_ascii_alphanumeric() || "_.+-".contains(c) => c,
            '/' => '.',
            _ => '_',
        })
        .collect();
    if !out.starts_with(|c: char| c.is_ascii_alphabetic()) {
        out.insert(0, 'r');
    }
    out.truncate(236);
    out
}

/// Slurm's memory syntax (`--mem`: a number with an optional K/M/G/T suffix, megabytes by
/// default) in PBS size units (`kb`, `mb`, `gb`, `tb`).
pub fn pbs_mem(slurm_mem: &str) -> Result<String, String> {
    let t = slurm_mem.trim();
    let (digits, unit) = match t.find(|c: char| !c.is_ascii_digit()) {
        Some(i) => t.split_at(i),
        None => (t, ""),
    };
    let unit = match unit.to_ascii_uppercase().as_str() {
        "" | "M" | "MB" => "mb",
        "K" | "KB" => "kb",
        "G" | "GB" => "gb",
        "T" | "TB" => "tb",
        _ => {
            return Err(format!(
                "memory {slurm_mem:?}: use a number with K, M, G or T"
            ))
        }
    };
    if digits.is_empty() || digits.parse::<u64>().is_err() {
        return Err(format!(
            "memory {slurm_mem:?}: use a number with K, M, G or T"
        ));
    }
    Ok(format!("{digits}{unit}"))
}

/// A duration as a PBS `walltime` (`HH:MM:SS`, seconds kept: PBS has second resolution).
pub fn pbs_walltime(d: Duration) -> String {
    let s = d.as_secs().max(1);
    format!("{:02}:{:02}:{:02}", s / 3600, (s / 60) % 60, s % 60)
}

/// The `#PBS` lines for these resources: job name, `select` chunk, walltime, queue, account,
/// and the output/error files in `workdir`.
pub fn pbs_directives(
    res: &Resources,
    time_limit: Option<Duration>,
    job_name: &str,
    workdir: &Path,
) -> Result<Vec<String>, ExecError> {
    let invalid = |m: String| ExecError::Invalid(m);
    let word = |name: &str, v: &str| -> Result<(), ExecError> {
        if v.is_empty() || v.chars().any(|c| c.is_whitespace() || c == '#' || c == ':') {
            return Err(invalid(format!(
                "resource {name} = {v:?}: must be a single word (no spaces, '#' or ':')"
            )));
        }
        Ok(())
    };
    if res.qos.is_some() {
        return Err(invalid(
            "resource qos: PBS has no quality-of-service option; pass the site's equivalent in `extra`".into(),
        ));
    }
    if res.constraint.is_some() {
        return Err(invalid(
            "resource constraint: PBS selects node features through site-defined chunk resources; pass them in `extra` (e.g. [\"-l\", \"select=1:ncpus=4:cpu_type=avx2\"])".into(),
        ));
    }
    let wd = workdir.display().to_string();
    if wd.chars().any(char::is_whitespace) {
        return Err(invalid(format!(
            "workdir {wd:?}: PBS directives cannot carry paths with spaces; use a scratch directory without spaces"
        )));
    }
    let chunks = res.nodes.unwrap_or(1).max(1);
    let tasks = res.ntasks.unwrap_or(chunks);
    if tasks % chunks != 0 {
        return Err(invalid(format!(
            "resources: ntasks = {tasks} is not a multiple of nodes = {chunks}; PBS chunks are all alike"
        )));
    }
    let mpiprocs = (tasks / chunks).max(1);
    let threads = res.cpus_per_task.unwrap_or(1).max(1);
    let mut select = format!(
        "select={chunks}:ncpus={}:mpiprocs={mpiprocs}",
        mpiprocs * threads
    );
    if res.cpus_per_task.is_some() {
        select.push_str(&format!(":ompthreads={threads}"));
    }
    if let Some(m) = &res.mem {
        select.push_str(&format!(":mem={}", pbs_mem(m).map_err(invalid)?));
    }
    if let Some(g) = &res.gres {
        let n = g
            .strip_prefix("gpu:")
            .filter(|n| n.parse::<u32>().is_ok())
            .ok_or_else(|| {
                invalid(format!(
                    "resource gres = {g:?}: only gpu:N translates to PBS (ngpus=N); pass others in `extra`"
                ))
            })?;
        select.push_str(&format!(":ngpus={n}"));
    }
    let mut d = vec![
        format!("#PBS -N {}", pbs_job_name(job_name)),
        format!("#PBS -l {select}"),
    ];
    let walltime = match (&res.time, time_limit) {
        (Some(t), _) => Some(parse_slurm_time(t).map_err(invalid)?),
        (None, limit) => limit,
    };
    if let Some(w) = walltime {
        d.push(format!("#PBS -l walltime={}", pbs_walltime(w)));
    }
    if let Some(q) = &res.partition {
        word("partition", q)?;
        d.push(format!("#PBS -q {q}"));
    }
    if let Some(a) = &res.account {
        word("account", a)?;
        d.push(format!("#PBS -A {a}"));
    }
    d.push(format!("#PBS -o {wd}/pbs.out"));
    d.push(format!("#PBS -e {wd}/pbs.err"));
    d.push("#PBS -j n".into());
    Ok(d)
}

/// One job of `qstat -f` output: its id and attributes (`Exit_status`, `job_state`, ...).
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct PbsJob {
    /// The full job id as printed after `Job Id:`.
    pub id: String,
    /// Attribute name → value, continuation lines joined.
    pub attrs: HashMap<String, String>,
}

/// Parse `qstat -f` (or `qstat -f -x`) output: blocks that start with `Job Id: <id>`, then
/// indented `name = value` lines; a value too long for one line continues on lines that
/// start with a tab (joined without separator).
pub fn parse_qstat_full(text: &str) -> Vec<PbsJob> {
    let mut jobs: Vec<PbsJob> = Vec::new();
    let mut last_key: Option<String> = None;
    for line in text.lines() {
        if let Some(id) = line.strip_prefix("Job Id:") {
            jobs.push(PbsJob {
                id: id.trim().to_string(),
                attrs: HashMap::new(),
            });
            last_key = None;
            continue;
        }
        let Some(job) = jobs.last_mut() else { continue };
        if line.trim().is_empty() {
            last_key = None;
            continue;
        }
        if line.starts_with('\t') {
            if let Some(v) = last_key.as_ref().and_then(|k| job.attrs.get_mut(k)) {
                v.push_str(line.trim());
                continue;
            }
        }
        if let Some((k, v)) = line.split_once(" = ") {
            let k = k.trim().to_string();
            job.attrs.insert(k.clone(), v.trim().to_string());
            last_key = Some(k);
        }
    }
    jobs
}

/// `JOB_EXEC_KILL_WALLTIME` (OpenPBS `job.h`): killed for exceeding its walltime.
pub const EXIT_KILL_WALLTIME: i32 = -29;
/// `JOB_EXEC_KILL_NCPUS_BURST` .. `JOB_EXEC_KILL_CPUT` (-24 .. -28): killed for exceeding a
/// CPU, memory or CPU-time limit.
pub const EXIT_KILL_RESOURCE: std::ops::RangeInclusive<i32> = -28..=-24;
/// `JOB_EXEC_RERUN_SIS_FAIL` (-14) and `JOB_EXEC_RERUN_MS_FAIL` (-20): a sister or the
/// mother-superior node failed.
pub const EXIT_NODE_FAILURES: [i32; 2] = [-14, -20];
/// History substate of a job deleted (e.g. with `qdel`) before it finished.
pub const SUBSTATE_TERMINATED: &str = "91";

/// The state of one `qstat -f` job. States from the PBS Professional Reference Guide
/// ("Job States"): `F` finished (history), `C` completed (Torque), `X` finished subjob; all
/// others (Q, R, H, W, T, E, B, S, U, M) are not over.
pub fn pbs_job_state(job: &PbsJob) -> JobState {
    let state = job.attrs.get("job_state").map(|s| s.trim()).unwrap_or("");
    if !matches!(state, "F" | "C" | "X") {
        return JobState::Active;
    }
    if job.attrs.get("substate").map(|s| s.trim()) == Some(SUBSTATE_TERMINATED) {
        return JobState::Ended(EndKind::Cancelled);
    }
    let exit = job
        .attrs
        .get("Exit_status")
        .or_else(|| job.attrs.get("exit_status"))
        .and_then(|v| v.trim().parse::<i32>().ok());
    JobState::Ended(match exit {
        Some(EXIT_KILL_WALLTIME) => EndKind::TimedOut,
        Some(c) if EXIT_NODE_FAILURES.contains(&c) => EndKind::NodeFailure,
        Some(c) if EXIT_KILL_RESOURCE.contains(&c) => EndKind::Other(format!(
            "killed for exceeding a resource limit (Exit_status {c})"
        )),
        Some(c) if c < 0 => EndKind::Other(format!("PBS could not run it (Exit_status {c})")),
        // An exit status above 256 is 256 + the signal that ended the job script.
        Some(c) if c > 256 => EndKind::Ran {
            exit: Some((0, c - 256)),
        },
        Some(c) => EndKind::Ran { exit: Some((c, 0)) },
        None => EndKind::Ran { exit: None },
    })
}

/// The sequence number of a PBS job id (`1234.server` → `1234`, `12[3].server` → `12[3]`).
pub fn sequence_number(id: &str) -> &str {
    id.split('.').next().unwrap_or(id)
}

/// States of the requested ids from `qstat -f` output. A block whose id differs from a
/// requested one only after the sequence number (the server printed a longer host name) is
/// matched to it.
pub fn states_for(ids: &[String], text: &str) -> HashMap<String, JobState> {
    let jobs = parse_qstat_full(text);
    let mut out = HashMap::new();
    for id in ids {
        let found = jobs.iter().find(|j| &j.id == id).or_else(|| {
            jobs.iter()
                .find(|j| sequence_number(&j.id) == sequence_number(id))
        });
        if let Some(j) = found {
            out.insert(id.clone(), pbs_job_state(j));
        }
    }
    out
}

/// Messages of a PBS client that mean the server did not answer (retry later) rather than a
/// refusal.
fn server_unreachable(message: &str) -> bool {
    [
        "Connection refused",
        "cannot connect to server",
        "Cannot connect",
        "pbs_connect",
        "communication failure",
        "did not answer",
        "timed out",
        "Server is busy",
    ]
    .iter()
    .any(|t| message.contains(t))
}

/// Whether every stderr line of `qstat` says only that a job is unknown (purged or never
/// there), which is not a failure of the server.
pub fn only_unknown_jobs(stderr: &str) -> bool {
    stderr
        .lines()
        .filter(|l| !l.trim().is_empty())
        .all(|l| l.contains("Unknown Job Id") || l.contains("Job has finished"))
}

/// The PBS side of [`BatchCore`].
pub struct Pbs {
    config: PbsConfig,
}

#[async_trait::async_trait]
impl BatchSystem for Pbs {
    fn kind(&self) -> &'static str {
        "pbs"
    }

    fn directives(&self, req: &LaunchRequest) -> Result<Vec<String>, ExecError> {
        let res = req.resources.over(&self.config.defaults);
        pbs_directives(&res, req.time_limit, &req.job_name, &req.workdir)
    }

    async fn submit(&self, script: &Path, req: &LaunchRequest) -> Result<String, ExecError> {
        let res = req.resources.over(&self.config.defaults);
        let mut args = res.extra.clone();
        args.push(script.display().to_string());
        let out = run_capture(&self.config.qsub, &args, self.config.client_timeout)
            .await
            .map_err(|m| {
                if server_unreachable(&m) {
                    ExecError::Unavailable {
                        what: "qsub".into(),
                        message: m,
                    }
                } else {
                    ExecError::Invalid(format!("qsub: {m}"))
                }
            })?;
        parse_qsub_output(&out)
    }

    async fn query(&self, ids: &[String]) -> Result<HashMap<String, JobState>, ExecError> {
        let mut args = vec!["-f".to_string()];
        if self.config.history {
            args.push("-x".into());
        }
        args.extend(ids.iter().cloned());
        let out = run_full(&self.config.qstat, &args, self.config.client_timeout)
            .await
            .map_err(|m| ExecError::Unavailable {
                what: "qstat".into(),
                message: m,
            })?;
        if out.success || only_unknown_jobs(&out.stderr) {
            Ok(states_for(ids, &out.stdout))
        } else {
            Err(ExecError::Unavailable {
                what: "qstat".into(),
                message: format!("qstat failed ({}): {}", out.status, out.stderr),
            })
        }
    }

    async fn cancel(&self, id: &str) -> Result<(), ExecError> {
        run_capture(
            &self.config.qdel,
            &[id.to_string()],
            self.config.client_timeout,
        )
        .await
        .map(|_| ())
        .map_err(|m| {
            if server_unreachable(&m) {
                ExecError::Unavailable {
                    what: "qdel".into(),
                    message: m,
                }
            } else {
                ExecError::Invalid(format!("qdel: {m}"))
            }
        })
    }

    async fn lookup_finished(&self, _id: &str) -> Option<EndKind> {
        // `qstat -x` (history) is already part of every query; there is no other record a
        // user can read.
        None
    }
}

/// The job id `qsub` printed (`1234.server`, or `1234[].server` for an array).
pub fn parse_qsub_output(out: &str) -> Result<String, ExecError> {
    let id = out
        .lines()
        .map(str::trim)
        .find(|l| !l.is_empty())
        .unwrap_or("");
    let seq = sequence_number(id);
    if seq.is_empty()
        || !seq.starts_with(|c: char| c.is_ascii_digit())
        || id.chars().any(char::is_whitespace)
    {
        return Err(ExecError::Invalid(format!(
            "qsub printed {out:?}, expected a job id such as 1234.server"
        )));
    }
    Ok(id.to_string())
}

/// Runs attempts as PBS batch jobs. Not run against a real PBS server (see the module docs).
pub struct PbsExecutor {
    core: BatchCore<Pbs>,
}

impl PbsExecutor {
    /// An executor that reports ends on `completions`. Needs a tokio runtime.
    pub fn new(config: PbsConfig, completions: UnboundedSender<Completion>) -> Self {
        let settings = PollSettings {
            poll_interval: config.poll_interval,
            max_backoff: config.max_backoff,
            marker_interval: config.marker_interval,
            submit_retries: config.submit_retries,
            max_jobs: config.max_jobs,
        };
        PbsExecutor {
            core: BatchCore::new(Pbs { config }, settings, completions),
        }
    }

    /// The job script this executor would submit for `req`.
    pub fn render_script(&self, req: &LaunchRequest) -> Result<String, ExecError> {
        let d = self.core.system().directives(req)?;
        batch::job_script(&d, req)
    }

    /// Submissions and status queries made so far.
    pub fn stats(&self) -> BatchStats {
        self.core.stats()
    }
}

crate::batch_executor!(PbsExecutor, "pbs");

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn job_names_start_with_a_letter_and_keep_the_path_readable() {
        assert_eq!(
            pbs_job_name("eos/V 0.95/it 3/solver"),
            "eos.V_0.95.it_3.solver"
        );
        assert_eq!(pbs_job_name("3x/a"), "r3x.a");
        assert_eq!(pbs_job_name(&"y".repeat(300)).len(), 236);
    }

    #[test]
    fn memory_and_walltime_in_pbs_units() {
        assert_eq!(pbs_mem("4G").as_deref(), Ok("4gb"));
        assert_eq!(pbs_mem("500").as_deref(), Ok("500mb"));
        assert_eq!(pbs_mem("2T").as_deref(), Ok("2tb"));
        assert_eq!(pbs_mem("64K").as_deref(), Ok("64kb"));
        assert!(pbs_mem("4X").is_err() && pbs_mem("G").is_err());
        assert_eq!(pbs_walltime(Duration::from_secs(90)), "00:01:30");
        assert_eq!(pbs_walltime(Duration::from_secs(50 * 3600 + 5)), "50:00:05");
    }

    #[test]
    fn slurm_named_resources_become_a_select_chunk() {
        let r = Resources {
            nodes: Some(2),
            ntasks: Some(8),
            cpus_per_task: Some(4),
            mem: Some("16G".into()),
            time: Some("1-00:30:00".into()),
            partition: Some("workq".into()),
            account: Some("proj1".into()),
            gres: Some("gpu:2".into()),
            ..Default::default()
        };
        let d = pbs_directives(&r, None, "c/p 1/it 2/solve", Path::new("/scratch/w1")).expect("ok");
        assert_eq!(
            d,
            [
                "#PBS -N c.p_1.it_2.solve",
                "#PBS -l select=2:ncpus=16:mpiprocs=4:ompthreads=4:mem=16gb:ngpus=2",
                "#PBS -l walltime=24:30:00",
                "#PBS -q workq",
                "#PBS -A proj1",
                "#PBS -o /scratch/w1/pbs.out",
                "#PBS -e /scratch/w1/pbs.err",
                "#PBS -j n",
            ]
        );
        let plain = pbs_directives(
            &Resources::default(),
            Some(Duration::from_secs(45)),
            "x",
            Path::new("/w"),
        )
        .expect("ok");
        assert_eq!(plain[1], "#PBS -l select=1:ncpus=1:mpiprocs=1");
        assert_eq!(plain[2], "#PBS -l walltime=00:00:45");
    }

    #[test]
    fn untranslatable_resources_are_refused_with_advice() {
        let msg = |r: Resources, wd: &str| match pbs_directives(&r, None, "x", Path::new(wd)) {
            Err(ExecError::Invalid(m)) => m,
            other => panic!("accepted: {other:?}"),
        };
        assert!(msg(
            Resources {
                qos: Some("high".into()),
                ..Default::default()
            },
            "/w"
        )
        .contains("extra"));
        assert!(msg(
            Resources {
                constraint: Some("avx2".into()),
                ..Default::default()
            },
            "/w"
        )
        .contains("extra"));
        assert!(msg(
            Resources {
                nodes: Some(3),
                ntasks: Some(4),
                ..Default::default()
            },
            "/w"
        )
        .contains("multiple"));
        assert!(msg(
            Resources {
                gres: Some("fpga:1".into()),
                ..Default::default()
            },
            "/w"
        )
        .contains("gpu:N"));
        assert!(msg(Resources::default(), "/w d").contains("spaces"));
    }

    #[test]
    fn qsub_output_gives_the_job_id() {
        assert_eq!(parse_qsub_output("1234.pbs01\n").expect("id"), "1234.pbs01");
        assert_eq!(parse_qsub_output("77[].pbs01\n").expect("id"), "77[].pbs01");
        assert!(parse_qsub_output("qsub: would exceed limit\n").is_err());
        assert!(parse_qsub_output("").is_err());
    }
}
