//! Resident stages (docs/resident.md) through the real rondo binary, real processes and the
//! reference engine: the shell server of docs/resident.md (read from the page) runs
//! `model-solid band` once per hand-off and gives exactly the numbers of the same campaign
//! with a fresh process per attempt; a resident program that dies, one that hangs past its
//! per-hand-off limit and one that writes its done before its output is complete are each
//! caught, never stored, and restarted from the last good iteration, ending bit-identical to
//! a run without the fault; seeded SIGKILLs of rondo end bit-identical too, with no process
//! left behind.

mod common;

use std::path::{Path, PathBuf};

use common::*;

/// The shell server of docs/resident.md, exactly as the page shows it.
fn serve_script(dir: &Path) -> PathBuf {
    let page = std::fs::read_to_string(repo().join("docs").join("resident.md"))
        .unwrap_or_else(|e| panic!("docs/resident.md: {e}"));
    let start = page
        .find("<!-- serve.sh: begin -->")
        .unwrap_or_else(|| panic!("docs/resident.md has no serve.sh block"));
    let block = &page[start..];
    let end = block
        .find("<!-- serve.sh: end -->")
        .unwrap_or_else(|| panic!("docs/resident.md: the serve.sh block does not end"));
    let body: String = block[..end]
        .lines()
        .skip(1)
        .filter(|l| !l.starts_with("```"))
        .map(|l| format!("{l}\n"))
        .collect();
    assert!(body.starts_with("#!/bin/sh\n"), "{body}");
    let path = dir.join("serve.sh");
    std::fs::write(&path, body).unwrap_or_else(|e| panic!("{e}"));
    use std::os::unix::fs::PermissionsExt;
    std::fs::set_permissions(&path, std::fs::Permissions::from_mode(0o755))
        .unwrap_or_else(|e| panic!("{e}"));
    path
}

/// The band stage: resident (the docs' server around tests/fixtures/bandstep.sh, with a
/// fault `mode`), or model-solid's own band as a fresh process per attempt.
fn band_stage(dir: &Path, mode: Option<&str>) -> String {
    let Some(mode) = mode else {
        return r#"  band:
    run: [engine, band, --volume, "{{param:volume}}", --kmesh, "{{param:kmesh}}",
          --density, "{{input:density}}", --out, "{{output:hk}}"]
    inputs:
      density: { previous: mix.density, initially: start.density }
    outputs: { hk: hk.npy }
    metrics: [band_energy, eps_f, hopping, hybridization]
"#
        .to_string();
    };
    let limit = if mode == "hang" { "0:10" } else { "5:00" };
    format!(
        r#"  band:
    resident: true
    run: [serve, {step}, {mode}, {counters}, "{{{{param:volume}}}}", "{{{{param:kmesh}}}}"]
    also-runs: [step, engine]
    case-folder: {{ path: case }}
    inputs:
      density: {{ previous: mix.density, initially: start.density }}
    outputs: {{ hk: hk.npy }}
    metrics: [band_energy, eps_f, hopping, hybridization]
    read-metrics:
      served: {{ file: served.txt, pattern: 'served (\d+)' }}
    time-limit: "{limit}"
"#,
        step = fixture("bandstep.sh").display(),
        counters = dir.join("counters").display(),
    )
}

