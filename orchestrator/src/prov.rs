//! Export of a workspace's provenance in the W3C PROV-JSON serialization (W3C Member
//! Submission "PROV-JSON", 2013, of the PROV data model, W3C Recommendation PROV-DM 2013):
//! artifacts are entities, attempts and report generations are activities, the programs
//! (by BLAKE3) and the user are agents; the campaign file is the plan the user's
//! association follows.

use std::collections::{BTreeMap, BTreeSet};

use anyhow::{Context, Result};
use serde_json::{json, Map, Value};
use sqlx::{Row, SqlitePool};

use crate::audit::{self, AttemptRecord, Target};
use crate::store::AttemptState;

/// rondo's namespace: a UUID URN (RFC 9562, the IANA-registered `uuid` namespace) minted
/// once for rondo from the kernel's random source. Nobody else can mint the same UUID, so
/// rondo owns the name without owning a domain; see docs/provenance.md for why it is not a
/// `urn:rondo:` name or a tag URI. Every prefix below is this plus a fragment.
pub const NS_BASE: &str = "urn:uuid:8cdbdefe-baa4-4a43-8f50-21e588a2d6ca";
/// Namespace of rondo's own terms (`rondo:Attempt`, `rondo:argv`, ...).
pub const NS_RONDO: &str = "urn:uuid:8cdbdefe-baa4-4a43-8f50-21e588a2d6ca#";
/// Namespace of artifacts, identified by their BLAKE3 hash (the same in every workspace).
pub const NS_ARTIFACT: &str = "urn:uuid:8cdbdefe-baa4-4a43-8f50-21e588a2d6ca#blake3:";
/// Namespace of programs, identified by the BLAKE3 hash of their executable.
pub const NS_PROGRAM: &str = "urn:uuid:8cdbdefe-baa4-4a43-8f50-21e588a2d6ca#program:";
/// Namespace of a workspace's attempts and reports: this, the workspace id and `:`.
pub const NS_WORKSPACE: &str = "urn:uuid:8cdbdefe-baa4-4a43-8f50-21e588a2d6ca#workspace:";
/// Namespace of users.
pub const NS_USER: &str = "urn:uuid:8cdbdefe-baa4-4a43-8f50-21e588a2d6ca#user:";

fn qname(v: &str) -> Value {
    json!({"$": v, "type": "xsd:QName"})
}

/// Sanitise a local name for a QName (letters, digits, `-`, `_`, `.`).
fn local(s: &str) -> String {
    s.chars()
        .map(|c| {
            if c.is_ascii_alphanumeric() || c == '-' || c == '_' || c == '.' {
                c
            } else {
                '_'
            }
        })
        .collect()
}

/// The user named in the export: `$USER`, else `$LOGNAME`, else `unknown`.
pub fn current_user() -> String {
    std::env::var("USER")
        .or_else(|_| std::env::var("LOGNAME"))
        .ok()
        .filter(|s| !s.is_empty())
        .unwrap_or_else(|| "unknown".into())
}

struct Doc {
    entity: Map<String, Value>,
    activity: Map<String, Value>,
    agent: Map<String, Value>,
    relations: BTreeMap<&'static str, Map<String, Value>>,
    counter: usize,
}

impl Doc {
    fn rel(&mut self, kind: &'static str, body: Value) {
        self.counter += 1;
        let id = format!("_:{}{}", kind, self.counter);
        self.relations.entry(kind).or_default().insert(id, body);
    }
}

/// Export the provenance of `target` (an artifact hash: its upstream lineage) or, with
/// `None`, of the whole campaign, naming the current user (see [`current_user`]).
pub async fn export(pool: &SqlitePool, target: Option<&str>) -> Result<Value> {
    export_as(pool, target, &current_user()).await
}

/// [`export`] naming `user` as the person responsible.
pub async fn export_as(pool: &SqlitePool, target: Option<&str>, user: &str) -> Result<Value> {
    let t = target.map(|h| Target::Artifact {
        hash: h.to_string(),
    });
    export_target(pool, t.as_ref(), user).await
}

