//! End-to-end tests of the Slurm executor on the real one-node Slurm (`scripts/dev-slurm`),
//! through the real `rondo` binary and a reduced copy of the demo campaign:
//!
//! - a run with `--on slurm` converges with bit-identical metrics and output hashes to a
//!   run with the local executor, one batch job per command attempt, and `rondo trace` shows
//!   the Slurm job ids (cross-checked against Slurm's own job-completion record);
//! - rondo SIGKILLed while jobs are pending and running, then run again: every outstanding job
//!   is adopted (finished ones and still-queued ones), no finished job is submitted again
//!   (counted in the job-completion record), and the numbers are those of the local run;
//! - `rondo cancel` while jobs run and wait: every outstanding job is `scancel`ed, the points are
//!   recorded cancelled, and the run exits with code 3.
//!
//! Without `sbatch`/a controller that answers, the tests skip loudly (tests/common/skip.rs),
//! unless `RONDO_REQUIRE_SLURM=1` or `CI=true`, which make them fail instead; so does a
//! job-completion record that cannot be read (`scripts/dev-slurm` configures one). The tests run one at a time (they
//! share the node's job slots) and occupy slots with "blocker" jobs of their own to hold the
//! campaign's jobs pending when they need that.

mod common;

use std::collections::{BTreeMap, BTreeSet, HashMap};
use std::path::{Path, PathBuf};
use std::process::{Child, Command, Stdio};
use std::sync::{Mutex, MutexGuard, OnceLock};
use std::time::{Duration, Instant};

use common::*;
use sqlx::Row;

/// Campaign name of every run here (the `{{seed}}` of a stage depends on it, so the local
/// reference and the Slurm runs must share it).
const CAMPAIGN: &str = "sweep-e2e";
/// The campaign file name inside each test directory.
const FILE: &str = "campaign.yaml";
/// The workspace rondo makes beside it.
const WS: &str = "campaign.rondo";
/// Command stages of the demo (`mix` is built in and runs inside rondo).
const COMMAND_STAGES: [&str; 4] = ["band", "project", "solve", "update"];

// ---------------------------------------------------------------- Slurm presence and helpers

/// Whether a working Slurm is here; skips loudly (or fails under RONDO_REQUIRE_SLURM=1).
fn slurm_or_skip() -> bool {
    let answers = |prog: &str, args: &[&str]| {
        Command::new(prog)
            .args(args)
            .stdout(Stdio::null())
            .stderr(Stdio::null())
            .status()
            .map(|s| s.success())
            .unwrap_or(false)
    };
    let ok = answers("sbatch", &["--version"]) && answers("sinfo", &["-h", "-o", "%T"]);
    if ok {
        return true;
    }
    skip_or_fail(
        "no working Slurm here (`sbatch --version` or `sinfo` failed)",
        "start the one-node Slurm with `bash scripts/dev-slurm start` (as root)",
        &["RONDO_REQUIRE_SLURM"],
    );
    false
}

/// One test at a time: they share the node's job slots and count its jobs.
fn serial() -> MutexGuard<'static, ()> {
    static LOCK: Mutex<()> = Mutex::new(());
    LOCK.lock().unwrap_or_else(|e| e.into_inner())
}

/// One line of `squeue` about a job.
#[derive(Debug, Clone)]
struct Job {
    id: String,
    state: String,
    name: String,
}

impl Job {
    /// Not yet in a final state.
    fn active(&self) -> bool {
        !matches!(
            self.state.as_str(),
            "COMPLETED"
                | "FAILED"
                | "CANCELLED"
                | "TIMEOUT"
                | "NODE_FAIL"
                | "PREEMPTED"
                | "BOOT_FAIL"
                | "DEADLINE"
                | "OUT_OF_MEMORY"
        )
    }
    fn running(&self) -> bool {
        matches!(self.state.as_str(), "RUNNING" | "COMPLETING")
    }
    fn pending(&self) -> bool {
        self.state == "PENDING"
    }
}

/// Every job Slurm still knows (`-t all`: finished ones too, until MinJobAge) whose working
/// directory lies under `root`.
fn jobs_under(root: &Path) -> Vec<Job> {
    let o = Command::new("squeue")
        .args(["-h", "-t", "all", "-o", "%i|%T|%j|%Z"])
        .output()
        .unwrap_or_else(|e| panic!("cannot run squeue: {e}"));
    assert!(o.status.success(), "squeue failed: {}", shown(&o));
    let root = root.display().to_string();
    String::from_utf8_lossy(&o.stdout)
        .lines()
        .filter_map(|l| {
            let f: Vec<&str> = l.splitn(4, '|').collect();
            (f.len() == 4 && f[3].starts_with(&root)).then(|| Job {
                id: f[0].trim().to_string(),
                state: f[1].trim().to_string(),
                name: f[2].trim().to_string(),
            })
        })
        .collect()
}

/// The job-completion record (`JobCompType=jobcomp/filetxt`) lines of jobs that ran under
/// `root`, as key → value maps; `None` (a loud skip of the cross-check, or a failure under
/// RONDO_REQUIRE_SLURM) when the site keeps no readable file.
fn jobcomp_under(root: &Path) -> Option<Vec<HashMap<String, String>>> {
    let o = Command::new("scontrol")
        .args(["show", "config"])
        .output()
        .unwrap_or_else(|e| panic!("cannot run scontrol: {e}"));
    assert!(o.status.success(), "scontrol show config: {}", shown(&o));
    let conf = String::from_utf8_lossy(&o.stdout);
    let get = |key: &str| {
        conf.lines().find_map(|l| {
            let (k, v) = l.split_once('=')?;
            (k.trim() == key).then(|| v.trim().to_string())
        })
    };
    let unreadable = |why: String| {
        skip_or_fail(
            &format!("Slurm's job-completion record cannot be read ({why}); the cross-check with it was left out"),
            "configure JobCompType=jobcomp/filetxt as `scripts/dev-slurm start` does",
            &["RONDO_REQUIRE_SLURM"],
        );
        None
    };
    if get("JobCompType").as_deref() != Some("jobcomp/filetxt") {
        return unreadable(format!("JobCompType is {:?}", get("JobCompType")));
    }
    let Some(loc) = get("JobCompLoc") else {
        return unreadable("no JobCompLoc".into());
    };
    let text = match std::fs::read_to_string(&loc) {
        Ok(t) => t,
        Err(e) => return unreadable(format!("{loc}: {e}")),
    };
    let root = root.display().to_string();
    Some(
        text.lines()
            .map(|l| {
                // values here have no spaces (our names and paths are plain)
                l.split(' ')
                    .filter_map(|w| w.split_once('='))
                    .map(|(k, v)| (k.to_string(), v.to_string()))
                    .collect::<HashMap<_, _>>()
            })
            .filter(|m| m.get("WorkDir").is_some_and(|w| w.starts_with(&root)))
            .collect(),
    )
}

/// Jobs that keep `n` of the node's slots busy until dropped (then `scancel`ed).
struct Blockers(Vec<String>);

impl Blockers {
    fn submit(n: usize) -> Blockers {
        let mut ids = Vec::new();
        for _ in 0..n {
            let o = Command::new("sbatch")
                .args([
                    "--parsable",
                    "--job-name=rondo-e2e-blocker",
                    "--time=10",
                    "--output=/dev/null",
                    "--error=/dev/null",
                    "--chdir=/tmp",
                    "--wrap",
                    "sleep 600",
                ])
                .output()
                .unwrap_or_else(|e| panic!("cannot run sbatch: {e}"));
            assert!(o.status.success(), "blocker sbatch: {}", shown(&o));
            ids.push(String::from_utf8_lossy(&o.stdout).trim().to_string());
        }
        let b = Blockers(ids);
        b.wait_running();
        b
    }

