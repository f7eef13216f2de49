//! Shared helpers of the end-to-end tests: the real binaries, temporary campaigns, and
//! read-only looks into a workspace's SQLite store.
#![allow(dead_code)]

pub mod skip;
#[allow(unused_imports)]
pub use skip::skip_or_fail;

use sqlx::Row;
use std::collections::BTreeMap;
use std::path::{Path, PathBuf};
use std::process::{Command, Output};

/// The rondo binary built for these tests.
pub fn rondo() -> PathBuf {
    PathBuf::from(env!("CARGO_BIN_EXE_rondo"))
}

/// The reference model engine binary, built by the same `cargo test --workspace` run
/// (it sits beside rondo in the target directory).
pub fn model_solid() -> PathBuf {
    let p = rondo().with_file_name("model-solid");
    assert!(
        p.is_file(),
        "{} is missing: build the workspace first (cargo build --workspace)",
        p.display()
    );
    p
}

/// The second reference engine's binary (built beside rondo, as model-solid is).
pub fn casebook() -> PathBuf {
    let p = rondo().with_file_name("casebook");
    assert!(
        p.is_file(),
        "{} is missing: build the workspace first (cargo build --workspace)",
        p.display()
    );
    p
}

/// The repository root.
pub fn repo() -> PathBuf {
    PathBuf::from(env!("CARGO_MANIFEST_DIR"))
        .parent()
        .map(Path::to_path_buf)
        .unwrap_or_default()
}

/// A test fixture program.
pub fn fixture(name: &str) -> PathBuf {
    repo().join("tests").join("fixtures").join(name)
}

/// Copy a campaign of `examples/` and its start files into `dir`.
pub fn demo_in(dir: &Path, campaign: &str) {
    let ex = repo().join("examples");
    std::fs::copy(ex.join(campaign), dir.join(campaign))
        .unwrap_or_else(|e| panic!("copy {campaign}: {e}"));
    std::fs::create_dir_all(dir.join("start")).unwrap_or_else(|e| panic!("{e}"));
    for f in ["density.json", "sigma.npy"] {
        std::fs::copy(ex.join("start").join(f), dir.join("start").join(f))
            .unwrap_or_else(|e| panic!("copy start file: {e}"));
    }
}

/// `rondo ARGS` in `dir`, with the failpoint `armed` (`NAME:N`) or none (a binary built
/// with the `failpoints` feature, as the tests' is).
pub fn rondo_at(dir: &Path, args: &[&str], armed: Option<&str>) -> Output {
    let mut c = Command::new(rondo());
    c.args(args)
        .current_dir(dir)
        .env("PATH", path_with_binaries())
        .env_remove(rondo::failpoint::VARIABLE);
    if let Some(a) = armed {
        c.env(rondo::failpoint::VARIABLE, a);
    }
    c.output()
        .unwrap_or_else(|e| panic!("cannot run rondo: {e}"))
}

/// The run crashed at its armed failpoint: SIGKILL after the failpoint's line on stderr.
pub fn assert_crashed_at(o: &Output, armed: &str) {
    use std::os::unix::process::ExitStatusExt;
    let (name, n) = armed.split_once(':').unwrap_or((armed, "?"));
    let line = format!("rondo: failpoint {name} hit {n}: crashing");
    let stderr = String::from_utf8_lossy(&o.stderr);
    assert!(
        o.status.signal() == Some(libc::SIGKILL) && stderr.contains(&line),
        "armed {armed}: expected a crash there (SIGKILL after `{line}`), got {}",
        shown(o)
    );
}

/// Run rondo with arguments in `dir`.
pub fn run_rondo(dir: &Path, args: &[&str]) -> Output {
    Command::new(rondo())
        .args(args)
        .current_dir(dir)
        .env("PATH", path_with_binaries())
        .output()
        .unwrap_or_else(|e| panic!("cannot run rondo: {e}"))
}

