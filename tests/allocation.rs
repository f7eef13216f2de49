//! Allocation mode on the real one-node Slurm: `rondo submit` writes and submits a job that
//! runs the campaign inside the allocation; at Slurm's warning signal rondo stops, submits
//! its continuation and exits; the chain finishes the campaign with the numbers of an
//! uninterrupted run. Skips loudly without Slurm, and fails instead under RONDO_REQUIRE_SLURM=1
//! or CI=true.

mod common;

use std::path::Path;
use std::time::{Duration, Instant};

use common::*;

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

fn campaign(dir: &Path) {
    std::fs::create_dir_all(dir.join("state")).unwrap_or_else(|e| panic!("{e}"));
    std::fs::write(dir.join("x0.json"), "{\"x\": 0.0}\n").unwrap_or_else(|e| panic!("{e}"));
    let text = format!(
        r#"campaign: chained
about: test campaign that needs more than one allocation (not physics)
programs:
  step: {{ path: {prog} }}
parameters:
  pause: 5
  mode: ok
  state: {state}
  a: 1.0
start:
  x: x0.json
cycle:
  s:
    run: [step, "{{{{param:pause}}}}", "{{{{param:mode}}}}", "{{{{param:state}}}}", "{{{{input:x}}}}", "{{{{output:x}}}}", "{{{{param:a}}}}"]
    inputs: {{ x: {{ previous: s.x, initially: start.x }} }}
    outputs: {{ x: x.json }}
    metrics: [x]
stop:
  when:
    - {{ metric: s.x, change-below: 1.0e-4, for: 2 }}
  max-iterations: 40
"#,
        prog = fixture("slowstep.sh").display(),
        state = dir.join("state").display(),
    );
    std::fs::write(dir.join("c.yaml"), text).unwrap_or_else(|e| panic!("{e}"));
}

#[test]
fn a_campaign_longer_than_one_allocation_finishes_through_continuations() {
    if !have_slurm() {
        return;
    }
    let d = tempfile::tempdir().unwrap_or_else(|e| panic!("{e}"));
    campaign(d.path());
    // 1-minute jobs, warned 40 s before the limit. The warning may come well after its
    // nominal 20 s (it once came more than 12 s late, which let a 30 s campaign finish
    // inside the first job; the controller sends it from a periodic check, as recalled,
    // not verified here). The campaign needs about 75 s of
    // stages (15 iterations of 5 s), more than a job's whole limit, so it cannot end inside
    // the first job: at least two jobs.
    let o = run_rondo(
        d.path(),
        &[
            "submit",
            "c.yaml",
            "--time",
            "1",
            "--warning",
            "40",
            "--max-continuations",
            "6",
        ],
    );
    assert!(o.status.success(), "{}", shown(&o));
    let ws = d.path().join("c.rondo");
    let t0 = Instant::now();
    let status = loop {
        if ws.join("rondo.db").is_file() {
            let s = status_json(d.path(), &ws);
            let state = s["points"][0]["state"].as_str().unwrap_or("").to_string();
            if state == "converged" && s["orchestrator"].is_null() {
                break s;
            }
            assert!(state != "failed" && state != "capped", "{s}");
        }
        if t0.elapsed() > Duration::from_secs(300) {
            let _ = std::process::Command::new("scancel")
                .args(["--name", "chained.allocation"])
                .status();
            panic!("the chain did not finish in 5 minutes");
        }
        std::thread::sleep(Duration::from_secs(2));
    };
    let p = &status["points"][0];
    let it = p["iteration"].as_i64().unwrap_or(0) as i32;
    let x = p["metrics"]["s.x"].as_f64().unwrap_or(f64::NAN);
    assert!(
        (x - (1.0 - 0.5f64.powi(it))).abs() < 1e-12,
        "exact sequence: {p}"
    );
    let continued: i64 = query(&ws, |pool| {
        Box::pin(async move {
            sqlx::query_scalar("SELECT count(*) FROM events WHERE kind = 'allocation-continued'")
                .fetch_one(pool)
                .await
                .unwrap_or(0)
        })
    });
    assert!(continued >= 1, "the campaign ran in one job only");
    eprintln!("allocation chain: {continued} continuation(s), converged at iteration {it}");
}
