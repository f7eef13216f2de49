//! The Slurm executor: one batch job per attempt, submitted with `sbatch --parsable`, watched
//! with one `squeue` call per poll interval for all outstanding jobs, final status from the
//! exit marker the generated script writes (finished jobs vanish from the queue after
//! `MinJobAge`), cancelled with `scancel`. Also Slurm's time syntax and the helper that
//! lengthens a wall-time limit for a retry after TIMEOUT.
//!
//! The job script, markers and the poller are shared with PBS in [`batch`]; the helpers for
//! running rondo itself inside a chain of allocation jobs are in [`allocation`].

pub mod allocation;
pub mod batch;

use std::collections::HashMap;
use std::path::{Path, PathBuf};
use std::time::Duration;

use tokio::sync::mpsc::UnboundedSender;

use crate::executor::{Completion, ExecError, LaunchRequest, Resources, Usage};
use batch::{
    run_capture, sanitize_job_name, BatchCore, BatchStats, BatchSystem, EndKind, JobState,
    PollSettings,
};

/// How the Slurm executor talks to the scheduler.
#[derive(Debug, Clone)]
pub struct SlurmConfig {
    /// Time between two `squeue` calls. Conservative by default (30 s): one call covers all
    /// of the campaign's jobs, but sites limit the load on the controller.
    pub poll_interval: Duration,
    /// Longest wait between `squeue` calls while the controller does not answer.
    pub max_backoff: Duration,
    /// Time between two looks at the outstanding jobs' exit markers on the shared file
    /// system (one `stat` per job, no scheduler call). Default 1 s: a job's end is noticed
    /// about a second after it, not at the next `squeue`. `Duration::ZERO` turns it off.
    pub marker_interval: Duration,
    /// Program names (or paths) of the Slurm clients.
    pub sbatch: String,
    /// See [`SlurmConfig::sbatch`].
    pub squeue: String,
    /// See [`SlurmConfig::sbatch`].
    pub scancel: String,
    /// See [`SlurmConfig::sbatch`].
    pub scontrol: String,
    /// Resources used where a stage gives none.
    pub defaults: Resources,
    /// How often a submission is retried while the controller does not answer.
    pub submit_retries: u32,
    /// How many jobs may be queued or running at once.
    pub max_jobs: usize,
    /// The `JobCompLoc` file of `jobcomp/filetxt`, if the site keeps one readable: consulted
    /// for a job that left the queue without an exit marker.
    pub jobcomp_file: Option<PathBuf>,
    /// Longest time one client call may take before it counts as unanswered.
    pub client_timeout: Duration,
}

impl Default for SlurmConfig {
    fn default() -> Self {
        SlurmConfig {
            poll_interval: Duration::from_secs(30),
            max_backoff: Duration::from_secs(300),
            marker_interval: Duration::from_secs(1),
            sbatch: "sbatch".into(),
            squeue: "squeue".into(),
            scancel: "scancel".into(),
            scontrol: "scontrol".into(),
            defaults: Resources::default(),
            submit_retries: 5,
            max_jobs: 100,
            jobcomp_file: None,
            client_timeout: Duration::from_secs(60),
        }
    }
}

