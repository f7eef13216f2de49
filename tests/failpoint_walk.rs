//! Crash at every named step (src/failpoint.rs): for each failpoint, a small real campaign
//! (the model engine, a built-in mixer, a folder output, a retention policy, a failing point
//! with a failing hook, the equation-of-state analysis, a report) is run with the crash armed
//! (`RONDO_FAILPOINT=NAME:N`), the crash is checked to have come there (killed by SIGKILL
//! after rondo's line naming the failpoint), and the same `rondo run` resumes it. The end
//! must be the uninterrupted run's: every output hash and metric bit, the analysis artifact,
//! the report's figure data; no stage recorded succeeded twice; no process of the workspace
//! left. `the_list_is_complete` holds the list of failpoints to docs/concepts.md and to
//! every store write in the source.
//!
//! The batch failpoints are walked with `--on slurm` against the one-node Slurm of
//! scripts/dev-slurm (skipped loudly without it, a failure under CI), the lengthened time
//! limit over a campaign of its own.
//!
//! The crash comes from the test build of rondo (the `failpoints` feature, which this crate's
//! dev-dependency on itself turns on for `cargo test`); a binary without it says so below.

mod common;

use std::collections::BTreeMap;
use std::path::Path;
use std::process::{Command, Output, Stdio};
use std::time::{Duration, Instant};

use common::*;
use rondo::failpoint::Failpoint;

/// How a failpoint is reached.
#[derive(Clone, Copy, Debug, PartialEq)]
enum Way {
    /// `rondo run` armed, from an empty workspace.
    Run,
    /// A first run crashed right after it recorded running attempts (`launches-recorded:1`),
    /// then the armed `rondo run` adopts them.
    Adopt,
    /// The armed run is cancelled with `rondo cancel` while it runs.
    CancelRunning,
    /// A first run crashed as in `Adopt`, then the armed `rondo cancel` (no orchestrator
    /// running) ends and records the attempts it left; the next `rondo cancel` and
    /// `rondo run` continue.
    CancelOffline,
    /// A finished workspace, then the armed `rondo report`, then `rondo report` again.
    Report,
    /// `rondo run --on slurm` armed, resumed with `--on slurm` (the one-node Slurm of
    /// scripts/dev-slurm; skipped loudly without one): `band` runs as batch jobs, the other
    /// stages where rondo runs (`placement: host`).
    Slurm,
    /// A campaign of its own ([`NAP`]): a stage killed by its time limit, then retried with
    /// a longer one.
    TimeLimit,
}

/// Every failpoint the walk crashes at, the hit that crashes, and how it is reached.
const WALK: &[(&str, u64, Way)] = &[
    ("store-migrated", 1, Way::Run),
    ("campaign-created", 1, Way::Run),
    ("points-restored", 1, Way::Run),
    ("event-recorded", 1, Way::Run),
    ("attempt-planned", 8, Way::Run),
    ("builtin-started", 2, Way::Run),
    ("child-started", 8, Way::Run),
    ("launches-recorded", 1, Way::Run),
    ("attempt-adopted", 1, Way::Adopt),
    ("child-ended", 8, Way::Run),
    ("output-hashed", 10, Way::Run),
    ("folder-snapshot", 2, Way::Run),
    ("output-stored", 8, Way::Run),
    ("success-recorded", 8, Way::Run),
    ("group-commit", 5, Way::Run),
    ("iteration-closed", 2, Way::Run),
    ("attempt-failed", 1, Way::Run),
    ("point-stopped", 1, Way::Run),
    ("retention-recorded", 1, Way::Run),
    ("retention-removed", 1, Way::Run),
    ("hook-failed", 1, Way::Run),
    ("run-cancelled", 1, Way::CancelRunning),
    ("analysis-recorded", 1, Way::Run),
    ("report-recorded", 1, Way::Report),
    ("cancel-recorded", 1, Way::CancelOffline),
    ("batch-planned", 2, Way::Slurm),
    ("job-submitted", 2, Way::Slurm),
    ("time-limit-lengthened", 1, Way::TimeLimit),
];

/// Failpoints this walk does not reach, and why (docs/concepts.md says the same).
const NOT_WALKED: &[(&str, &str)] = &[
    (
        "campaign-stage-recorded",
        "walked over after-campaign stages in tests/outside.rs \
         (a_kill_during_each_stage_outside_the_loop_then_resume_records_the_same_results)",
    ),
    (
        "revision-recorded",
        "walked over an edited campaign in tests/revisions.rs \
         (a_raised_cap_continues_capped_points_as_a_cold_run_would)",
    ),
    (
        "handoff-started",
        "walked over a resident campaign in tests/resident.rs \
         (every_handoff_failpoint_crashes_there_and_resumes_identically)",
    ),
    (
        "handoff-recorded",
        "walked over a resident campaign in tests/resident.rs \
         (every_handoff_failpoint_crashes_there_and_resumes_identically)",
    ),
];

