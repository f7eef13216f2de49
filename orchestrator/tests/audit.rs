//! Audit on a recorded workspace (real SQLite file, real artifact files): resolving targets,
//! upstream lineage, the stable `trace --json` shape, point diffs and clear errors.

mod fixtures;

use anyhow::Result;
use rondo::query::{self as audit, Target};

fn err_text(e: anyhow::Error) -> String {
    format!("{e:#}")
}

#[tokio::test]
async fn trace_a_metrics_file_back_to_the_band_program() -> Result<()> {
    let d = tempfile::tempdir()?;
    let fx = fixtures::build(d.path()).await?;
    // the metrics.json of p003's last update, as a file on disk outside the store
    let mj = serde_json::json!({"energy": fixtures::energy(27.0, 100.0, 3), "n_f": fixtures::n_f(27.0, 100.0, 3)})
        .to_string();
    let f = d.path().join("copied-metrics.json");
    std::fs::write(&f, &mj)?;
    let hash = audit::resolve_target(&fx.pool, &fx.ws, f.to_str().unwrap_or_default()).await?;
    assert_eq!(hash, blake3::hash(mj.as_bytes()).to_hex().to_string());
    let lin = audit::lineage(&fx.pool, &hash).await?;
    assert_eq!(lin.target, hash);
    assert_eq!(lin.campaign.name, "collapse-scan");
    // nearest first: the update that wrote it
    let first = &lin.attempts[0];
    assert_eq!(
        (
            first.point.as_deref(),
            first.iteration,
            first.stage.as_str()
        ),
        (Some("p003"), Some(3), "update")
    );
    // everything upstream stays within p003: 3 iterations × 5 stages
    assert_eq!(lin.attempts.len(), 15);
    assert!(lin
        .attempts
        .iter()
        .all(|a| a.point.as_deref() == Some("p003")));
    let band1 = lin
        .attempts
        .iter()
        .find(|a| a.stage == "band" && a.iteration == Some(1))
        .expect("band of iteration 1 in the lineage");
    assert_eq!(
        band1.program.blake3.as_deref(),
        Some(fx.band_program_blake3.as_str())
    );
    assert_eq!(band1.inputs.get("density"), Some(&fx.start_density));
    assert_eq!(lin.sources.len(), 1);
    assert_eq!(lin.sources[0].name, "density");
    // breadth-first: then the producers of the update's inputs (roles in name order: hk, sigma)
    let next: Vec<(&str, Option<i64>)> = lin.attempts[1..3]
        .iter()
        .map(|a| (a.stage.as_str(), a.iteration))
        .collect();
    assert_eq!(next, vec![("band", Some(3)), ("mix", Some(3))]);
    // the stable JSON shape
    let j = serde_json::to_value(&lin)?;
    assert_eq!(j["target"], hash);
    let a0 = &j["attempts"][0];
    for key in [
        "point",
        "iteration",
        "stage",
        "attempt",
        "argv",
        "program",
        "parameters",
        "inputs",
        "outputs",
    ] {
        assert!(a0.get(key).is_some(), "missing {key} in {a0}");
    }
    assert_eq!(a0["program"]["path"], "/opt/rondo/bin/model-solid");
    assert_eq!(a0["parameters"]["volume"], 27.0);
    assert_eq!(a0["outputs"]["metrics"], hash);
    assert!(a0["argv"].is_array());
    let text = lin.to_text();
    assert!(text.contains(&fx.band_program_blake3), "{text}");
    assert!(text.contains("p003 iteration 3 stage update"), "{text}");
    Ok(())
}

#[tokio::test]
async fn failed_attempts_are_not_producers_but_retries_are() -> Result<()> {
    let d = tempfile::tempdir()?;
    let fx = fixtures::build(d.path()).await?;
    let t = audit::resolve(&fx.pool, &fx.ws, "p001/2/update.energy", &mut |_, _| {}).await?;
    let Target::Metric(m) = &t else {
        panic!("expected a metric target, got {t:?}");
    };
    assert_eq!(m.value, fixtures::energy(26.0, 100.0, 2));
    let lin = audit::lineage_of(&fx.pool, &t).await?;
    assert_eq!(lin.target, "p001/2/update.energy");
    let bands: Vec<_> = lin.attempts.iter().filter(|a| a.stage == "band").collect();
    // iterations 2 and 1; the failed first band attempt of iteration 2 produced nothing
    assert_eq!(bands.len(), 2);
    assert!(bands.iter().all(|a| a.state == "succeeded"));
    assert_eq!(bands[0].attempt, 2);
    // `last` is the last good iteration
    let t = audit::resolve(&fx.pool, &fx.ws, "p010/last/solve.p1", &mut |_, _| {}).await?;
    let Target::Metric(m) = t else {
        panic!("expected a metric");
    };
    assert_eq!(m.iteration, 3);
    assert_eq!(m.error, Some(0.004));
    Ok(())
}

