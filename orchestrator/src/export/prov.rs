//! Export of a workspace's provenance in the W3C PROV-JSON serialization (W3C Member
//! Submission "PROV-JSON", 2013, of the PROV data model, W3C Recommendation PROV-DM 2013):
//! artifacts are entities, attempts and report generations are activities, the programs
//! (by BLAKE3) and the user are agents; the campaign file is the plan the user's
//! association follows; a warm-start blend is derived from its two sources.
//!
//! Reads through [`crate::query`] and [`crate::store::reads`]; knows no engine and no
//! scheduler.

use std::collections::{BTreeMap, BTreeSet};

use anyhow::{Context, Result};
use serde_json::{json, Map, Value};
use sqlx::SqlitePool;

use crate::query::{self, AttemptRecord, StartFile, Target};
use crate::store::reads::artifacts::Blend;
use crate::store::reads::{artifacts, attempts};

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
/// The records and start files an export covers: the lineage of `target`, or every
/// attempt past planning, every generation and every start file.
async fn records_of(
    pool: &SqlitePool,
    target: Option<&Target>,
) -> Result<(Vec<AttemptRecord>, Vec<StartFile>, Vec<Blend>)> {
    if let Some(t) = target {
        let l = query::lineage_of(pool, t).await?;
        return Ok((l.attempts, l.sources, l.blends));
    }
    let mut recs = Vec::new();
    for id in attempts::started_ids(pool).await? {
        recs.push(query::load_attempt(pool, id).await?);
    }
    for id in query::report_ids(pool).await? {
        recs.push(query::load_report(pool, id, None).await?);
    }
    let sf = artifacts::start_files(pool)
        .await?
        .into_iter()
        .map(|(name, hash)| StartFile { name, hash })
        .collect();
    Ok((recs, sf, artifacts::blends(pool, None).await?))
}

/// The artifacts an export names: the target, every artifact for a whole campaign, and
/// everything the records used or made.
async fn hashes_of(
    pool: &SqlitePool,
    target: Option<&Target>,
    records: &[AttemptRecord],
    start: &[StartFile],
) -> Result<BTreeSet<String>> {
    let mut hashes: BTreeSet<String> = BTreeSet::new();
    if let Some(Target::Artifact { hash }) = target {
        hashes.insert(hash.clone());
    }
    if target.is_none() {
        hashes.extend(artifacts::all_hashes(pool).await?);
    }
    for r in records {
        hashes.extend(r.inputs.values().cloned());
        hashes.extend(r.outputs.values().cloned());
    }
    hashes.extend(start.iter().map(|s| s.hash.clone()));
    Ok(hashes)
}

impl Doc {
    /// One entity per artifact, start files marked with their `start:` name.
    async fn add_artifacts(
        &mut self,
        pool: &SqlitePool,
        hashes: &BTreeSet<String>,
        start: &[StartFile],
    ) -> Result<()> {
        let start_names: BTreeMap<&str, &str> = start
            .iter()
            .map(|s| (s.hash.as_str(), s.name.as_str()))
            .collect();
        for h in hashes {
            let row = artifacts::artifact(pool, h).await?;
            let mut e = json!({
                "prov:type": qname("rondo:Artifact"),
                "prov:label": row.original_name,
                "rondo:size": row.size,
                "rondo:blake3": h,
                "rondo:storedAt": row.created_at,
            });
            if let Some(sn) = start_names.get(h.as_str()) {
                e["rondo:startFile"] = json!(sn);
            }
            let folder = row.original_name.ends_with('/');
            if folder {
                // A folder artifact: a PROV collection of its member files.
                e["prov:type"] = qname("prov:Collection");
                e["rondo:folder"] = json!(true);
            }
            self.entity.insert(format!("art:{h}"), e);
            if folder {
                self.add_members(pool, h).await?;
            }
        }
        Ok(())
    }

