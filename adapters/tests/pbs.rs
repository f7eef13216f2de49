//! The PBS executor's parsing and script generation, against command output written from the
//! PBS documentation (`tests/fixtures/pbs/`, see its README: not captured from a real server),
//! and the generated job script run as a real shell process.

use std::path::{Path, PathBuf};

use rondo_adapters::executor::{LaunchRequest, Outcome, Resources};
use rondo_adapters::pbs::{
    only_unknown_jobs, parse_qstat_full, parse_qsub_output, pbs_job_state, states_for, PbsConfig,
    PbsExecutor,
};
use rondo_adapters::slurm::batch::{completion, read_exit, EndKind, JobState};

fn fixture(name: &str) -> String {
    let p: PathBuf = [env!("CARGO_MANIFEST_DIR"), "tests", "fixtures", "pbs", name]
        .iter()
        .collect();
    std::fs::read_to_string(&p).unwrap_or_else(|e| panic!("{}: {e}", p.display()))
}

fn ids(v: &[&str]) -> Vec<String> {
    v.iter().map(|s| s.to_string()).collect()
}

#[test]
fn qsub_prints_the_job_id() {
    assert_eq!(
        parse_qsub_output(&fixture("qsub.out")).expect("id"),
        "4242.pbs01"
    );
}

#[test]
fn full_status_blocks_are_parsed_with_continuation_lines() {
    let jobs = parse_qstat_full(&fixture("qstat-f-active.txt"));
    assert_eq!(jobs.len(), 3);
    assert_eq!(jobs[0].id, "4242.pbs01");
    assert_eq!(jobs[0].attrs["Job_Name"], "demo.V_1.00.it_1.solve");
    assert_eq!(
        jobs[0].attrs["Resource_List.select"],
        "1:ncpus=4:mpiprocs=4"
    );
    let vars = &jobs[0].attrs["Variable_List"];
    assert!(vars.starts_with("PBS_O_HOME=/home/alice,PBS_O_LANG=C.UTF-8,PBS_O_LOGNAME=alice,"));
    assert!(vars.ends_with("PBS_O_HOST=login1.example.org"));
    assert_eq!(jobs[1].attrs["exec_host"], "node07/0*4");
    // Queued, running and held jobs are not over.
    for j in &jobs {
        assert_eq!(pbs_job_state(j), JobState::Active, "{}", j.id);
    }
}

#[test]
fn finished_jobs_map_to_distinct_end_kinds() {
    let text = fixture("qstat-fx-finished.txt");
    let want = [
        ("5001.pbs01", EndKind::Ran { exit: Some((0, 0)) }),
        ("5002.pbs01", EndKind::Ran { exit: Some((3, 0)) }),
        ("5003.pbs01", EndKind::TimedOut),
        ("5004.pbs01", EndKind::Ran { exit: Some((0, 9)) }),
        ("5005.pbs01", EndKind::Cancelled),
        ("5006.pbs01", EndKind::NodeFailure),
    ];
    let requested: Vec<String> = want.iter().map(|(id, _)| id.to_string()).collect();
    let states = states_for(&requested, &text);
    for (id, end) in want {
        assert_eq!(states[id], JobState::Ended(end), "{id}");
    }
    let all = parse_qstat_full(&text);
    match pbs_job_state(&all[6]) {
        JobState::Ended(EndKind::Other(m)) => assert!(m.contains("-27"), "{m}"),
        other => panic!("memory-limit kill read as {other:?}"),
    }
}

#[test]
fn torque_completed_state_and_lower_case_exit_status() {
    let jobs = parse_qstat_full(&fixture("qstat-torque-completed.txt"));
    assert_eq!(
        pbs_job_state(&jobs[0]),
        JobState::Ended(EndKind::Ran { exit: Some((0, 0)) })
    );
}

#[test]
fn ids_match_by_sequence_number_and_unknown_ids_are_absent() {
    let text = fixture("qstat-f-active.txt");
    // The server printed 4243.pbs01.example.org for the 4243.pbs01 that qsub gave.
    let s = states_for(&ids(&["4243.pbs01", "3999.pbs01"]), &text);
    assert_eq!(s.get("4243.pbs01"), Some(&JobState::Active));
    assert!(!s.contains_key("3999.pbs01"));
    assert!(only_unknown_jobs(&fixture("qstat-unknown.err")));
    assert!(!only_unknown_jobs(&fixture("qstat-down.err")));
}