/// The campaign of [`Way::TimeLimit`]: its one attempt needs 2 s and is allowed 1 s; the
/// retry gets three times that and finishes.
const NAP: &str = r#"campaign: nap
cycle:
  nap:
    run: [sh, -c, "sleep 2; echo rested > out.txt"]
    outputs: { out: out.txt }
    time-limit: "00:01"
    retries: 1
    timeout-factor: 3
stop:
  max-iterations: 1
"#;

const CAMPAIGN: &str = "walk.yaml";

/// The campaign: three volumes of the model solid; the 29.0 point fails in its `snap` stage
/// (twice: one retry), which runs the `point-failed` hook `false`.
const CAMPAIGN_TEXT: &str = r#"campaign: walk
about: A small campaign every failpoint is walked over (tests/failpoint_walk.rs).
programs:
  engine: { path: model-solid, version-flag: --version }
parameters:
  u: 6.0
  kmesh: 6
  electrons: 1.8
  solver: hubbard-i
  temperature: 1200
sweep:
  product:
    volume: [27.0, 28.0, 29.0]
start:
  density: start/density.json
  sigma: start/sigma.npy
defaults:
  time-limit: "00:05:00"
  retries: 1
seed: 20261204
cycle:
  band:
    run: [engine, band, --volume, "{{param:volume}}", --kmesh, "{{param:kmesh}}",
          --density, "{{input:density}}", --out, "{{output:hk}}"]
    inputs:
      density: { previous: mix.density, initially: start.density }
    outputs: { hk: hk.npy }
    keep: { hk: { last: 1 } }
    metrics: [band_energy, eps_f]
  project:
    placement: host
    run: [engine, project, --hk, "{{input:hk}}", --sigma, "{{input:sigma}}",
          --density, "{{input:density}}", --temperature, "{{param:temperature}}",
          --emin, "-10.0", --emax, "10.0",
          --out-delta, "{{output:delta}}", --out-levels, "{{output:levels}}"]
    inputs:
      hk: band.hk
      sigma: { previous: mix.sigma, initially: start.sigma }
      density: { previous: mix.density, initially: start.density }
    outputs: { delta: delta.npy, levels: levels.json }
  solve:
    placement: host
    run: [engine, solve, --delta, "{{input:delta}}", --levels, "{{input:levels}}",
          --u, "{{param:u}}", --solver, "{{param:solver}}", --seed, "{{seed}}",
          --out-sigma, "{{output:sigma}}"]
    inputs: { delta: project.delta, levels: project.levels }
    outputs: { sigma: sigma.npy }
    metrics: [n_f, docc]
  update:
    placement: host
    run: [engine, update, --hk, "{{input:hk}}", --sigma, "{{input:sigma}}",
          --density, "{{input:density}}", --temperature, "{{param:temperature}}",
          --electrons, "{{param:electrons}}", --volume, "{{param:volume}}",
          --out, "{{output:density}}"]
    inputs:
      hk: band.hk
      sigma: solve.sigma
      density: { previous: mix.density, initially: start.density }
    outputs: { density: density.json }
    metrics: [n_f, energy]
  mix:
    builtin: mix
    inputs: { sigma: solve.sigma, density: update.density }
    outputs: { sigma: sigma.npy, density: density.json }
    settings: { method: anderson, alpha: 0.4, history: 4 }
  snap:
    placement: host
    # A folder output (a snapshot of the mixed density); fails for the volume 29 point.
    run: [sh, -c, 'test "$2" != 29.0 || exit 3; mkdir snap && cp "$1" snap/density.json',
          snap, "{{input:density}}", "{{param:volume}}"]
    inputs: { density: mix.density }
    outputs: { snap: snap/ }
stop:
  when:
    - { metric: update.n_f, change-below: 1.0e-2, for: 1 }
  max-iterations: 4
analysis:
  eos: { energy: update.energy, volume: volume }
hooks:
  point-failed: ["false"]
"#;

/// The exit code of a finished walk campaign: 3, one point failed.
const FINISHED: i32 = 3;

/// A fresh folder with the campaign and its start files.
fn campaign_dir() -> tempfile::TempDir {
    let d = tempfile::tempdir().unwrap_or_else(|e| panic!("{e}"));
    demo_in(d.path(), "model-sweep.yaml");
    std::fs::write(d.path().join(CAMPAIGN), CAMPAIGN_TEXT).unwrap_or_else(|e| panic!("{e}"));
    d
}

fn ws_of(dir: &Path) -> std::path::PathBuf {
    dir.join("walk.rondo")
}