    /// Wait until every blocker holds its slot.
    fn wait_running(&self) {
        wait_for("the blocker jobs to run", Duration::from_secs(90), || {
            let o = Command::new("squeue")
                .args(["-h", "-t", "all", "-o", "%i %T", "-j", &self.0.join(",")])
                .output()
                .ok()?;
            let text = String::from_utf8_lossy(&o.stdout).to_string();
            let running = text.lines().filter(|l| l.ends_with(" RUNNING")).count();
            (running == self.0.len()).then_some(())
        });
    }
}

impl Drop for Blockers {
    fn drop(&mut self) {
        if !self.0.is_empty() {
            let _ = Command::new("scancel").args(&self.0).status();
        }
    }
}

/// A rondo run in the background, SIGKILLed if the test ends first.
struct Background(Option<Child>);

impl Background {
    fn run(dir: &Path, log: &str) -> Background {
        let out = std::fs::File::create(dir.join(log)).unwrap_or_else(|e| panic!("{e}"));
        let child = Command::new(rondo())
            .args([
                "run",
                FILE,
                "--on",
                "slurm",
                "--poll-interval",
                "1",
                "--max-running",
                "4",
                "-q",
            ])
            .current_dir(dir)
            .env("PATH", path_with_binaries())
            .stdout(Stdio::null())
            .stderr(out)
            .spawn()
            .unwrap_or_else(|e| panic!("spawn rondo: {e}"));
        Background(Some(child))
    }

    /// Panic (with its log) if rondo has already exited.
    fn still_running(&mut self, dir: &Path, log: &str) {
        if let Some(c) = self.0.as_mut() {
            if let Ok(Some(st)) = c.try_wait() {
                panic!(
                    "rondo ended early ({st}):\n{}",
                    std::fs::read_to_string(dir.join(log)).unwrap_or_default()
                );
            }
        }
    }

    fn sigkill(&mut self) {
        if let Some(mut c) = self.0.take() {
            let _ = c.kill(); // SIGKILL
            let _ = c.wait();
        }
    }

    /// Wait for the exit code (bounded; SIGKILLed past the bound).
    fn exit_code(&mut self, limit: Duration) -> Option<i32> {
        let mut c = self.0.take()?;
        let end = Instant::now() + limit;
        loop {
            if let Ok(Some(st)) = c.try_wait() {
                return st.code();
            }
            if Instant::now() > end {
                let _ = c.kill();
                let _ = c.wait();
                panic!("rondo did not finish within {limit:?}");
            }
            std::thread::sleep(Duration::from_millis(100));
        }
    }
}

impl Drop for Background {
    fn drop(&mut self) {
        self.sigkill();
    }
}

/// Poll `f` every 50 ms until it gives a value; panic naming `what` after `limit` (a guard
/// against a hung test, not a timing assertion).
fn wait_for<T>(what: &str, limit: Duration, mut f: impl FnMut() -> Option<T>) -> T {
    let end = Instant::now() + limit;
    loop {
        if let Some(v) = f() {
            return v;
        }
        assert!(
            Instant::now() < end,
            "gave up waiting for {what} after {limit:?}"
        );
        std::thread::sleep(Duration::from_millis(50));
    }
}

// ---------------------------------------------------------------- campaign and store

/// The demo, reduced: 2 volumes × 1 temperature, a 8×8×8 k mesh and looser tolerances
/// (converges in about 10 iterations). With `engine`, the engine program is replaced.
fn campaign_in(dir: &Path, engine: Option<&Path>) {
    campaign_placed(dir, engine, false);
}

/// The reduced demo; `host_stages`: keep its `placement: host` stages where rondo runs.
fn campaign_placed(dir: &Path, engine: Option<&Path>, host_stages: bool) {
    let ex = repo().join("examples");
    let mut s = std::fs::read_to_string(ex.join("model-sweep.yaml"))
        .unwrap_or_else(|e| panic!("read the demo: {e}"));
    if !host_stages {
        // These tests exercise the batch path: every command stage a job of its own (the demo
        // keeps its light stages on the host; `placement_keeps_light_stages_on_the_host…` runs
        // it as it is).
        assert!(
            s.contains("placement: host"),
            "the demo no longer places stages"
        );
        s = s.replace("placement: host", "placement: batch");
    }
    let mut edit = |from: &str, to: &str| {
        assert!(s.contains(from), "the demo no longer contains {from:?}");
        s = s.replacen(from, to, 1);
    };
    edit("campaign: model-sweep", &format!("campaign: {CAMPAIGN}"));
    edit("kmesh: 12 ", "kmesh: 8 ");
    edit(
        "volume: [26.0, 27.0, 28.0, 29.0, 30.0]",
        "volume: [27.0, 29.0]",
    );
    edit("temperature: [300, 1200]", "temperature: [300]");
    edit(
        "metric: update.n_f, change-below: 1.0e-6",
        "metric: update.n_f, change-below: 1.0e-3",
    );
    edit(
        "metric: update.energy, change-below: 1.0e-7",
        "metric: update.energy, change-below: 1.0e-4",
    );
    if let Some(p) = engine {
        edit(
            "engine: { path: model-solid, version-flag: --version }",
            &format!(
                "engine: {{ path: \"{}\", version-flag: --version }}",
                p.display()
            ),
        );
    }
    std::fs::write(dir.join(FILE), s).unwrap_or_else(|e| panic!("{e}"));
    std::fs::create_dir_all(dir.join("start")).unwrap_or_else(|e| panic!("{e}"));
    for f in ["density.json", "sigma.npy"] {
        std::fs::copy(ex.join("start").join(f), dir.join("start").join(f))
            .unwrap_or_else(|e| panic!("copy start file: {e}"));
    }
}

/// The same campaign with the local executor, run once for all tests.
fn local_reference() -> &'static Record {
    static REF: OnceLock<Record> = OnceLock::new();
    REF.get_or_init(|| {
        let _ = model_solid();
        let d = tempfile::tempdir().unwrap_or_else(|e| panic!("{e}"));
        campaign_in(d.path(), None);
        let o = run_rondo(d.path(), &["run", FILE, "--max-running", "2", "-q"]);
        assert_eq!(
            o.status.code(),
            Some(0),
            "local reference run: {}",
            shown(&o)
        );
        let r = record(&d.path().join(WS));
        assert!(!r.is_empty());
        r
    })
}

/// Same succeeded attempts, same output hashes, same metric bits.
fn assert_same_numbers(reference: &Record, got: &Record, what: &str) {
    let a: BTreeSet<_> = reference.keys().collect();
    let b: BTreeSet<_> = got.keys().collect();
    assert_eq!(a, b, "{what}: the same (point, iteration, stage) succeeded");
    let mut metrics = 0;
    for (key, want) in reference {
        let have = &got[key];
        assert_eq!(have.0, want.0, "{what}: output hashes of {key:?}");
        assert_eq!(have.1, want.1, "{what}: metric bits of {key:?}");
        metrics += want.1.len();
    }
    eprintln!(
        "{what}: {} succeeded attempts and {metrics} metric values identical to the local run",
        reference.len()
    );
}

fn all_converged(dir: &Path) {
    let s = status_json(dir, &dir.join(WS));
    let points = s["points"].as_array().cloned().unwrap_or_default();
    assert_eq!(points.len(), 2, "{s}");
    for p in &points {
        assert_eq!(p["state"], "converged", "{p}");
    }
}

/// An attempt row.
#[derive(Debug, Clone)]
struct Attempt {
    id: i64,
    point: String,
    iteration: i64,
    stage: String,
    state: String,
    executor: String,
    handle: Option<String>,
    workdir: PathBuf,
    failure_kind: Option<String>,
    failure_message: Option<String>,
}