#[test]
fn end_kinds_become_the_recorded_outcomes() {
    // No markers in an empty directory: the server's word decides.
    let dir = tempfile::tempdir().expect("tempdir");
    let out = |end: EndKind, ours: bool| completion(1, dir.path(), Some(end), ours).outcome;
    assert_eq!(out(EndKind::TimedOut, false), Outcome::TimedOut);
    assert_eq!(out(EndKind::NodeFailure, false), Outcome::NodeFailure);
    assert_eq!(
        out(EndKind::Cancelled, true),
        Outcome::Cancelled { by: "rondo".into() }
    );
    assert!(matches!(
        out(EndKind::Cancelled, false),
        Outcome::Cancelled { by } if by.starts_with("external")
    ));
    assert_eq!(
        out(EndKind::Ran { exit: Some((0, 9)) }, false),
        Outcome::Signaled { signal: 9 }
    );
}

fn request(dir: &Path) -> LaunchRequest {
    LaunchRequest {
        attempt_id: 9,
        job_name: "demo/V 1.00/it 1/solve".into(),
        argv: vec![
            "/bin/sh".into(),
            "-c".into(),
            "printf '%s' \"$RONDO_X\" > x.txt; exit 4".into(),
        ],
        workdir: dir.to_path_buf(),
        env: [("RONDO_X".to_string(), "it's here".to_string())].into(),
        time_limit: None,
        outlive: false,
        resources: Resources {
            ntasks: Some(2),
            time: Some("30".into()),
            account: Some("proj1".into()),
            ..Default::default()
        },
    }
}

/// The script qsub would get: its directives, and (run as a real shell process here, since
/// `#PBS` lines are comments to the shell) the markers and exit status it leaves behind.
#[tokio::test]
async fn generated_script_has_pbs_directives_and_runs_with_markers() {
    let dir = tempfile::tempdir().expect("tempdir");
    let (tx, _rx) = tokio::sync::mpsc::unbounded_channel();
    let ex = PbsExecutor::new(PbsConfig::default(), tx);
    let script = ex.render_script(&request(dir.path())).expect("script");
    let wd = dir.path().display().to_string();
    for line in [
        "#PBS -N demo.V_1.00.it_1.solve".to_string(),
        "#PBS -l select=1:ncpus=2:mpiprocs=2".to_string(),
        "#PBS -l walltime=00:30:00".to_string(),
        "#PBS -A proj1".to_string(),
        format!("#PBS -o {wd}/pbs.out"),
        format!("#PBS -e {wd}/pbs.err"),
    ] {
        assert!(
            script.lines().any(|l| l == line),
            "missing {line:?} in\n{script}"
        );
    }
    let path = dir.path().join("rondo-job.sh");
    std::fs::write(&path, &script).expect("write script");
    let st = std::process::Command::new("/bin/sh")
        .arg(&path)
        .status()
        .expect("sh runs");
    assert_eq!(st.code(), Some(4));
    assert_eq!(read_exit(dir.path()).map(|(c, _)| c), Some(4));
    assert_eq!(
        std::fs::read_to_string(dir.path().join("x.txt")).expect("x.txt"),
        "it's here"
    );
    // With the marker present, a job the server reports as finished records the exit code.
    let c = completion(9, dir.path(), Some(EndKind::Ran { exit: None }), false);
    assert_eq!(c.outcome, Outcome::Exited { code: 4 });
    assert!(c.started_at.is_some() && c.host.is_some());
}

/// Stand-ins for the PBS clients that answer with the recorded outputs: `qsub` prints the
/// id in `next-id`, `qstat` prints `answer` (stdout) or `answer.err` (stderr, exit 153) and,
/// when `down-first` exists, first answers as a server that is down; every call's arguments
/// are appended to `<client>.args`. Not a PBS server: only the recorded text is replayed.
fn recorded_clients(dir: &Path) -> PbsConfig {
    let fix: PathBuf = [env!("CARGO_MANIFEST_DIR"), "tests", "fixtures", "pbs"]
        .iter()
        .collect();
    let d = dir.display();
    let f = fix.display();
    let scripts = [
        (
            "qsub",
            format!("#!/bin/sh\necho \"$@\" >> \"$0.args\"\ncat {d}/next-id\n"),
        ),
        (
            "qstat",
            format!(
                "#!/bin/sh\necho \"$@\" >> \"$0.args\"\n\
                 if [ -f {d}/down-first ]; then rm {d}/down-first; cat {f}/qstat-down.err >&2; exit 2; fi\n\
                 if [ -f {d}/answer.err ]; then cat {d}/answer.err >&2; exit 153; fi\n\
                 cat {d}/answer\n"
            ),
        ),
        ("qdel", "#!/bin/sh\necho \"$@\" >> \"$0.args\"\n".to_string()),
    ];
    for (name, text) in &scripts {
        let p = dir.join(name);
        std::fs::write(&p, text).expect("write client");
        use std::os::unix::fs::PermissionsExt;
        std::fs::set_permissions(&p, std::fs::Permissions::from_mode(0o755)).expect("chmod");
    }
    PbsConfig {
        poll_interval: std::time::Duration::from_millis(200),
        max_backoff: std::time::Duration::from_millis(400),
        qsub: dir.join("qsub").display().to_string(),
        qstat: dir.join("qstat").display().to_string(),
        qdel: dir.join("qdel").display().to_string(),
        ..Default::default()
    }
}