#[tokio::test]
async fn hash_prefixes_resolve_and_ambiguity_lists_candidates() -> Result<()> {
    let d = tempfile::tempdir()?;
    let fx = fixtures::build(d.path()).await?;
    let h = audit::resolve_target(&fx.pool, &fx.ws, &fx.start_density[..10]).await?;
    assert_eq!(h, fx.start_density);
    let upper = fx.start_density[..12].to_ascii_uppercase();
    assert_eq!(
        audit::resolve_target(&fx.pool, &fx.ws, &upper).await?,
        fx.start_density
    );
    let e = err_text(
        audit::resolve_target(&fx.pool, &fx.ws, "abc")
            .await
            .unwrap_err(),
    );
    assert!(e.contains("too short"), "{e}");
    for suffix in ["01", "02"] {
        sqlx::query("INSERT INTO artifacts(hash, size, original_name, created_at) VALUES (?, 1, 'x', 'now')")
            .bind(format!("abcdef{suffix}{}", "0".repeat(56)))
            .execute(&fx.pool)
            .await?;
    }
    let e = err_text(
        audit::resolve_target(&fx.pool, &fx.ws, "abcdef")
            .await
            .unwrap_err(),
    );
    assert!(
        e.contains("ambiguous") && e.contains("abcdef01") && e.contains("abcdef02"),
        "{e}"
    );
    let e = err_text(
        audit::resolve_target(&fx.pool, &fx.ws, "fedcba98")
            .await
            .unwrap_err(),
    );
    assert!(e.contains("no artifact"), "{e}");
    // a start file is its own lineage's source
    let lin = audit::lineage(&fx.pool, &fx.start_density).await?;
    assert!(lin.attempts.is_empty());
    assert_eq!(lin.sources[0].name, "density");
    Ok(())
}

#[tokio::test]
async fn bad_targets_give_clear_errors() -> Result<()> {
    let d = tempfile::tempdir()?;
    let fx = fixtures::build(d.path()).await?;
    let f = d.path().join("stranger.dat");
    std::fs::write(&f, b"never seen by the campaign")?;
    let e = err_text(
        audit::resolve_target(&fx.pool, &fx.ws, f.to_str().unwrap_or_default())
            .await
            .unwrap_err(),
    );
    assert!(
        e.contains("was never produced or used by this campaign"),
        "{e}"
    );
    assert!(e.contains("stranger.dat"), "{e}");
    let e = err_text(
        audit::resolve_target(&fx.pool, &fx.ws, "p099/1/update.energy")
            .await
            .unwrap_err(),
    );
    assert!(
        e.contains("unknown point `p099`") && e.contains("p001"),
        "{e}"
    );
    let e = err_text(
        audit::resolve_target(&fx.pool, &fx.ws, "p001/9/update.energy")
            .await
            .unwrap_err(),
    );
    assert!(e.contains("no metrics recorded at iteration 9"), "{e}");
    let e = err_text(
        audit::resolve_target(&fx.pool, &fx.ws, "p001/1/update.entropy")
            .await
            .unwrap_err(),
    );
    assert!(
        e.contains("no metric `update.entropy`") && e.contains("update.energy"),
        "{e}"
    );
    let e = err_text(
        audit::resolve_target(&fx.pool, &fx.ws, "no such thing")
            .await
            .unwrap_err(),
    );
    assert!(e.contains("cannot understand target"), "{e}");
    Ok(())
}

#[tokio::test]
async fn corrupt_database_is_named() -> Result<()> {
    let d = tempfile::tempdir()?;
    let db = d.path().join("rondo.db");
    std::fs::write(&db, vec![0x5au8; 8192])?;
    let e = err_text(rondo::store::open(&db).await.unwrap_err());
    assert!(e.contains(&db.display().to_string()), "{e}");
    // an empty (new) store has no campaign: a clear message rather than an empty lineage
    let d2 = tempfile::tempdir()?;
    let pool = rondo::store::open(&d2.path().join("rondo.db")).await?;
    let e = err_text(audit::lineage(&pool, &"0".repeat(64)).await.unwrap_err());
    assert!(e.contains("no campaign recorded"), "{e}");
    Ok(())
}