/// model-sweep's physics at two volumes, five iterations (capped), on a small k mesh.
fn campaign(dir: &Path, mode: Option<&str>) {
    demo_in(dir, "model-sweep.yaml");
    std::fs::create_dir_all(dir.join("counters")).unwrap_or_else(|e| panic!("{e}"));
    let serve = serve_script(dir);
    let text = format!(
        r#"campaign: resident
about: test campaign (the invented demo physics of model-solid)
programs:
  engine: {{ path: model-solid }}
  serve: {{ path: {serve} }}
  step: {{ path: {step} }}
parameters: {{ u: 6.0, kmesh: 8, electrons: 1.8, solver: hubbard-i, emin: -10.0, emax: 10.0,
              temperature: 600 }}
sweep:
  product:
    volume: [26.0, 28.0]
start:
  density: start/density.json
  sigma: start/sigma.npy
defaults:
  time-limit: "05:00"
  retries: 1
seed: 20261204
cycle:
{band}  project:
    run: [engine, project, --hk, "{{{{input:hk}}}}", --sigma, "{{{{input:sigma}}}}",
          --density, "{{{{input:density}}}}", --temperature, "{{{{param:temperature}}}}",
          --emin, "{{{{param:emin}}}}", --emax, "{{{{param:emax}}}}",
          --out-delta, "{{{{output:delta}}}}", --out-levels, "{{{{output:levels}}}}"]
    inputs:
      hk: band.hk
      sigma: {{ previous: mix.sigma, initially: start.sigma }}
      density: {{ previous: mix.density, initially: start.density }}
    outputs: {{ delta: delta.npy, levels: levels.json }}
  solve:
    run: [engine, solve, --delta, "{{{{input:delta}}}}", --levels, "{{{{input:levels}}}}",
          --u, "{{{{param:u}}}}", --solver, "{{{{param:solver}}}}", --seed, "{{{{seed}}}}",
          --out-sigma, "{{{{output:sigma}}}}"]
    inputs: {{ delta: project.delta, levels: project.levels }}
    outputs: {{ sigma: sigma.npy }}
    metrics: [n_f, docc]
  update:
    run: [engine, update, --hk, "{{{{input:hk}}}}", --sigma, "{{{{input:sigma}}}}",
          --density, "{{{{input:density}}}}", --temperature, "{{{{param:temperature}}}}",
          --electrons, "{{{{param:electrons}}}}", --volume, "{{{{param:volume}}}}",
          --out, "{{{{output:density}}}}"]
    inputs:
      hk: band.hk
      sigma: solve.sigma
      density: {{ previous: mix.density, initially: start.density }}
    outputs: {{ density: density.json }}
    metrics: [n_f, mu, energy]
  mix:
    builtin: mix
    inputs: {{ sigma: solve.sigma, density: update.density }}
    outputs: {{ sigma: sigma.npy, density: density.json }}
    settings: {{ method: anderson, alpha: 0.4, history: 8 }}
stop:
  when:
    - {{ metric: update.n_f, change-below: 1.0e-15, for: 2 }}
  max-iterations: 5
"#,
        serve = serve.display(),
        step = fixture("bandstep.sh").display(),
        band = band_stage(dir, mode),
    );
    std::fs::write(dir.join("r.yaml"), text).unwrap_or_else(|e| panic!("{e}"));
}

fn tmp() -> tempfile::TempDir {
    tempfile::tempdir().unwrap_or_else(|e| panic!("tempdir: {e}"))
}

/// Run the campaign to its end (every point capped: exit status 3) and return its record.
fn run_to_end(dir: &Path) -> Record {
    let o = run_rondo(
        dir,
        &["run", "r.yaml", "--max-running", "2", "-q", "--grace", "2"],
    );
    let ws = dir.join("r.rondo");
    if o.status.code() != Some(3) {
        let log = strings(
            &ws,
            "SELECT kind || ' ' || coalesce(point, '') || ' ' || detail FROM events",
        );
        panic!("{}\nevents:\n{}", shown(&o), log.join("\n"));
    }
    assert_no_double_success_nor_children(&ws, 0);
    record(&ws)
}

fn events(ws: &Path, kind: &'static str) -> Vec<String> {
    match kind {
        "handoff" => strings(
            ws,
            "SELECT point || ' ' || detail FROM events WHERE kind = 'handoff' ORDER BY rowid",
        ),
        "resident-started" => strings(
            ws,
            "SELECT point || ' ' || detail FROM events WHERE kind = 'resident-started' ORDER BY rowid",
        ),
        _ => strings(
            ws,
            "SELECT point || ' ' || detail FROM events WHERE kind = 'resident-ended' ORDER BY rowid",
        ),
    }
}

