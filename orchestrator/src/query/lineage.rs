//! The upstream lineage of a target (`rondo trace`): the attempts or generations that
//! produced it, the attempts that produced their inputs, and so on, breadth-first, with the
//! campaign start files and the warm-start blends reached; and the depth limit of the text view. Reads the store
//! through [`crate::store::reads`] only; knows no engine and no scheduler.

use std::collections::{BTreeMap, BTreeSet, HashSet, VecDeque};

use anyhow::{bail, Result};
use serde::Serialize;
use sqlx::SqlitePool;

use super::generations::producing_reports;
use super::records::{campaign, load_attempt, AttemptRecord, CampaignRef, StartFile};
use super::target::{FinalTarget, MetricTarget, Target};
use crate::store::reads::artifacts::Blend;
use crate::store::reads::{artifacts, attempts};
use crate::store::AttemptState;

#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct Lineage {
    /// Artifact hash; for a metric target, the `POINT/ITERATION/stage.metric` reference.
    pub target: String,
    /// The metric, when the target is one.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub metric: Option<MetricTarget>,
    /// The final value, when the target is `POINT/final/stage.metric`.
    #[serde(rename = "final", skip_serializing_if = "Option::is_none")]
    pub final_value: Option<FinalTarget>,
    /// Campaign of the workspace.
    pub campaign: CampaignRef,
    /// Attempts, nearest first (breadth-first, each once).
    pub attempts: Vec<AttemptRecord>,
    /// Campaign start files reached.
    pub sources: Vec<StartFile>,
    /// Inputs of warm-started points interpolated between two converged points (each
    /// followed to the attempts that made its two sources).
    #[serde(skip_serializing_if = "Vec::is_empty")]
    pub blends: Vec<Blend>,
    /// Artifacts of the lineage whose content a retention policy removed from the store (the
    /// records stay): hash, policy, when.
    #[serde(skip_serializing_if = "Vec::is_empty")]
    pub removed: Vec<RemovedContent>,
    /// Attempts left out by a depth limit ([`Lineage::limit`]); only then present.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub omitted_attempts: Option<usize>,
    /// The records that produced the target itself, as (kind, id): the attempt of a metric,
    /// the attempts of a final value, the producers of an artifact (attempts, or report and
    /// analysis generations).
    #[serde(skip)]
    pub direct: Vec<(String, i64)>,
    /// Attempts the depth limit counts iterations back from: the direct attempts, and for a
    /// generation the attempts whose metrics it read.
    #[serde(skip)]
    pub anchors: Vec<i64>,
}

/// Content a retention policy removed.
#[derive(Debug, Clone, PartialEq, serde::Serialize)]
pub struct RemovedContent {
    /// The artifact's hash.
    pub hash: String,
    /// The policy that let it go (`last:2`, `every:10`, ...).
    pub policy: String,
    /// When.
    pub at: String,
}

/// How far `rondo trace` looks upstream, in iterations.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Depth {
    /// The target's own iteration and N − 1 before it, per point.
    Iterations(u32),
    /// Everything upstream.
    All,
}

impl std::str::FromStr for Depth {
    type Err = String;
    fn from_str(s: &str) -> std::result::Result<Depth, String> {
        if s == "all" {
            return Ok(Depth::All);
        }
        match s.parse::<u32>() {
            Ok(n) if n >= 1 => Ok(Depth::Iterations(n)),
            _ => Err(format!(
                "`{s}` is not a depth: give a number of iterations (1 or more) or `all`"
            )),
        }
    }
}

/// The default depth of the text view: the target's iteration and the one before.
pub const DEFAULT_DEPTH: Depth = Depth::Iterations(2);

