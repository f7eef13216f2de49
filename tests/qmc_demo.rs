//! The Monte Carlo demo campaign (`examples/model-sweep-qmc.yaml`) end to end: every point
//! converges by the noise-aware rule with the sweeps schedule driven by the loop, `rondo
//! status` reports final-window averages with error bars, the solver's estimators obey their
//! exact identities, and a campaign SIGKILLed at seeded instants and resumed records
//! bit-identical numbers (the solver's seed is derived from campaign, point, iteration and
//! stage, the schedule from recorded metrics).

mod common;

use common::*;
use sqlx::Row;

const CAMPAIGN: &str = "model-sweep-qmc.yaml";

#[test]
fn qmc_demo_converges_within_its_errors_and_resumes_bit_identically() {
    let _ = model_solid();
    let a = tempfile::tempdir().unwrap_or_else(|e| panic!("{e}"));
    let b = tempfile::tempdir().unwrap_or_else(|e| panic!("{e}"));
    demo_in(a.path(), CAMPAIGN);
    demo_in(b.path(), CAMPAIGN);

    let o = run_rondo(a.path(), &["run", CAMPAIGN, "--jobs", "2", "-q"]);
    assert_eq!(o.status.code(), Some(0), "{}", shown(&o));
    let ws = a.path().join("model-sweep-qmc.rondo");
    check_results(a.path(), &ws);
    let reference = record(&ws);

    let ws_b = b.path().join("model-sweep-qmc.rondo");
    let seed = crash_seed(20_261_203);
    kill_and_finish(b.path(), CAMPAIGN, seed, 4, 500..6_000);
    assert_same_record(&reference, &record(&ws_b), seed);
    assert_resume_was_clean(&ws_b, seed);
    let s = status_json(b.path(), &ws_b);
    for p in s["points"].as_array().cloned().unwrap_or_default() {
        assert_eq!(p["state"], "converged", "{p}");
    }
}

fn check_results(dir: &std::path::Path, ws: &std::path::Path) {
    let s = status_json(dir, ws);
    let points = s["points"].as_array().cloned().unwrap_or_default();
    assert_eq!(points.len(), 5, "five volumes at one temperature");
    for p in &points {
        // Converged by the rules (not capped), then the six iterations of the final window.
        assert_eq!(p["state"], "converged", "{p}");
        let avg = &p["averages"];
        let its = avg["solve.n_f"]["iterations"]
            .as_array()
            .map(Vec::len)
            .unwrap_or(0);
        assert_eq!(its, 6, "final window of 6 iterations: {avg}");
        for m in [
            "solve.n_f",
            "solve.docc",
            "solve.p0",
            "solve.p1",
            "solve.p2",
            "update.energy",
        ] {
            let e = avg[m]["error"].as_f64().unwrap_or(f64::NAN);
            assert!(
                e > 0.0 && e.is_finite(),
                "{}: {m} has no error bar: {}",
                p["id"],
                avg[m]
            );
        }
        let v = |m: &str| avg[m]["value"].as_f64().unwrap_or(f64::NAN);
        let e = |m: &str| avg[m]["error"].as_f64().unwrap_or(f64::NAN);
        // Exact identities of the segment-picture estimators (the configuration of the
        // orbital at each instant is one of empty, one flavour, both): P0 + P1 + P2 = 1,
        // ⟨n↑n↓⟩ = P2, ⟨n⟩ = P1 + 2 P2; they hold measurement by measurement, so also for
        // the window averages to rounding.
        assert!((v("solve.p0") + v("solve.p1") + v("solve.p2") - 1.0).abs() < 1e-9);
        assert!((v("solve.docc") - v("solve.p2")).abs() < 1e-12);
        assert!((v("solve.n_f") - v("solve.p1") - 2.0 * v("solve.p2")).abs() < 1e-9);
        // A strongly correlated f orbital near half filling (U = 6 eV ≫ hybridization):
        // the singly occupied configuration dominates and the double occupancy is far below
        // its uncorrelated value ⟨n↑⟩⟨n↓⟩ ≈ n²/4 (a fact of the trade).
        let n = v("solve.n_f");
        assert!((0.85..1.0).contains(&n), "{}: n_f = {n}", p["id"]);
        assert!(v("solve.p1") > 0.85, "{}: P1 = {}", p["id"], v("solve.p1"));
        assert!(v("solve.docc") < 0.1 * n * n / 4.0);
        // The lattice's n_f (update, from the mixed Σ) and the impurity's (solve) agree at
        // self-consistency within the loop's noise.
        let diff = (v("update.n_f") - v("solve.n_f")).abs();
        let comb = (e("update.n_f").powi(2) + e("solve.n_f").powi(2)).sqrt();
        assert!(
            diff < 5.0 * comb + 2e-3,
            "{}: impurity vs lattice n_f {diff} (± {comb})",
            p["id"]
        );
    }
    // The correlated orbital fills as the volume grows (narrower bands, smaller
    // hybridization), by far more than the error bars: n_f increases monotonically.
    let nf: Vec<f64> = points
        .iter()
        .map(|p| {
            p["averages"]["solve.n_f"]["value"]
                .as_f64()
                .unwrap_or(f64::NAN)
        })
        .collect();
    assert!(
        nf.windows(2).all(|w| w[1] > w[0]),
        "n_f against volume: {nf:?}"
    );

    // The sweeps schedule: every point started at 20 000 sweeps and reached the cap of
    // 320 000 before it stopped; the value is recorded in each solve attempt's parameters.
    let sweeps: Vec<(String, i64, i64)> = query(ws, |pool| {
        Box::pin(async move {
            sqlx::query(
                "SELECT point, iteration, parameters_json FROM attempts \
                 WHERE stage = 'solve' AND state = 'succeeded' ORDER BY point, iteration",
            )
            .fetch_all(pool)
            .await
            .unwrap_or_default()
            .into_iter()
            .map(|r| {
                let p: serde_json::Value =
                    serde_json::from_str(&r.get::<String, _>(2)).unwrap_or_default();
                (r.get(0), r.get(1), p["sweeps"].as_i64().unwrap_or(-1))
            })
            .collect()
        })
    });
    for p in &points {
        let id = p["id"].as_str().unwrap_or("");
        let own: Vec<i64> = sweeps.iter().filter(|s| s.0 == id).map(|s| s.2).collect();
        assert_eq!(own.first(), Some(&20_000), "{id}: {own:?}");
        assert_eq!(own.last(), Some(&320_000), "{id}: {own:?}");
        assert!(
            own.windows(2).all(|w| w[1] == w[0] || w[1] == 2 * w[0]),
            "{id}: {own:?}"
        );
    }

    // The text status shows the window averages with their error bars.
    let o = run_rondo(dir, &["status", CAMPAIGN]);
    let text = String::from_utf8_lossy(&o.stdout);
    assert!(text.contains("averaged over iterations"), "{text}");
    assert!(
        text.contains("solve.n_f=0.9") && text.contains(" ± "),
        "{text}"
    );
}