/// Parse a Slurm time (`--time`): `minutes`, `minutes:seconds`, `hours:minutes:seconds`,
/// `days-hours`, `days-hours:minutes`, `days-hours:minutes:seconds` (sbatch(1), `--time`).
pub fn parse_slurm_time(text: &str) -> Result<Duration, String> {
    let t = text.trim();
    let bad = || {
        format!("time {text:?} is not a Slurm time; use minutes, MM:SS, HH:MM:SS or D-HH[:MM[:SS]]")
    };
    let num = |s: &str| -> Result<u64, String> {
        if s.is_empty() || !s.bytes().all(|b| b.is_ascii_digit()) {
            return Err(bad());
        }
        s.parse::<u64>().map_err(|_| bad())
    };
    let parts = if let Some((d, rest)) = t.split_once('-') {
        let days = num(d)?;
        let parts: Vec<&str> = rest.split(':').collect();
        let (h, m, s) = match parts.as_slice() {
            [h] => (num(h)?, 0, 0),
            [h, m] => (num(h)?, num(m)?, 0),
            [h, m, s] => (num(h)?, num(m)?, num(s)?),
            _ => return Err(bad()),
        };
        (days, h, m, s)
    } else {
        let parts: Vec<&str> = t.split(':').collect();
        match parts.as_slice() {
            [m] => (0, 0, num(m)?, 0),
            [m, s] => (0, 0, num(m)?, num(s)?),
            [h, m, s] => (0, num(h)?, num(m)?, num(s)?),
            _ => return Err(bad()),
        }
    };
    let (days, h, m, s) = parts;
    // Checked: a limit past u64 seconds is refused, not wrapped around.
    let total = days
        .checked_mul(86_400)
        .and_then(|d| d.checked_add(h.checked_mul(3600)?))
        .and_then(|t| t.checked_add(m.checked_mul(60)?))
        .and_then(|t| t.checked_add(s))
        .ok_or_else(|| format!("time {text:?} is too long to count in seconds"))?;
    Ok(Duration::from_secs(total))
}

/// Format a duration as a Slurm time, rounded up to whole minutes (Slurm's resolution):
/// `[D-]HH:MM:00`.
pub fn format_slurm_time(d: Duration) -> String {
    let minutes = d.as_secs().div_ceil(60).max(1);
    let (days, rem) = (minutes / 1440, minutes % 1440);
    let (h, m) = (rem / 60, rem % 60);
    if days > 0 {
        format!("{days}-{h:02}:{m:02}:00")
    } else {
        format!("{h:02}:{m:02}:00")
    }
}

/// Resources for a retry after a wall-time kill: `time` multiplied by `factor` and rounded up
/// to whole minutes, at least one minute longer than before. Unchanged when no time is set or
/// it cannot be parsed (the launch would report that).
pub fn lengthen_time(res: &Resources, factor: f64) -> Resources {
    let mut out = res.clone();
    if let Some(t) = res.time.as_deref().and_then(|t| parse_slurm_time(t).ok()) {
        out.time = Some(format_slurm_time(lengthen_limit(t, factor)));
    }
    out
}

/// A time limit for a retry after a wall-time kill: `limit × factor` (factors below 1 or not
/// finite count as 1), at least one minute longer, rounded up to whole minutes (Slurm's
/// resolution). For stages whose limit is a `time-limit` rather than `resources.time`.
pub fn lengthen_limit(limit: Duration, factor: f64) -> Duration {
    let factor = if factor.is_finite() && factor > 1.0 {
        factor
    } else {
        1.0
    };
    // Saturating: a limit near the largest `Duration` stays there instead of overflowing.
    let longer = Duration::try_from_secs_f64(limit.as_secs_f64() * factor).unwrap_or(Duration::MAX);
    let at_least = longer.max(limit.saturating_add(Duration::from_secs(60)));
    Duration::from_secs(at_least.as_secs().div_ceil(60).saturating_mul(60))
}

/// The `#SBATCH` lines for these resources and this job name.
pub fn sbatch_directives(
    res: &Resources,
    time_limit: Option<Duration>,
    job_name: &str,
    comment: &str,
) -> Result<Vec<String>, ExecError> {
    let mut d = vec![format!(
        "#SBATCH --job-name={}",
        sanitize_job_name(job_name)
    )];
    let mut opt = |name: &str, value: Option<String>| -> Result<(), ExecError> {
        if let Some(v) = value {
            if v.is_empty() || v.chars().any(|c| c.is_whitespace() || c == '#') {
                return Err(ExecError::Invalid(format!(
                    "resource {name} = {v:?}: must be a single word (no spaces or '#')"
                )));
            }
            d.push(format!("#SBATCH --{name}={v}"));
        }
        Ok(())
    };
    opt("nodes", res.nodes.map(|v| v.to_string()))?;
    opt("ntasks", res.ntasks.map(|v| v.to_string()))?;
    opt("cpus-per-task", res.cpus_per_task.map(|v| v.to_string()))?;
    opt("mem", res.mem.clone())?;
    let time = match (&res.time, time_limit) {
        (Some(t), _) => {
            let parsed = parse_slurm_time(t).map_err(ExecError::Invalid)?;
            Some(format_slurm_time(parsed))
        }
        (None, Some(limit)) => Some(format_slurm_time(limit)),
        (None, None) => None,
    };
    opt("time", time)?;
    opt("partition", res.partition.clone())?;
    opt("account", res.account.clone())?;
    opt("qos", res.qos.clone())?;
    opt("gres", res.gres.clone())?;
    opt("constraint", res.constraint.clone())?;
    opt("comment", Some(sanitize_job_name(comment)))?;
    Ok(d)
}