/// Attempts that produced `hash`, preferring succeeded ones and those of `point`.
async fn producers(pool: &SqlitePool, hash: &str, point: Option<&str>) -> Result<Vec<i64>> {
    let mut all = attempts::writers_of(pool, hash).await?;
    if all.iter().any(|a| a.2 == AttemptState::Succeeded) {
        all.retain(|a| a.2 == AttemptState::Succeeded);
    }
    if let Some(p) = point {
        if all.iter().any(|a| a.1 == p) {
            all.retain(|a| a.1 == p);
        }
    }
    Ok(all.into_iter().map(|a| a.0).collect())
}

/// Lineage of an artifact (see [`lineage_of`]).
pub async fn lineage(pool: &SqlitePool, hash: &str) -> Result<Lineage> {
    lineage_of(
        pool,
        &Target::Artifact {
            hash: hash.to_string(),
        },
    )
    .await
}

/// Where a walk starts: the records that made the target, and what it found on the way.
#[derive(Default)]
struct Walk {
    queue: VecDeque<i64>,
    attempts: Vec<AttemptRecord>,
    sources: BTreeSet<StartFile>,
    blends: BTreeSet<Blend>,
    direct: Vec<(String, i64)>,
    anchors: Vec<i64>,
}

impl Walk {
    /// Start at attempts that made the target directly.
    fn start_at(&mut self, ids: &[i64]) {
        self.queue.extend(ids.iter().copied());
        self.direct
            .extend(ids.iter().map(|id| ("attempt".to_string(), *id)));
        self.anchors.extend(ids.iter().copied());
    }

    /// Note the start files among the names of artifact `hash`.
    async fn start_files(&mut self, pool: &SqlitePool, hash: &str) -> Result<()> {
        for name in artifacts::start_file_names(pool, hash).await? {
            self.sources.insert(StartFile {
                name,
                hash: hash.to_string(),
            });
        }
        Ok(())
    }

    /// Note the blends among the names of artifact `hash`, and queue the attempts that made
    /// their two sources.
    async fn blends(&mut self, pool: &SqlitePool, hash: &str) -> Result<()> {
        for b in artifacts::blends(pool, Some(hash)).await? {
            for src in [&b.first, &b.second] {
                self.queue
                    .extend(producers(pool, &src.artifact, Some(&src.point)).await?);
            }
            self.blends.insert(b);
        }
        Ok(())
    }

    /// Start at the producers of an artifact: attempts, or else report and analysis
    /// generations (which start the walk at the attempts whose metrics they read).
    async fn start_at_artifact(&mut self, pool: &SqlitePool, hash: &str) -> Result<()> {
        if !artifacts::is_recorded(pool, hash).await? {
            bail!("artifact {hash} is not recorded in this workspace");
        }
        let producing = producers(pool, hash, None).await?;
        self.start_at(&producing);
        if producing.is_empty() {
            for rep in producing_reports(pool, hash).await? {
                self.queue.extend(rep.sources.iter().copied());
                self.anchors.extend(rep.sources.iter().copied());
                self.direct.push((rep.kind.clone(), rep.id));
                self.attempts.push(rep);
            }
        }
        self.start_files(pool, hash).await?;
        if producing.is_empty() {
            self.blends(pool, hash).await?;
        }
        if self.queue.is_empty() && self.attempts.is_empty() && self.sources.is_empty() {
            bail!(
                "artifact {hash} is recorded but no attempt produced it and it is not a start file; \
                 the store may have been edited by hand"
            );
        }
        Ok(())
    }

    /// Walk upstream from the queue, each attempt once, nearest first.
    async fn run(&mut self, pool: &SqlitePool) -> Result<()> {
        let mut seen: HashSet<i64> = HashSet::new();
        while let Some(id) = self.queue.pop_front() {
            if !seen.insert(id) {
                continue;
            }
            let rec = load_attempt(pool, id).await?;
            for hash in rec.inputs.values() {
                self.start_files(pool, hash).await?;
                self.blends(pool, hash).await?;
                for p in producers(pool, hash, rec.point.as_deref()).await? {
                    if !seen.contains(&p) {
                        self.queue.push_back(p);
                    }
                }
            }
            self.attempts.push(rec);
        }
        Ok(())
    }
}

