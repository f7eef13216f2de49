//! The query plans of the hot reads: each must find its rows through an index, so that
//! status, resume planning and traces cost O(points), not O(history). Checked with
//! `EXPLAIN QUERY PLAN` on a real store made by the migrations: a full scan of any table
//! other than `points` fails the test.

use super::*;

/// (name, SQL) of every read that runs once per run, per status or per trace.
fn hot_queries() -> Vec<(&'static str, String)> {
    vec![
        ("last iterations", iterations::LAST_ITERATIONS.to_string()),
        (
            "last iteration's attempts",
            attempts::LAST_ITERATION_ATTEMPTS.to_string(),
        ),
        ("last programs", attempts::LAST_PROGRAMS.to_string()),
        ("next attempt id", attempts::NEXT_ATTEMPT_ID.to_string()),
        ("outstanding attempts", attempts::outstanding_sql()),
        (
            "first rules met",
            reads::points::FIRST_RULES_MET.to_string(),
        ),
        ("last good iteration", reads::points::LAST_GOOD.to_string()),
    ]
}

/// The plan's lines that scan a table other than `points` (an index search is fine).
fn full_scans(plan: &[String]) -> Vec<String> {
    plan.iter()
        .filter(|d| {
            let d = d.trim();
            let table = d
                .strip_prefix("SCAN ")
                .and_then(|t| t.split_whitespace().next());
            table.is_some_and(|t| t != "p" && t != "points")
        })
        .cloned()
        .collect()
}

#[tokio::test]
async fn hot_queries_search_indexes_and_scan_no_history() -> anyhow::Result<()> {
    let dir = tempfile::tempdir()?;
    let pool = open(&dir.path().join(DB_FILE)).await?;
    for (name, sql) in hot_queries() {
        let mut q = sqlx::query_as::<_, (i64, i64, i64, String)>(
            // sqlx needs the text to live as long as the query.
            Box::leak(format!("EXPLAIN QUERY PLAN {sql}").into_boxed_str()),
        );
        for _ in 0..sql.matches('?').count() {
            q = q.bind(Option::<String>::None);
        }
        let plan: Vec<String> = q.fetch_all(&pool).await?.into_iter().map(|r| r.3).collect();
        let scans = full_scans(&plan);
        assert!(
            scans.is_empty(),
            "{name}: the plan scans history ({scans:?}); whole plan: {plan:#?}"
        );
        // A search through an index, or of the rowid ("SEARCH attempts" for max(id)).
        assert!(
            plan.iter().any(|d| d.trim().starts_with("SEARCH ")),
            "{name}: no index search in the plan: {plan:#?}"
        );
        // A search by point alone would still read the point's whole history: these must
        // use the index made for them.
        let wanted = match name {
            "first rules met" => Some("iterations_rules_met"),
            _ => None,
        };
        if let Some(index) = wanted {
            assert!(
                plan.iter().any(|d| d.contains(index)),
                "{name}: not through {index}: {plan:#?}"
            );
        }
    }
    Ok(())
}

#[test]
fn a_full_scan_is_recognised() {
    let plan = vec![
        "SCAN p USING COVERING INDEX sqlite_autoindex_points_1".to_string(),
        "SEARCH a USING INDEX sqlite_autoindex_attempts_1 (point=? AND iteration=?)".into(),
        "SCAN attempts USING COVERING INDEX attempts_by_state".into(),
    ];
    assert_eq!(
        full_scans(&plan),
        vec!["SCAN attempts USING COVERING INDEX attempts_by_state".to_string()]
    );
}
