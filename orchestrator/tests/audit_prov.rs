//! PROV-JSON export of a recorded workspace, checked for its structure here and validated
//! by the general-purpose `prov` library (PyPI) through tests/prov_check.py.
//!
//! The Python interpreter with `prov` is RONDO_PROV_PYTHON (which `scripts/test` sets to the
//! environment it installs), else `python3` if it can import `prov`. Without one the
//! validation is skipped loudly (tests/common/skip.rs), unless RONDO_REQUIRE_PROV or CI=true
//! makes that a failure.

mod fixtures;

use std::path::{Path, PathBuf};
use std::process::Command;

use anyhow::{bail, Context, Result};
use rondo::export::{prov, report};
use rondo::query as audit;
use serde_json::Value;

fn has_prov(py: &str) -> bool {
    Command::new(py)
        .args(["-c", "import prov.model"])
        .output()
        .map(|o| o.status.success())
        .unwrap_or(false)
}

fn prov_python() -> Result<Option<String>> {
    if let Ok(p) = std::env::var("RONDO_PROV_PYTHON") {
        if has_prov(&p) {
            return Ok(Some(p));
        }
        bail!("RONDO_PROV_PYTHON={p} cannot import the `prov` package");
    }
    if has_prov("python3") {
        return Ok(Some("python3".to_string()));
    }
    fixtures::skip::skip_or_fail(
        "no Python with the `prov` package (RONDO_PROV_PYTHON is unset and python3 cannot import it); \
         the PROV-JSON export was not validated by the reference library",
        "run bash scripts/test, which installs tests/requirements-prov.txt and sets RONDO_PROV_PYTHON",
        &["RONDO_REQUIRE_PROV"],
    );
    Ok(None)
}

fn checker() -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR")).join("../tests/prov_check.py")
}

/// Run tests/prov_check.py; Ok(stdout) when it accepts the document with these counts.
fn validate(
    py: &str,
    doc: &Value,
    dir: &Path,
    entities: usize,
    activities: usize,
    agents: usize,
) -> Result<String> {
    let f = dir.join("prov.json");
    std::fs::write(&f, serde_json::to_vec_pretty(doc)?)?;
    let o = Command::new(py)
        .arg(checker())
        .arg(&f)
        .args(["--entities", &entities.to_string()])
        .args(["--activities", &activities.to_string()])
        .args(["--agents", &agents.to_string()])
        .output()
        .context("cannot run tests/prov_check.py")?;
    let out = String::from_utf8_lossy(&o.stdout).to_string();
    if !o.status.success() {
        bail!(
            "prov_check rejected the export: {out}{}",
            String::from_utf8_lossy(&o.stderr)
        );
    }
    Ok(out)
}

async fn artifact_count(pool: &sqlx::SqlitePool) -> Result<usize> {
    let n: i64 = sqlx::query_scalar("SELECT COUNT(*) FROM artifacts")
        .fetch_one(pool)
        .await?;
    Ok(n as usize)
}

#[tokio::test]
async fn whole_campaign_export_has_every_artifact_and_attempt() -> Result<()> {
    let d = tempfile::tempdir()?;
    let fx = fixtures::build(d.path()).await?;
    let doc = prov::export_as(&fx.pool, None, "alice").await?;
    let (entities, activities, agents) = prov::counts(&doc);
    // every artifact plus the campaign file (the plan)
    assert_eq!(entities, artifact_count(&fx.pool).await? + 1);
    assert_eq!(activities, fixtures::attempt_count());
    // the user, the engine program (by hash) and rondo (builtin mix)
    assert_eq!(agents, 3);
    for k in [
        "prefix",
        "entity",
        "activity",
        "agent",
        "used",
        "wasGeneratedBy",
        "wasAssociatedWith",
        "wasAttributedTo",
        "wasDerivedFrom",
    ] {
        assert!(doc.get(k).is_some(), "missing {k}");
    }
    let prog = format!("prog:{}", fx.band_program_blake3);
    assert_eq!(doc["agent"][&prog]["prov:type"]["$"], "prov:SoftwareAgent");
    assert_eq!(doc["agent"]["user:alice"]["prov:type"]["$"], "prov:Person");
    let start = format!("art:{}", fx.start_density);
    assert_eq!(doc["entity"][&start]["rondo:startFile"], "density");
    // the failed band attempt used the density but generated nothing
    let failed = doc["activity"]
        .as_object()
        .context("activities")?
        .iter()
        .find(|(_, a)| a["rondo:state"] == "failed")
        .map(|(k, _)| k.clone())
        .context("the failed attempt is an activity")?;
    let gens = doc["wasGeneratedBy"].as_object().context("generations")?;
    assert!(!gens.values().any(|g| g["prov:activity"] == failed.as_str()));
    let used = doc["used"].as_object().context("usages")?;
    assert!(used.values().any(|u| u["prov:activity"] == failed.as_str()));
    if let Some(py) = prov_python()? {
        let out = validate(&py, &doc, d.path(), entities, activities, agents)?;
        assert!(out.contains(&format!("{entities} entities")), "{out}");
        // wrong counts are refused
        assert!(validate(&py, &doc, d.path(), entities + 1, activities, agents).is_err());
    }
    Ok(())
}