/// Upstream lineage of a target: the attempts (or report generation) that produced it, the
/// attempts that produced their inputs, and so on, breadth-first, each attempt once, nearest
/// first; inputs that are campaign start files end the walk and are listed as sources.
pub async fn lineage_of(pool: &SqlitePool, target: &Target) -> Result<Lineage> {
    let campaign = campaign(pool).await?;
    let mut walk = Walk::default();
    let (target_str, metric, final_value): (String, Option<MetricTarget>, Option<FinalTarget>) =
        match target {
            Target::Artifact { hash } => {
                walk.start_at_artifact(pool, hash).await?;
                (hash.clone(), None, None)
            }
            Target::Metric(m) => {
                walk.start_at(&[m.attempt_id]);
                (
                    format!("{}/{}/{}", m.point, m.iteration, m.name),
                    Some(m.clone()),
                    None,
                )
            }
            Target::Final(f) => {
                walk.start_at(&f.attempts);
                (
                    format!("{}/final/{}", f.point, f.name),
                    None,
                    Some(f.clone()),
                )
            }
        };
    walk.run(pool).await?;
    let mut hashes: std::collections::BTreeSet<&str> = std::collections::BTreeSet::new();
    if matches!(target, Target::Artifact { .. }) {
        hashes.insert(&target_str);
    }
    for a in &walk.attempts {
        hashes.extend(a.inputs.values().map(String::as_str));
        hashes.extend(a.outputs.values().map(String::as_str));
    }
    let mut removed = Vec::new();
    for h in hashes {
        if let Some((policy, at)) = crate::store::retention::removal(pool, h).await? {
            removed.push(RemovedContent {
                hash: h.to_string(),
                policy,
                at,
            });
        }
    }
    Ok(Lineage {
        removed,
        target: target_str,
        metric,
        final_value,
        campaign,
        attempts: walk.attempts,
        sources: walk.sources.into_iter().collect(),
        blends: walk.blends.into_iter().collect(),
        omitted_attempts: None,
        direct: walk.direct,
        anchors: walk.anchors,
    })
}

impl Lineage {
    /// Keep the attempts within `depth` iterations of the target, per point: an attempt
    /// stays when it produced the target, or when its iteration is at most `N − 1` below the
    /// lowest iteration of that point's anchors (the attempts behind the target; for a point
    /// with none, its highest iteration in the lineage). Generations (reports, analyses)
    /// always stay. The number left out is kept in `omitted_attempts`.
    pub fn limit(&mut self, depth: Depth) {
        let Depth::Iterations(n) = depth else { return };
        let mut reference: BTreeMap<String, i64> = BTreeMap::new();
        for a in &self.attempts {
            if let (Some(p), Some(i)) = (&a.point, a.iteration) {
                if self.anchors.contains(&a.id) && a.kind == "attempt" {
                    let r = reference.entry(p.clone()).or_insert(i);
                    *r = (*r).min(i);
                }
            }
        }
        let mut highest: BTreeMap<String, i64> = BTreeMap::new();
        for a in &self.attempts {
            if let (Some(p), Some(i)) = (&a.point, a.iteration) {
                if !reference.contains_key(p) {
                    let h = highest.entry(p.clone()).or_insert(i);
                    *h = (*h).max(i);
                }
            }
        }
        reference.extend(highest);
        let before = self.attempts.len();
        let direct = self.direct.clone();
        self.attempts.retain(|a| {
            let (Some(p), Some(i)) = (&a.point, a.iteration) else {
                return true;
            };
            direct.contains(&(a.kind.clone(), a.id))
                || reference.get(p).is_none_or(|r| i > r - i64::from(n))
        });
        self.omitted_attempts = Some(before - self.attempts.len());
    }
}