/// Map a Slurm job state (squeue `%T`, scontrol `JobState=`) to a [`JobState`].
/// States from squeue(1), "JOB STATE CODES".
pub fn map_state(state: &str) -> JobState {
    let state = state.trim().trim_end_matches('+');
    match state {
        "COMPLETED" | "FAILED" | "OUT_OF_MEMORY" => JobState::Ended(EndKind::Ran { exit: None }),
        "TIMEOUT" | "DEADLINE" => JobState::Ended(EndKind::TimedOut),
        "NODE_FAIL" | "BOOT_FAIL" => JobState::Ended(EndKind::NodeFailure),
        "PREEMPTED" => JobState::Ended(EndKind::Preempted),
        "CANCELLED" => JobState::Ended(EndKind::Cancelled),
        "SPECIAL_EXIT" | "REVOKED" => JobState::Ended(EndKind::Other(state.to_string())),
        // PENDING, RUNNING, COMPLETING, CONFIGURING, SUSPENDED, REQUEUED, REQUEUE_FED,
        // REQUEUE_HOLD, RESIZING, RESV_DEL_HOLD, SIGNALING, STAGE_OUT, STOPPED and any
        // state a newer Slurm adds: not over.
        _ => JobState::Active,
    }
}

/// Parse `squeue -h -o '%i %T %r'` output: job id → state.
pub fn parse_squeue(text: &str) -> HashMap<String, JobState> {
    text.lines()
        .filter_map(|l| {
            let mut it = l.split_whitespace();
            Some((it.next()?.to_string(), map_state(it.next()?)))
        })
        .collect()
}

/// The `key=value` fields of one `scontrol -o show job` or jobcomp line. Values end at the
/// next ` key=` (values are not escaped, e.g. `Name=my job`).
pub fn parse_kv_line(line: &str) -> HashMap<String, String> {
    let mut out = HashMap::new();
    let mut key: Option<String> = None;
    let mut val = String::new();
    for word in line.split(' ') {
        match word.split_once('=') {
            Some((k, v))
                if !k.is_empty()
                    && k.bytes().all(|b| {
                        b.is_ascii_alphanumeric() || b == b'_' || b == b':' || b == b'/'
                    }) =>
            {
                if let Some(k0) = key.take() {
                    out.insert(k0, std::mem::take(&mut val).trim_end().to_string());
                }
                key = Some(k.to_string());
                val = v.to_string();
            }
            _ => {
                if key.is_some() {
                    val.push(' ');
                    val.push_str(word);
                }
            }
        }
    }
    if let Some(k0) = key {
        // `scontrol -o` ends its line with a space.
        out.insert(k0, val.trim_end().to_string());
    }
    out
}

/// The final state from `JobState=` and `ExitCode=status:signal` fields.
pub fn end_from_fields(f: &HashMap<String, String>) -> Option<EndKind> {
    let state = f.get("JobState")?;
    match map_state(state) {
        JobState::Active => None,
        JobState::Ended(EndKind::Ran { .. }) => {
            let exit = f.get("ExitCode").and_then(|e| {
                let (a, b) = e.split_once(':')?;
                Some((a.parse().ok()?, b.parse().ok()?))
            });
            Some(EndKind::Ran { exit })
        }
        JobState::Ended(other) => Some(other),
    }
}

/// The Slurm side of [`BatchCore`].
pub struct Slurm {
    config: SlurmConfig,
    workspace_id: String,
    /// Set once `sacct` failed (no accounting at this site, or no `sacct`): not asked again.
    accounting_off: std::sync::atomic::AtomicBool,
}