fn attempts(ws: &Path, filter: &'static str) -> Vec<Attempt> {
    query(ws, move |pool| {
        Box::pin(async move {
            sqlx::query(&format!(
                "SELECT id, point, iteration, stage, state, executor, handle_id, workdir, failure_kind, \
                 failure_message \
                 FROM attempts {filter} ORDER BY id"
            ))
            .fetch_all(pool)
            .await
            .unwrap_or_else(|e| panic!("{e}"))
            .into_iter()
            .map(|r| Attempt {
                id: r.get(0),
                point: r.get(1),
                iteration: r.get(2),
                stage: r.get(3),
                state: r.get(4),
                executor: r.get(5),
                handle: r.get(6),
                workdir: PathBuf::from(r.get::<String, _>(7)),
                failure_kind: r.get(8),
                failure_message: r.get(9),
            })
            .collect()
        })
    })
}

/// (kind, attempt id, detail) of the events of some kind.
fn events(ws: &Path, kind: &'static str) -> Vec<(Option<i64>, String)> {
    query(ws, move |pool| {
        Box::pin(async move {
            sqlx::query(
                "SELECT attempt_id, coalesce(detail, '') FROM events WHERE kind = ? ORDER BY seq",
            )
            .bind(kind)
            .fetch_all(pool)
            .await
            .unwrap_or_else(|e| panic!("{e}"))
            .into_iter()
            .map(|r| (r.get(0), r.get(1)))
            .collect()
        })
    })
}

/// The model engine behind a shell wrapper that first sleeps two minutes (not for
/// `--version`), so that its jobs are surely running when a test acts on them.
fn slow_engine(dir: &Path) -> PathBuf {
    let slow = dir.join("slow-engine");
    std::fs::write(
        &slow,
        format!(
            "#!/bin/sh\ncase \"$1\" in --version) ;; *) sleep 120 ;; esac\nexec '{}' \"$@\"\n",
            model_solid().display()
        ),
    )
    .unwrap_or_else(|e| panic!("{e}"));
    use std::os::unix::fs::PermissionsExt;
    std::fs::set_permissions(&slow, std::fs::Permissions::from_mode(0o755))
        .unwrap_or_else(|e| panic!("{e}"));
    slow
}

fn job_name(a: &Attempt) -> String {
    format!("{CAMPAIGN}.{}.i{}.{}", a.point, a.iteration, a.stage)
}

// ---------------------------------------------------------------- tests

#[test]
fn slurm_run_matches_the_local_run_and_trace_shows_job_ids() {
    let _serial = serial();
    if !slurm_or_skip() {
        return;
    }
    let t0 = Instant::now();
    let reference = local_reference();
    let d = tempfile::tempdir().unwrap_or_else(|e| panic!("{e}"));
    let dir = d.path();
    campaign_in(dir, None);
    let t1 = Instant::now();
    let o = run_rondo(
        dir,
        &[
            "run",
            FILE,
            "--on",
            "slurm",
            "--poll-interval",
            "1",
            "--max-running",
            "4",
            "-q",
        ],
    );
    assert_eq!(o.status.code(), Some(0), "{}", shown(&o));
    eprintln!("slurm run: {:.1} s", t1.elapsed().as_secs_f64());
    let ws = dir.join(WS);
    all_converged(dir);
    assert_same_numbers(reference, &record(&ws), "slurm run");

    // One batch job per command attempt, each attempt succeeded on its first try.
    let all = attempts(&ws, "");
    let mut ids = BTreeSet::new();
    for a in &all {
        assert_eq!(a.state, "succeeded", "{a:?}");
        if COMMAND_STAGES.contains(&a.stage.as_str()) {
            assert_eq!(a.executor, "slurm", "{a:?}");
            let id = a.handle.clone().unwrap_or_default();
            assert!(
                !id.is_empty() && id.bytes().all(|b| b.is_ascii_digit()),
                "Slurm job id of {a:?}"
            );
            assert!(ids.insert(id), "job id used twice: {a:?}");
        } else {
            assert_eq!(a.executor, "builtin", "{a:?}");
        }
    }
    let wanted = reference
        .keys()
        .filter(|k| COMMAND_STAGES.contains(&k.2.as_str()))
        .count();
    assert!(wanted > 0, "the reference ran no command stage");
    assert_eq!(ids.len(), wanted, "one batch job per command attempt");
    // Each batch job measured its command (the job script's `times`; `sacct` where this
    // Slurm keeps accounting, which the dev Slurm does not), and status sums it per stage.
    let sources = strings(
        &ws,
        "SELECT DISTINCT coalesce(usage_source, 'none') || ' ' || (cpu_user_s IS NOT NULL) \
         FROM attempts WHERE executor = 'slurm'",
    );
    assert!(
        sources
            .iter()
            .all(|s| s == "job-script 1" || s == "sacct 1"),
        "every batch attempt's cost was measured: {sources:?}"
    );
    let s = status_json(dir, &ws);
    for st in COMMAND_STAGES {
        let c = &s["usage"]["by_stage"][st];
        assert!(
            c["attempts"].as_i64().unwrap_or(0) > 0 && c["core_hours"].as_f64().is_some(),
            "status sums the cost of stage {st}: {c}"
        );
    }
    // Slurm's own record agrees: each of these jobs ran once, under the attempt's name, in
    // the attempt's scratch directory, and completed.
    // (skipped loudly, or failed under RONDO_REQUIRE_SLURM, when there is no record)
    if let Some(lines) = jobcomp_under(&ws) {
        assert_eq!(
            lines.len(),
            ids.len(),
            "jobs Slurm recorded for this workspace"
        );
        let by_id: HashMap<&str, &HashMap<String, String>> = lines
            .iter()
            .map(|l| (l.get("JobId").map(String::as_str).unwrap_or(""), l))
            .collect();
        for a in all.iter().filter(|a| a.executor == "slurm") {
            let l = by_id
                .get(a.handle.as_deref().unwrap_or(""))
                .unwrap_or_else(|| panic!("{a:?} has no job-completion line"));
            assert_eq!(l["Name"], job_name(a), "{a:?}");
            assert_eq!(l["JobState"], "COMPLETED", "{a:?}");
            assert_eq!(
                Path::new(&l["WorkDir"]),
                a.workdir.as_path(),
                "{a:?} ran in its scratch directory"
            );
        }
    }

    // `rondo trace` of p001's final mixed density, copied out of the workspace: the mix
    // stage ends the iteration, so every stage of it is upstream.
    let last = all
        .iter()
        .filter(|a| a.point == "p001" && a.stage == "mix")
        .max_by_key(|a| a.iteration)
        .cloned()
        .unwrap_or_else(|| panic!("no mix attempt of p001"));
    let hash: String = query(&ws, move |pool| {
        Box::pin(async move {
            sqlx::query_scalar(
                "SELECT artifact FROM attempt_outputs WHERE attempt_id = ? AND role = 'density'",
            )
            .bind(last.id)
            .fetch_one(pool)
            .await
            .unwrap_or_else(|e| panic!("{e}"))
        })
    });
    let copy = dir.join("final-density.json");
    std::fs::copy(ws.join("store").join(&hash[..2]).join(&hash[2..]), &copy)
        .unwrap_or_else(|e| panic!("{e}"));
    let o = run_rondo(
        dir,
        &[
            "trace",
            "--workspace",
            &ws.display().to_string(),
            "--json",
            &copy.display().to_string(),
        ],
    );
    assert!(o.status.success(), "{}", shown(&o));
    let t: serde_json::Value = serde_json::from_slice(&o.stdout).unwrap_or_else(|e| panic!("{e}"));
    assert_eq!(t["target"], hash.as_str());
    let traced = t["attempts"].as_array().cloned().unwrap_or_default();
    let handles: HashMap<i64, Option<String>> =
        all.iter().map(|a| (a.id, a.handle.clone())).collect();
    let mut shown_ids = 0;
    for stage in ["band", "project", "solve", "mix", "update"] {
        let a = traced
            .iter()
            .find(|a| a["stage"] == stage && a["iteration"] == last.iteration)
            .unwrap_or_else(|| panic!("trace: no {stage} of iteration {}", last.iteration));
        let id = a["id"].as_i64().unwrap_or(-1);
        if stage == "mix" {
            assert_eq!(a["executor"], "builtin", "{a}");
            continue;
        }
        assert_eq!(a["executor"], "slurm", "{a}");
        let job = a["job_id"].as_str().unwrap_or_default();
        assert!(
            !job.is_empty() && job.bytes().all(|b| b.is_ascii_digit()),
            "trace shows the Slurm job id: {a}"
        );
        assert_eq!(Some(job), handles[&id].as_deref(), "{a}");
        shown_ids += 1;
    }
    // every command attempt upstream, back to iteration 1, carries its job id
    for a in &traced {
        if a["executor"] == "slurm" {
            assert!(a["job_id"].as_str().is_some_and(|j| !j.is_empty()), "{a}");
        }
    }
    assert!(traced
        .iter()
        .any(|a| a["iteration"] == 1 && a["stage"] == "band" && a["executor"] == "slurm"));
    eprintln!(
        "trace: {} upstream attempts, job ids shown ({shown_ids} checked in the last iteration); \
         test took {:.1} s",
        traced.len(),
        t0.elapsed().as_secs_f64()
    );
}

