//! Retention in the store: which outputs of a point's iteration a policy may let go, every
//! reference to a content hash (so shared content is kept while anything keeps it), the
//! removal records, and the disk-usage view (bytes per stage and role, kept and removed).
//! The decisions are [`crate::retention`]'s; this module only reads and records.

use anyhow::Result;
use sqlx::{Row, SqlitePool};

use super::{now, AttemptState, IterationState, Script};

/// One output reference: the attempt's point, stage, role and iteration.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct Reference {
    pub point: String,
    pub stage: String,
    pub role: String,
    pub iteration: u32,
}

/// A stored output of a succeeded attempt: its hash and size, and where it came from.
#[derive(Debug, Clone)]
pub struct Held {
    pub hash: String,
    pub size: i64,
    pub at: Reference,
}

/// Where a point stands for retention: its last good iteration and the first one whose
/// stopping rules were met (the start of its final window).
#[derive(Debug, Clone, Copy, Default)]
pub struct Marks {
    pub latest: Option<u32>,
    pub window_from: Option<u32>,
}

/// The outputs of a stage's role at a point's iterations before `before`, not removed yet,
/// in iteration order.
pub async fn outputs_before(
    pool: &SqlitePool,
    point: &str,
    stage: &str,
    role: &str,
    before: u32,
) -> Result<Vec<Held>> {
    let rows = sqlx::query(
        "SELECT o.artifact AS hash, f.size AS size, a.iteration AS iteration FROM attempts a \
         JOIN attempt_outputs o ON o.attempt_id = a.id JOIN artifacts f ON f.hash = o.artifact \
         WHERE a.point = ? AND a.iteration < ? AND a.stage = ? AND a.state = ? AND o.role = ? \
         AND NOT EXISTS (SELECT 1 FROM removals r WHERE r.hash = o.artifact) \
         ORDER BY a.iteration",
    )
    .bind(point)
    .bind(i64::from(before))
    .bind(stage)
    .bind(AttemptState::Succeeded)
    .bind(role)
    .fetch_all(pool)
    .await?;
    Ok(rows
        .into_iter()
        .map(|r| Held {
            hash: r.get("hash"),
            size: r.get("size"),
            at: Reference {
                point: point.to_string(),
                stage: stage.to_string(),
                role: role.to_string(),
                iteration: u32::try_from(r.get::<i64, _>("iteration")).unwrap_or(0),
            },
        })
        .collect())
}

/// Every succeeded attempt's output reference to a hash (through the index on the artifact).
pub async fn references(pool: &SqlitePool, hash: &str) -> Result<Vec<Reference>> {
    let rows = sqlx::query(
        "SELECT a.point, a.stage, o.role, a.iteration FROM attempt_outputs o \
         JOIN attempts a ON a.id = o.attempt_id WHERE o.artifact = ? AND a.state = ?",
    )
    .bind(hash)
    .bind(AttemptState::Succeeded)
    .fetch_all(pool)
    .await?;
    Ok(rows
        .into_iter()
        .map(|r| Reference {
            point: r.get(0),
            stage: r.get(1),
            role: r.get(2),
            iteration: r.get::<i64, _>(3) as u32,
        })
        .collect())
}

/// Whether a hash is a start file, or an output of a report or an analysis (kept always).
pub async fn pinned(pool: &SqlitePool, hash: &str) -> Result<bool> {
    let n: i64 = sqlx::query_scalar(
        "SELECT (SELECT count(*) FROM start_files WHERE artifact = ?1) \
         + (SELECT count(*) FROM report_outputs WHERE artifact = ?1)",
    )
    .bind(hash)
    .fetch_one(pool)
    .await?;
    Ok(n > 0)
}

/// A point's last good iteration and the start of its final window (two index look-ups).
pub async fn marks(pool: &SqlitePool, point: &str) -> Result<Marks> {
    let (first, last) = super::reads::points::convergence_marks(pool, point).await?;
    Ok(Marks {
        latest: last.map(|i| i as u32),
        window_from: first.map(|i| i as u32),
    })
}

/// Every point with its good iterations' range, for a pass over a whole workspace.
pub async fn good_ranges(pool: &SqlitePool) -> Result<Vec<(String, u32)>> {
    Ok(sqlx::query_as::<_, (String, i64)>(
        "SELECT point, max(iteration) FROM iterations WHERE state = ? GROUP BY point",
    )
    .bind(IterationState::Good)
    .fetch_all(pool)
    .await?
    .into_iter()
    .map(|(p, n)| (p, n as u32))
    .collect())
}

/// Whether content was removed by retention, and how: (policy, when).
pub async fn removal(pool: &SqlitePool, hash: &str) -> Result<Option<(String, String)>> {
    Ok(sqlx::query_as::<_, (String, String)>(
        "SELECT policy, removed_at FROM removals WHERE hash = ?",
    )
    .bind(hash)
    .fetch_optional(pool)
    .await?)
}

/// Hashes recorded as removed (their files may still be there after a crash).
pub async fn removed_hashes(pool: &SqlitePool) -> Result<Vec<String>> {
    Ok(sqlx::query_scalar("SELECT hash FROM removals")
        .fetch_all(pool)
        .await?)
}

impl Script {
    /// Record that a content hash is removed by a policy (before its file is deleted).
    pub fn content_removed(&mut self, held: &Held, policy: &str) {
        self.stmt(
            "INSERT INTO removals(hash, size, removed_at, policy, point, stage, role, iteration) \
             VALUES (?,?,?,?,?,?,?,?) ON CONFLICT(hash) DO NOTHING",
        )
        .bind(held.hash.clone())
        .bind(held.size)
        .bind(now())
        .bind(policy.to_string())
        .bind(held.at.point.clone())
        .bind(held.at.stage.clone())
        .bind(held.at.role.clone())
        .bind(i64::from(held.at.iteration));
    }
}

/// Bytes per stage and output role: distinct contents kept and removed.
#[derive(Debug, Clone, serde::Serialize)]
pub struct Usage {
    pub stage: String,
    pub role: String,
    pub kept_files: i64,
    pub kept_bytes: i64,
    pub removed_files: i64,
    pub removed_bytes: i64,
}

/// Where the disk goes: per stage and role, the distinct contents its succeeded attempts
/// produced, kept and removed (content shared between roles counts under each).
pub async fn usage(pool: &SqlitePool) -> Result<Vec<Usage>> {
    let rows = sqlx::query(
        "SELECT stage, role, \
         sum(CASE WHEN removed THEN 0 ELSE 1 END), sum(CASE WHEN removed THEN 0 ELSE size END), \
         sum(CASE WHEN removed THEN 1 ELSE 0 END), sum(CASE WHEN removed THEN size ELSE 0 END) \
         FROM (SELECT DISTINCT a.stage AS stage, o.role AS role, o.artifact AS hash, f.size AS size, \
               EXISTS (SELECT 1 FROM removals r WHERE r.hash = o.artifact) AS removed \
               FROM attempts a JOIN attempt_outputs o ON o.attempt_id = a.id \
               JOIN artifacts f ON f.hash = o.artifact WHERE a.state = ?) \
         GROUP BY stage, role ORDER BY stage, role",
    )
    .bind(AttemptState::Succeeded)
    .fetch_all(pool)
    .await?;
    Ok(rows
        .into_iter()
        .map(|r| Usage {
            stage: r.get(0),
            role: r.get(1),
            kept_files: r.get(2),
            kept_bytes: r.get(3),
            removed_files: r.get(4),
            removed_bytes: r.get(5),
        })
        .collect())
}