#[test]
fn the_shell_server_of_the_docs_gives_the_numbers_of_a_fresh_process_per_attempt() {
    let fresh = tmp();
    campaign(fresh.path(), None);
    let want = run_to_end(fresh.path());
    let served = tmp();
    campaign(served.path(), Some("ok"));
    let got = run_to_end(served.path());
    assert_eq!(want.len(), got.len(), "the same attempts succeeded");
    for (key, (outs, metrics)) in &want {
        let (g_outs, g_metrics) = got
            .get(key)
            .unwrap_or_else(|| panic!("{key:?} missing in the resident run"));
        if key.2 == "band" {
            assert_eq!(g_outs.get("hk"), outs.get("hk"), "H(k) of {key:?}");
            for (name, bits) in metrics {
                assert_eq!(g_metrics.get(name), Some(bits), "{name} of {key:?}");
            }
            // One line per iteration in the program's kept state.
            assert_eq!(
                g_metrics.get("band.served").map(|b| f64::from_bits(*b)),
                Some(key.1 as f64),
                "{key:?}"
            );
            assert!(g_outs.contains_key("folder"), "{key:?}");
        } else {
            assert_eq!(g_outs, outs, "outputs of {key:?}");
            assert_eq!(g_metrics, metrics, "metrics of {key:?}");
        }
    }
    // Provenance: one attempt per hand-off, the argv that started the process, the hashes
    // of the wrapper and what it runs, the hand-off numbers 1..5 of one process per point.
    let ws = served.path().join("r.rondo");
    let rows = strings(
        &ws,
        "SELECT executor || ' ' || argv_json || ' ' || coalesce(program_blake3, '-') \
         FROM attempts WHERE stage = 'band' ORDER BY rowid",
    );
    assert_eq!(rows.len(), 10, "{rows:?}");
    for r in &rows {
        assert!(r.starts_with("resident [\""), "{r}");
        assert!(r.contains("serve.sh") && r.contains("bandstep.sh"), "{r}");
        assert!(!r.ends_with(" -"), "no program hash: {r}");
    }
    let started = events(&ws, "resident-started");
    assert_eq!(started.len(), 2, "one process per point: {started:?}");
    let handoffs = events(&ws, "handoff");
    for point in ["p001", "p002"] {
        let numbers: Vec<String> = handoffs
            .iter()
            .filter(|h| h.starts_with(point))
            .filter_map(|h| h.split_whitespace().nth(2).map(str::to_string))
            .collect();
        assert_eq!(numbers, ["1", "2", "3", "4", "5"], "{handoffs:?}");
    }
    assert_eq!(events(&ws, "resident-ended").len(), 2);
    let numbers = strings(
        &ws,
        "SELECT CAST(h.number AS TEXT) FROM handoffs h JOIN attempts a ON a.id = h.attempt_id \
         WHERE a.point = 'p002' ORDER BY a.iteration",
    );
    assert_eq!(numbers, ["1", "2", "3", "4", "5"]);
    // `rondo trace` shows the hand-off with its process and the attempt that started it.
    let o = run_rondo(served.path(), &["trace", "p002/3/band.hk"]);
    assert!(o.status.success(), "{}", shown(&o));
    let text = String::from_utf8_lossy(&o.stdout);
    assert!(
        text.contains("handoff   3 to resident process") && text.contains("started by attempt"),
        "{text}"
    );
    let o = run_rondo(served.path(), &["trace", "p002/3/band.hk", "--json"]);
    assert!(o.status.success(), "{}", shown(&o));
    let t: serde_json::Value = serde_json::from_slice(&o.stdout)
        .unwrap_or_else(|e| panic!("trace --json: {e}\n{}", shown(&o)));
    let h = &t["attempts"][0]["handoff"];
    assert_eq!(h["number"], 3, "{t}");
    assert!(h["process_id"].as_i64().is_some_and(|p| p > 0), "{t}");
}

