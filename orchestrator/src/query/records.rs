//! The records of a workspace as the read side sees them: the campaign, one attempt with its
//! inputs, outputs and metrics, and the campaign file's `stop:` section. Built from the
//! typed rows of [`crate::store::reads`]; nothing here runs, schedules or writes anything.

use std::collections::BTreeMap;

use anyhow::{bail, Context, Result};
use serde::Serialize;
use serde_json::Value;
use sqlx::SqlitePool;

use crate::store::reads::attempts::{self, Files};

/// The campaign a record belongs to.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct CampaignRef {
    /// Campaign name.
    pub name: String,
    /// Campaign file as given at the first run.
    pub spec_path: String,
    /// BLAKE3 of the exact campaign file text.
    pub spec_blake3: String,
}

/// A program as recorded for an attempt.
#[derive(Debug, Clone, PartialEq, Eq, PartialOrd, Ord, Serialize)]
pub struct ProgramRef {
    /// Path that was run.
    pub path: Option<String>,
    /// BLAKE3 of the program file.
    pub blake3: Option<String>,
    /// Output of its version flag, if declared.
    pub version: Option<String>,
}

/// One metric value.
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct MetricValue {
    /// The value.
    pub value: f64,
    /// Standard error, for noisy estimates.
    pub error: Option<f64>,
}

/// One attempt (or report generation) in a lineage.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct AttemptRecord {
    /// `attempt` for a stage attempt, `report` for a report generation.
    pub kind: String,
    /// Attempt id (RONDO_ATTEMPT_ID) or report id.
    pub id: i64,
    /// Point id; `None` for a report.
    pub point: Option<String>,
    /// Iteration (1-based); `None` for a report.
    pub iteration: Option<i64>,
    /// Stage name (`report` for a report).
    pub stage: String,
    /// Attempt number for this point/iteration/stage.
    pub attempt: i64,
    /// State (`succeeded`, ...).
    pub state: String,
    /// Rendered argument list.
    pub argv: Vec<String>,
    /// Scratch directory.
    pub workdir: Option<String>,
    /// `local`, `slurm`, `pbs`, `builtin`.
    pub executor: String,
    /// Process group id or batch job id.
    pub job_id: Option<String>,
    /// Host it ran on.
    pub host: Option<String>,
    /// Start (RFC 3339 UTC).
    pub started_at: Option<String>,
    /// End (RFC 3339 UTC).
    pub ended_at: Option<String>,
    /// Exit status.
    pub exit_status: Option<i64>,
    /// Failure kind, for failed attempts.
    pub failure_kind: Option<String>,
    /// Program run.
    pub program: ProgramRef,
    /// Why the program's hash is unknown (`program.blake3` is then null): the program file
    /// could not be read when the record was made.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub program_unknown: Option<String>,
    /// Resolved parameters.
    pub parameters: Value,
    /// `{{seed}}` value, if used.
    pub seed: Option<String>,
    /// rondo version that ran it.
    pub rondo_version: String,
    /// The campaign file's revision it ran under (none for a report).
    #[serde(skip_serializing_if = "Option::is_none")]
    pub revision: Option<RevisionRef>,
    /// The allow-listed environment passed to it (docs/provenance.md), name → value.
    #[serde(skip_serializing_if = "BTreeMap::is_empty")]
    pub environment: BTreeMap<String, String>,
    /// A hand-off to a resident program: its number, the process and the attempt that
    /// started it (docs/resident.md).
    #[serde(skip_serializing_if = "Option::is_none")]
    pub handoff: Option<crate::store::reads::attempts::HandoffRow>,
    /// Input role → artifact hash.
    pub inputs: BTreeMap<String, String>,
    /// Output role → artifact hash.
    pub outputs: BTreeMap<String, String>,
    /// Metrics recorded, `stage.metric` → value.
    pub metrics: BTreeMap<String, MetricValue>,
    /// For a report: the attempts whose metrics it read.
    #[serde(skip_serializing_if = "Vec::is_empty")]
    pub sources: Vec<i64>,
}

