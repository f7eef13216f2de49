//! Retention: which iterations' content of an output role stays in the store. A policy
//! (`keep:` of a stage) keeps the last N good iterations and/or every K-th; the latest good
//! iteration (the next one reads it, and it may be the final one) and, once the stopping
//! rules are met, the whole final window always stay, and so does content that a start
//! file, a report or an analysis names, or that any reference a policy keeps shares (the
//! store is content-addressed: one file serves every identical output). A removal is
//! recorded (hash, size, when, policy) before the file is deleted; the hash and every record
//! naming it stay, and `rondo trace` says the content was removed. This module decides; the
//! SQL is `store::retention`'s, the files `artifacts`'s.

use std::collections::HashMap;

use anyhow::{Context, Result};
use sqlx::SqlitePool;

use crate::artifacts::ArtifactStore;
use crate::failpoint::{self, Failpoint};
use crate::spec::{Campaign, Keep};
use crate::store::retention::{self as rows, Held, Marks};
use crate::store::Script;

/// Whether iteration `it` of a role keeps its content under `policy`, given where the
/// point stands.
pub fn keeps(policy: Keep, it: u32, marks: Marks) -> bool {
    let Some(latest) = marks.latest else {
        return true;
    };
    if it >= latest || marks.window_from.is_some_and(|f| it >= f) {
        return true;
    }
    let by_last = policy.last.is_some_and(|n| it + n > latest);
    let by_every = policy.every.is_some_and(|k| it % k == 0);
    by_last || by_every
}

/// The policies of a campaign, by (stage, role).
#[derive(Debug, Clone, Default)]
pub struct Policies(HashMap<(String, String), Keep>);

impl Policies {
    /// The campaign's `keep:` entries.
    pub fn of(campaign: &Campaign) -> Policies {
        let mut map = HashMap::new();
        for st in &campaign.stages {
            for (role, keep) in &st.keep {
                map.insert((st.name.clone(), role.clone()), *keep);
            }
        }
        Policies(map)
    }

    /// Add or replace one policy (`rondo prune --keep`).
    pub fn set(&mut self, stage: &str, role: &str, keep: Keep) {
        self.0.insert((stage.to_string(), role.to_string()), keep);
    }

    /// Whether there is any.
    pub fn is_empty(&self) -> bool {
        self.0.is_empty()
    }

    fn get(&self, stage: &str, role: &str) -> Option<Keep> {
        self.0.get(&(stage.to_string(), role.to_string())).copied()
    }
}

/// The `keep:` policies of a recorded campaign text (for `rondo prune`, which runs on a
/// workspace, not on a campaign file).
pub fn recorded_policies(spec_text: &str) -> Result<Policies> {
    let v: serde_json::Value =
        serde_saphyr::from_str(spec_text).context("the recorded campaign text does not parse")?;
    let mut p = Policies::default();
    let Some(cycle) = v.get("cycle").and_then(|c| c.as_object()) else {
        return Ok(p);
    };
    for (stage, st) in cycle {
        let Some(keep) = st.get("keep").and_then(|k| k.as_object()) else {
            continue;
        };
        for (role, policy) in keep {
            let n = |key: &str| policy.get(key).and_then(|x| x.as_u64()).map(|x| x as u32);
            p.set(
                stage,
                role,
                Keep {
                    last: n("last"),
                    every: n("every"),
                },
            );
        }
    }
    Ok(p)
}

/// What a pass removed.
#[derive(Debug, Clone, Copy, Default, PartialEq, Eq, serde::Serialize)]
pub struct Removed {
    /// Distinct contents.
    pub files: u64,
    /// Their bytes.
    pub bytes: u64,
}

/// A pass over the iterations of one point before `latest` (its last good iteration) whose
/// content is still stored: what no policy keeps any more goes. Normally that is the one
/// iteration `latest` just moved out of its policy (`latest − N` for `last: N`, the
/// previous latest for `every: K`); after a crash between an iteration's record and its
/// pass, the iterations the crash left are caught at the next pass of the point. One
/// indexed query per policy, returning the contents still held.
pub async fn after_iteration(
    pool: &SqlitePool,
    artifacts: &ArtifactStore,
    policies: &Policies,
    point: &str,
) -> Result<Removed> {
    let marks = rows::marks(pool, point).await?;
    let Some(latest) = marks.latest else {
        return Ok(Removed::default());
    };
    let mut candidates = Vec::new();
    for ((stage, role), keep) in &policies.0 {
        for held in rows::outputs_before(pool, point, stage, role, latest).await? {
            if !keeps(*keep, held.at.iteration, marks) {
                candidates.push(held);
            }
        }
    }
    remove(pool, artifacts, policies, candidates).await
}