/// The faults: each one fails one hand-off per point, which is retried in a fresh program
/// from the last good iteration; the record is the fault-free run's, bit for bit.
#[test]
fn a_program_that_dies_hangs_or_answers_early_restarts_from_the_last_good_iteration() {
    let clean = tmp();
    campaign(clean.path(), Some("ok"));
    let reference = run_to_end(clean.path());
    for (mode, kind, says) in [
        ("die", "resident-died", "killed by signal 9"),
        ("hang", "timeout", "within its time limit of 10 s"),
        (
            "half",
            "refused-output",
            "it was not complete when the program wrote done",
        ),
    ] {
        let d = tmp();
        campaign(d.path(), Some(mode));
        let got = run_to_end(d.path());
        let ws = d.path().join("r.rondo");
        let failed = strings(
            &ws,
            "SELECT point || ' ' || failure_kind || ' ' || failure_message || ' ' || id \
             FROM attempts WHERE state = 'failed' ORDER BY point",
        );
        assert_eq!(failed.len(), 2, "{mode}: one failure per point: {failed:?}");
        for f in &failed {
            assert!(
                f.contains(&format!(" {kind} ")) && f.contains(says),
                "{mode}: {f}"
            );
        }
        assert_same_record(&reference, &got, 0);
        // A fresh process for each retry: two per point.
        assert_eq!(events(&ws, "resident-started").len(), 4, "{mode}");
        if mode == "half" {
            // The refused attempts stored nothing, and the half file is not in the store.
            let stored = strings(
                &ws,
                "SELECT o.artifact FROM attempt_outputs o JOIN attempts a ON a.id = o.attempt_id \
                 WHERE a.state = 'failed'",
            );
            assert!(stored.is_empty(), "{stored:?}");
            for point in ["p001", "p002"] {
                let full = reference
                    .get(&(point.to_string(), 2, "band".to_string()))
                    .and_then(|(o, _)| o.get("hk").cloned())
                    .unwrap_or_default();
                let bytes = std::fs::read(ws.join("store").join(&full[..2]).join(&full[2..]))
                    .unwrap_or_else(|e| panic!("{e}"));
                let half = blake3::hash(&bytes[..bytes.len() / 2]).to_hex().to_string();
                let path = ws.join("store").join(&half[..2]).join(&half[2..]);
                assert!(!path.exists(), "the half-written H(k) was stored");
            }
        }
    }
}

#[test]
fn sigkill_of_rondo_mid_campaign_then_resume_is_bit_identical_and_leaves_no_process() {
    let clean = tmp();
    campaign(clean.path(), Some("ok"));
    let reference = run_to_end(clean.path());
    let d = tmp();
    campaign(d.path(), Some("ok"));
    let seed = crash_seed(20_261_205);
    kill_and_finish(d.path(), "r.yaml", seed, 3, reference.len(), (0.15, 0.8), 3);
    let ws = d.path().join("r.rondo");
    assert_same_record(&reference, &record(&ws), seed);
    assert_resume_was_clean(&ws, seed);
    // Every start of rondo began a fresh program from the last good iteration.
    let started = events(&ws, "resident-started");
    assert!(started.len() > 2, "{started:?}");
}

/// The failpoints of a hand-off (docs/concepts.md, "Failpoints"; the other failpoints are
/// walked in tests/failpoint_walk.rs): rondo crashes there (SIGKILL, on the third hit, in
/// the middle of the campaign), and the next run ends the leftover program, starts afresh
/// from the last good iteration, and ends bit-identical to an uninterrupted run with no
/// process left.
#[test]
fn every_handoff_failpoint_crashes_there_and_resumes_identically() {
    let clean = tmp();
    campaign(clean.path(), Some("ok"));
    let reference = run_to_end(clean.path());
    for name in ["handoff-started", "handoff-recorded"] {
        let d = tmp();
        campaign(d.path(), Some("ok"));
        let armed = format!("{name}:3");
        let args = ["run", "r.yaml", "--max-running", "2", "-q", "--grace", "2"];
        assert_crashed_at(&rondo_at(d.path(), &args, Some(&armed)), &armed);
        let got = run_to_end(d.path());
        let ws = d.path().join("r.rondo");
        assert_same_record(&reference, &got, 0);
        assert_resume_was_clean(&ws, 0);
        eprintln!("{armed}: crashed there; the resumed run ends identical, no process left");
    }
}