/// One attempt through the executor against recorded `qstat` output: the outcome it reports.
async fn outcome_with(
    id: &str,
    answer: Option<&str>,
    answer_err: Option<&str>,
    down_first: bool,
) -> (Outcome, String) {
    use rondo_adapters::executor::Executor;
    let clients = tempfile::tempdir().expect("tempdir");
    let work = tempfile::tempdir().expect("tempdir");
    let cfg = recorded_clients(clients.path());
    std::fs::write(clients.path().join("next-id"), format!("{id}\n")).expect("id");
    if let Some(a) = answer {
        std::fs::write(clients.path().join("answer"), fixture(a)).expect("answer");
    }
    if let Some(e) = answer_err {
        std::fs::write(clients.path().join("answer.err"), fixture(e)).expect("answer");
    }
    if down_first {
        std::fs::write(clients.path().join("down-first"), "").expect("down");
    }
    let (tx, mut rx) = tokio::sync::mpsc::unbounded_channel();
    let ex = PbsExecutor::new(cfg, tx);
    let handle = ex.launch(request(work.path())).await.expect("qsub");
    assert_eq!(handle.executor, "pbs");
    assert_eq!(handle.id, id);
    // A bound against a hang, not a timing check.
    let c = tokio::time::timeout(std::time::Duration::from_secs(60), rx.recv())
        .await
        .expect("a completion")
        .expect("channel open");
    assert_eq!(c.attempt_id, 9);
    let qsub_args = std::fs::read_to_string(clients.path().join("qsub.args")).expect("qsub args");
    assert!(
        qsub_args.trim_end().ends_with("rondo-job.sh"),
        "qsub gets the script: {qsub_args}"
    );
    assert!(work.path().join("rondo-job.sh").is_file());
    let qstat_args =
        std::fs::read_to_string(clients.path().join("qstat.args")).expect("qstat args");
    (c.outcome, qstat_args)
}

#[tokio::test]
async fn the_executor_submits_polls_and_reports_from_recorded_output() {
    // Walltime kill (-29), after one poll at which the server was down: retried, no false end.
    let (o, args) = outcome_with("5003.pbs01", Some("qstat-fx-finished.txt"), None, true).await;
    assert_eq!(o, Outcome::TimedOut);
    let calls: Vec<&str> = args.lines().collect();
    assert!(calls.len() >= 2, "{args}");
    assert!(calls.iter().all(|l| *l == "-f -x 5003.pbs01"), "{args}");
    // Killed by SIGKILL (265 = 256 + 9).
    let (o, _) = outcome_with("5004.pbs01", Some("qstat-fx-finished.txt"), None, false).await;
    assert_eq!(o, Outcome::Signaled { signal: 9 });
    // Deleted by someone else while running (substate 91).
    let (o, _) = outcome_with("5005.pbs01", Some("qstat-fx-finished.txt"), None, false).await;
    assert!(
        matches!(&o, Outcome::Cancelled { by } if by.starts_with("external")),
        "{o:?}"
    );
    // Mother-superior node failure (-20).
    let (o, _) = outcome_with("5006.pbs01", Some("qstat-fx-finished.txt"), None, false).await;
    assert_eq!(o, Outcome::NodeFailure);
    // The server printed a longer id (812.torque01.example.org) for the 812.torque01 qsub
    // gave; the job completed (Torque's `C`, exit_status 0) but its script left no markers
    // here (it never ran its program): lost, never taken for a success.
    let (o, _) = outcome_with(
        "812.torque01",
        Some("qstat-torque-completed.txt"),
        None,
        false,
    )
    .await;
    assert!(matches!(o, Outcome::Lost { .. }), "{o:?}");
    // The server no longer knows the job, and no marker: lost.
    let (o, _) = outcome_with("3999.pbs01", None, Some("qstat-unknown.err"), false).await;
    assert!(matches!(o, Outcome::Lost { .. }), "{o:?}");
}