#[test]
fn killed_while_jobs_wait_and_run_adopts_them_and_redoes_nothing() {
    let _serial = serial();
    if !slurm_or_skip() {
        return;
    }
    let t0 = Instant::now();
    let reference = local_reference();
    let d = tempfile::tempdir().unwrap_or_else(|e| panic!("{e}"));
    let dir = d.path();
    campaign_in(dir, None);
    let ws = dir.join(WS);

    // Kill 1: three of the four slots are held, so one campaign job runs while the other
    // point's job waits; rondo is killed at such an instant, after some jobs have finished.
    let blockers = Blockers::submit(3);
    let mut run = Background::run(dir, "run1.log");
    let at_kill1 = wait_for(
        "a campaign job running while another waits",
        Duration::from_secs(120),
        || {
            run.still_running(dir, "run1.log");
            let jobs = jobs_under(&ws);
            let done = jobs.iter().filter(|j| j.state == "COMPLETED").count();
            (done >= 4 && jobs.iter().any(Job::running) && jobs.iter().any(Job::pending))
                .then_some(jobs)
        },
    );
    run.sigkill();
    let active1: Vec<Job> = at_kill1.iter().filter(|j| j.active()).cloned().collect();
    eprintln!("kill 1 with jobs {active1:?}");
    let out1 = attempts(&ws, "WHERE state IN ('planned', 'submitted', 'running')");
    // every job Slurm has for the campaign is recorded with its attempt
    for j in &active1 {
        assert!(
            out1.iter()
                .any(|a| a.handle.as_deref() == Some(j.id.as_str())),
            "job {j:?} is not recorded as an outstanding attempt: {out1:?}"
        );
    }
    // The jobs finish while no orchestrator watches.
    drop(blockers);
    wait_for(
        "the campaign's jobs to finish",
        Duration::from_secs(60),
        || (!jobs_under(&ws).iter().any(Job::active)).then_some(()),
    );
    let finished1: Vec<Attempt> = out1
        .iter()
        .filter(|a| a.handle.is_some())
        .cloned()
        .collect();
    assert!(
        finished1.len() >= 2,
        "both points had a job outstanding: {out1:?}"
    );
    for a in &finished1 {
        assert!(
            a.workdir.join(".rondo-exit").is_file(),
            "{a:?} finished with its exit marker"
        );
    }

    // Rerun 1 adopts them as finished; kill 2 while all four slots are held, so the
    // campaign's jobs are queued, and rerun 2 adopts them as still queued.
    let mut run = Background::run(dir, "run2.log");
    let adopted_ids = |ws: &Path| -> BTreeSet<i64> {
        events(ws, "attempt-adopted")
            .into_iter()
            .filter_map(|(id, _)| id)
            .collect()
    };
    wait_for("rerun 1 to adopt the jobs", Duration::from_secs(60), || {
        run.still_running(dir, "run2.log");
        let got = adopted_ids(&ws);
        finished1.iter().all(|a| got.contains(&a.id)).then_some(())
    });
    let blockers = Blockers::submit(4);
    let at_kill2 = wait_for(
        "the campaign's jobs queued behind the blockers",
        Duration::from_secs(60),
        || {
            run.still_running(dir, "run2.log");
            let jobs = jobs_under(&ws);
            (jobs.iter().any(Job::pending) && !jobs.iter().any(Job::running)).then_some(jobs)
        },
    );
    run.sigkill();
    let pending2: Vec<Job> = at_kill2.iter().filter(|j| j.pending()).cloned().collect();
    eprintln!("kill 2 with queued jobs {pending2:?}");
    let out2 = attempts(&ws, "WHERE state IN ('planned', 'submitted', 'running')");
    let queued2: Vec<Attempt> = out2
        .iter()
        .filter(|a| {
            pending2
                .iter()
                .any(|j| a.handle.as_deref() == Some(j.id.as_str()))
        })
        .cloned()
        .collect();
    assert_eq!(queued2.len(), pending2.len(), "{out2:?} vs {pending2:?}");
    let mut run = Background::run(dir, "run3.log");
    wait_for(
        "rerun 2 to adopt the queued jobs",
        Duration::from_secs(60),
        || {
            run.still_running(dir, "run3.log");
            let got = adopted_ids(&ws);
            queued2.iter().all(|a| got.contains(&a.id)).then_some(())
        },
    );
    // still queued: rerun 2 must have watched them, not resubmitted them
    let still: Vec<Job> = jobs_under(&ws)
        .into_iter()
        .filter(|j| pending2.iter().any(|p| p.id == j.id))
        .collect();
    assert_eq!(still.len(), pending2.len(), "{still:?} vs {pending2:?}");
    assert!(still.iter().all(Job::active), "{still:?}");
    drop(blockers);
    let code = run.exit_code(Duration::from_secs(180));
    assert_eq!(
        code,
        Some(0),
        "{}",
        std::fs::read_to_string(dir.join("run3.log")).unwrap_or_default()
    );

    // How each was adopted.
    let adopted: HashMap<i64, String> = events(&ws, "attempt-adopted")
        .into_iter()
        .filter_map(|(id, d)| Some((id?, d)))
        .collect();
    for a in &finished1 {
        assert_eq!(
            adopted[&a.id], "finished while no orchestrator watched",
            "{a:?}"
        );
    }
    for a in &queued2 {
        assert_eq!(adopted[&a.id], "still queued or running", "{a:?}");
    }
    // Each adopted attempt succeeded under its original job id.
    let all = attempts(&ws, "");
    for a in finished1.iter().chain(&queued2) {
        let now = all
            .iter()
            .find(|b| b.id == a.id)
            .cloned()
            .unwrap_or_else(|| panic!());
        assert_eq!(now.state, "succeeded", "{now:?}");
        assert_eq!(now.handle, a.handle, "{now:?}");
    }
    // Zero resubmissions: one attempt per (point, iteration, stage) that had a job; no lost
    // attempt that had one; one Slurm job per name.
    let mut per_key: BTreeMap<(String, i64, String), Vec<&Attempt>> = BTreeMap::new();
    for a in &all {
        per_key
            .entry((a.point.clone(), a.iteration, a.stage.clone()))
            .or_default()
            .push(a);
    }
    let mut retried_unsubmitted = 0;
    for (key, v) in &per_key {
        let with_job: Vec<_> = v.iter().filter(|a| a.handle.is_some()).collect();
        assert!(
            with_job.len() <= 1,
            "{key:?} was submitted more than once: {with_job:?}"
        );
        retried_unsubmitted += v.len() - 1;
        for a in v.iter().filter(|a| a.state != "succeeded") {
            assert!(
                a.handle.is_none() && a.state == "lost",
                "only attempts never submitted may be lost and redone: {a:?}"
            );
        }
    }
    let slurm_attempts = all.iter().filter(|a| a.handle.is_some()).count();
    let wanted = reference
        .keys()
        .filter(|k| COMMAND_STAGES.contains(&k.2.as_str()))
        .count();
    assert_eq!(
        slurm_attempts, wanted,
        "one batch job per command stage run"
    );
    if let Some(lines) = jobcomp_under(&ws) {
        let mut names: BTreeMap<String, usize> = BTreeMap::new();
        for l in &lines {
            *names
                .entry(l.get("Name").cloned().unwrap_or_default())
                .or_default() += 1;
        }
        let twice: Vec<_> = names.iter().filter(|(_, n)| **n > 1).collect();
        assert!(twice.is_empty(), "jobs Slurm ran more than once: {twice:?}");
        assert_eq!(lines.len(), wanted, "jobs Slurm ran for this campaign");
    }
    all_converged(dir);
    assert_same_numbers(reference, &record(&ws), "killed twice and rerun");
    eprintln!(
        "kill test: {} adopted finished, {} adopted queued, {retried_unsubmitted} never-submitted \
         attempt(s) redone, {wanted} jobs in all; took {:.1} s",
        finished1.len(),
        queued2.len(),
        t0.elapsed().as_secs_f64()
    );
}

