//! The campaign file's revisions: every accepted text with its hash and classification, the
//! points a revision adds, retires or brings back, and the reads `rondo run`, `rondo check`
//! and the read side need (the latest text, the list, each point as the store holds it).
//! Knows no campaign rules: what changed is decided in `crate::revision`.

use anyhow::{Context, Result};
use sqlx::{Row, SqlitePool};

use super::{now, rows, IterationState, PointState, Script};

/// A recorded revision.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct RevisionRow {
    /// 1, 2, ...
    pub number: i64,
    /// The exact text.
    pub spec_text: String,
    /// Its BLAKE3 (hex).
    pub spec_blake3: String,
    /// When it was accepted.
    pub created_at: String,
    /// Physics changes accepted with `--accept-revision`.
    pub accepted: bool,
    /// The classification (JSON), none for revision 1.
    pub changes: Option<String>,
}

/// A point as the store holds it, for a revision's classification.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct StoredPoint {
    pub id: String,
    pub idx: i64,
    pub values_json: String,
    pub state: PointState,
    /// The revision that retired it, if retired.
    pub retired_in: Option<i64>,
    /// Why (`removed` from the sweep, or `physics` changed).
    pub retired_why: Option<String>,
    /// Its last good iteration.
    pub last_good: Option<u32>,
    /// Whether any iteration of it began.
    pub started: bool,
}

/// Every revision, oldest first (empty for a store made before revisions were kept and not
/// yet migrated, which cannot happen: the migration writes revision 1).
pub async fn list(pool: &SqlitePool) -> Result<Vec<RevisionRow>> {
    let rows = sqlx::query(
        "SELECT number, spec_text, spec_blake3, created_at, accepted, changes FROM revisions \
         ORDER BY number",
    )
    .fetch_all(pool)
    .await
    .context("cannot read the campaign's revisions")?;
    let mut out = Vec::new();
    for r in rows {
        out.push(RevisionRow {
            number: r.try_get(0)?,
            spec_text: r.try_get(1)?,
            spec_blake3: r.try_get(2)?,
            created_at: r.try_get(3)?,
            accepted: r.try_get::<i64, _>(4)? != 0,
            changes: r.try_get(5)?,
        });
    }
    Ok(out)
}

/// The latest revision.
pub async fn latest(pool: &SqlitePool) -> Result<Option<RevisionRow>> {
    Ok(list(pool).await?.pop())
}

/// The BLAKE3 of revision `number`'s text, if recorded.
pub async fn blake3_of(pool: &SqlitePool, number: i64) -> Result<Option<String>> {
    Ok(
        sqlx::query_scalar("SELECT spec_blake3 FROM revisions WHERE number = ?")
            .bind(number)
            .fetch_optional(pool)
            .await?,
    )
}

/// Every point with what a revision's classification needs, in index order.
pub async fn stored_points(pool: &SqlitePool) -> Result<Vec<StoredPoint>> {
    let rows = sqlx::query(
        "SELECT p.id, p.idx, p.values_json, p.state, p.retired_in, p.retired_why, \
         (SELECT max(iteration) FROM iterations WHERE point = p.id AND state = ?), \
         EXISTS (SELECT 1 FROM iterations WHERE point = p.id) FROM points p ORDER BY p.idx",
    )
    .bind(IterationState::Good)
    .fetch_all(pool)
    .await
    .context("cannot read the points")?;
    let mut out = Vec::new();
    for r in rows {
        out.push(StoredPoint {
            id: r.try_get(0)?,
            idx: r.try_get(1)?,
            values_json: r.try_get(2)?,
            state: r.try_get(3)?,
            retired_in: r.try_get(4)?,
            retired_why: r.try_get(5)?,
            last_good: r.try_get::<Option<i64>, _>(6)?.map(|i| i as u32),
            started: r.try_get::<i64, _>(7)? != 0,
        });
    }
    Ok(out)
}