fn run_args() -> Vec<&'static str> {
    vec!["run", CAMPAIGN, "--max-running", "2", "-q"]
}

fn slurm_run_args() -> Vec<&'static str> {
    let mut a = run_args();
    a.extend(["--on", "slurm"]);
    a
}

/// Whether a working Slurm is here; skips loudly (fails under RONDO_REQUIRE_SLURM or CI).
fn slurm_or_skip() -> bool {
    let answers = |prog: &str, args: &[&str]| {
        Command::new(prog)
            .args(args)
            .stdout(Stdio::null())
            .stderr(Stdio::null())
            .status()
            .is_ok_and(|s| s.success())
    };
    if answers("sbatch", &["--version"]) && answers("sinfo", &["-h", "-o", "%T"]) {
        return true;
    }
    skip_or_fail(
        "no working Slurm here (`sbatch --version` or `sinfo` failed): the batch failpoints \
         are not walked",
        "start the one-node Slurm with `bash scripts/dev-slurm start` (as root)",
        &["RONDO_REQUIRE_SLURM"],
    );
    false
}

/// What a finished walk workspace must show like the uninterrupted one.
struct Finished {
    record: Record,
    /// The latest equation-of-state artifact.
    eos: String,
    /// Point → state.
    states: BTreeMap<String, String>,
}

fn finished(ws: &Path) -> Finished {
    let eos = strings(
        ws,
        "SELECT o.artifact FROM report_outputs o WHERE o.role = 'eos.json' \
         ORDER BY o.report_id DESC LIMIT 1",
    );
    let states = strings(ws, "SELECT id || '=' || state FROM points ORDER BY id")
        .into_iter()
        .filter_map(|s| s.split_once('=').map(|(a, b)| (a.into(), b.into())))
        .collect();
    Finished {
        record: record(ws),
        eos: eos.into_iter().next().unwrap_or_default(),
        states,
    }
}

/// The report's outputs (role → hash) of the latest generation, without those that show
/// measured costs (CPU times differ from run to run).
fn report_outputs(ws: &Path) -> BTreeMap<String, String> {
    strings(
        ws,
        "SELECT role || '=' || artifact FROM report_outputs WHERE report_id = \
         (SELECT max(report_id) FROM report_outputs WHERE role = 'index.html')",
    )
    .into_iter()
    .filter_map(|s| {
        s.split_once('=')
            .map(|(a, b)| (a.to_string(), b.to_string()))
    })
    .filter(|(role, _)| role != "cost.csv" && role != "index.html")
    .collect()
}

/// Every recorded report generation is whole: none without outputs, and every report
/// (the generations with an `index.html`) with as many outputs as the others.
fn assert_reports_whole(ws: &Path, armed: &str) {
    let empty = strings(
        ws,
        "SELECT CAST(id AS TEXT) FROM reports r WHERE NOT EXISTS \
         (SELECT 1 FROM report_outputs o WHERE o.report_id = r.id)",
    );
    assert!(
        empty.is_empty(),
        "armed {armed}: generations without outputs: {empty:?}"
    );
    let counts = strings(
        ws,
        "SELECT CAST(count(*) AS TEXT) FROM report_outputs WHERE report_id IN \
         (SELECT report_id FROM report_outputs WHERE role = 'index.html') GROUP BY report_id",
    );
    assert!(
        counts.windows(2).all(|w| w[0] == w[1]),
        "armed {armed}: a report recorded in part: outputs per report {counts:?}"
    );
}

/// The crashed-and-resumed workspace ends as the uninterrupted one, with nothing left over.
fn assert_same_end(reference: &Finished, ws: &Path, armed: &str) {
    let got = finished(ws);
    eprintln!("comparing the end of the walk at {armed} with the uninterrupted run");
    assert_eq!(got.states, reference.states, "armed {armed}: point states");
    assert_same_record(&reference.record, &got.record, 0);
    assert_eq!(
        got.eos, reference.eos,
        "armed {armed}: the analysis artifact"
    );
    assert_no_double_success_nor_children(ws, 0);
    let open = strings(
        ws,
        "SELECT CAST(id AS TEXT) FROM attempts WHERE state IN ('planned', 'submitted', 'running')",
    );
    assert!(
        open.is_empty(),
        "armed {armed}: attempts left open: {open:?}"
    );
}

/// A first run that crashes right after recording running attempts: the workspace then holds
/// outstanding attempts whose keepers may still run.
fn crash_with_attempts_outstanding(dir: &Path) {
    let armed = "launches-recorded:1";
    let o = rondo_at(dir, &run_args(), Some(armed));
    assert_crashed_at(&o, armed);
}