/// After a cancel: every job of `before` is CANCELLED in Slurm's view `after`, and every
/// point of the campaign is `cancelled`. Returns the attempts of the store.
fn assert_jobs_and_points_cancelled(
    dir: &Path,
    ws: &Path,
    before: &[Job],
    after: &[Job],
) -> Vec<Attempt> {
    for j in before {
        let now = after
            .iter()
            .find(|a| a.id == j.id)
            .unwrap_or_else(|| panic!("{j:?} forgotten by Slurm already"));
        assert_eq!(now.state, "CANCELLED", "{j:?} -> {now:?}");
    }
    let s = status_json(dir, ws);
    let points = s["points"].as_array().cloned().unwrap_or_default();
    assert_eq!(points.len(), 2, "{s}");
    for p in points {
        assert_eq!(p["state"], "cancelled", "{p}");
    }
    attempts(ws, "")
}

/// Wait until no process of the workspace is left (the cancelled jobs' programs).
fn wait_for_no_processes(ws: &Path) {
    let ws_id = workspace_id(ws);
    wait_for(
        "the cancelled jobs' processes to end",
        Duration::from_secs(30),
        || processes_of_workspace(&ws_id).is_empty().then_some(()),
    );
}

#[test]
fn cancel_scancels_every_outstanding_job() {
    let _serial = serial();
    if !slurm_or_skip() {
        return;
    }
    let t0 = Instant::now();
    let d = tempfile::tempdir().unwrap_or_else(|e| panic!("{e}"));
    let dir = d.path();
    // The engine, slowed down so that a job is surely running when the cancel comes.
    let slow = slow_engine(dir);
    campaign_in(dir, Some(&slow));
    let ws = dir.join(WS);
    let blockers = Blockers::submit(3);
    let mut run = Background::run(dir, "run.log");
    let before = wait_for(
        "one campaign job running and one waiting",
        Duration::from_secs(60),
        || {
            run.still_running(dir, "run.log");
            let jobs = jobs_under(&ws);
            (jobs.iter().any(|j| j.state == "RUNNING") && jobs.iter().any(Job::pending))
                .then_some(jobs)
        },
    );
    eprintln!("cancelling with jobs {before:?}");
    let o = run_rondo(dir, &["cancel", FILE]);
    assert_eq!(o.status.code(), Some(0), "{}", shown(&o));
    let code = run.exit_code(Duration::from_secs(60));
    assert_eq!(
        code,
        Some(3),
        "run exit code after cancel: {}",
        std::fs::read_to_string(dir.join("run.log")).unwrap_or_default()
    );
    drop(blockers);

    // Slurm: none of the campaign's jobs is left, the two were cancelled.
    let after = jobs_under(&ws);
    let left: Vec<_> = after.iter().filter(|j| j.active()).collect();
    assert!(left.is_empty(), "jobs left after the cancel: {left:?}");
    let all = assert_jobs_and_points_cancelled(dir, &ws, &before, &after);
    // The store: those attempts cancelled, nothing outstanding, why recorded.
    for j in &before {
        let a = all
            .iter()
            .find(|a| a.handle.as_deref() == Some(j.id.as_str()))
            .unwrap_or_else(|| panic!("no attempt for job {j:?}"));
        assert_eq!(a.state, "cancelled", "{a:?}");
        assert_eq!(a.failure_kind.as_deref(), Some("cancelled"), "{a:?}");
        assert!(
            a.failure_message
                .as_deref()
                .is_some_and(|m| m.contains("rondo cancel")),
            "why is recorded: {a:?}"
        );
        assert_eq!(a.stage, "band", "{a:?}");
        assert_eq!(j.name, job_name(a), "the job is named after its attempt");
        assert!(
            !a.workdir.join(".rondo-exit").exists(),
            "{a:?} did not finish"
        );
    }
    assert!(
        all.iter()
            .all(|a| !matches!(a.state.as_str(), "planned" | "submitted" | "running")),
        "{all:?}"
    );
    assert!(!events(&ws, "cancel").is_empty(), "the cancel is recorded");
    // the sleeping program of the running job is gone too
    wait_for_no_processes(&ws);
    eprintln!("cancel test took {:.1} s", t0.elapsed().as_secs_f64());
}

#[test]
fn cancel_without_a_running_orchestrator_scancels_the_recorded_jobs() {
    let _serial = serial();
    if !slurm_or_skip() {
        return;
    }
    let t0 = Instant::now();
    let d = tempfile::tempdir().unwrap_or_else(|e| panic!("{e}"));
    let dir = d.path();
    let slow = slow_engine(dir);
    campaign_in(dir, Some(&slow));
    let ws = dir.join(WS);
    let mut run = Background::run(dir, "run.log");
    let before = wait_for(
        "both points' first jobs running",
        Duration::from_secs(60),
        || {
            run.still_running(dir, "run.log");
            let jobs = jobs_under(&ws);
            (jobs.iter().filter(|j| j.state == "RUNNING").count() == 2).then_some(jobs)
        },
    );
    run.sigkill();
    // rondo is gone; its jobs run on until `rondo cancel` finds them in the store.
    let still = jobs_under(&ws);
    assert!(
        still.len() >= 2 && still.len() == before.len(),
        "{still:?} vs {before:?}"
    );
    assert!(still.iter().all(Job::active), "{still:?}");
    let o = run_rondo(dir, &["cancel", FILE]);
    assert_eq!(o.status.code(), Some(0), "{}", shown(&o));
    assert!(
        String::from_utf8_lossy(&o.stderr).contains("cancelled 2 outstanding attempt(s)"),
        "{}",
        shown(&o)
    );
    let after = wait_for("the cancelled jobs to end", Duration::from_secs(30), || {
        let jobs = jobs_under(&ws);
        (!jobs.iter().any(Job::active)).then_some(jobs)
    });
    let all = assert_jobs_and_points_cancelled(dir, &ws, &before, &after);
    assert_eq!(all.len(), 2, "{all:?}");
    for a in &all {
        assert_eq!(a.state, "cancelled", "{a:?}");
        assert!(
            before
                .iter()
                .any(|j| a.handle.as_deref() == Some(j.id.as_str())),
            "{a:?}"
        );
    }
    assert!(
        events(&ws, "cancel")
            .iter()
            .any(|(_, d)| d.contains("2 outstanding attempt(s) cancelled")),
        "the cancel is recorded"
    );
    wait_for_no_processes(&ws);
    eprintln!(
        "cancel without orchestrator took {:.1} s",
        t0.elapsed().as_secs_f64()
    );
}