fn unavailable_or_invalid(what: &str, message: String) -> ExecError {
    // Observed with the controller down: "Unable to contact slurm controller (connect
    // failure)"; busy controllers answer "Socket timed out" (fact of the trade).
    let transient = [
        "Unable to contact",
        "Socket timed out",
        "did not answer",
        "Resource temporarily unavailable",
        "try again",
    ];
    if transient.iter().any(|t| message.contains(t)) {
        ExecError::Unavailable {
            what: what.to_string(),
            message,
        }
    } else {
        ExecError::Invalid(format!("{what}: {message}"))
    }
}

#[async_trait::async_trait]
impl BatchSystem for Slurm {
    fn kind(&self) -> &'static str {
        "slurm"
    }

    fn directives(&self, req: &LaunchRequest) -> Result<Vec<String>, ExecError> {
        let res = req.resources.over(&self.config.defaults);
        sbatch_directives(
            &res,
            req.time_limit,
            &req.job_name,
            &format!("rondo:{}:{}", self.workspace_id, req.attempt_id),
        )
    }

    async fn submit(&self, script: &Path, req: &LaunchRequest) -> Result<String, ExecError> {
        let res = req.resources.over(&self.config.defaults);
        let wd = req.workdir.display().to_string();
        let mut args = vec![
            "--parsable".to_string(),
            format!("--chdir={wd}"),
            format!("--output={wd}/slurm-%j.out"),
            format!("--error={wd}/slurm-%j.err"),
        ];
        args.extend(res.extra.iter().cloned());
        args.push(script.display().to_string());
        let out = run_capture(&self.config.sbatch, &args, self.config.client_timeout)
            .await
            .map_err(|m| unavailable_or_invalid("sbatch", m))?;
        // --parsable prints "jobid" or "jobid;cluster".
        let id = out.trim().split(';').next().unwrap_or("").to_string();
        if id.is_empty() || !id.bytes().all(|b| b.is_ascii_digit() || b == b'_') {
            return Err(ExecError::Invalid(format!(
                "sbatch printed {out:?}, expected a job id"
            )));
        }
        Ok(id)
    }

    async fn find_attempt(&self, attempt_id: i64) -> Result<Option<String>, ExecError> {
        let tag = format!("rondo:{}:{}", self.workspace_id, attempt_id);
        let args: Vec<String> = ["-h", "-t", "all", "-o", "%i %k"]
            .iter()
            .map(|s| s.to_string())
            .collect();
        let out = run_capture(&self.config.squeue, &args, self.config.client_timeout)
            .await
            .map_err(|m| unavailable_or_invalid("squeue", m))?;
        Ok(out.lines().find_map(|l| {
            let mut it = l.split_whitespace();
            let id = it.next()?;
            (it.next()? == tag).then(|| id.to_string())
        }))
    }

    async fn query(&self, ids: &[String]) -> Result<HashMap<String, JobState>, ExecError> {
        let args = vec![
            "-h".to_string(),
            "-o".to_string(),
            "%i %T %r".to_string(),
            "-t".to_string(),
            "all".to_string(),
            "-j".to_string(),
            ids.join(","),
        ];
        match run_capture(&self.config.squeue, &args, self.config.client_timeout).await {
            Ok(out) => Ok(parse_squeue(&out)),
            // Every listed job purged: squeue exits 1 with this message (22.05).
            Err(m) if m.contains("Invalid job id") => Ok(HashMap::new()),
            Err(m) => Err(ExecError::Unavailable {
                what: "squeue".into(),
                message: m,
            }),
        }
    }

    /// `sacct` for the job, where the site keeps accounting: the job's user and system
    /// CPU time and elapsed seconds, and the largest MaxRSS of its steps. The first failure
    /// (accounting storage disabled, no `sacct` beside `scontrol`) turns it off for this
    /// executor, so a site without accounting pays one call per run.
    async fn accounting(&self, id: &str) -> Option<Usage> {
        use std::sync::atomic::Ordering;
        if self.accounting_off.load(Ordering::Relaxed) {
            return None;
        }
        let sacct = Path::new(&self.config.scontrol).with_file_name("sacct");
        let args: Vec<String> = [
            "-j",
            id,
            "-n",
            "-P",
            "--noconvert",
            "-o",
            "JobID,UserCPU,SystemCPU,MaxRSS,ElapsedRaw",
        ]
        .iter()
        .map(|s| s.to_string())
        .collect();
        match run_capture(
            &sacct.display().to_string(),
            &args,
            self.config.client_timeout,
        )
        .await
        {
            Ok(out) => parse_sacct(id, &out),
            Err(m) => {
                tracing::info!(
                    "no Slurm accounting here ({}); an attempt's cost is the job script's own \
                     measure",
                    m.lines().next().unwrap_or("")
                );
                self.accounting_off.store(true, Ordering::Relaxed);
                None
            }
        }
    }

    async fn cancel(&self, id: &str) -> Result<(), ExecError> {
        run_capture(
            &self.config.scancel,
            &[id.to_string()],
            self.config.client_timeout,
        )
        .await
        .map(|_| ())
        .map_err(|m| unavailable_or_invalid("scancel", m))
    }

    async fn lookup_finished(&self, id: &str) -> Option<EndKind> {
        let args = vec![
            "-o".to_string(),
            "show".to_string(),
            "job".to_string(),
            id.to_string(),
        ];
        if let Ok(out) = run_capture(&self.config.scontrol, &args, self.config.client_timeout).await
        {
            if let Some(end) = out
                .lines()
                .next()
                .map(parse_kv_line)
                .as_ref()
                .and_then(end_from_fields)
            {
                return Some(end);
            }
        }
        let file = self.config.jobcomp_file.as_ref()?;
        let text = std::fs::read_to_string(file).ok()?;
        let prefix = format!("JobId={id} ");
        // A requeued job has one line per end; the last one counts.
        let line = text.lines().rev().find(|l| l.starts_with(&prefix))?;
        end_from_fields(&parse_kv_line(line))
    }
}