/// A pass over a whole workspace (`rondo prune`): every good iteration of every point, and
/// the files of removals a crash left behind.
pub async fn whole_workspace(
    pool: &SqlitePool,
    artifacts: &ArtifactStore,
    policies: &Policies,
) -> Result<Removed> {
    let mut candidates = Vec::new();
    for (point, latest) in rows::good_ranges(pool).await? {
        let marks = rows::marks(pool, &point).await?;
        for ((stage, role), keep) in &policies.0 {
            for held in rows::outputs_before(pool, &point, stage, role, latest).await? {
                if !keeps(*keep, held.at.iteration, marks) {
                    candidates.push(held);
                }
            }
        }
    }
    let mut done = remove(pool, artifacts, policies, candidates).await?;
    for hash in rows::removed_hashes(pool).await? {
        if delete_file(artifacts, &hash).await? {
            done.files += 1;
        }
    }
    Ok(done)
}

/// Remove the candidates that nothing keeps: record first, then delete the files.
async fn remove(
    pool: &SqlitePool,
    artifacts: &ArtifactStore,
    policies: &Policies,
    candidates: Vec<Held>,
) -> Result<Removed> {
    let mut marks: HashMap<String, Marks> = HashMap::new();
    let mut chosen: Vec<(Held, String)> = Vec::new();
    'next: for held in candidates {
        if chosen.iter().any(|(h, _)| h.hash == held.hash) || rows::pinned(pool, &held.hash).await?
        {
            continue;
        }
        for r in rows::references(pool, &held.hash).await? {
            let Some(keep) = policies.get(&r.stage, &r.role) else {
                continue 'next;
            };
            if !marks.contains_key(&r.point) {
                marks.insert(r.point.clone(), rows::marks(pool, &r.point).await?);
            }
            if keeps(keep, r.iteration, marks[&r.point]) {
                continue 'next;
            }
        }
        let Some(policy) = policies.get(&held.at.stage, &held.at.role) else {
            continue;
        };
        chosen.push((held, policy.to_string()));
    }
    if chosen.is_empty() {
        return Ok(Removed::default());
    }
    let mut script = Script::new();
    for (held, policy) in &chosen {
        script.content_removed(held, policy);
    }
    script
        .commit(pool, Failpoint::RetentionRecorded)
        .await
        .context("recording removals")?;
    let mut done = Removed::default();
    for (held, _) in chosen {
        delete_file(artifacts, &held.hash).await?;
        failpoint::hit(Failpoint::RetentionRemoved);
        done.files += 1;
        done.bytes += u64::try_from(held.size).unwrap_or(0);
    }
    Ok(done)
}

/// Delete a stored file (on the blocking pool); whether it was there.
async fn delete_file(artifacts: &ArtifactStore, hash: &str) -> Result<bool> {
    let path = artifacts.path_of(hash);
    tokio::task::spawn_blocking(move || match std::fs::remove_file(&path) {
        Ok(()) => Ok(true),
        Err(e) if e.kind() == std::io::ErrorKind::NotFound => Ok(false),
        Err(e) => Err(e).with_context(|| format!("{}: cannot remove", path.display())),
    })
    .await
    .context("internal: the removal task panicked")?
}

#[cfg(test)]
mod tests {
    use super::*;

    fn marks(latest: u32, window_from: Option<u32>) -> Marks {
        Marks {
            latest: Some(latest),
            window_from,
        }
    }

    #[test]
    fn the_last_n_the_every_kth_the_latest_and_the_window_stay() {
        let last2 = Keep {
            last: Some(2),
            every: None,
        };
        let kept: Vec<u32> = (1..=10)
            .filter(|&i| keeps(last2, i, marks(10, None)))
            .collect();
        assert_eq!(kept, vec![9, 10]);
        let every4 = Keep {
            last: None,
            every: Some(4),
        };
        let kept: Vec<u32> = (1..=10)
            .filter(|&i| keeps(every4, i, marks(10, None)))
            .collect();
        assert_eq!(kept, vec![4, 8, 10]);
        let both = Keep {
            last: Some(1),
            every: Some(5),
        };
        let kept: Vec<u32> = (1..=12)
            .filter(|&i| keeps(both, i, marks(12, Some(7))))
            .collect();
        assert_eq!(
            kept,
            vec![5, 7, 8, 9, 10, 11, 12],
            "window from 7 protected"
        );
        assert!(
            keeps(last2, 1, Marks::default()),
            "no good iteration yet: keep all"
        );
    }
}