/// rondo killed after `sbatch` answered but before the job id reached the store: the store then
/// holds a `planned` attempt without a job id while its job (comment
/// `rondo:<workspace-id>:<attempt-id>`) waits in the queue. The instant is too short to hit
/// with a SIGKILL on purpose, so the test puts the store into that state itself. The rerun
/// must find the job by its comment and adopt it instead of submitting the stage again.
#[test]
fn killed_between_sbatch_and_recording_the_job_id_adopts_the_job() {
    let _serial = serial();
    if !slurm_or_skip() {
        return;
    }
    let reference = local_reference();
    let d = tempfile::tempdir().unwrap_or_else(|e| panic!("{e}"));
    let dir = d.path();
    campaign_in(dir, None);
    let ws = dir.join(WS);
    let blockers = Blockers::submit(4);
    let mut run = Background::run(dir, "run1.log");
    wait_for(
        "both first jobs queued and recorded",
        Duration::from_secs(60),
        || {
            run.still_running(dir, "run1.log");
            let queued = jobs_under(&ws).iter().filter(|j| j.pending()).count();
            (queued == 2
                && attempts(&ws, "WHERE state = 'submitted' AND handle_id IS NOT NULL").len() == 2)
                .then_some(())
        },
    );
    run.sigkill();
    let victim = attempts(&ws, "WHERE state = 'submitted' AND point = 'p001'")
        .pop()
        .unwrap_or_else(|| panic!("no submitted attempt of p001"));
    let id = victim.id;
    query(&ws, move |pool| {
        Box::pin(async move {
            sqlx::query("UPDATE attempts SET state = 'planned', handle_id = NULL WHERE id = ?")
                .bind(id)
                .execute(pool)
                .await
                .unwrap_or_else(|e| panic!("{e}"));
        })
    });
    let mut run = Background::run(dir, "run2.log");
    wait_for(
        "the rerun to settle the attempt",
        Duration::from_secs(60),
        || {
            run.still_running(dir, "run2.log");
            let a = attempts(
                &ws,
                "WHERE point = 'p001' AND iteration = 1 AND stage = 'band'",
            );
            (a.len() > 1 || a.iter().any(|a| a.state != "planned")).then_some(())
        },
    );
    drop(blockers);
    let code = run.exit_code(Duration::from_secs(180));
    assert_eq!(code, Some(0));
    let again = attempts(
        &ws,
        "WHERE point = 'p001' AND iteration = 1 AND stage = 'band'",
    );
    assert_eq!(again.len(), 1, "the stage was submitted again: {again:?}");
    assert_eq!(again[0].handle, victim.handle, "{again:?}");
    if let Some(lines) = jobcomp_under(&ws) {
        let n = lines
            .iter()
            .filter(|l| l.get("Name").map(String::as_str) == Some(job_name(&victim).as_str()))
            .count();
        assert_eq!(n, 1, "jobs Slurm ran for {}", job_name(&victim));
    }
    assert_same_numbers(reference, &record(&ws), "job id lost at the kill");
}

/// The demo as it is, through Slurm at the default poll interval (30 s): its light stages
/// (`placement: host`: project and update) run where rondo runs, band and solve are batch
/// jobs whose ends are noticed from their exit markers (checked every second), and `squeue`
/// is asked at most once per poll interval, counted through a logging `squeue` ahead on
/// PATH. The numbers equal the local run's; both wall times are printed (timings belong in
/// docs/performance.md, not in assertions).
/// A folder `shim/` in `dir` with an `squeue` that appends `date FORMAT` to
/// `dir/squeue-calls.log` and runs the real one: (the folder for PATH, the log).
fn squeue_shim(dir: &Path, format: &str) -> (PathBuf, PathBuf) {
    let real = String::from_utf8_lossy(
        &Command::new("sh")
            .args(["-c", "command -v squeue"])
            .output()
            .unwrap_or_else(|e| panic!("{e}"))
            .stdout,
    )
    .trim()
    .to_string();
    assert!(!real.is_empty(), "squeue is not on PATH");
    let shim = dir.join("shim");
    std::fs::create_dir_all(&shim).unwrap_or_else(|e| panic!("{e}"));
    let log = dir.join("squeue-calls.log");
    let script = format!(
        "#!/bin/sh\ndate {format} >> '{}'\nexec '{real}' \"$@\"\n",
        log.display()
    );
    std::fs::write(shim.join("squeue"), script).unwrap_or_else(|e| panic!("{e}"));
    use std::os::unix::fs::PermissionsExt;
    std::fs::set_permissions(shim.join("squeue"), std::fs::Permissions::from_mode(0o755))
        .unwrap_or_else(|e| panic!("{e}"));
    (shim, log)
}

/// Add `lines` to the `defaults:` of the campaign file in `dir` (after its `retries: 1`).
fn add_to_defaults(dir: &Path, lines: &str) {
    let file = dir.join(FILE);
    let text = std::fs::read_to_string(&file).unwrap_or_else(|e| panic!("{e}"));
    let from = "  retries: 1\n";
    assert!(text.contains(from), "the demo's defaults changed");
    let text = text.replacen(from, &format!("{from}{lines}"), 1);
    std::fs::write(&file, text).unwrap_or_else(|e| panic!("{e}"));
}

#[test]
fn placement_keeps_light_stages_on_the_host_and_squeue_runs_once_per_interval() {
    let _serial = serial();
    if !slurm_or_skip() {
        return;
    }
    let reference = local_reference();
    let d = tempfile::tempdir().unwrap_or_else(|e| panic!("{e}"));
    let dir = d.path();
    campaign_placed(dir, None, true);
    let (shim, log) = squeue_shim(dir, "+%s.%N");
    let path = format!("{}:{}", shim.display(), path_with_binaries());

    // The same campaign locally, for the wall-time comparison.
    let l = tempfile::tempdir().unwrap_or_else(|e| panic!("{e}"));
    campaign_placed(l.path(), None, true);
    let t = Instant::now();
    let o = Command::new(rondo())
        .args(["run", FILE, "-q"])
        .current_dir(l.path())
        .env("PATH", &path)
        .output()
        .unwrap_or_else(|e| panic!("{e}"));
    let local = t.elapsed();
    assert_eq!(o.status.code(), Some(0), "{}", shown(&o));

    let t = Instant::now();
    let o = Command::new(rondo())
        .args(["run", FILE, "--on", "slurm", "-q"])
        .current_dir(dir)
        .env("PATH", &path)
        .output()
        .unwrap_or_else(|e| panic!("{e}"));
    let wall = t.elapsed();
    assert_eq!(o.status.code(), Some(0), "{}", shown(&o));
    all_converged(dir);
    let ws = dir.join(WS);
    assert_same_numbers(reference, &record(&ws), "slurm run with host stages");
    let all = attempts(&ws, "");
    for a in &all {
        let want = match a.stage.as_str() {
            "project" | "update" => "local",
            "band" | "solve" => "slurm",
            _ => "builtin",
        };
        assert_eq!(a.executor, want, "{a:?}");
    }
    let calls = std::fs::read_to_string(&log)
        .unwrap_or_default()
        .lines()
        .count();
    // At most one status query per 30 s poll interval of the run, plus one.
    let allowed = (wall.as_secs_f64() / 30.0).ceil() as usize + 1;
    eprintln!(
        "placed demo: local {:.1} s, slurm {:.1} s ({:.1}×), {} batch jobs, {calls} squeue calls \
         (allowed {allowed})",
        local.as_secs_f64(),
        wall.as_secs_f64(),
        wall.as_secs_f64() / local.as_secs_f64(),
        all.iter().filter(|a| a.executor == "slurm").count()
    );
    assert!(
        calls <= allowed,
        "{calls} squeue calls in {:.1} s at a 30 s poll interval",
        wall.as_secs_f64()
    );
}