/// Runs attempts as Slurm batch jobs.
pub struct SlurmExecutor {
    core: BatchCore<Slurm>,
}

impl SlurmExecutor {
    /// An executor for the workspace `workspace_id` (recorded in each job's comment) that
    /// reports ends on `completions`. Needs a tokio runtime (the poller is a task).
    pub fn new(
        config: SlurmConfig,
        workspace_id: String,
        completions: UnboundedSender<Completion>,
    ) -> Self {
        let settings = PollSettings {
            poll_interval: config.poll_interval,
            max_backoff: config.max_backoff,
            marker_interval: config.marker_interval,
            submit_retries: config.submit_retries,
            max_jobs: config.max_jobs,
        };
        SlurmExecutor {
            core: BatchCore::new(
                Slurm {
                    accounting_off: Default::default(),
                    config,
                    workspace_id,
                },
                settings,
                completions,
            ),
        }
    }

    /// Job ids currently watched.
    pub fn watched(&self) -> Vec<String> {
        self.core.watched()
    }

    /// Submissions and status queries made so far.
    pub fn stats(&self) -> BatchStats {
        self.core.stats()
    }

    /// The job script this executor would submit for `req` (for `rondo` to show or test).
    pub fn render_script(&self, req: &LaunchRequest) -> Result<String, ExecError> {
        let d = self.core.system().directives(req)?;
        batch::job_script(&d, req)
    }
}