/// The second reference engine, built by the same `cargo test --workspace` run.
fn casebook() -> PathBuf {
    let p = rondo().with_file_name("casebook");
    assert!(
        p.is_file(),
        "{} is missing: build the workspace first (cargo build --workspace)",
        p.display()
    );
    p
}

/// A campaign of casebook's band sub-step on a case made by `casebook init`, three
/// iterations at the start density: resident (`casebook serve`) or one-shot per attempt.
fn casebook_campaign(dir: &Path, resident: bool) {
    let ex = repo().join("examples").join("start");
    let start = dir.join("start");
    std::fs::create_dir_all(&start).unwrap_or_else(|e| panic!("{e}"));
    let o = std::process::Command::new(casebook())
        .arg("init")
        .arg(start.join("case"))
        .arg("--density")
        .arg(ex.join("density.json"))
        .arg("--sigma")
        .arg(ex.join("sigma.npy"))
        .args(["--volume", "27", "--kmesh", "8", "--temperature", "600"])
        .args(["--electrons", "1.8", "--u", "6.0"])
        .output()
        .unwrap_or_else(|e| panic!("casebook init: {e}"));
    assert!(o.status.success(), "{}", shown(&o));
    std::fs::copy(
        start.join("case").join("case.density"),
        start.join("density.txt"),
    )
    .unwrap_or_else(|e| panic!("{e}"));
    let band = if resident {
        "    resident: true\n    run: [casebook, serve, case, --handoff, handoff]\n"
    } else {
        "    shell: true\n    run: \"cp {{input:density}} case/case.density && \
         {{program:casebook}} band case && cp case/case.hamiltonian.npy hamiltonian.npy && \
         cp case/case.eigen eigen && cp case/case.levels levels\"\n"
    };
    let text = format!(
        "campaign: cb
about: test campaign (the invented demo physics of model-solid, through casebook)
programs:
  casebook: {{ path: {exe}, version-flag: --version }}
start:
  case: start/case
  density: start/density.txt
cycle:
  band:
{band}    case-folder: {{ path: case, initially: start.case }}
    inputs: {{ density: start.density }}
    outputs: {{ hk: hamiltonian.npy, eigen: eigen, levels: levels }}
stop: {{ max-iterations: 3 }}
",
        exe = casebook().display()
    );
    std::fs::write(dir.join("r.yaml"), text).unwrap_or_else(|e| panic!("{e}"));
}

#[test]
fn casebook_serve_speaks_the_protocol_and_gives_the_one_shot_band() {
    let oneshot = tmp();
    casebook_campaign(oneshot.path(), false);
    let want = run_to_end(oneshot.path());
    let served = tmp();
    casebook_campaign(served.path(), true);
    let got = run_to_end(served.path());
    assert_eq!(want.len(), 3);
    assert_eq!(got.len(), 3);
    for (key, (outs, _)) in &want {
        let (g, _) = got
            .get(key)
            .unwrap_or_else(|| panic!("{key:?} missing in the resident run"));
        for role in ["hk", "levels"] {
            assert_eq!(g.get(role), outs.get(role), "{role} of {key:?}");
        }
        assert!(g.contains_key("eigen") && g.contains_key("folder"), "{g:?}");
    }
    let ws = served.path().join("r.rondo");
    assert_eq!(events(&ws, "resident-started").len(), 1);
    assert_eq!(events(&ws, "handoff").len(), 3);
}

fn have_slurm() -> bool {
    let ok = std::process::Command::new("sbatch")
        .arg("--version")
        .output()
        .is_ok_and(|o| o.status.success());
    if !ok {
        skip_or_fail(
            "Slurm is not here (`sbatch --version` failed)",
            "start the one-node Slurm with `bash scripts/dev-slurm start` (as root)",
            &["RONDO_REQUIRE_SLURM"],
        );
    }
    ok
}