/// Walk one failpoint in a fresh folder.
fn walk_one(name: &str, n: u64, way: Way, reference: &Finished, report: &BTreeMap<String, String>) {
    let d = campaign_dir();
    let dir = d.path();
    let ws = ws_of(dir);
    let armed = format!("{name}:{n}");
    let started = Instant::now();
    let mut resume = run_args();
    match way {
        Way::TimeLimit => return walk_time_limit(&armed),
        Way::Slurm => {
            if !slurm_or_skip() {
                return;
            }
            resume = slurm_run_args();
            let o = rondo_at(dir, &resume, Some(&armed));
            assert_crashed_at(&o, &armed);
        }
        Way::Run => {
            let o = rondo_at(dir, &run_args(), Some(&armed));
            assert_crashed_at(&o, &armed);
        }
        Way::Adopt => {
            crash_with_attempts_outstanding(dir);
            let o = rondo_at(dir, &run_args(), Some(&armed));
            assert_crashed_at(&o, &armed);
        }
        Way::CancelRunning => {
            let o = run_cancelled(dir, &armed);
            assert_crashed_at(&o, &armed);
        }
        Way::CancelOffline => {
            crash_with_attempts_outstanding(dir);
            let wsa = ws.display().to_string();
            let cancel = ["cancel", "--workspace", wsa.as_str(), "--reason", "walk"];
            let o = rondo_at(dir, &cancel, Some(&armed));
            assert_crashed_at(&o, &armed);
            let o = rondo_at(dir, &cancel, None);
            assert_eq!(o.status.code(), Some(0), "armed {armed}: {}", shown(&o));
            let open = strings(
                &ws,
                "SELECT CAST(id AS TEXT) FROM attempts WHERE state IN ('planned', 'submitted', 'running')",
            );
            assert!(
                open.is_empty(),
                "armed {armed}: cancel left attempts open: {open:?}"
            );
        }
        Way::Report => {
            let o = rondo_at(dir, &run_args(), None);
            assert_eq!(o.status.code(), Some(FINISHED), "{}", shown(&o));
            let wsa = ws.display().to_string();
            let args = ["report", "--workspace", wsa.as_str()];
            let o = rondo_at(dir, &args, Some(&armed));
            assert_crashed_at(&o, &armed);
            let o = rondo_at(dir, &args, None);
            assert_eq!(o.status.code(), Some(0), "armed {armed}: {}", shown(&o));
            assert_eq!(
                &report_outputs(&ws),
                report,
                "armed {armed}: the report's outputs"
            );
            assert_reports_whole(&ws, &armed);
        }
    }
    let o = rondo_at(dir, &resume, None);
    assert_eq!(
        o.status.code(),
        Some(FINISHED),
        "armed {armed}: the resumed run: {}",
        shown(&o)
    );
    assert_same_end(reference, &ws, &armed);
    eprintln!(
        "failpoint {armed} ({way:?}): crashed there, resumed to the same end ({:.1} s)",
        started.elapsed().as_secs_f64()
    );
}

/// [`Way::TimeLimit`]: the nap campaign uninterrupted, then crashed right after the event
/// that gives the retry its longer limit, then resumed: the same success, the retry with the
/// same limit, the timed-out attempt counted once.
fn walk_time_limit(armed: &str) {
    let started = Instant::now();
    let nap = |dir: &Path| {
        std::fs::write(dir.join("nap.yaml"), NAP).unwrap_or_else(|e| panic!("{e}"));
    };
    let args = ["run", "nap.yaml", "-q", "--grace", "1"];
    let a = tempfile::tempdir().unwrap_or_else(|e| panic!("{e}"));
    nap(a.path());
    let want = rondo_at(a.path(), &args, None);
    let b = tempfile::tempdir().unwrap_or_else(|e| panic!("{e}"));
    nap(b.path());
    let o = rondo_at(b.path(), &args, Some(armed));
    assert_crashed_at(&o, armed);
    let o = rondo_at(b.path(), &args, None);
    assert_eq!(
        o.status.code(),
        want.status.code(),
        "armed {armed}: {}",
        shown(&o)
    );
    let (wa, wb) = (a.path().join("nap.rondo"), b.path().join("nap.rondo"));
    let rec = record(&wb);
    assert_eq!(rec.len(), 1, "armed {armed}: the retry succeeded: {rec:?}");
    assert_same_record(&record(&wa), &rec, 0);
    // The retry's planned row went in with the event, so the crash left it `planned` with
    // no child: recorded `lost` (no retry used up) and planned again.
    let kinds = "SELECT coalesce(failure_kind, state) FROM attempts ORDER BY id";
    assert_eq!(
        strings(&wb, kinds),
        ["timeout", "lost", "succeeded"],
        "armed {armed}"
    );
    let limits = "SELECT detail FROM events WHERE kind = 'time-limit-lengthened' ORDER BY seq";
    let (la, lb) = (strings(&wa, limits), strings(&wb, limits));
    assert!(
        la.len() == 1 && lb.iter().all(|l| *l == la[0]) && la[0].contains("the limit is 3 s"),
        "armed {armed}: the retry's limit, uninterrupted {la:?}, resumed {lb:?}"
    );
    assert_no_double_success_nor_children(&wb, 0);
    eprintln!(
        "failpoint {armed} (TimeLimit): crashed there, resumed to the same end ({:.1} s)",
        started.elapsed().as_secs_f64()
    );
}