/// PATH with the target directory first, so `model-solid` resolves to the fresh build.
pub fn path_with_binaries() -> String {
    let bin = rondo().parent().map(Path::to_path_buf).unwrap_or_default();
    format!(
        "{}:{}",
        bin.display(),
        std::env::var("PATH").unwrap_or_default()
    )
}

/// Text of an output's stderr and stdout, for assertion messages.
pub fn shown(o: &Output) -> String {
    format!(
        "status {:?}\n--- stdout\n{}\n--- stderr\n{}",
        o.status.code(),
        String::from_utf8_lossy(&o.stdout),
        String::from_utf8_lossy(&o.stderr)
    )
}

/// `rondo status --json` of a workspace.
pub fn status_json(dir: &Path, ws: &Path) -> serde_json::Value {
    let ws = ws.display().to_string();
    let o = run_rondo(dir, &["status", "--workspace", &ws, "--json"]);
    assert!(o.status.success(), "{}", shown(&o));
    serde_json::from_slice(&o.stdout)
        .unwrap_or_else(|e| panic!("status --json: {e}\n{}", shown(&o)))
}

/// Run a query against a workspace's database (read only).
pub fn query<T, F>(ws: &Path, f: F) -> T
where
    F: for<'a> FnOnce(
        &'a sqlx::SqlitePool,
    ) -> std::pin::Pin<Box<dyn std::future::Future<Output = T> + 'a>>,
{
    let rt = tokio::runtime::Builder::new_current_thread()
        .enable_all()
        .build()
        .unwrap_or_else(|e| panic!("runtime: {e}"));
    rt.block_on(async {
        let pool = rondo::store::open(&ws.join("rondo.db"))
            .await
            .unwrap_or_else(|e| panic!("open store: {e:#}"));
        let out = f(&pool).await;
        pool.close().await;
        out
    })
}

/// The workspace id recorded in `ws` (the tag of its child processes).
pub fn workspace_id(ws: &Path) -> String {
    query(ws, |pool| {
        Box::pin(async move {
            sqlx::query_scalar("SELECT workspace_id FROM campaign")
                .fetch_one(pool)
                .await
                .unwrap_or_else(|e| panic!("{e}"))
        })
    })
}

/// Live processes whose environment tags them with this workspace id.
pub fn processes_of_workspace(ws_id: &str) -> Vec<i32> {
    let mut found = Vec::new();
    let Ok(entries) = std::fs::read_dir("/proc") else {
        return found;
    };
    let needle = format!("RONDO_WORKSPACE_ID={ws_id}");
    for e in entries.flatten() {
        let Some(pid) = e.file_name().to_str().and_then(|s| s.parse::<i32>().ok()) else {
            continue;
        };
        let Ok(env) = std::fs::read(e.path().join("environ")) else {
            continue;
        };
        if env.split(|b| *b == 0).any(|kv| kv == needle.as_bytes()) {
            found.push(pid);
        }
    }
    found
}

/// Live processes of this workspace other than the attempts' keepers (which carry
/// `RONDO_KEEPER`): the stages' programs and what they started.
pub fn programs_of_workspace(ws_id: &str) -> Vec<i32> {
    processes_of_workspace(ws_id)
        .into_iter()
        .filter(|pid| {
            std::fs::read(format!("/proc/{pid}/environ")).is_ok_and(|env| {
                !env.split(|b| *b == 0)
                    .any(|kv| kv.starts_with(b"RONDO_KEEPER="))
            })
        })
        .collect()
}

/// Everything a run recorded that must not depend on interruptions: per succeeded attempt,
/// (point, iteration, stage) → outputs (role → hash) and metrics (name → value bits).
pub type Record =
    BTreeMap<(String, i64, String), (BTreeMap<String, String>, BTreeMap<String, u64>)>;