#[tokio::test]
async fn diff_of_two_temperatures() -> Result<()> {
    let d = tempfile::tempdir()?;
    let fx = fixtures::build(d.path()).await?;
    // p001 = (26, 100 K), p002 = (26, 600 K); selected by id and by sweep values
    let df = audit::diff(&fx.pool, "p001", &fx.pool, "volume=26,temperature=600").await?;
    assert_eq!(df.b.point, "p002");
    assert_eq!(df.sweep_values.len(), 1);
    assert_eq!(df.sweep_values[0].name, "temperature");
    assert_eq!(df.sweep_values[0].a, Some(serde_json::json!(100.0)));
    assert_eq!(df.sweep_values[0].b, Some(serde_json::json!(600.0)));
    assert!(df.parameters.is_empty(), "{:?}", df.parameters);
    assert!(df.programs.is_empty());
    assert!(df.stop.is_none());
    // the start density is shared; what band produced from it differs from there on
    assert!(!df
        .inputs
        .iter()
        .any(|i| i.stage == "band" && i.role == "density"));
    assert!(df
        .inputs
        .iter()
        .any(|i| i.stage == "project" && i.role == "hk"));
    let e = df
        .metrics
        .iter()
        .find(|m| m.name == "update.energy")
        .expect("energy differs");
    assert_eq!(e.first_iteration, 1);
    assert_eq!(e.a, Some(fixtures::energy(26.0, 100.0, 1)));
    assert_eq!(e.b, Some(fixtures::energy(26.0, 600.0, 1)));
    // project.n_c does not depend on temperature in the fixture
    assert!(df.metrics_equal.contains(&"project.n_c".to_string()));
    let text = df.to_text();
    assert!(
        text.contains("temperature") && text.contains("first differ at iteration 1"),
        "{text}"
    );
    let j = serde_json::to_value(&df)?;
    assert_eq!(j["metrics"][0]["first_iteration"], 1);
    Ok(())
}

#[tokio::test]
async fn diff_across_campaigns_sees_parameters_programs_and_stop_rules() -> Result<()> {
    let d1 = tempfile::tempdir()?;
    let d2 = tempfile::tempdir()?;
    let a = fixtures::build(d1.path()).await?;
    let b = fixtures::build_with(d2.path(), "1.0e-4", 6.5, "build-2").await?;
    let df = audit::diff(&a.pool, "p005", &b.pool, "p005").await?;
    assert!(df.sweep_values.is_empty());
    assert!(df.parameters.iter().any(|p| p.name == "band.u"
        && p.a == Some(serde_json::json!(6.0))
        && p.b == Some(serde_json::json!(6.5))));
    let bandp = df
        .programs
        .iter()
        .find(|p| p.stage == "band")
        .expect("band program differs");
    assert_eq!(
        bandp.a.blake3.as_deref(),
        Some(a.band_program_blake3.as_str())
    );
    assert_eq!(
        bandp.b.blake3.as_deref(),
        Some(b.band_program_blake3.as_str())
    );
    assert!(
        !df.programs.iter().any(|p| p.stage == "mix"),
        "builtin mix has no program"
    );
    let stop = df.stop.expect("stop rules differ");
    assert_eq!(stop.a["when"][0]["change-below"], 1.0e-3);
    assert_eq!(stop.b["when"][0]["change-below"], 1.0e-4);
    // the fixture's metric values do not depend on u: equal throughout
    assert!(df.metrics.is_empty(), "{:?}", df.metrics);
    let e = err_text(
        audit::diff(&a.pool, "p001", &b.pool, "p042")
            .await
            .unwrap_err(),
    );
    assert!(
        e.contains("point B") && e.contains("unknown point `p042`"),
        "{e}"
    );
    Ok(())
}

#[tokio::test]
async fn the_compact_trace_labels_batch_jobs_and_counts_what_it_leaves_out() -> Result<()> {
    let d = tempfile::tempdir()?;
    let fx = fixtures::build(d.path()).await?;
    let t = audit::resolve(&fx.pool, &fx.ws, "p003/3/update.energy", &mut |_, _| {}).await?;
    let mut lin = audit::lineage_of(&fx.pool, &t).await?;
    assert_eq!(lin.attempts.len(), 15);
    lin.limit(audit::DEFAULT_DEPTH);
    // iterations 3 and 2 of p003, five stages each
    assert_eq!(lin.attempts.len(), 10);
    assert_eq!(lin.omitted_attempts, Some(5));
    assert!(lin
        .attempts
        .iter()
        .all(|a| a.iteration.is_some_and(|i| i >= 2)));
    let text = lin.render(&audit::TextView { long: false });
    // the fixture's stages ran as Slurm jobs (the builtin mix inside rondo)
    assert!(text.contains("Slurm job "), "{text}");
    assert!(text.contains("inside rondo"), "{text}");
    assert!(
        !text.replace("Slurm job ", "").contains(" job "),
        "a bare `job`: {text}"
    );
    assert_eq!(text.matches("  argv ").count(), 1, "{text}");
    assert!(
        text.contains("... and 5 attempts of earlier iterations"),
        "{text}"
    );
    let j = serde_json::to_value(&lin)?;
    assert_eq!(j["omitted_attempts"], 5);
    Ok(())
}
