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
    record(pool, campaign, &c, accept).await?;
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
    if !campaign.warm_start.is_empty() {
        let stored = revisions::stored_points(pool).await?;
        let leaving: Vec<&str> = c
            .retired
            .iter()
            .map(|(id, _)| id.as_str())
            .chain(c.rerun.iter().map(|(old, _, _)| old.as_str()))
            .chain(c.reopened.iter().map(|r| r.point.as_str()))
            .collect();
        for p in c
            .points
            .iter()
            .filter(|p| c.added.iter().any(|(id, _)| *id == p.id))
        {
            let Some((source, iteration, distance)) =
                nearest_converged(&campaign.warm_start, p, &stored, &leaving)
            else {
                continue;
            };
            s.warm_start(&p.id, &source, iteration, distance);
            s.event(
                "warm-start",
                Some(&p.id),
                Some(1),
                None,
                &format!(
                    "revision {n}: starts from {source} iteration {iteration} (distance \
                     {distance} along {})",
                    campaign.warm_start.join(", ")
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

/// The converged point nearest to `p` along the `along` axes, among those equal to it on
/// every other axis and not leaving the campaign: (its id, last good iteration, distance).
/// Distance is the sum of the absolute differences along the axes; ties go to the point
/// recorded first, so the choice depends only on the store.
fn nearest_converged(
    along: &[String],
    p: &PointSpec,
    stored: &[StoredPoint],
    leaving: &[&str],
) -> Option<(String, u32, f64)> {
    let mine = values_json(p);
    let mut best: Option<(f64, i64, String, u32)> = None;
    for s in stored {
        let (PointState::Converged, Some(it), None) = (s.state, s.last_good, s.retired_in) else {
            continue;
        };
        if leaving.contains(&s.id.as_str()) || s.id == p.id {
            continue;
        }
        let Ok(theirs) = serde_json::from_str::<serde_json::Value>(&s.values_json) else {
            continue;
        };
        let (Some(a), Some(b)) = (mine.as_object(), theirs.as_object()) else {
            continue;
        };
        let same_elsewhere = a
            .iter()
            .filter(|(k, _)| !along.contains(k))
            .all(|(k, v)| b.get(k) == Some(v))
            && a.len() == b.len();
        if !same_elsewhere {
            continue;
        }
        let mut d = 0.0;
        for axis in along {
            let (Some(x), Some(y)) = (
                a.get(axis).and_then(serde_json::Value::as_f64),
                b.get(axis).and_then(serde_json::Value::as_f64),
            ) else {
                d = f64::NAN;
                break;
            };
            d += (x - y).abs();
        }
        if !d.is_finite() {
            continue;
        }
        let better = match &best {
            None => true,
            Some((bd, bidx, _, _)) => d < *bd || (d == *bd && s.idx < *bidx),
        };
        if better {
            best = Some((d, s.idx, s.id.clone(), it));
        }
    }
    best.map(|(d, _, id, it)| (id, it, d))
}