/// What `ws` recorded, read through rondo's own store layer (a store error fails the test).
pub fn record(ws: &Path) -> Record {
    query(ws, |pool| {
        Box::pin(async move {
            let mut out = Record::new();
            let rows = sqlx::query(
                "SELECT a.id, a.point, a.iteration, a.stage FROM attempts a WHERE a.state = 'succeeded'",
            )
            .fetch_all(pool)
            .await
            .unwrap_or_else(|e| panic!("{e}"));
            for r in rows {
                let id: i64 = r.get(0);
                let outs =
                    sqlx::query("SELECT role, artifact FROM attempt_outputs WHERE attempt_id = ?")
                        .bind(id)
                        .fetch_all(pool)
                        .await
                        .unwrap_or_else(|e| panic!("{e}"))
                        .into_iter()
                        .map(|o| (o.get::<String, _>(0), o.get::<String, _>(1)))
                        .collect();
                let mets = sqlx::query("SELECT name, value FROM metrics WHERE attempt_id = ?")
                    .bind(id)
                    .fetch_all(pool)
                    .await
                    .unwrap_or_else(|e| panic!("{e}"))
                    .into_iter()
                    .map(|m| (m.get::<String, _>(0), m.get::<f64, _>(1).to_bits()))
                    .collect();
                let key = (r.get(1), r.get(2), r.get(3));
                assert!(out.insert(key, (outs, mets)).is_none());
            }
            out
        })
    })
}

/// The seed of the kill instants: `RONDO_CRASH_SEED` when set, else `default`.
pub fn crash_seed(default: u64) -> u64 {
    std::env::var("RONDO_CRASH_SEED")
        .ok()
        .and_then(|s| s.parse().ok())
        .unwrap_or(default)
}

/// How many SIGKILLs a crash test deals: `RONDO_CRASH_KILLS` when set, else `default`.
pub fn crash_kills(default: usize) -> usize {
    std::env::var("RONDO_CRASH_KILLS")
        .ok()
        .and_then(|s| s.parse().ok())
        .filter(|&k| k > 0)
        .unwrap_or(default)
}

/// Start `rondo run CAMPAIGN --max-running 2` in `dir` `kills` times and SIGKILL it each
/// time at a seeded point of its progress, then run it to the end (exit `final_code`
/// required: 0 when every point converges, 3 when some are capped). `total` is the number
/// of succeeded attempts of the uninterrupted run; the kills come when the store holds a
/// seeded fraction of them (between `from` and `to`, increasing, each after at least one
/// new success), plus a seeded 0–60 ms, so every kill lands while work is left whatever
/// the machine's speed. Prints the seed and what each kill hit, to replay a failure.
pub fn kill_and_finish(
    dir: &Path,
    campaign: &str,
    seed: u64,
    kills: usize,
    total: usize,
    (from, to): (f64, f64),
    final_code: i32,
) {
    use std::process::Stdio;
    use std::time::{Duration, Instant};
    assert!(kills > 0 && total > 1 && 0.0 < from && from < to && to < 1.0);
    let ws = dir.join(Path::new(campaign).with_extension("rondo"));
    let mut rng = rondo_numerics::rng::SplitMix64::new(seed);
    let mut targets: Vec<i64> = (0..kills)
        .map(|_| ((from + (to - from) * rng.uniform()) * total as f64).round() as i64)
        .collect();
    targets.sort_unstable();
    // (target, succeeded when killed, extra ms, had the run ended by itself)
    let mut done = Vec::new();
    for target in targets {
        let target = target.max(succeeded_attempts(&ws) + 1);
        let extra = Duration::from_millis(rng.below(60));
        let mut child = Command::new(rondo())
            .args(["run", campaign, "--max-running", "2", "-q"])
            .current_dir(dir)
            .env("PATH", path_with_binaries())
            .stdout(Stdio::null())
            .stderr(Stdio::null())
            .spawn()
            .unwrap_or_else(|e| panic!("spawn rondo: {e}"));
        let deadline = Instant::now() + Duration::from_secs(600);
        let mut ended = None;
        loop {
            if let Some(st) = child.try_wait().ok().flatten() {
                ended = Some(st);
                break;
            }
            if succeeded_attempts_ro(&ws) >= target {
                break;
            }
            assert!(
                Instant::now() < deadline,
                "no progress to {target} succeeded attempts in 10 min (seed {seed})"
            );
            std::thread::sleep(Duration::from_millis(10));
        }
        std::thread::sleep(extra);
        if ended.is_none() {
            ended = child.try_wait().ok().flatten();
        }
        let _ = child.kill(); // SIGKILL
        let _ = child.wait();
        done.push((target, succeeded_attempts(&ws), extra.as_millis(), ended));
    }
    eprintln!(
        "crash test seed {seed}: kills at (target, succeeded, +ms, ended by itself) {done:?}"
    );
    for (i, (target, _, _, ended)) in done.iter().enumerate() {
        assert!(
            ended.is_none(),
            "kill {} (at {target} of {total} successes) came when the run had already ended by \
             itself ({ended:?}): it interrupted nothing (seed {seed}, {done:?})",
            i + 1
        );
    }
    let before = succeeded_attempts(&ws);
    let o = run_rondo(dir, &["run", campaign, "--max-running", "2", "-q"]);
    assert_eq!(o.status.code(), Some(final_code), "{}", shown(&o));
    let after = succeeded_attempts(&ws);
    assert!(
        after > before,
        "the run after the last kill had nothing left to do ({before} succeeded attempts before \
         it, {after} after): the kills came after the work (seed {seed}, {done:?})"
    );
    eprintln!(
        "the final run recorded {} more succeeded attempts",
        after - before
    );
}