// ---------------------------------------------------------------- faults a cluster throws

/// Root, so that a test may stop and start the controller or requeue a job of its own;
/// skips loudly otherwise (fails under RONDO_REQUIRE_SLURM=1).
fn slurm_admin_or_skip() -> bool {
    if !slurm_or_skip() {
        return false;
    }
    let uid = Command::new("id")
        .arg("-u")
        .output()
        .map(|o| String::from_utf8_lossy(&o.stdout).trim().to_string())
        .unwrap_or_default();
    if uid == "0" {
        return true;
    }
    skip_or_fail(
        "not root, and this test stops slurmctld or requeues a job",
        "run the Slurm tests as root",
        &["RONDO_REQUIRE_SLURM"],
    );
    false
}

/// Stops slurmctld now; starts it again (through `scripts/dev-slurm start`) when told to or
/// when dropped, whatever the test did in between.
struct ControllerDown(bool);

impl ControllerDown {
    fn now() -> ControllerDown {
        let pid = std::fs::read_to_string("/run/slurmctld.pid")
            .unwrap_or_else(|e| panic!("/run/slurmctld.pid: {e}"));
        let pid = pid.trim().to_string();
        let st = Command::new("kill").args(["-TERM", &pid]).status();
        assert!(st.is_ok_and(|s| s.success()), "kill slurmctld {pid}");
        wait_for("slurmctld to exit", Duration::from_secs(30), || {
            (!Path::new(&format!("/proc/{pid}")).exists()).then_some(())
        });
        ControllerDown(true)
    }

    fn restore(&mut self) {
        if std::mem::take(&mut self.0) {
            let o = Command::new("bash")
                .arg(repo().join("scripts/dev-slurm"))
                .arg("start")
                .output()
                .unwrap_or_else(|e| panic!("scripts/dev-slurm start: {e}"));
            assert!(o.status.success(), "dev-slurm start: {}", shown(&o));
        }
    }
}

impl Drop for ControllerDown {
    fn drop(&mut self) {
        self.restore();
    }
}

/// A wrapper around the model engine whose first `band` call (the first one anywhere in
/// the test, marked by a file) runs `first` before the engine; every other call is the
/// engine alone.
fn engine_first_band(dir: &Path, first: &str) -> PathBuf {
    let wrapper = dir.join("engine-first-band");
    let flag = dir.join("first-band-done");
    std::fs::write(
        &wrapper,
        format!(
            "#!/bin/sh\nif [ \"$1\" = band ] && mkdir '{}' 2>/dev/null; then\n{first}\nfi\nexec '{}' \"$@\"\n",
            flag.display(),
            model_solid().display()
        ),
    )
    .unwrap_or_else(|e| panic!("{e}"));
    use std::os::unix::fs::PermissionsExt;
    std::fs::set_permissions(&wrapper, std::fs::Permissions::from_mode(0o755))
        .unwrap_or_else(|e| panic!("{e}"));
    wrapper
}

/// slurmctld is down when rondo starts: every `sbatch` blocks and fails ("Unable to
/// contact slurm controller"), the executor backs off, and attempts that still could not be
/// submitted are recorded as `launch-failed` without using up the stage's retries. Once the
/// controller is back the campaign converges to the local run's numbers.
#[test]
fn the_controller_down_when_rondo_starts_is_waited_out() {
    let _serial = serial();
    if !slurm_admin_or_skip() {
        return;
    }
    let reference = local_reference();
    let d = tempfile::tempdir().unwrap_or_else(|e| panic!("{e}"));
    let dir = d.path();
    campaign_placed(dir, None, true);
    let mut down = ControllerDown::now();
    let mut bg = Background::run(dir, "run.log");
    // An outage longer than the executor's own submission retries (five, 1 s to 16 s apart
    // at this poll interval, each `sbatch` blocking for some seconds): an attempt is
    // recorded as not submitted, and the point waits on.
    let ws = dir.join(WS);
    wait_for(
        "an attempt recorded as not submitted",
        Duration::from_secs(300),
        || {
            bg.still_running(dir, "run.log");
            (ws.join("rondo.db").exists()
                && !attempts(&ws, "WHERE failure_kind = 'launch-failed'").is_empty())
            .then_some(())
        },
    );
    let submitted = attempts(&ws, "WHERE executor = 'slurm' AND handle_id IS NOT NULL");
    assert!(
        submitted.is_empty(),
        "no job can have been submitted while the controller is down: {submitted:?}"
    );
    down.restore();
    let code = bg.exit_code(Duration::from_secs(600));
    let log = std::fs::read_to_string(dir.join("run.log")).unwrap_or_default();
    assert_eq!(code, Some(0), "{log}");
    all_converged(dir);
    assert_same_numbers(
        reference,
        &record(&ws),
        "a run that began with the controller down",
    );
    let refused = attempts(&ws, "WHERE failure_kind = 'launch-failed'");
    assert!(!refused.is_empty());
    eprintln!(
        "{} attempt(s) could not be submitted while the controller was down",
        refused.len()
    );
    for a in &refused {
        let m = a.failure_message.as_deref().unwrap_or("");
        assert!(m.contains("sbatch"), "{a:?}");
    }
}

/// `sbatch` refuses the job (a partition that does not exist): the attempt fails with
/// Slurm's own message, the stage's retries are used up, the point fails with that reason,
/// rondo exits 3, and nothing is left half-written (no attempt open, the store intact).
#[test]
fn a_submission_sbatch_refuses_fails_the_point_with_slurms_message() {
    let _serial = serial();
    if !slurm_or_skip() {
        return;
    }
    let d = tempfile::tempdir().unwrap_or_else(|e| panic!("{e}"));
    let dir = d.path();
    campaign_placed(dir, None, true);
    add_to_defaults(dir, "  resources: { partition: no-such-partition }\n");
    let o = Command::new(rondo())
        .args(["run", FILE, "--on", "slurm", "--poll-interval", "1", "-q"])
        .current_dir(dir)
        .env("PATH", path_with_binaries())
        .output()
        .unwrap_or_else(|e| panic!("{e}"));
    assert_eq!(o.status.code(), Some(3), "{}", shown(&o));
    let ws = dir.join(WS);
    let bad = attempts(&ws, "WHERE executor = 'slurm'");
    // Two points, each: the first attempt and its one retry.
    assert_eq!(bad.len(), 4, "{bad:?}");
    for a in &bad {
        assert_eq!(a.failure_kind.as_deref(), Some("launch-failed"), "{a:?}");
        let m = a.failure_message.as_deref().unwrap_or("");
        assert!(
            m.contains("sbatch") && m.contains("artition"),
            "Slurm's message: {m}"
        );
    }
    let s = status_json(dir, &ws);
    for p in s["points"].as_array().cloned().unwrap_or_default() {
        assert_eq!(p["state"], "failed", "{p}");
    }
    let open = attempts(&ws, "WHERE state IN ('planned', 'submitted', 'running')");
    assert!(open.is_empty(), "attempts left open: {open:?}");
    let integrity = strings(&ws, "PRAGMA integrity_check");
    assert_eq!(integrity, vec!["ok".to_string()]);
}