crate::batch_executor!(SlurmExecutor, "slurm");

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn slurm_times_parse_in_every_documented_form() {
        // Forms from sbatch(1), option --time.
        let s = |t: &str| parse_slurm_time(t).map(|d| d.as_secs());
        assert_eq!(s("90"), Ok(5400));
        assert_eq!(s("1:30"), Ok(90));
        assert_eq!(s("02:00:05"), Ok(7205));
        assert_eq!(s("1-2"), Ok(93_600));
        assert_eq!(s("1-02:30"), Ok(95_400));
        assert_eq!(s("2-00:00:10"), Ok(172_810));
        for bad in ["", "1:2:3:4", "a", "1-", "-1", "1:-2", "1.5"] {
            assert!(parse_slurm_time(bad).is_err(), "{bad:?} accepted");
        }
    }

    #[test]
    fn formatting_rounds_up_to_whole_minutes() {
        // Slurm's time resolution is one minute (sbatch(1)).
        assert_eq!(format_slurm_time(Duration::from_secs(10)), "00:01:00");
        assert_eq!(format_slurm_time(Duration::from_secs(90)), "00:02:00");
        assert_eq!(format_slurm_time(Duration::from_secs(3600)), "01:00:00");
        assert_eq!(
            format_slurm_time(Duration::from_secs(86_400 + 61)),
            "1-00:02:00"
        );
    }

    #[test]
    fn lengthened_time_is_longer_by_the_factor_or_a_minute() {
        let r = Resources {
            time: Some("1".into()),
            ..Default::default()
        };
        assert_eq!(lengthen_time(&r, 2.0).time.as_deref(), Some("00:02:00"));
        assert_eq!(lengthen_time(&r, 1.1).time.as_deref(), Some("00:02:00"));
        let r = Resources {
            time: Some("10:00:00".into()),
            ..Default::default()
        };
        assert_eq!(lengthen_time(&r, 1.5).time.as_deref(), Some("15:00:00"));
        assert_eq!(
            lengthen_time(&Resources::default(), 2.0),
            Resources::default()
        );
        let m = |s: u64, f: f64| lengthen_limit(Duration::from_secs(s), f).as_secs();
        assert_eq!(m(60, 2.0), 120);
        assert_eq!(m(600, 1.5), 900);
        assert_eq!(m(30, 1.0), 120); // 30 s + 1 min, rounded up to 2 min
        assert_eq!(m(100, f64::NAN), 180);
    }

    #[test]
    fn directives_use_slurm_option_names() {
        let r = Resources {
            nodes: Some(2),
            ntasks: Some(8),
            cpus_per_task: Some(4),
            mem: Some("4G".into()),
            time: Some("90".into()),
            partition: Some("batch".into()),
            account: Some("proj1".into()),
            qos: Some("normal".into()),
            gres: Some("gpu:1".into()),
            constraint: Some("avx2".into()),
            ..Default::default()
        };
        let d = sbatch_directives(&r, None, "eos/V 1/it 2/solver", "rondo:ws:3").expect("ok");
        assert_eq!(
            d,
            [
                "#SBATCH --job-name=eos/V_1/it_2/solver",
                "#SBATCH --nodes=2",
                "#SBATCH --ntasks=8",
                "#SBATCH --cpus-per-task=4",
                "#SBATCH --mem=4G",
                "#SBATCH --time=01:30:00",
                "#SBATCH --partition=batch",
                "#SBATCH --account=proj1",
                "#SBATCH --qos=normal",
                "#SBATCH --gres=gpu:1",
                "#SBATCH --constraint=avx2",
                "#SBATCH --comment=rondo:ws:3",
            ]
        );
        let t = sbatch_directives(
            &Resources::default(),
            Some(Duration::from_secs(30)),
            "x",
            "c",
        )
        .expect("ok");
        assert!(t.contains(&"#SBATCH --time=00:01:00".to_string()));
        let bad = Resources {
            partition: Some("a b".into()),
            ..Default::default()
        };
        assert!(sbatch_directives(&bad, None, "x", "c").is_err());
        let bad = Resources {
            time: Some("soon".into()),
            ..Default::default()
        };
        assert!(sbatch_directives(&bad, None, "x", "c").is_err());
    }

    #[test]
    fn squeue_and_scontrol_lines_are_parsed() {
        let q = parse_squeue("12 RUNNING None\n13 PENDING Resources\n14 TIMEOUT TimeLimit\n15 CANCELLED None\n16 NODE_FAIL NodeDown\n17 COMPLETED None\n");
        assert_eq!(q["12"], JobState::Active);
        assert_eq!(q["13"], JobState::Active);
        assert_eq!(q["14"], JobState::Ended(EndKind::TimedOut));
        assert_eq!(q["15"], JobState::Ended(EndKind::Cancelled));
        assert_eq!(q["16"], JobState::Ended(EndKind::NodeFailure));
        assert_eq!(q["17"], JobState::Ended(EndKind::Ran { exit: None }));
        // A jobcomp/filetxt line as written by slurmctld 22.05 (values are not escaped).
        let line = "JobId=25 UserId=root(0) GroupId=root(0) Name=my job JobState=FAILED Partition=debug TimeLimit=UNLIMITED NodeList=vm DerivedExitCode=0:0 ExitCode=3:0";
        let f = parse_kv_line(line);
        assert_eq!(f["Name"], "my job");
        let g = parse_kv_line("JobId=7 JobName=x Comment=rondo:ws:2 ");
        assert_eq!(g["Comment"], "rondo:ws:2");
        assert_eq!(
            end_from_fields(&f),
            Some(EndKind::Ran { exit: Some((3, 0)) })
        );
    }
}