/// Start the armed run and cancel it with `rondo cancel` once it has a success recorded.
fn run_cancelled(dir: &Path, armed: &str) -> Output {
    let ws = ws_of(dir);
    let child = Command::new(rondo())
        .args(run_args())
        .current_dir(dir)
        .env("PATH", path_with_binaries())
        .env(rondo::failpoint::VARIABLE, armed)
        .stdout(Stdio::piped())
        .stderr(Stdio::piped())
        .spawn()
        .unwrap_or_else(|e| panic!("spawn rondo: {e}"));
    let deadline = Instant::now() + Duration::from_secs(300);
    while succeeded_attempts_ro(&ws) < 1 {
        assert!(
            Instant::now() < deadline,
            "armed {armed}: no success in 5 min"
        );
        std::thread::sleep(Duration::from_millis(5));
    }
    let wsa = ws.display().to_string();
    let o = rondo_at(
        dir,
        &["cancel", "--workspace", &wsa, "--reason", "walk"],
        None,
    );
    assert_eq!(
        o.status.code(),
        Some(0),
        "armed {armed}: rondo cancel: {}",
        shown(&o)
    );
    child
        .wait_with_output()
        .unwrap_or_else(|e| panic!("wait for rondo: {e}"))
}

/// Whether this rondo binary has the failpoints (it refuses an unknown name only then).
fn binary_has_failpoints() -> bool {
    let d = tempfile::tempdir().unwrap_or_else(|e| panic!("{e}"));
    let o = rondo_at(d.path(), &["schema"], Some("no-such-failpoint:1"));
    o.status.code() == Some(2)
        && String::from_utf8_lossy(&o.stderr).contains("`no-such-failpoint` is not a failpoint")
}

#[test]
fn every_failpoint_crashes_there_and_resumes_to_the_end_of_an_uninterrupted_run() {
    let _ = model_solid();
    assert!(
        binary_has_failpoints(),
        "{} was built without the `failpoints` feature, so it cannot crash on purpose: run \
         the tests through cargo (`cargo test -p rondo --test failpoint_walk`), whose \
         dev-dependency of rondo on itself turns the feature on, or build it with \
         `cargo build -p rondo --features failpoints`",
        rondo().display()
    );
    // Every failpoint is walked or says why not.
    for f in Failpoint::ALL {
        let walked = WALK.iter().any(|(n, _, _)| *n == f.name());
        let skipped = NOT_WALKED.iter().any(|(n, _)| *n == f.name());
        assert!(
            walked != skipped,
            "failpoint {} must be in exactly one of WALK and NOT_WALKED",
            f.name()
        );
    }
    let started = Instant::now();
    let (_a, reference, report) = reference_run();
    let mut walked = 0;
    for (name, n, way) in WALK {
        if !chosen(name) {
            continue;
        }
        walk_one(name, *n, *way, &reference, &report);
        walked += 1;
    }
    eprintln!(
        "failpoint walk: {walked} of {} failpoints in {:.0} s",
        WALK.len(),
        started.elapsed().as_secs_f64()
    );
}

/// The uninterrupted run and its report: what every walk must end with.
fn reference_run() -> (tempfile::TempDir, Finished, BTreeMap<String, String>) {
    let a = campaign_dir();
    let o = rondo_at(a.path(), &run_args(), None);
    assert_eq!(o.status.code(), Some(FINISHED), "{}", shown(&o));
    let ws = ws_of(a.path());
    let reference = finished(&ws);
    assert!(!reference.eos.is_empty(), "the analysis was recorded");
    assert_eq!(
        reference.states.values().collect::<Vec<_>>(),
        ["converged", "converged", "failed"],
        "the campaign's plan"
    );
    let wsa = ws.display().to_string();
    let o = rondo_at(a.path(), &["report", "--workspace", &wsa], None);
    assert_eq!(o.status.code(), Some(0), "{}", shown(&o));
    let report = report_outputs(&ws);
    assert!(report.contains_key("eos.csv"), "{report:?}");
    (a, reference, report)
}

