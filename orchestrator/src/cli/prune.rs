//! `rondo prune` and `rondo du`: apply the retention policies to an existing workspace (the
//! campaign's `keep:` entries, or `--keep` on the command line), and show where the disk
//! goes (bytes per stage and role, kept and removed). The decisions are
//! [`crate::retention`]'s, the SQL `store::retention`'s; this file holds the flags' meaning
//! and the output.

use anyhow::{Context, Result};

use super::output::{emit, emit_json};
use super::workspace::find_workspace;
use super::{BadInput, DuArgs, PruneArgs, EXIT_OK};
use crate::artifacts::ArtifactStore;
use crate::retention;
use crate::spec::Keep;
use crate::store;

/// `rondo prune [FILE] [--keep STAGE.ROLE=last:N,every:K]...`.
pub async fn prune(a: PruneArgs) -> Result<u8> {
    let ws = find_workspace(a.file.as_deref(), a.workspace)?;
    // The same lock `rondo run` takes: never while a run writes the workspace.
    let _lock = store::lock(&ws)?;
    let pool = store::open_existing_rw(&ws, "prune").await?;
    let artifacts = ArtifactStore::open(&ws.join("store"))
        .with_context(|| format!("{}: cannot open the artifact store", ws.display()))?;
    let row = store::campaign_row(&pool)
        .await?
        .context("the workspace has no campaign record")?;
    let mut policies = retention::recorded_policies(&row.spec_text)?;
    for k in &a.keep {
        let (stage, role, keep) = parse_keep(k)?;
        policies.set(&stage, &role, keep);
    }
    if policies.is_empty() {
        pool.close().await;
        return Err(BadInput(
            "no retention policy: the campaign names none under `keep:`, and no --keep was \
             given (e.g. --keep band.restart=last:2)"
                .into(),
        )
        .into());
    }
    let done = retention::whole_workspace(&pool, &artifacts, &policies).await;
    pool.close().await;
    let done = done?;
    if a.json {
        emit_json(&done)?;
    } else {
        emit(&format!(
            "removed {} stored file(s), {} bytes; their records stay (rondo trace says so)\n",
            done.files, done.bytes
        ));
    }
    Ok(EXIT_OK)
}

/// `STAGE.ROLE=last:N,every:K`.
fn parse_keep(text: &str) -> Result<(String, String, Keep)> {
    let bad = |why: &str| -> anyhow::Error {
        BadInput(format!(
            "--keep {text}: {why}; write STAGE.ROLE=last:N, STAGE.ROLE=every:K or both \
             (STAGE.ROLE=last:2,every:10)"
        ))
        .into()
    };
    let (what, policy) = text.split_once('=').ok_or_else(|| bad("no `=`"))?;
    let (stage, role) = what.split_once('.').ok_or_else(|| bad("no STAGE.ROLE"))?;
    let mut keep = Keep {
        last: None,
        every: None,
    };
    for part in policy.split(',') {
        let (k, v) = part
            .split_once(':')
            .ok_or_else(|| bad("no `:` in the policy"))?;
        let n: u32 = v.parse().map_err(|_| bad("counts are whole numbers"))?;
        if n == 0 {
            return Err(bad("counts must be at least 1"));
        }
        match k {
            "last" => keep.last = Some(n),
            "every" => keep.every = Some(n),
            _ => return Err(bad("the policy words are `last` and `every`")),
        }
    }
    Ok((stage.to_string(), role.to_string(), keep))
}

/// `rondo du [FILE]`.
pub async fn du(a: DuArgs) -> Result<u8> {
    let ws = find_workspace(a.file.as_deref(), a.workspace)?;
    let pool = store::open_existing(&ws).await?;
    let rows = store::retention::usage(&pool).await;
    pool.close().await;
    let rows = rows?;
    if a.json {
        emit_json(&rows)?;
        return Ok(EXIT_OK);
    }
    let mut out = format!(
        "{:<16} {:<16} {:>8} {:>14} {:>8} {:>14}\n",
        "stage", "role", "kept", "kept bytes", "removed", "removed bytes"
    );
    let (mut kept, mut removed) = (0i64, 0i64);
    for r in &rows {
        out.push_str(&format!(
            "{:<16} {:<16} {:>8} {:>14} {:>8} {:>14}\n",
            r.stage, r.role, r.kept_files, r.kept_bytes, r.removed_files, r.removed_bytes
        ));
        kept += r.kept_bytes;
        removed += r.removed_bytes;
    }
    out.push_str(&format!(
        "total: {kept} bytes kept, {removed} bytes removed by retention (content shared by \
         several roles counts under each)\n"
    ));
    emit(&out);
    Ok(EXIT_OK)
}

#[cfg(test)]
mod tests {
    use super::parse_keep;

    #[test]
    fn keep_flags_parse_and_bad_ones_say_how() {
        let (s, r, k) = parse_keep("band.restart=last:2,every:10").expect("parses");
        assert_eq!(
            (s.as_str(), r.as_str(), k.last, k.every),
            ("band", "restart", Some(2), Some(10))
        );
        for bad in [
            "band.restart",
            "restart=last:2",
            "band.restart=last:0",
            "band.restart=first:1",
        ] {
            let e = parse_keep(bad).expect_err(bad).to_string();
            assert!(e.contains("STAGE.ROLE=last:N"), "{e}");
        }
    }
}
