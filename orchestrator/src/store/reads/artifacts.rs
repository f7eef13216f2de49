//! Reads of the `artifacts`, `start_files` and `warm_blends` tables.

use anyhow::{Context, Result};
use sqlx::{Row, SqlitePool};

/// Whether an artifact with this hash is recorded.
pub async fn is_recorded(pool: &SqlitePool, hash: &str) -> Result<bool> {
    let known: Option<String> = sqlx::query_scalar("SELECT hash FROM artifacts WHERE hash = ?")
        .bind(hash)
        .fetch_optional(pool)
        .await?;
    Ok(known.is_some())
}

/// Hashes starting with `prefix` (lower-case hex), in order, at most `limit`.
pub async fn with_prefix(pool: &SqlitePool, prefix: &str, limit: i64) -> Result<Vec<String>> {
    Ok(sqlx::query_scalar(
        "SELECT hash FROM artifacts WHERE hash LIKE ? || '%' ORDER BY hash LIMIT ?",
    )
    .bind(prefix)
    .bind(limit)
    .fetch_all(pool)
    .await?)
}

/// The name an artifact was first recorded under.
pub async fn original_name(pool: &SqlitePool, hash: &str) -> Result<String> {
    Ok(
        sqlx::query_scalar("SELECT original_name FROM artifacts WHERE hash = ?")
            .bind(hash)
            .fetch_one(pool)
            .await?,
    )
}

/// One `artifacts` row.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct ArtifactRow {
    /// Size in bytes.
    pub size: i64,
    /// Name it was first recorded under.
    pub original_name: String,
    /// When it was first recorded.
    pub created_at: String,
}

/// The row of an artifact; an error naming the hash when it is not recorded.
pub async fn artifact(pool: &SqlitePool, hash: &str) -> Result<ArtifactRow> {
    let row = sqlx::query("SELECT size, original_name, created_at FROM artifacts WHERE hash = ?")
        .bind(hash)
        .fetch_optional(pool)
        .await?
        .with_context(|| format!("artifact {hash} is used but not recorded"))?;
    Ok(ArtifactRow {
        size: row.try_get(0)?,
        original_name: row.try_get(1)?,
        created_at: row.try_get(2)?,
    })
}

/// Every recorded hash.
pub async fn all_hashes(pool: &SqlitePool) -> Result<Vec<String>> {
    Ok(sqlx::query_scalar("SELECT hash FROM artifacts")
        .fetch_all(pool)
        .await?)
}

/// The `start:` names an artifact was given as a campaign start file, in order.
pub async fn start_file_names(pool: &SqlitePool, hash: &str) -> Result<Vec<String>> {
    Ok(
        sqlx::query_scalar("SELECT name FROM start_files WHERE artifact = ? ORDER BY name")
            .bind(hash)
            .fetch_all(pool)
            .await?,
    )
}

/// Every start file as (name, artifact hash), by name.
pub async fn start_files(pool: &SqlitePool) -> Result<Vec<(String, String)>> {
    let rows = sqlx::query("SELECT name, artifact FROM start_files ORDER BY name")
        .fetch_all(pool)
        .await?;
    let mut out = Vec::new();
    for r in rows {
        out.push((r.try_get(0)?, r.try_get(1)?));
    }
    Ok(out)
}

/// The member files of a folder artifact: (relative path, content hash, size), by path
/// (empty for a plain file).
pub async fn folder_members(pool: &SqlitePool, folder: &str) -> Result<Vec<(String, String, i64)>> {
    let rows = sqlx::query(
        "SELECT path, artifact, size FROM folder_members WHERE folder = ? ORDER BY path",
    )
    .bind(folder)
    .fetch_all(pool)
    .await?;
    rows.into_iter()
        .map(|r| Ok((r.try_get(0)?, r.try_get(1)?, r.try_get(2)?)))
        .collect()
}

/// The content hash of the file at `path` inside the folder artifact `folder`, if any.
pub async fn folder_member(pool: &SqlitePool, folder: &str, path: &str) -> Result<Option<String>> {
    Ok(
        sqlx::query_scalar("SELECT artifact FROM folder_members WHERE folder = ? AND path = ?")
            .bind(folder)
            .bind(path)
            .fetch_optional(pool)
            .await?,
    )
}

/// The first recorded folder holding a file with this content, with its path there.
pub async fn first_folder_holding(
    pool: &SqlitePool,
    member: &str,
) -> Result<Option<(String, String)>> {
    let row = sqlx::query(
        "SELECT folder, path FROM folder_members WHERE artifact = ? ORDER BY rowid LIMIT 1",
    )
    .bind(member)
    .fetch_optional(pool)
    .await?;
    row.map(|r| Ok((r.try_get(0)?, r.try_get(1)?))).transpose()
}

/// A blended first input of a warm-started point (`warm_blends`), as lineage and PROV show
/// it: `artifact = first + weight·(second − first)` along `axis`.
#[derive(Debug, Clone, PartialEq, Eq, PartialOrd, Ord, serde::Serialize)]
pub struct Blend {
    pub artifact: String,
    /// The point it starts, and the `previous:` source it stands in for.
    pub point: String,
    pub stage: String,
    pub role: String,
    pub axis: String,
    /// The weight, as text (exact, and orderable).
    pub weight: String,
    pub first: BlendSource,
    pub second: BlendSource,
}

/// One of the two converged outputs a blend is made of.
#[derive(Debug, Clone, PartialEq, Eq, PartialOrd, Ord, serde::Serialize)]
pub struct BlendSource {
    pub point: String,
    pub iteration: i64,
    pub artifact: String,
}

/// The blends recorded with artifact `hash` (every blend when `hash` is `None`).
pub async fn blends(pool: &SqlitePool, hash: Option<&str>) -> Result<Vec<Blend>> {
    let rows = sqlx::query(
        "SELECT artifact, point, stage, role, axis, weight, first_point, first_iteration, \
         first_artifact, second_point, second_iteration, second_artifact FROM warm_blends \
         WHERE ?1 IS NULL OR artifact = ?1 ORDER BY point, stage, role",
    )
    .bind(hash)
    .fetch_all(pool)
    .await
    .context("cannot read the warm-start blends")?;
    let mut out = Vec::new();
    for r in rows {
        out.push(Blend {
            artifact: r.try_get(0)?,
            point: r.try_get(1)?,
            stage: r.try_get(2)?,
            role: r.try_get(3)?,
            axis: r.try_get(4)?,
            weight: r.try_get::<f64, _>(5)?.to_string(),
            first: BlendSource {
                point: r.try_get(6)?,
                iteration: r.try_get(7)?,
                artifact: r.try_get(8)?,
            },
            second: BlendSource {
                point: r.try_get(9)?,
                iteration: r.try_get(10)?,
                artifact: r.try_get(11)?,
            },
        });
    }
    Ok(out)
}