/// `sacct`'s `[DD-[HH:]]MM:SS[.mmm]` as seconds.
fn sacct_seconds(t: &str) -> Option<f64> {
    let (days, rest) = match t.split_once('-') {
        Some((d, r)) => (d.parse::<f64>().ok()?, r),
        None => (0.0, t),
    };
    let mut secs = 0.0;
    for part in rest.split(':') {
        secs = secs * 60.0 + part.parse::<f64>().ok()?;
    }
    Some(days * 86_400.0 + secs)
}

/// `sacct`'s MaxRSS (`204800K`, `200M`, `2G`, or bytes without a suffix) in KiB.
fn sacct_kib(v: &str) -> Option<u64> {
    let (num, scale) = match v.chars().last()? {
        'K' => (&v[..v.len() - 1], 1.0),
        'M' => (&v[..v.len() - 1], 1024.0),
        'G' => (&v[..v.len() - 1], 1024.0 * 1024.0),
        'T' => (&v[..v.len() - 1], 1024.0 * 1024.0 * 1024.0),
        _ => (v, 1.0 / 1024.0),
    };
    Some((num.parse::<f64>().ok()? * scale).round() as u64)
}

/// The cost of job `id` from `sacct -n -P -o JobID,UserCPU,SystemCPU,MaxRSS,ElapsedRaw`:
/// CPU and elapsed time from the job's own line (which sums its steps), MaxRSS the largest
/// of any step. `None` when the job's line is missing.
pub fn parse_sacct(id: &str, out: &str) -> Option<Usage> {
    let mut usage = None;
    let mut rss: Option<u64> = None;
    for line in out.lines() {
        let f: Vec<&str> = line.split('|').collect();
        if f.len() < 5 {
            continue;
        }
        if let Some(k) = sacct_kib(f[3].trim()) {
            rss = Some(rss.map_or(k, |r| r.max(k)));
        }
        if f[0] == id {
            usage = Some(Usage {
                user_s: sacct_seconds(f[1].trim())?,
                system_s: sacct_seconds(f[2].trim())?,
                max_rss_kib: None,
                wall_s: f[4].trim().parse::<f64>().ok(),
                source: "sacct".to_string(),
            });
        }
    }
    usage.map(|u| Usage {
        max_rss_kib: rss,
        ..u
    })
}

#[cfg(test)]
mod accounting_tests {
    use super::*;

    #[test]
    fn sacct_lines_give_cpu_time_elapsed_and_the_largest_step_rss() {
        let out = "4242|01:02.500|00:03.250||75\n4242.batch|01:02.400|00:03.200|210944K|75\n\
                   4242.extern|00:00.001|00:00:00|1024K|75\n";
        let u = parse_sacct("4242", out).expect("the job's line");
        assert_eq!(u.user_s, 62.5);
        assert_eq!(u.system_s, 3.25);
        assert_eq!(u.max_rss_kib, Some(210_944));
        assert_eq!(u.wall_s, Some(75.0));
        assert_eq!(u.source, "sacct");
        assert_eq!(sacct_seconds("1-02:03:04"), Some(93_784.0));
        assert_eq!(sacct_kib("2G"), Some(2 * 1024 * 1024));
        assert_eq!(sacct_kib("2048"), Some(2));
        assert!(
            parse_sacct("7", out).is_none(),
            "another job's lines are not this job's"
        );
    }
}