/// Whether the walk takes this failpoint: `RONDO_FAILPOINT_WALK=NAME[,NAME...]` walks only
/// those (to replay one).
fn chosen(name: &str) -> bool {
    std::env::var("RONDO_FAILPOINT_WALK")
        .ok()
        .is_none_or(|o| o.split(',').any(|x| x == name))
}

/// `rondo run` in `dir`, armed with `armed` if given, logging every failpoint hit to `log`:
/// its output and how often the rondo process itself (not a keeper it started) passed each
/// failpoint.
fn run_logged(dir: &Path, armed: Option<&str>, log: &Path) -> (Output, BTreeMap<String, u64>) {
    let mut c = Command::new(rondo());
    c.args(run_args())
        .current_dir(dir)
        .env("PATH", path_with_binaries())
        .env_remove(rondo::failpoint::VARIABLE)
        .env(rondo::failpoint::LOG_VARIABLE, log)
        .stdout(Stdio::piped())
        .stderr(Stdio::piped());
    if let Some(a) = armed {
        c.env(rondo::failpoint::VARIABLE, a);
    }
    let child = c
        .spawn()
        .unwrap_or_else(|e| panic!("cannot run rondo: {e}"));
    let pid = child.id().to_string();
    let o = child
        .wait_with_output()
        .unwrap_or_else(|e| panic!("wait for rondo: {e}"));
    let text = std::fs::read_to_string(log).unwrap_or_default();
    let mut counts = BTreeMap::new();
    for (p, name) in text.lines().filter_map(|l| l.split_once(' ')) {
        if p == pid {
            *counts.entry(name.to_string()).or_insert(0) += 1;
        }
    }
    (o, counts)
}

/// How often one uninterrupted run passes each failpoint.
fn hit_counts() -> BTreeMap<String, u64> {
    let d = campaign_dir();
    let log = d.path().join("hits.log");
    let (o, counts) = run_logged(d.path(), None, &log);
    assert_eq!(o.status.code(), Some(FINISHED), "{}", shown(&o));
    counts
}

/// Crash at the `n`-th, last, hit of `name` and resume. A run that passed the failpoint
/// fewer times than that (its count depends on timing) is told and not held against it;
/// one that passed it `n` times without crashing fails the test.
fn walk_last(name: &str, n: u64, reference: &Finished) -> bool {
    let d = campaign_dir();
    let dir = d.path();
    let armed = format!("{name}:{n}");
    let started = Instant::now();
    let (o, counts) = run_logged(dir, Some(&armed), &dir.join("hits.log"));
    let passed = counts.get(name).copied().unwrap_or(0);
    if o.status.code() == Some(FINISHED) && passed < n {
        eprintln!(
            "failpoint {armed}: this run passed it {passed} times, fewer than the reference              runs (timing); not crashed at its last hit"
        );
        return false;
    }
    assert_crashed_at(&o, &armed);
    let o = rondo_at(dir, &run_args(), None);
    assert_eq!(
        o.status.code(),
        Some(FINISHED),
        "armed {armed}: the resumed run: {}",
        shown(&o)
    );
    assert_same_end(reference, &ws_of(dir), &armed);
    eprintln!(
        "failpoint {armed} (its last hit): crashed there, resumed to the same end ({:.1} s)",
        started.elapsed().as_secs_f64()
    );
    true
}

/// The walk above crashes each failpoint at one hit, mostly an early one. A plain run
/// passes many of them over and over (every attempt, every iteration): each failpoint that
/// two uninterrupted runs pass the same number of times, more often than the walk's hit,
/// is crashed at its last hit as well, where the campaign is nearly done and the store
/// holds the most. Failpoints whose count depends on timing (the two runs disagree) are
/// listed and left to the walk above.
#[test]
fn every_repeated_failpoint_crashes_at_its_last_hit_too() {
    let _ = model_solid();
    assert!(
        binary_has_failpoints(),
        "see the walk above: a build without failpoints"
    );
    let started = Instant::now();
    let (_a, reference, _report) = reference_run();
    let (c1, c2) = (hit_counts(), hit_counts());
    let (mut walked, mut varied) = (Vec::new(), Vec::new());
    for (name, n, way) in WALK {
        if *way != Way::Run || !chosen(name) {
            continue;
        }
        let (a, b) = (c1.get(*name).copied(), c2.get(*name).copied());
        match (a, b) {
            (Some(a), Some(b)) if a == b && a > *n => {
                if walk_last(name, a, &reference) {
                    walked.push(format!("{name}:{a}"));
                } else {
                    varied.push(format!("{name} (this run)"));
                }
            }
            (Some(a), Some(b)) if a == b => {}
            _ => varied.push(format!("{name} ({a:?} and {b:?} hits)")),
        }
    }
    eprintln!(
        "failpoints crashed at their last hit: {} ({}); counts that vary with timing: {};          {:.0} s",
        walked.len(),
        walked.join(", "),
        if varied.is_empty() { "none".to_string() } else { varied.join(", ") },
        started.elapsed().as_secs_f64()
    );
    // Most of the repeated steps are deterministic in this campaign: the test would mean
    // nothing if timing took them all away.
    assert!(
        walked.len() >= 8,
        "only {} failpoints crashed at their last hit",
        walked.len()
    );
}