/// One blended first input of a warm-started point (`warm_blends`): the output `role` of
/// `stage` interpolated between two converged points' last good iterations.
#[derive(Debug, Clone, PartialEq)]
pub struct WarmBlend {
    pub stage: String,
    pub role: String,
    /// The blend, already in the artifact store: hash, size and file name.
    pub artifact: String,
    pub size: u64,
    pub name: String,
    /// The sweep axis interpolated along.
    pub axis: String,
    /// (point, iteration, artifact) of the two sources.
    pub first: (String, u32, String),
    pub second: (String, u32, String),
    /// t: artifact = first + t·(second − first).
    pub weight: f64,
}

/// A point a revision adds: (id, index, sweep values as JSON).
pub type AddedPoint = (String, i64, String);

impl Script {
    /// Record an accepted revision.
    pub fn revision_recorded(
        &mut self,
        number: i64,
        text: &str,
        blake3: &str,
        accepted: bool,
        changes: String,
    ) {
        self.stmt(
            "INSERT INTO revisions(number, spec_text, spec_blake3, created_at, accepted, changes) \
             VALUES (?,?,?,?,?,?)",
        )
        .bind(number)
        .bind(text.to_string())
        .bind(blake3.to_string())
        .bind(now())
        .bind(i64::from(accepted))
        .bind(changes);
    }

    /// New points of revision `number`.
    pub fn points_added(&mut self, number: i64, points: &[AddedPoint]) {
        for chunk in points.chunks(300) {
            self.stmt(&format!(
                "INSERT INTO points(id, idx, values_json, state, revision) VALUES {}",
                rows(chunk.len(), 5)
            ));
            for (id, idx, values) in chunk {
                self.bind(id.clone())
                    .bind(*idx)
                    .bind(values.clone())
                    .bind(PointState::Planned)
                    .bind(number);
            }
        }
    }

    /// A point added by this revision starts from `source`'s iteration `iteration`.
    pub fn warm_start(&mut self, point: &str, source: &str, iteration: u32, distance: f64) {
        self.stmt(
            "INSERT INTO warm_starts(point, source_point, source_iteration, distance) \
             VALUES (?, ?, ?, ?)",
        )
        .bind(point.to_string())
        .bind(source.to_string())
        .bind(i64::from(iteration))
        .bind(distance);
    }

    /// A blended first input of the warm-started `point`, and its artifact.
    pub fn warm_blend(&mut self, point: &str, b: &WarmBlend) {
        self.stmt(
            "INSERT INTO artifacts(hash, size, original_name, created_at) VALUES (?,?,?,?) \
             ON CONFLICT(hash) DO NOTHING",
        )
        .bind(b.artifact.clone())
        .bind(i64::try_from(b.size).unwrap_or(i64::MAX))
        .bind(b.name.clone())
        .bind(now());
        self.stmt(
            "INSERT INTO warm_blends(point, stage, role, artifact, axis, first_point, \
             first_iteration, first_artifact, second_point, second_iteration, second_artifact, \
             weight) VALUES (?,?,?,?,?,?,?,?,?,?,?,?)",
        )
        .bind(point.to_string())
        .bind(b.stage.clone())
        .bind(b.role.clone())
        .bind(b.artifact.clone())
        .bind(b.axis.clone())
        .bind(b.first.0.clone())
        .bind(i64::from(b.first.1))
        .bind(b.first.2.clone())
        .bind(b.second.0.clone())
        .bind(i64::from(b.second.1))
        .bind(b.second.2.clone())
        .bind(b.weight);
    }

    /// A point leaves the campaign (kept with its history).
    pub fn point_retired(&mut self, point: &str, number: i64, why: &str) {
        self.stmt("UPDATE points SET retired_in = ?, retired_why = ? WHERE id = ?")
            .bind(number)
            .bind(why.to_string())
            .bind(point.to_string());
    }

    /// A retired point's sweep value is back: it rejoins the campaign.
    pub fn point_restored(&mut self, point: &str) {
        self.stmt("UPDATE points SET retired_in = NULL, retired_why = NULL WHERE id = ?")
            .bind(point.to_string());
    }

    /// The final window of a point counts rules-met marks from `iteration` on.
    pub fn window_from(&mut self, point: &str, iteration: u32) {
        self.stmt("UPDATE points SET window_from = ? WHERE id = ?")
            .bind(i64::from(iteration))
            .bind(point.to_string());
    }
}