/// Inside an allocation (`rondo submit` on the one-node Slurm) the resident programs run on
/// the allocation's node beside rondo, end with it, and the campaign records exactly the
/// local run's outputs and metrics.
#[test]
fn inside_an_allocation_the_resident_campaign_gives_the_local_record() {
    use std::time::{Duration, Instant};
    if !have_slurm() {
        return;
    }
    let clean = tmp();
    campaign(clean.path(), Some("ok"));
    let reference = run_to_end(clean.path());
    let d = tmp();
    campaign(d.path(), Some("ok"));
    let o = run_rondo(d.path(), &["submit", "r.yaml", "--time", "10"]);
    assert!(o.status.success(), "{}", shown(&o));
    let ws = d.path().join("r.rondo");
    let t0 = Instant::now();
    loop {
        if ws.join("rondo.db").is_file() {
            let s = status_json(d.path(), &ws);
            let points = s["points"].as_array().cloned().unwrap_or_default();
            let capped = points.iter().filter(|p| p["state"] == "capped").count();
            if capped == 2 && s["orchestrator"].is_null() {
                break;
            }
            assert!(!points.iter().any(|p| p["state"] == "failed"), "{s}");
        }
        if t0.elapsed() > Duration::from_secs(300) {
            let _ = std::process::Command::new("scancel")
                .args(["--name", "resident.allocation"])
                .status();
            panic!("the allocation did not finish the campaign in 5 minutes");
        }
        std::thread::sleep(Duration::from_secs(1));
    }
    assert_same_record(&reference, &record(&ws), 0);
    assert_no_double_success_nor_children(&ws, 0);
    assert_eq!(events(&ws, "resident-started").len(), 2);
    assert_eq!(events(&ws, "resident-ended").len(), 2);
}

/// A stop of rondo on purpose (SIGTERM) ends the resident programs before rondo exits, the
/// hand-off it was waiting for (if any) uses up no retry, and the next run ends with the
/// record of an uninterrupted one.
#[test]
fn sigterm_of_rondo_ends_its_resident_programs_and_the_next_run_goes_on() {
    use std::time::{Duration, Instant};
    let clean = tmp();
    campaign(clean.path(), Some("ok"));
    let reference = run_to_end(clean.path());
    let d = tmp();
    campaign(d.path(), Some("ok"));
    let ws = d.path().join("r.rondo");
    let mut child = std::process::Command::new(rondo())
        .args(["run", "r.yaml", "--max-running", "2", "-q", "--grace", "2"])
        .current_dir(d.path())
        .env("PATH", path_with_binaries())
        .stdout(std::process::Stdio::null())
        .stderr(std::process::Stdio::null())
        .spawn()
        .unwrap_or_else(|e| panic!("spawn rondo: {e}"));
    let t0 = Instant::now();
    while succeeded_attempts_ro(&ws) < 12 {
        assert!(
            child.try_wait().ok().flatten().is_none(),
            "rondo ended early"
        );
        assert!(t0.elapsed() < Duration::from_secs(300), "no progress");
        std::thread::sleep(Duration::from_millis(10));
    }
    let pid = child.id() as i32;
    // SAFETY: kill(2) on the pid of our own child, which has not been waited for yet.
    assert_eq!(unsafe { libc::kill(pid, libc::SIGTERM) }, 0);
    let status = child.wait().unwrap_or_else(|e| panic!("{e}"));
    assert!(!status.success(), "{status:?}");
    let id = workspace_id(&ws);
    assert!(
        processes_of_workspace(&id).is_empty(),
        "processes left when rondo stopped: {:?}",
        processes_of_workspace(&id)
    );
    let got = run_to_end(d.path());
    assert_same_record(&reference, &got, 0);
    let failed = strings(&ws, "SELECT id FROM attempts WHERE state = 'failed'");
    assert!(failed.is_empty(), "{failed:?}");
}