/// Succeeded attempts in `ws`, read through a read-only connection (safe while a run
/// writes; 0 while no store exists yet or it cannot be read at this instant).
pub fn succeeded_attempts_ro(ws: &Path) -> i64 {
    strings_ro(
        ws,
        "SELECT CAST(count(*) AS TEXT) FROM attempts WHERE state = 'succeeded'",
    )
    .first()
    .and_then(|n| n.parse().ok())
    .unwrap_or(0)
}

/// A query's first column (text) through a read-only connection: empty while the store is
/// not there or not readable yet (a run may be creating it).
pub fn strings_ro(ws: &Path, sql: &'static str) -> Vec<String> {
    let db = ws.join("rondo.db");
    if !db.is_file() {
        return Vec::new();
    }
    let rt = tokio::runtime::Builder::new_current_thread()
        .enable_all()
        .build()
        .unwrap_or_else(|e| panic!("runtime: {e}"));
    rt.block_on(async {
        let opts = sqlx::sqlite::SqliteConnectOptions::new()
            .filename(&db)
            .read_only(true)
            .busy_timeout(std::time::Duration::from_secs(5));
        let Ok(pool) = sqlx::SqlitePool::connect_with(opts).await else {
            return Vec::new();
        };
        let rows = sqlx::query_scalar(sql)
            .fetch_all(&pool)
            .await
            .unwrap_or_default();
        pool.close().await;
        rows
    })
}

/// Succeeded attempts recorded in `ws` (0 while no store exists yet).
pub fn succeeded_attempts(ws: &Path) -> i64 {
    if !ws.join("rondo.db").is_file() {
        return 0;
    }
    query(ws, |pool| {
        Box::pin(async move {
            sqlx::query_scalar("SELECT count(*) FROM attempts WHERE state = 'succeeded'")
                .fetch_one(pool)
                .await
                .unwrap_or_else(|e| panic!("count succeeded attempts: {e}"))
        })
    })
}

/// The resumed run recorded exactly the attempts, output hashes and metric bits of the
/// uninterrupted one.
pub fn assert_same_record(reference: &Record, resumed: &Record, seed: u64) {
    assert_eq!(
        reference.len(),
        resumed.len(),
        "the same attempts succeeded (seed {seed})"
    );
    for (key, want) in reference {
        let got = resumed
            .get(key)
            .unwrap_or_else(|| panic!("{key:?} missing after the crashes (seed {seed})"));
        assert_eq!(got.0, want.0, "output hashes of {key:?} (seed {seed})");
        assert_eq!(got.1, want.1, "metric bits of {key:?} (seed {seed})");
    }
}