#[tokio::test]
async fn export_of_a_report_csv_is_its_lineage() -> Result<()> {
    let d = tempfile::tempdir()?;
    let fx = fixtures::build(d.path()).await?;
    let sum = report::generate(&fx.pool, &fx.ws, &d.path().join("report"), &mut |_| {}).await?;
    let csv = sum.out_dir.join("convergence-p003.csv");
    let hash = audit::resolve_target(&fx.pool, &fx.ws, csv.to_str().unwrap_or_default()).await?;
    let doc = prov::export_as(&fx.pool, Some(&hash), "alice").await?;
    let (entities, activities, agents) = prov::counts(&doc);
    // the report and p003's 3 iterations × 5 stages
    assert_eq!(activities, 16);
    // p003: the start density and 7 artifacts per iteration; every report file; the plan
    assert_eq!(entities, 1 + 7 * 3 + sum.files.len() + 1);
    assert_eq!(agents, 3);
    let gen = doc["wasGeneratedBy"]
        .as_object()
        .context("generations")?
        .values()
        .find(|g| g["prov:entity"] == format!("art:{hash}").as_str())
        .context("the CSV was generated")?;
    assert_eq!(
        gen["prov:activity"],
        format!("run:report-{}", sum.report_id).as_str()
    );
    assert_eq!(gen["prov:role"], "convergence-p003.csv");
    let informed = doc["wasInformedBy"].as_object().context("communications")?;
    assert_eq!(
        informed.len(),
        3,
        "the report read p003's three update attempts"
    );
    // the band attempts act for the engine program, found by its hash
    let prog = format!("prog:{}", fx.band_program_blake3);
    let assoc = doc["wasAssociatedWith"]
        .as_object()
        .context("associations")?;
    assert!(assoc.values().any(|a| a["prov:agent"] == prog.as_str()));
    if let Some(py) = prov_python()? {
        validate(&py, &doc, d.path(), entities, activities, agents)?;
    }
    // after the report the whole campaign has one more activity
    let all = prov::export_as(&fx.pool, None, "alice").await?;
    assert_eq!(prov::counts(&all).1, fixtures::attempt_count() + 1);
    Ok(())
}

#[tokio::test]
async fn export_of_an_unknown_target_fails_clearly() -> Result<()> {
    let d = tempfile::tempdir()?;
    let fx = fixtures::build(d.path()).await?;
    let e = prov::export_as(&fx.pool, Some(&"ab".repeat(32)), "alice")
        .await
        .unwrap_err();
    assert!(
        format!("{e:#}").contains("not recorded in this workspace"),
        "{e:#}"
    );
    Ok(())
}

#[tokio::test]
async fn export_of_a_metric_is_the_lineage_of_its_attempt() -> Result<()> {
    let d = tempfile::tempdir()?;
    let fx = fixtures::build(d.path()).await?;
    let t = audit::resolve(&fx.pool, &fx.ws, "p001/2/update.energy", &mut |_, _| {}).await?;
    let doc = prov::export_target(&fx.pool, Some(&t), "alice").await?;
    let (entities, activities, agents) = prov::counts(&doc);
    // iterations 1 and 2 of p001, five stages each; the failed band attempt produced
    // nothing this metric depends on
    assert_eq!(activities, 10);
    // the start density, 7 artifacts per iteration, the plan
    assert_eq!(entities, 1 + 7 * 2 + 1);
    assert!(!doc["activity"]
        .as_object()
        .context("activities")?
        .values()
        .any(|a| a["rondo:state"] == "failed"));
    if let Some(py) = prov_python()? {
        validate(&py, &doc, d.path(), entities, activities, agents)?;
    }
    Ok(())
}

#[tokio::test]
async fn the_export_uses_only_namespaces_rondo_owns() -> Result<()> {
    let d = tempfile::tempdir()?;
    let fx = fixtures::build(d.path()).await?;
    let doc = prov::export_as(&fx.pool, None, "alice").await?;
    let text = serde_json::to_string_pretty(&doc)?;
    for placeholder in ["example.", ".invalid", "localhost", "urn:rondo:"] {
        assert!(
            !text.contains(placeholder),
            "the export names a namespace nobody owns ({placeholder}):\n{}",
            &doc["prefix"]
        );
    }
    let prefixes = doc["prefix"].as_object().context("prefix")?;
    for (p, uri) in prefixes {
        let uri = uri.as_str().context("a prefix is a string")?;
        assert!(
            uri.starts_with(prov::NS_BASE) || uri == "http://www.w3.org/2001/XMLSchema#",
            "prefix {p} = {uri} is not under rondo's namespace {}",
            prov::NS_BASE
        );
    }
    // rondo's namespace is a UUID URN (RFC 9562): "urn:uuid:" and 8-4-4-4-12 hex digits.
    let uuid = prov::NS_BASE
        .strip_prefix("urn:uuid:")
        .context("a UUID URN")?;
    let groups: Vec<usize> = uuid.split('-').map(str::len).collect();
    assert_eq!(groups, [8, 4, 4, 4, 12], "{uuid}");
    assert!(uuid
        .chars()
        .all(|c| c == '-' || c.is_ascii_hexdigit() && !c.is_ascii_uppercase()));
    // Workspace-scoped names: attempts of two workspaces never share an identifier.
    let ws_id: String = sqlx::query_scalar("SELECT workspace_id FROM campaign")
        .fetch_one(&fx.pool)
        .await?;
    assert_eq!(
        prefixes["run"],
        format!("{}#workspace:{ws_id}:", prov::NS_BASE).as_str()
    );
    Ok(())
}