/// A revision of the campaign file, as an attempt names it.
#[derive(Debug, Clone, PartialEq, Eq, Serialize)]
pub struct RevisionRef {
    /// 1, 2, ...
    pub number: i64,
    /// BLAKE3 of its text (the text is kept in the workspace's `revisions`).
    pub spec_blake3: Option<String>,
}

/// A campaign start file reached by a lineage.
#[derive(Debug, Clone, PartialEq, Eq, PartialOrd, Ord, Serialize)]
pub struct StartFile {
    /// Key of `start:`.
    pub name: String,
    /// Artifact hash.
    pub hash: String,
}

/// Campaign row of a workspace.
pub async fn campaign(pool: &SqlitePool) -> Result<CampaignRef> {
    let row = crate::store::campaign_row(pool)
        .await
        .context("cannot read the campaign record")?;
    let Some(row) = row else {
        bail!("this workspace has no campaign recorded yet; run `rondo run CAMPAIGN.yaml` first");
    };
    Ok(CampaignRef {
        name: row.name,
        spec_path: row.spec_path,
        spec_blake3: row.spec_blake3,
    })
}

/// The `stop:` section of a campaign file text, as JSON (`null` if absent).
pub fn stop_section(spec_text: &str) -> Result<Value> {
    let v: Value = serde_saphyr::from_str(spec_text)
        .map_err(|e| anyhow::anyhow!("{e}"))
        .context("the campaign file stored in the workspace does not parse")?;
    Ok(v.get("stop").cloned().unwrap_or(Value::Null))
}

/// A JSON column of attempt `id`, decoded.
pub(crate) fn opt_json<T: serde::de::DeserializeOwned>(s: &str, what: &str, id: i64) -> Result<T> {
    serde_json::from_str(s).with_context(|| format!("attempt {id}: malformed {what} in the store"))
}

/// Load one attempt with its inputs, outputs and metrics.
pub async fn load_attempt(pool: &SqlitePool, id: i64) -> Result<AttemptRecord> {
    let r = attempts::attempt(pool, id).await?;
    let mut rec = AttemptRecord {
        kind: "attempt".into(),
        id,
        point: Some(r.point),
        iteration: Some(r.iteration),
        stage: r.stage,
        attempt: r.attempt,
        state: r.state.to_string(),
        argv: opt_json(&r.argv_json, "argv_json", id)?,
        workdir: Some(r.workdir),
        executor: r.executor,
        job_id: r.handle_id,
        host: r.host,
        started_at: r.started_at,
        ended_at: r.ended_at,
        exit_status: r.exit_status,
        failure_kind: r.failure_kind,
        program: ProgramRef {
            path: r.program_path,
            blake3: r.program_blake3,
            version: r.program_version,
        },
        program_unknown: r.program_unknown,
        parameters: opt_json(&r.parameters_json, "parameters_json", id)?,
        seed: r.seed,
        rondo_version: r.rondo_version,
        revision: Some(RevisionRef {
            number: r.revision,
            spec_blake3: crate::store::revisions::blake3_of(pool, r.revision).await?,
        }),
        environment: match &r.env_json {
            Some(e) => opt_json(e, "env_json", id)?,
            None => BTreeMap::new(),
        },
        handoff: None,
        inputs: BTreeMap::new(),
        outputs: BTreeMap::new(),
        metrics: BTreeMap::new(),
        sources: Vec::new(),
    };
    if rec.executor == "resident" {
        rec.handoff = attempts::handoff(pool, id).await?;
    }
    rec.inputs = attempts::files(pool, id, Files::Inputs)
        .await?
        .into_iter()
        .collect();
    rec.outputs = attempts::files(pool, id, Files::Outputs)
        .await?
        .into_iter()
        .collect();
    for (name, value, error) in attempts::metrics(pool, id).await? {
        rec.metrics.insert(name, MetricValue { value, error });
    }
    Ok(rec)
}
