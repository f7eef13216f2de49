//! A workspace's first records: the campaign row and revision 1 (its exact text and hash), one row per
//! point, and the start files as artifacts, written in one transaction. Knows no campaign
//! rules: it stores what the engine hands it.

use anyhow::Result;
use sqlx::SqlitePool;

use super::{now, rows, PointState, Script};

/// The records of a new workspace.
pub struct NewCampaign<'a> {
    pub name: &'a str,
    pub spec_path: String,
    pub spec_text: &'a str,
    pub spec_blake3: &'a str,
    pub workspace_id: &'a str,
    /// (id, index, sweep values as JSON) per point.
    pub points: Vec<(String, i64, String)>,
    /// (role name, artifact hash, size, file name) per start file.
    pub starts: Vec<(String, String, u64, String)>,
}

/// Write a new workspace's records in one transaction.
pub async fn create(pool: &SqlitePool, c: NewCampaign<'_>) -> Result<()> {
    let mut s = Script::new();
    s.stmt(
        "INSERT INTO campaign(id, name, spec_path, spec_text, spec_blake3, created_at, \
         rondo_version, workspace_id) VALUES (1,?,?,?,?,?,?,?)",
    )
    .bind(c.name.to_string())
    .bind(c.spec_path)
    .bind(c.spec_text.to_string())
    .bind(c.spec_blake3.to_string())
    .bind(now())
    .bind(crate::RONDO_VERSION)
    .bind(c.workspace_id.to_string());
    s.stmt(
        "INSERT INTO revisions(number, spec_text, spec_blake3, created_at) \
         SELECT 1, spec_text, spec_blake3, created_at FROM campaign",
    );
    // Multi-row inserts: a sweep of thousands of points is a few statements.
    for chunk in c.points.chunks(300) {
        s.stmt(&format!(
            "INSERT INTO points(id, idx, values_json, state) VALUES {}",
            rows(chunk.len(), 4)
        ));
        for (id, idx, values) in chunk {
            s.bind(id.clone())
                .bind(*idx)
                .bind(values.clone())
                .bind(PointState::Planned);
        }
    }
    let at = now();
    for (name, h, size, fname) in &c.starts {
        s.stmt(
            "INSERT INTO artifacts(hash, size, original_name, created_at) VALUES (?,?,?,?) \
             ON CONFLICT(hash) DO NOTHING",
        )
        .bind(h.clone())
        .bind(i64::try_from(*size).unwrap_or(i64::MAX))
        .bind(fname.clone())
        .bind(at.clone());
        s.stmt("INSERT INTO start_files(name, artifact) VALUES (?,?)")
            .bind(name.clone())
            .bind(h.clone());
    }
    s.event("campaign-created", None, None, None, c.name);
    s.commit(pool, crate::failpoint::Failpoint::CampaignCreated)
        .await
}