/// Export the lineage of any resolved target (an artifact or a metric; see
/// [`audit::resolve`]), or of the whole campaign with `None`, naming `user`.
pub async fn export_target(
    pool: &SqlitePool,
    target: Option<&Target>,
    user: &str,
) -> Result<Value> {
    let campaign = audit::campaign(pool).await?;
    let workspace_id: String = sqlx::query_scalar("SELECT workspace_id FROM campaign WHERE id = 1")
        .fetch_one(pool)
        .await?;
    let (records, start): (Vec<AttemptRecord>, Vec<audit::StartFile>) = match target {
        Some(t) => {
            let l = audit::lineage_of(pool, t).await?;
            (l.attempts, l.sources)
        }
        None => {
            let ids: Vec<i64> =
                sqlx::query_scalar("SELECT id FROM attempts WHERE state <> ? ORDER BY id")
                    .bind(AttemptState::Planned)
                    .fetch_all(pool)
                    .await?;
            let mut recs = Vec::new();
            for id in ids {
                recs.push(audit::load_attempt(pool, id).await?);
            }
            for id in crate::report::report_ids(pool).await? {
                recs.push(crate::report::load_report(pool, id, None).await?);
            }
            let rows = sqlx::query("SELECT name, artifact FROM start_files ORDER BY name")
                .fetch_all(pool)
                .await?;
            let mut sf = Vec::new();
            for r in rows {
                sf.push(audit::StartFile {
                    name: r.try_get(0)?,
                    hash: r.try_get(1)?,
                });
            }
            (recs, sf)
        }
    };
    let mut hashes: BTreeSet<String> = BTreeSet::new();
    if let Some(Target::Artifact { hash }) = target {
        hashes.insert(hash.clone());
    }
    if target.is_none() {
        let all: Vec<String> = sqlx::query_scalar("SELECT hash FROM artifacts")
            .fetch_all(pool)
            .await?;
        hashes.extend(all);
    }
    for r in &records {
        hashes.extend(r.inputs.values().cloned());
        hashes.extend(r.outputs.values().cloned());
    }
    hashes.extend(start.iter().map(|s| s.hash.clone()));

    let mut doc = Doc {
        entity: Map::new(),
        activity: Map::new(),
        agent: Map::new(),
        relations: BTreeMap::new(),
        counter: 0,
    };
    let start_names: BTreeMap<&str, &str> = start
        .iter()
        .map(|s| (s.hash.as_str(), s.name.as_str()))
        .collect();
    for h in &hashes {
        let row =
            sqlx::query("SELECT size, original_name, created_at FROM artifacts WHERE hash = ?")
                .bind(h)
                .fetch_optional(pool)
                .await?
                .with_context(|| format!("artifact {h} is used but not recorded"))?;
        let size: i64 = row.try_get(0)?;
        let name: String = row.try_get(1)?;
        let mut e = json!({
            "prov:type": qname("rondo:Artifact"),
            "prov:label": name,
            "rondo:size": size,
            "rondo:blake3": h,
            "rondo:storedAt": row.try_get::<String, _>(2)?,
        });
        if let Some(sn) = start_names.get(h.as_str()) {
            e["rondo:startFile"] = json!(sn);
        }
        doc.entity.insert(format!("art:{h}"), e);
    }
    let plan = "rondo:campaign-file".to_string();
    doc.entity.insert(
        plan.clone(),
        json!({
            "prov:type": qname("prov:Plan"),
            "prov:label": campaign.spec_path,
            "rondo:campaign": campaign.name,
            "rondo:blake3": campaign.spec_blake3,
        }),
    );
    let user_id = format!("user:{}", local(user));
    doc.agent.insert(
        user_id.clone(),
        json!({"prov:type": qname("prov:Person"), "prov:label": user}),
    );
    doc.rel(
        "wasAttributedTo",
        json!({"prov:entity": plan, "prov:agent": user_id}),
    );
    for r in &records {
        let act = if r.kind == "report" {
            format!("run:report-{}", r.id)
        } else {
            format!("run:attempt-{}", r.id)
        };
        let mut a = json!({
            "prov:type": qname(if r.kind == "report" { "rondo:Report" } else { "rondo:Attempt" }),
            "prov:label": match (&r.point, r.iteration) {
                (Some(p), Some(i)) => format!("{p} iteration {i} {} attempt {}", r.stage, r.attempt),
                _ => format!("report {}", r.id),
            },
            "rondo:stage": r.stage,
            "rondo:attempt": r.attempt,
            "rondo:state": r.state,
            "rondo:argv": serde_json::to_string(&r.argv)?,
            "rondo:executor": r.executor,
            "rondo:parameters": r.parameters.to_string(),
            "rondo:rondoVersion": r.rondo_version,
        });
        let o = a.as_object_mut().context("activity is an object")?;
        if let Some(p) = &r.point {
            o.insert("rondo:point".into(), json!(p));
        }
        if let Some(i) = r.iteration {
            o.insert("rondo:iteration".into(), json!(i));
        }
        if let Some(t) = &r.started_at {
            o.insert("prov:startTime".into(), json!(t));
        }
        if let Some(t) = &r.ended_at {
            o.insert("prov:endTime".into(), json!(t));
        }
        for (k, v) in [
            ("rondo:host", &r.host),
            ("rondo:jobId", &r.job_id),
            ("rondo:workdir", &r.workdir),
            ("rondo:seed", &r.seed),
            ("rondo:failureKind", &r.failure_kind),
            ("rondo:programHashUnknown", &r.program_unknown),
        ] {
            if let Some(v) = v {
                o.insert(k.into(), json!(v));
            }
        }
        if let Some(x) = r.exit_status {
            o.insert("rondo:exitStatus".into(), json!(x));
        }
        for (n, m) in &r.metrics {
            o.insert(format!("rondo:metric.{}", local(n)), json!(m.value));
            if let Some(e) = m.error {
                o.insert(format!("rondo:metricError.{}", local(n)), json!(e));
            }
        }
        doc.activity.insert(act.clone(), a);
        // the program: by hash; builtin stages and reports are run by rondo itself
        let agent = match &r.program.blake3 {
            Some(h) if r.kind != "report" => {
                let id = format!("prog:{h}");
                if !doc.agent.contains_key(&id) {
                    let mut ag = json!({
                        "prov:type": qname("prov:SoftwareAgent"),
                        "prov:label": r.program.path.clone().unwrap_or_default(),
                        "rondo:blake3": h,
                    });
                    if let Some(v) = &r.program.version {
                        ag["rondo:version"] = json!(v.trim());
                    }
                    doc.agent.insert(id.clone(), ag);
                }
                id
            }
            _ => {
                let id = format!("rondo:rondo-{}", local(&r.rondo_version));
                doc.agent.entry(id.clone()).or_insert_with(|| {
                    json!({
                        "prov:type": qname("prov:SoftwareAgent"),
                        "prov:label": format!("rondo {}", r.rondo_version),
                    })
                });
                id
            }
        };
        doc.rel(
            "wasAssociatedWith",
            json!({"prov:activity": act, "prov:agent": agent}),
        );
        doc.rel(
            "wasAssociatedWith",
            json!({"prov:activity": act, "prov:agent": user_id, "prov:plan": plan}),
        );
        for (role, h) in &r.inputs {
            doc.rel(
                "used",
                json!({"prov:activity": act, "prov:entity": format!("art:{h}"), "prov:role": role}),
            );
        }
        for (role, h) in &r.outputs {
            let ent = format!("art:{h}");
            doc.rel(
                "wasGeneratedBy",
                json!({"prov:entity": ent, "prov:activity": act, "prov:role": role,
                       "prov:time": r.ended_at}),
            );
            doc.rel(
                "wasAttributedTo",
                json!({"prov:entity": ent, "prov:agent": agent}),
            );
            for ih in r.inputs.values() {
                doc.rel(
                    "wasDerivedFrom",
                    json!({"prov:generatedEntity": ent, "prov:usedEntity": format!("art:{ih}"),
                           "prov:activity": act}),
                );
            }
        }
        for src in &r.sources {
            doc.rel(
                "wasInformedBy",
                json!({"prov:informed": act,
                       "prov:informant": format!("run:attempt-{src}")}),
            );
        }
    }
    // drop null times (an unfinished activity has no end)
    for rels in doc.relations.values_mut() {
        for v in rels.values_mut() {
            if let Some(o) = v.as_object_mut() {
                o.retain(|_, x| !x.is_null());
            }
        }
    }
    let mut out = Map::new();
    out.insert(
        "prefix".into(),
        json!({
            "rondo": NS_RONDO,
            "art": NS_ARTIFACT,
            "prog": NS_PROGRAM,
            "user": NS_USER,
            "run": format!("{NS_WORKSPACE}{}:", local(&workspace_id)),
            "xsd": "http://www.w3.org/2001/XMLSchema#",
        }),
    );
    out.insert("entity".into(), Value::Object(doc.entity));
    out.insert("activity".into(), Value::Object(doc.activity));
    out.insert("agent".into(), Value::Object(doc.agent));
    for (k, v) in doc.relations {
        out.insert(k.into(), Value::Object(v));
    }
    Ok(Value::Object(out))
}

/// Counts of a PROV-JSON document's entities, activities and agents.
pub fn counts(doc: &Value) -> (usize, usize, usize) {
    let n = |k: &str| doc.get(k).and_then(Value::as_object).map_or(0, Map::len);
    (n("entity"), n("activity"), n("agent"))
}