/// A running job is requeued (what preemption under `PreemptMode=REQUEUE` does, here by
/// `scontrol requeue`): it goes back to pending under the same id and runs its script again.
/// rondo keeps watching it: one attempt, one job id, no failure, and the local run's numbers.
#[test]
fn a_job_requeued_while_running_is_followed_to_its_end_under_the_same_attempt() {
    let _serial = serial();
    if !slurm_admin_or_skip() {
        return;
    }
    let reference = local_reference();
    let d = tempfile::tempdir().unwrap_or_else(|e| panic!("{e}"));
    let dir = d.path();
    let engine = engine_first_band(dir, "sleep 300");
    campaign_placed(dir, Some(&engine), true);
    let mut bg = Background::run(dir, "run.log");
    let ws = dir.join(WS);
    let job = wait_for(
        "the first band job to run",
        Duration::from_secs(120),
        || {
            bg.still_running(dir, "run.log");
            let jobs = jobs_under(dir);
            let band = jobs
                .iter()
                .find(|j| j.name.ends_with(".band") && j.running())?;
            dir.join("first-band-done")
                .exists()
                .then(|| band.id.clone())
        },
    );
    let scontrol = |args: &[&str]| {
        let o = Command::new("scontrol")
            .args(args)
            .output()
            .unwrap_or_else(|e| panic!("scontrol: {e}"));
        assert!(o.status.success(), "scontrol {args:?}: {}", shown(&o));
    };
    scontrol(&["requeue", &job]);
    wait_for(
        "the job to be pending again",
        Duration::from_secs(60),
        || {
            jobs_under(dir)
                .iter()
                .any(|j| j.id == job && j.pending())
                .then_some(())
        },
    );
    // Slurm holds a requeued job back for about two minutes: let it run again now.
    scontrol(&["update", &format!("JobId={job}"), "StartTime=now"]);
    let code = bg.exit_code(Duration::from_secs(600));
    let log = std::fs::read_to_string(dir.join("run.log")).unwrap_or_default();
    assert_eq!(code, Some(0), "{log}");
    all_converged(dir);
    assert_same_numbers(reference, &record(&ws), "a run with a requeued job");
    let a: Vec<Attempt> = attempts(&ws, "")
        .into_iter()
        .filter(|a| a.handle.as_deref() == Some(job.as_str()))
        .collect();
    assert_eq!(a.len(), 1, "one attempt for the requeued job: {a:?}");
    assert_eq!(a[0].state, "succeeded", "{a:?}");
    let failed = attempts(&ws, "WHERE state <> 'succeeded'");
    assert!(failed.is_empty(), "no attempt failed: {failed:?}");
}

/// A batch job runs past its `--time` (one minute, the shortest Slurm has): Slurm's TIMEOUT
/// is recorded as a time-limit kill, the retry asks for twice the time (the default
/// `timeout-factor`, event `time-limit-lengthened`), and the campaign converges to the local
/// run's numbers.
#[test]
fn a_job_past_its_time_limit_is_retried_with_twice_the_time() {
    let _serial = serial();
    if !slurm_or_skip() {
        return;
    }
    let reference = local_reference();
    let d = tempfile::tempdir().unwrap_or_else(|e| panic!("{e}"));
    let dir = d.path();
    let engine = engine_first_band(dir, "sleep 600");
    campaign_placed(dir, Some(&engine), true);
    add_to_defaults(dir, "  resources: { time: \"1\" }\n");
    let mut bg = Background::run(dir, "run.log");
    let code = bg.exit_code(Duration::from_secs(900));
    let log = std::fs::read_to_string(dir.join("run.log")).unwrap_or_default();
    assert_eq!(code, Some(0), "{log}");
    all_converged(dir);
    let ws = dir.join(WS);
    assert_same_numbers(reference, &record(&ws), "a run with a time-limit kill");
    let timed_out = attempts(&ws, "WHERE failure_kind = 'timeout'");
    assert_eq!(timed_out.len(), 1, "{timed_out:?}");
    let lengthened = events(&ws, "time-limit-lengthened");
    assert_eq!(lengthened.len(), 1, "{lengthened:?}");
    assert!(
        lengthened[0].1.contains("batch --time 00:02:00"),
        "{lengthened:?}"
    );
}

/// Storing a large output does not stall the Slurm poller: while point `a`'s 16 GiB output
/// (a sparse file: no disk used) is hashed and moved into the store on the blocking pool,
/// point `b`'s batch jobs are still noticed ending (from their exit markers, checked every
/// second) and their successors submitted. Counted in the store (and the `squeue` calls
/// from a shim's log, printed), in the window between the end of `a`'s big job and the plan of `a`'s next
/// stage (which waits for the big output to be recorded).
#[test]
fn slurm_polls_go_on_while_a_large_output_is_stored() {
    let _serial = serial();
    if !slurm_or_skip() {
        return;
    }
    let d = tempfile::tempdir().unwrap_or_else(|e| panic!("{e}"));
    let dir = d.path();
    let text = r#"campaign: big-and-small-slurm
about: test campaign (not physics)
programs:
  sh: { path: /bin/sh }
sweep:
  product:
    size: [17179869184, 0]
cycle:
  w:
    run: [sh, -c, 'if [ {{iteration}} = 1 ]; then truncate -s "$1" big.bin; else : > big.bin; fi', sh, "{{param:size}}"]
    outputs: { big: big.bin }
  t:
    run: [sh, -c, 'n={{iteration}}; [ $n -gt 8 ] && n=8; echo "{\"n\": $n}" > metrics.json']
    metrics: [n]
stop:
  when:
    - { metric: t.n, change-below: 0.5, for: 1 }
  max-iterations: 12
"#;
    std::fs::write(dir.join(FILE), text).unwrap_or_else(|e| panic!("{e}"));
    let (shim, log) = squeue_shim(dir, "-u +%Y-%m-%dT%H:%M:%S.%3NZ");
    let o = Command::new(rondo())
        .args(["run", FILE, "--on", "slurm", "--poll-interval", "1", "-q"])
        .current_dir(dir)
        .env(
            "PATH",
            format!("{}:{}", shim.display(), path_with_binaries()),
        )
        .output()
        .unwrap_or_else(|e| panic!("{e}"));
    assert!(o.status.success(), "{}", shown(&o));
    let ws = dir.join(WS);
    // When rondo saw the big job end (the attempt's own end time is the job script's, in
    // whole seconds): the event of its success is written once stored, so take the plan of
    // the next stage as the window's end and the big job's last status change before it.
    let window = strings(
        &ws,
        "SELECT a.ended_at || ' ' || n.created_at FROM attempts a JOIN attempts n \
         ON n.point = a.point AND n.iteration = 1 AND n.stage = 't' \
         JOIN points p ON p.id = a.point \
         WHERE a.stage = 'w' AND a.iteration = 1 AND p.idx = 1",
    );
    let (big_ended, next_planned) = window
        .first()
        .and_then(|t| t.split_once(' '))
        .map(|(a, b)| (a.to_string(), b.to_string()))
        .unwrap_or_else(|| panic!("no big attempt: {window:?}"));
    // The job script's end time has whole seconds; count from the second after it.
    let from = format!(
        "{}.999Z",
        big_ended
            .trim_end_matches('Z')
            .split('.')
            .next()
            .unwrap_or("")
    );
    let calls: Vec<String> = std::fs::read_to_string(&log)
        .unwrap_or_default()
        .lines()
        .map(str::to_string)
        .collect();
    let during = calls
        .iter()
        .filter(|t| t.as_str() > from.as_str() && t.as_str() < next_planned.as_str())
        .count();
    // Each of the other point's attempts is planned only after rondo noticed the end of
    // the job before it, which only the poller can tell.
    let planned_during = strings(
        &ws,
        "SELECT a.created_at FROM attempts a JOIN points p ON p.id = a.point \
         WHERE p.idx = 2 AND a.executor = 'slurm'",
    )
    .into_iter()
    .filter(|t| t.as_str() > from.as_str() && t.as_str() < next_planned.as_str())
    .count();
    eprintln!(
        "16 GiB output: job ended {big_ended}, next stage planned {next_planned}; {during} \
         squeue calls (none is needed while every job's end comes from its marker within the \
         poll interval) and {planned_during} jobs of the other point planned in between"
    );
    assert!(
        planned_during >= 1,
        "the Slurm poller stalled while the big output was stored: {planned_during} jobs of \
         the other point planned between {from} and {next_planned} ({during} squeue calls)"
    );
}