/// After kills and a resume: at most one success per point/iteration/stage, at least one
/// attempt was caught in flight (else the test proved nothing), and no child is left.
pub fn assert_resume_was_clean(ws: &Path, seed: u64) {
    assert_no_double_success_nor_children(ws, seed);
    let lost: i64 = query(ws, |pool| {
        Box::pin(async move {
            sqlx::query_scalar("SELECT count(*) FROM attempts WHERE state = 'lost'")
                .fetch_one(pool)
                .await
                .unwrap_or(0)
        })
    });
    // A local attempt caught in flight outlives the kill (`outlive-rondo`, default true)
    // and is adopted by the next run; one whose stage opted out, or that was caught between
    // its records, is lost and run again.
    let adopted: i64 = query(ws, |pool| {
        Box::pin(async move {
            sqlx::query_scalar("SELECT count(*) FROM events WHERE kind = 'attempt-adopted'")
                .fetch_one(pool)
                .await
                .unwrap_or(0)
        })
    });
    eprintln!("attempts caught in flight by the kills: {lost} lost and re-run, {adopted} adopted");
    assert!(
        lost + adopted >= 1,
        "no kill hit an attempt in flight (seed {seed})"
    );
}

/// At most one success per point/iteration/stage, and no child of the workspace alive.
pub fn assert_no_double_success_nor_children(ws: &Path, seed: u64) {
    let dups: i64 = query(ws, |pool| {
        Box::pin(async move {
            sqlx::query_scalar(
                "SELECT count(*) FROM (SELECT point, iteration, stage FROM attempts \
                 WHERE state = 'succeeded' GROUP BY 1, 2, 3 HAVING count(*) > 1)",
            )
            .fetch_one(pool)
            .await
            .unwrap_or(-1)
        })
    });
    assert_eq!(dups, 0, "a stage recorded succeeded twice (seed {seed})");
    assert!(
        processes_of_workspace(&workspace_id(ws)).is_empty(),
        "children left behind (seed {seed})"
    );
}

/// The first column of a query's rows, as text (a store error fails the test).
pub fn strings(ws: &Path, sql: &'static str) -> Vec<String> {
    query(ws, |pool| {
        Box::pin(async move {
            sqlx::query_scalar(sql)
                .fetch_all(pool)
                .await
                .unwrap_or_else(|e| panic!("{sql}: {e}"))
        })
    })
}

/// The PROV-JSON document at `prov` reads back through the general-purpose `prov` library
/// (tests/prov_check.py, with RONDO_PROV_PYTHON or python3) with this many entities and
/// activities; without the library the check is skipped loudly (a failure under
/// RONDO_REQUIRE_PROV or CI).
pub fn assert_prov_valid(prov: &Path, entities: usize, activities: usize) {
    let python = std::env::var("RONDO_PROV_PYTHON").unwrap_or_else(|_| "python3".into());
    let out = Command::new(&python)
        .arg(repo().join("tests/prov_check.py"))
        .arg(prov)
        .args([
            "--entities",
            &entities.to_string(),
            "--activities",
            &activities.to_string(),
        ])
        .output()
        .unwrap_or_else(|e| panic!("cannot run {python}: {e}"));
    let err = String::from_utf8_lossy(&out.stderr);
    if out.status.success() {
        return;
    }
    if err.contains("not installed") {
        skip_or_fail(
            &format!(
                "the prov library is not installed for {python}; {} was not validated",
                prov.display()
            ),
            "bash scripts/test installs it (tests/requirements-prov.txt) and sets RONDO_PROV_PYTHON",
            &["RONDO_REQUIRE_PROV"],
        );
    } else {
        panic!("prov_check.py refused {}: {err}", prov.display());
    }
}