    /// The member files of a folder artifact as entities, each `prov:hadMember` of it.
    async fn add_members(&mut self, pool: &SqlitePool, folder: &str) -> Result<()> {
        for (path, hash, size) in artifacts::folder_members(pool, folder).await? {
            let id = format!("art:{hash}");
            self.entity.entry(id.clone()).or_insert_with(|| {
                json!({
                    "prov:type": qname("rondo:Artifact"),
                    "prov:label": path,
                    "rondo:size": size,
                    "rondo:blake3": hash,
                })
            });
            self.rel(
                "hadMember",
                json!({"prov:collection": format!("art:{folder}"), "prov:entity": id}),
            );
        }
        Ok(())
    }

    /// The activity of one attempt or generation.
    fn add_activity(&mut self, r: &AttemptRecord, act: &str) -> Result<()> {
        let mut a = json!({
            "prov:type": qname(if r.kind == "report" { "rondo:Report" } else { "rondo:Attempt" }),
            "prov:label": match (&r.point, r.iteration) {
                (Some(p), Some(i)) => format!("{p} iteration {i} {} attempt {}", r.stage, r.attempt),
                _ if r.executor == crate::query::generations::CAMPAIGN_STAGE => {
                    format!("after-campaign stage {} (generation {})", r.stage, r.id)
                }
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
        if let Some(rev) = &r.revision {
            o.insert("rondo:revision".into(), json!(rev.number));
            if let Some(h) = &rev.spec_blake3 {
                o.insert("rondo:revisionBlake3".into(), json!(h));
            }
        }
        for (k, v) in &r.environment {
            o.insert(format!("rondo:env.{}", local(k)), json!(v));
        }
        for (n, m) in &r.metrics {
            o.insert(format!("rondo:metric.{}", local(n)), json!(m.value));
            if let Some(e) = m.error {
                o.insert(format!("rondo:metricError.{}", local(n)), json!(e));
            }
        }
        self.activity.insert(act.to_string(), a);
        Ok(())
    }

    /// The agent that ran a record: its program by hash; builtin stages and reports are
    /// run by rondo itself. Returns the agent's id.
    fn program_agent(&mut self, r: &AttemptRecord) -> String {
        match &r.program.blake3 {
            Some(h) if r.kind != "report" => {
                let id = format!("prog:{h}");
                if !self.agent.contains_key(&id) {
                    let mut ag = json!({
                        "prov:type": qname("prov:SoftwareAgent"),
                        "prov:label": r.program.path.clone().unwrap_or_default(),
                        "rondo:blake3": h,
                    });
                    if let Some(v) = &r.program.version {
                        ag["rondo:version"] = json!(v.trim());
                    }
                    self.agent.insert(id.clone(), ag);
                }
                id
            }
            _ => {
                let id = format!("rondo:rondo-{}", local(&r.rondo_version));
                self.agent.entry(id.clone()).or_insert_with(|| {
                    json!({
                        "prov:type": qname("prov:SoftwareAgent"),
                        "prov:label": format!("rondo {}", r.rondo_version),
                    })
                });
                id
            }
        }
    }

    /// The relations of one record's activity `act`: its associations (program, and the
    /// user following the plan), what it used and generated, derivations, and the
    /// attempts a generation read.
    fn add_relations(&mut self, r: &AttemptRecord, act: &str, agent: &str, user: &str, plan: &str) {
        self.rel(
            "wasAssociatedWith",
            json!({"prov:activity": act, "prov:agent": agent}),
        );
        self.rel(
            "wasAssociatedWith",
            json!({"prov:activity": act, "prov:agent": user, "prov:plan": plan}),
        );
        for (role, h) in &r.inputs {
            self.rel(
                "used",
                json!({"prov:activity": act, "prov:entity": format!("art:{h}"), "prov:role": role}),
            );
        }
        for (role, h) in &r.outputs {
            let ent = format!("art:{h}");
            self.rel(
                "wasGeneratedBy",
                json!({"prov:entity": ent, "prov:activity": act, "prov:role": role,
                       "prov:time": r.ended_at}),
            );
            self.rel(
                "wasAttributedTo",
                json!({"prov:entity": ent, "prov:agent": agent}),
            );
            for ih in r.inputs.values() {
                self.rel(
                    "wasDerivedFrom",
                    json!({"prov:generatedEntity": ent, "prov:usedEntity": format!("art:{ih}"),
                           "prov:activity": act}),
                );
            }
        }
        for src in &r.sources {
            self.rel(
                "wasInformedBy",
                json!({"prov:informed": act,
                       "prov:informant": format!("run:attempt-{src}")}),
            );
        }
    }

    /// A warm-start blend: derived from each of its two sources (no activity of its own:
    /// rondo made it when the revision was recorded), with the weight and axis.
    fn add_blend(&mut self, b: &Blend) {
        for (src, which) in [(&b.first, "first"), (&b.second, "second")] {
            self.rel(
                "wasDerivedFrom",
                json!({"prov:generatedEntity": format!("art:{}", b.artifact),
                       "prov:usedEntity": format!("art:{}", src.artifact),
                       "prov:type": qname("rondo:WarmStartInterpolation"),
                       "rondo:source": which, "rondo:point": src.point,
                       "rondo:iteration": src.iteration, "rondo:axis": b.axis,
                       "rondo:weight": b.weight, "rondo:startsPoint": b.point}),
            );
        }
    }

    /// The finished PROV-JSON document (null times dropped: an unfinished activity has no
    /// end), with the prefixes of workspace `workspace_id`.
    fn into_json(mut self, workspace_id: &str) -> Value {
        for rels in self.relations.values_mut() {
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
                "run": format!("{NS_WORKSPACE}{}:", local(workspace_id)),
                "xsd": "http://www.w3.org/2001/XMLSchema#",
            }),
        );
        out.insert("entity".into(), Value::Object(self.entity));
        out.insert("activity".into(), Value::Object(self.activity));
        out.insert("agent".into(), Value::Object(self.agent));
        for (k, v) in self.relations {
            out.insert(k.into(), Value::Object(v));
        }
        Value::Object(out)
    }
}

/// Export the lineage of any resolved target (an artifact or a metric; see
/// [`query::resolve`]), or of the whole campaign with `None`, naming `user`.
pub async fn export_target(
    pool: &SqlitePool,
    target: Option<&Target>,
    user: &str,
) -> Result<Value> {
    let campaign = query::campaign(pool).await?;
    let workspace_id = crate::store::campaign_row(pool)
        .await?
        .map(|c| c.workspace_id)
        .context("this workspace has no campaign recorded")?;
    let (records, start, blends) = records_of(pool, target).await?;
    let mut hashes = hashes_of(pool, target, &records, &start).await?;
    for b in &blends {
        hashes.extend([
            b.artifact.clone(),
            b.first.artifact.clone(),
            b.second.artifact.clone(),
        ]);
    }
    let mut doc = Doc {
        entity: Map::new(),
        activity: Map::new(),
        agent: Map::new(),
        relations: BTreeMap::new(),
        counter: 0,
    };
    doc.add_artifacts(pool, &hashes, &start).await?;
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
        doc.add_activity(r, &act)?;
        let agent = doc.program_agent(r);
        doc.add_relations(r, &act, &agent, &user_id, &plan);
    }
    for b in &blends {
        doc.add_blend(b);
    }
    Ok(doc.into_json(&workspace_id))
}

/// Counts of a PROV-JSON document's entities, activities and agents.
pub fn counts(doc: &Value) -> (usize, usize, usize) {
    let n = |k: &str| doc.get(k).and_then(Value::as_object).map_or(0, Map::len);
    (n("entity"), n("activity"), n("agent"))
}