#[test]
fn an_unknown_failpoint_is_refused_clearly() {
    let d = tempfile::tempdir().unwrap_or_else(|e| panic!("{e}"));
    let o = rondo_at(d.path(), &["schema"], Some("child-startd:1"));
    assert_eq!(o.status.code(), Some(2), "{}", shown(&o));
    let e = String::from_utf8_lossy(&o.stderr);
    assert!(
        e.contains("RONDO_FAILPOINT=child-startd:1: `child-startd` is not a failpoint")
            && e.contains("child-started"),
        "{e}"
    );
}

/// The failpoints docs/concepts.md lists (the first column of the table under
/// "## Failpoints"), in order.
fn documented() -> Vec<String> {
    let path = repo().join("docs").join("concepts.md");
    let text = std::fs::read_to_string(&path).unwrap_or_else(|e| panic!("{}: {e}", path.display()));
    let Some(at) = text.find("\n## Failpoints") else {
        panic!("{}: no section `## Failpoints`", path.display());
    };
    let section = &text[at + 1..];
    let end = section[3..].find("\n## ").map_or(section.len(), |e| e + 3);
    section[..end]
        .lines()
        .filter_map(|l| l.strip_prefix("| `"))
        .filter_map(|l| l.split_once('`').map(|(name, _)| name.to_string()))
        .collect()
}

/// The Rust files under `dir`.
fn rust_files(dir: &Path, out: &mut Vec<std::path::PathBuf>) {
    let entries = std::fs::read_dir(dir).unwrap_or_else(|e| panic!("{}: {e}", dir.display()));
    for e in entries.flatten() {
        let path = e.path();
        if path.is_dir() {
            rust_files(&path, &mut *out);
        } else if path.extension().is_some_and(|x| x == "rs") {
            out.push(path);
        }
    }
}

/// A file's lines up to its test module (`#[cfg(test)]` before `mod NAME {`), with comment
/// lines blanked (their numbers kept).
fn code_lines(text: &str) -> Vec<&str> {
    let lines: Vec<&str> = text.lines().collect();
    let mut out = Vec::new();
    for (n, line) in lines.iter().enumerate() {
        let next = lines.get(n + 1).map(|l| l.trim()).unwrap_or("");
        if line.trim() == "#[cfg(test)]" && next.starts_with("mod ") && next.ends_with('{') {
            break;
        }
        out.push(if line.trim_start().starts_with("//") {
            ""
        } else {
            line
        });
    }
    out
}

/// Whether a line starts a function; its name.
fn fn_name(line: &str) -> Option<&str> {
    let mut t = line.trim_start();
    for prefix in ["pub(crate) ", "pub(super) ", "pub ", "async ", "unsafe "] {
        t = t.strip_prefix(prefix).unwrap_or(t);
    }
    let t = t.strip_prefix("async ").unwrap_or(t).strip_prefix("fn ")?;
    let end = t.find(|c: char| !(c.is_alphanumeric() || c == '_'))?;
    Some(&t[..end])
}

/// Functions that run write statements on a transaction their caller opens and commits:
/// the failpoint is the caller's, and every call of them must pass a transaction.
const ON_CALLERS_TRANSACTION: &[&str] = &[
    "store/mod.rs:event",
    "store/mod.rs:artifact",
    "store/reads/reports.rs:insert_generation",
    "store/reads/reports.rs:insert_artifact",
    "store/reads/reports.rs:insert_output",
    "store/reads/reports.rs:insert_source",
];

/// Writes with no failpoint of their own, and why none is needed.
const UNNAMED_WRITES: &[(&str, &str)] = &[(
    "store/reads/reports.rs:ensure_tables",
    "creates the report tables of a store older than migration 2 (CREATE TABLE IF NOT \
     EXISTS: a crash part-way is completed by the next call)",
)];

