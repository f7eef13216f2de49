//! An edited campaign file in an existing workspace: its classification against the latest
//! recorded revision (`crate::revision`), the refusal of unaccepted physics changes with the
//! diff, and the records of an accepted revision (its text and hash, new, retired and
//! returning points, stopped points judged again, restarted final windows), written in one
//! transaction before anything runs.

use super::*;
use crate::failpoint::Failpoint;
use crate::revision::{self, Classification, History};
use crate::store::revisions::{self, StoredPoint};

/// Where a run stands with the campaign file: the revision it runs under and the points
/// with the store's ids.
pub struct Revised {
    pub number: i64,
    pub points: Vec<PointSpec>,
}

/// Where a revision may write content: the workspace's artifact store, and a folder for
/// files on their way into it.
pub struct StoreAt<'a> {
    pub artifacts: &'a ArtifactStore,
    pub scratch: &'a Path,
}

/// The classification of `campaign` against the workspace's latest revision, and whether
/// the text is that revision's (then the classification only maps the points to the
/// store's ids). Nothing is written.
pub async fn classify(
    pool: &SqlitePool,
    campaign: &Campaign,
    accept: bool,
) -> Result<(bool, Classification)> {
    let Some(latest) = revisions::latest(pool).await? else {
        bail!("internal: the workspace records no revision of its campaign file");
    };
    let stored = revisions::stored_points(pool).await?;
    let same = latest.spec_blake3 == spec_hash(&campaign.text);
    let histories = if same {
        HashMap::new()
    } else {
        histories(pool, &stored).await?
    };
    let c = revision::classify(
        latest.number,
        &latest.spec_text,
        campaign,
        &stored,
        &histories,
        accept,
    )?;
    Ok((same, c))
}

/// The good iterations' metrics of the stopped points (the only ones judged again).
async fn histories(pool: &SqlitePool, stored: &[StoredPoint]) -> Result<HashMap<String, History>> {
    let mut ledger = store::Ledger::new(pool.clone());
    let flushed = ledger.flush().await?;
    let mut out = HashMap::new();
    for s in stored {
        let (PointState::Converged, Some(n)) = (s.state, s.last_good) else {
            continue;
        };
        let mut h = History::new();
        for (it, name, value, error) in flushed.metric_history(&s.id, n).await? {
            h.entry(it)
                .or_default()
                .insert(name, Sample { value, error });
        }
        out.insert(s.id.clone(), h);
    }
    Ok(out)
}

/// The revision a run goes on under: the latest one when the text is unchanged, else the
/// edited text classified and, unless refused, recorded as the next revision.
pub async fn settle_revision(
    pool: &SqlitePool,
    at: &StoreAt<'_>,
    campaign: &Campaign,
    accept: bool,
) -> Result<Revised> {
    let (same, c) = classify(pool, campaign, accept).await?;
    if same {
        return Ok(Revised {
            number: c.from,
            points: c.points,
        });
    }
    if c.needs_acceptance() && !accept {
        return Err(refusal(campaign, &c));
    }
    record(pool, at, campaign, &c, accept).await?;
    Ok(Revised {
        number: c.number,
        points: c.points,
    })
}

/// The refusal of an edit that changes what the points compute, with its diff: what
/// `rondo run` (and `rondo submit`, before it spends an allocation) says without
/// `--accept-revision`.
pub fn refusal(campaign: &Campaign, c: &Classification) -> anyhow::Error {
    anyhow::Error::new(crate::spec::BadInput(format!(
        "{}: the campaign file changed what its points compute.\n{}\
         Started points would get two physics in one history. Restore the file, run the \
         changed campaign in a new workspace (--workspace NEW), or accept the revision \
         with --accept-revision: points that have not started then run the new text, and \
         the values of started points run again as new points (the started ones are \
         retired with their history)",
        campaign.file.display(),
        c.text()
    )))
}

/// Write an accepted revision in one transaction.
async fn record(
    pool: &SqlitePool,
    at: &StoreAt<'_>,
    campaign: &Campaign,
    c: &Classification,
    accept: bool,
) -> Result<()> {
    let n = c.number;
    let mut s = store::Script::new();
    s.revision_recorded(
        n,
        &campaign.text,
        &spec_hash(&campaign.text),
        accept && c.needs_acceptance(),
        serde_json::to_string(c)?,
    );
    let new_ids: Vec<&str> = c
        .added
        .iter()
        .map(|(id, _)| id.as_str())
        .chain(c.rerun.iter().map(|(_, id, _)| id.as_str()))
        .collect();
    let added: Vec<revisions::AddedPoint> = c
        .points
        .iter()
        .filter(|p| new_ids.contains(&p.id.as_str()))
        .map(|p| (p.id.clone(), p.index as i64, values_json(p).to_string()))
        .collect();
    s.points_added(n, &added);
    if let Some(warm) = &campaign.warm_start {
        let stored = revisions::stored_points(pool).await?;
        let leaving: Vec<&str> = c
            .retired
            .iter()
            .map(|(id, _)| id.as_str())
            .chain(c.rerun.iter().map(|(old, _, _)| old.as_str()))
            .chain(c.reopened.iter().map(|r| r.point.as_str()))
            .collect();
        let cx = super::warm::WarmContext {
            campaign,
            warm,
            stored: &stored,
            leaving: &leaving,
            artifacts: at.artifacts,
            scratch: at.scratch,
        };
        let mut ledger = store::Ledger::new(pool.clone());
        let reads = ledger.flush().await?;
        for p in c
            .points
            .iter()
            .filter(|p| c.added.iter().any(|(id, _)| *id == p.id))
        {
            let Some(choice) = super::warm::choose(&cx, &reads, p).await? else {
                continue;
            };
            let n = &choice.nearest;
            s.warm_start(&p.id, &n.point, n.iteration, choice.distance);
            for b in &choice.blends {
                s.warm_blend(&p.id, b);
            }
            s.event(
                "warm-start",
                Some(&p.id),
                Some(1),
                None,
                &format!(
                    "revision {}: {}",
                    c.number,
                    super::warm::describe(&choice, warm)
                ),
            );
        }
    }
    for (id, _) in &c.retired {
        s.point_retired(id, n, "removed");
    }
    for (id, _, _) in &c.rerun {
        s.point_retired(id, n, "physics");
    }
    for (id, _) in &c.restored {
        s.point_restored(id);
    }
    for r in &c.reopened {
        let reason = (r.becomes != PointState::Running).then_some(r.why.as_str());
        let state = r.becomes;
        s.point_state(&r.point, state, reason);
        s.event(
            "point-reopened",
            Some(&r.point),
            Some(r.iteration),
            None,
            &format!("revision {n}: was {}, now {}: {}", r.was, r.becomes, r.why),
        );
    }
    for (id, it) in &c.window_from {
        s.window_from(id, *it);
    }
    let summary = format!(
        "revision {n}: {} new, {} retired, {} back, {} run again, {} judged again",
        c.added.len(),
        c.retired.len(),
        c.restored.len(),
        c.rerun.len(),
        c.reopened.len()
    );
    s.event("campaign-revised", None, None, None, &summary);
    s.commit(pool, Failpoint::RevisionRecorded).await
}