/// Does this line write to the store outside a `Script`?
fn writes(lines: &[&str], n: usize) -> Option<&'static str> {
    let line = lines[n];
    let near = lines[n..lines.len().min(n + 3)].join(" ");
    if line.contains(".execute(") {
        return Some(".execute(");
    }
    if line.contains("raw_sql(") {
        return Some("raw_sql(");
    }
    if line.contains(".commit()") {
        return Some("a transaction's .commit()");
    }
    if line.contains("migrator()") && near.contains(".run(") {
        return Some("the migrations' run");
    }
    if line.contains("sqlx::query") {
        let sql = near.to_uppercase();
        for kw in [
            "\"INSERT",
            "\"UPDATE",
            "\"DELETE",
            "\"REPLACE",
            "\"CREATE",
            "\"DROP",
            "\"ALTER",
        ] {
            if sql.contains(kw) {
                return Some("a writing statement");
            }
        }
    }
    None
}

#[test]
fn the_list_is_complete() {
    let names: Vec<String> = Failpoint::ALL
        .iter()
        .map(|f| f.name().to_string())
        .collect();
    assert_eq!(
        documented(),
        names,
        "the failpoints of docs/concepts.md (## Failpoints, first column) and of \
         src/failpoint.rs differ"
    );
    let src = repo().join("orchestrator").join("src");
    let mut files = Vec::new();
    rust_files(&src, &mut files);
    files.sort();
    let mut all_code = String::new();
    let mut offenders = Vec::new();
    let mut sites = Vec::new();
    for path in &files {
        let rel = path
            .strip_prefix(&src)
            .unwrap_or(path)
            .to_string_lossy()
            .replace('\\', "/");
        let text = std::fs::read_to_string(path).unwrap_or_else(|e| panic!("{rel}: {e}"));
        let lines = code_lines(&text);
        if rel != "failpoint.rs" {
            all_code.push_str(&lines.join("\n"));
        }
        // Each function: its name and its lines.
        let starts: Vec<(usize, &str)> = lines
            .iter()
            .enumerate()
            .filter_map(|(n, l)| fn_name(l).map(|f| (n, f)))
            .collect();
        let body_of = |n: usize| {
            let i = starts.iter().rposition(|(s, _)| *s <= n)?;
            let end = starts.get(i + 1).map_or(lines.len(), |(e, _)| *e);
            Some((starts[i].1, lines[starts[i].0..end].join("\n")))
        };
        let named = |body: &str| body.contains("failpoint::hit(") || body.contains("Failpoint::");
        for n in 0..lines.len() {
            let Some(what) = writes(&lines, n) else {
                continue;
            };
            let Some((func, body)) = body_of(n) else {
                offenders.push(format!("src/{rel}:{}: {what} outside a function", n + 1));
                continue;
            };
            let key = format!("{rel}:{func}");
            sites.push(key.clone());
            if named(&body)
                || ON_CALLERS_TRANSACTION.contains(&key.as_str())
                || UNNAMED_WRITES.iter().any(|(k, _)| *k == key)
            {
                continue;
            }
            offenders.push(format!(
                "src/{rel}:{}: {what} in `{func}`, which hits no failpoint",
                n + 1
            ));
        }
        // Every call of a function that writes on its caller's transaction passes one, from
        // a function that names the write.
        for n in 0..lines.len() {
            for block in ON_CALLERS_TRANSACTION {
                let Some((_, f)) = block.split_once(':') else {
                    continue;
                };
                let call = if f.starts_with("insert_") {
                    format!("reports::{f}(")
                } else {
                    format!("store::{f}(")
                };
                let Some(at) = lines[n].find(&call) else {
                    continue;
                };
                let rest = format!(
                    "{} {}",
                    &lines[n][at + call.len()..],
                    lines.get(n + 1).copied().unwrap_or("")
                );
                let arg = rest.trim_start();
                let on_tx = arg.starts_with("&mut *tx") || arg.starts_with("&mut tx");
                let in_named = body_of(n).is_some_and(|(_, b)| named(&b));
                if !(on_tx && in_named) {
                    offenders.push(format!(
                        "src/{rel}:{}: `{call}` must take a transaction (`&mut *tx`) inside a \
                         function that hits a failpoint",
                        n + 1
                    ));
                }
            }
        }
    }
    for must in [
        "store/mod.rs:commit",
        "store/mod.rs:open",
        "export/report/record.rs:record",
        "query/analysis.rs:record_eos",
        "store/mod.rs:event",
    ] {
        assert!(
            sites.iter().any(|s| s == must),
            "the scan did not see the write in {must}: {sites:?}"
        );
    }
    assert!(
        offenders.is_empty(),
        "store writes without a failpoint (call rondo::failpoint::hit after the commit, with \
         a new name in src/failpoint.rs and docs/concepts.md, or commit through a Script):\n{}",
        offenders.join("\n")
    );
    for f in Failpoint::ALL {
        let used = format!("Failpoint::{f:?}");
        assert!(
            all_code.contains(&used),
            "failpoint {} ({used}) is hit nowhere in the source",
            f.name()
        );
    }
}
