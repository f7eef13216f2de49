//! The workspace's SQLite store: opening with the journal mode its file system allows (WAL
//! on a local disk, a rollback journal on a file system other hosts share; see
//! [`crate::fsinfo`]), busy timeout and foreign keys, the versioned migrations in
//! `orchestrator/migrations/`, and the workspace lock (a lock file holding pid, host and
//! boot id, taken with `flock`; broken only when its holder is provably gone).

pub mod attempts;
pub mod campaign;
pub mod iterations;
pub mod ledger;
pub mod overview;
#[cfg(test)]
mod plans;
pub mod reads;
pub mod retention;
pub mod revisions;
pub mod seal;
pub mod states;

pub use ledger::{Flushed, Ledger};
pub use states::{AttemptState, IterationState, PointState};

use std::fs::{File, OpenOptions};
use std::io::{Read, Seek, Write};
use std::os::fd::AsRawFd;
use std::path::Path;
use std::str::FromStr;
use std::time::Duration;

use anyhow::{bail, Context, Result};

use crate::failpoint::{self, Failpoint};
use crate::fsinfo::{self, Journal};
use chrono::{DateTime, SecondsFormat, Utc};
use sqlx::migrate::{Migration, MigrationType, Migrator};
use sqlx::sqlite::{
    SqliteConnectOptions, SqliteJournalMode, SqlitePool, SqlitePoolOptions, SqliteSynchronous,
};

/// The schema migrations, in order.
pub fn migrator() -> Migrator {
    // (version, description, SQL), in order.
    let steps: [(i64, &str, &'static str); 13] = [
        (
            1,
            "initial",
            include_str!("../../migrations/0001_initial.sql"),
        ),
        (
            2,
            "report provenance",
            include_str!("../../migrations/0002_report_provenance.sql"),
        ),
        (
            3,
            "point started trigger",
            include_str!("../../migrations/0003_point_started_trigger.sql"),
        ),
        (
            4,
            "program hash unknown",
            include_str!("../../migrations/0004_program_hash_unknown.sql"),
        ),
        (
            5,
            "rules met index",
            include_str!("../../migrations/0005_rules_met_index.sql"),
        ),
        (
            6,
            "folders",
            include_str!("../../migrations/0006_folders.sql"),
        ),
        (
            7,
            "attempt env",
            include_str!("../../migrations/0007_attempt_env.sql"),
        ),
        (
            8,
            "retention",
            include_str!("../../migrations/0008_retention.sql"),
        ),
        (
            9,
            "attempt usage",
            include_str!("../../migrations/0009_attempt_usage.sql"),
        ),
        (
            10,
            "handoffs",
            include_str!("../../migrations/0010_handoffs.sql"),
        ),
        (
            11,
            "revisions",
            include_str!("../../migrations/0011_revisions.sql"),
        ),
        (
            12,
            "warm starts",
            include_str!("../../migrations/0012_warm_starts.sql"),
        ),
        (
            13,
            "warm blends",
            include_str!("../../migrations/0013_warm_blends.sql"),
        ),
    ];
    let m: Vec<Migration> = steps
        .into_iter()
        .map(|(version, what, sql)| {
            Migration::new(
                version,
                what.into(),
                MigrationType::Simple,
                sql.into(),
                false,
            )
        })
        .collect();
    Migrator {
        migrations: m.into(),
        ..Migrator::DEFAULT
    }
}

/// Open (creating) the database file and apply migrations.
pub async fn open(db: &Path) -> Result<SqlitePool> {
    let url = format!("sqlite://{}", db.display());
    let (journal, why) = journal_mode(db)?;
    tracing::debug!(db = %db.display(), ?journal, why, "journal mode");
    let (mode, sync) = match journal {
        Journal::Wal => (SqliteJournalMode::Wal, SqliteSynchronous::Normal),
        Journal::Rollback => (SqliteJournalMode::Delete, SqliteSynchronous::Full),
    };
    let opts = SqliteConnectOptions::from_str(&url)
        .with_context(|| format!("{}: bad database path", db.display()))?
        .create_if_missing(true)
        .journal_mode(mode)
        .synchronous(sync)
        .foreign_keys(true)
        .busy_timeout(Duration::from_secs(30));
    let pool = SqlitePoolOptions::new()
        .max_connections(1)
        .connect_with(opts)
        .await
        .with_context(|| format!("{}: cannot open the workspace database", db.display()))?;
    migrator()
        .run(&pool)
        .await
        .with_context(|| format!("{}: cannot migrate the workspace database", db.display()))?;
    failpoint::hit(Failpoint::StoreMigrated);
    Ok(pool)
}

/// The journal mode for the database at `db`, from its folder's file system and
/// `RONDO_JOURNAL`, with the reason.
pub fn journal_mode(db: &Path) -> Result<(Journal, String)> {
    let dir = db
        .parent()
        .filter(|p| !p.as_os_str().is_empty())
        .unwrap_or(Path::new("."));
    let kind = fsinfo::detect(dir)
        .with_context(|| format!("{}: cannot tell its file system (statfs)", dir.display()))?;
    let env = std::env::var("RONDO_JOURNAL").ok();
    fsinfo::journal_for(kind, env.as_deref()).map_err(|e| anyhow::anyhow!(e))
}

/// An exclusive lock on a workspace, held while the value lives.
#[derive(Debug)]
pub struct WorkspaceLock {
    _file: File,
}

/// Take the workspace lock, or fail naming the holder's pid and host. A lock whose holder
/// is provably gone (same host, and another boot or no such process: a lock a crashed node
/// left on a shared file system) is broken, once, with a warning.
pub fn lock(ws: &Path) -> Result<WorkspaceLock> {
    let path = ws.join("lock");
    let host = hostname();
    let mut broke = false;
    loop {
        let mut f = OpenOptions::new()
            .read(true)
            .write(true)
            .create(true)
            .truncate(false)
            .open(&path)
            .with_context(|| format!("{}: cannot open the lock file", path.display()))?;
        // SAFETY: flock on a file descriptor we own; no memory is involved.
        let r = unsafe { libc::flock(f.as_raw_fd(), libc::LOCK_EX | libc::LOCK_NB) };
        if r != 0 {
            let mut text = String::new();
            let _ = f.read_to_string(&mut text);
            let judged = fsinfo::LockRecord::parse(&text).map(|rec| {
                fsinfo::judge(
                    &rec,
                    &host,
                    fsinfo::boot_id().as_deref(),
                    fsinfo::pid_running,
                )
            });
            match judged {
                Some(fsinfo::Holder::Gone(why)) if !broke => {
                    tracing::warn!(lock = %path.display(), why, "breaking a stale workspace lock");
                    eprintln!(
                        "rondo: breaking the stale lock of workspace {}: {why}",
                        ws.display()
                    );
                    // A new file (a new inode) carries the new lock; the stale holder's
                    // lock stays on the unlinked one.
                    std::fs::remove_file(&path).with_context(|| {
                        format!("{}: cannot remove the stale lock file", path.display())
                    })?;
                    broke = true;
                    continue;
                }
                Some(fsinfo::Holder::Alive(who)) | Some(fsinfo::Holder::Gone(who)) => bail!(
                    "workspace {} is in use by another rondo ({who}); wait for it to finish or stop it with `rondo cancel`",
                    ws.display()
                ),
                None => bail!(
                    "workspace {} is in use by another rondo ({}); wait for it to finish or stop it with `rondo cancel`",
                    ws.display(),
                    text.trim()
                ),
            }
        }
        f.set_len(0)?;
        f.rewind()?;
        f.write_all(fsinfo::LockRecord::this_process(host).to_text().as_bytes())?;
        f.flush()?;
        return Ok(WorkspaceLock { _file: f });
    }
}

/// Who holds the workspace lock, if anyone, without taking it (a shared probe that is
/// released at once, so a starting `rondo run` is not disturbed).
pub fn holder(ws: &Path) -> Option<String> {
    let path = ws.join("lock");
    let mut f = File::open(&path).ok()?;
    // SAFETY: flock on a file descriptor we own.
    let r = unsafe { libc::flock(f.as_raw_fd(), libc::LOCK_SH | libc::LOCK_NB) };
    if r == 0 {
        // SAFETY: as above.
        unsafe { libc::flock(f.as_raw_fd(), libc::LOCK_UN) };
        return None;
    }
    let mut holder = String::new();
    let _ = f.read_to_string(&mut holder);
    Some(
        fsinfo::LockRecord::parse(&holder)
            .map(|r| r.describe())
            .unwrap_or_else(|| holder.trim().to_string()),
    )
}

/// This machine's host name.
pub fn hostname() -> String {
    let mut buf = [0u8; 256];
    // SAFETY: the buffer is valid for its length; gethostname writes at most that many bytes.
    let r = unsafe { libc::gethostname(buf.as_mut_ptr().cast(), buf.len()) };
    if r != 0 {
        return "unknown".into();
    }
    let n = buf.iter().position(|&b| b == 0).unwrap_or(buf.len());
    String::from_utf8_lossy(&buf[..n]).into_owned()
}

/// Now, as the store writes times: RFC 3339 UTC with milliseconds.
pub fn now() -> String {
    Utc::now().to_rfc3339_opts(SecondsFormat::Millis, true)
}

/// Statements sent to SQLite as one script that runs as one transaction, in a single call to
/// the database thread: each separate statement costs two thread wake-ups, which dominate
/// the bookkeeping of short stages. The `?` placeholders of all statements take the bound
/// values in order; their counts are checked before anything runs. Statements must not
/// return rows.
#[derive(Default)]
pub struct Script {
    sql: String,
    args: sqlx::sqlite::SqliteArguments<'static>,
    placeholders: usize,
    bound: usize,
    error: Option<String>,
}

impl Script {
    /// An empty script.
    pub fn new() -> Script {
        Script::default()
    }

    /// Append one statement.
    pub fn stmt(&mut self, sql: &str) -> &mut Script {
        self.placeholders += sql.matches('?').count();
        self.sql.push_str(sql);
        self.sql.push_str(";\n");
        self
    }

    /// Bind the next placeholder.
    pub fn bind<T>(&mut self, value: T) -> &mut Script
    where
        T: 'static + Send + sqlx::Encode<'static, sqlx::Sqlite> + sqlx::Type<sqlx::Sqlite>,
    {
        use sqlx::Arguments;
        self.bound += 1;
        if let Err(e) = self.args.add(value) {
            self.error.get_or_insert_with(|| e.to_string());
        }
        self
    }

    /// Whether no statement was added.
    pub fn is_empty(&self) -> bool {
        self.sql.is_empty()
    }

    /// Run every statement in one transaction (rolled back if any fails); `at` names the
    /// write, whose failpoint is hit once it committed (see [`crate::failpoint`]).
    pub async fn commit(self, pool: &SqlitePool, at: Failpoint) -> Result<()> {
        if let Some(e) = self.error {
            bail!("internal: cannot bind a value: {e}");
        }
        if self.placeholders != self.bound {
            bail!(
                "internal: store script has {} placeholders but {} values",
                self.placeholders,
                self.bound
            );
        }
        if self.sql.is_empty() {
            return Ok(());
        }
        let text = format!("BEGIN IMMEDIATE;\n{}COMMIT;", self.sql);
        let mut conn = pool.acquire().await?;
        // Not kept in the connection's statement cache: scripts are rarely the same twice (the
        // held-back records vary), and a cached script of hundreds of rows holds megabytes of
        // prepared statements (the cache keeps up to 100 of them).
        let result = sqlx::query_with(&text, self.args)
            .persistent(false)
            .execute(&mut *conn)
            .await;
        if let Err(e) = result {
            // The script stops at the failing statement with the transaction open.
            let _ = sqlx::query("ROLLBACK").execute(&mut *conn).await;
            return Err(e).context("store transaction");
        }
        failpoint::hit(at);
        Ok(())
    }
}

/// `n` rows of `cols` placeholders for a multi-row `VALUES`: `(?,?),(?,?)`.
pub fn rows(n: usize, cols: usize) -> String {
    let row = format!("({})", vec!["?"; cols].join(","));
    vec![row; n].join(",")
}

/// Append an event to a script (see [`event`]).
pub fn event_stmt(
    script: &mut Script,
    kind: &str,
    point: Option<&str>,
    iteration: Option<u32>,
    attempt_id: Option<i64>,
    detail: &str,
) {
    script
        .stmt("INSERT INTO events(at, kind, point, iteration, attempt_id, detail) VALUES (?,?,?,?,?,?)")
        .bind(now())
        .bind(kind.to_string())
        .bind(point.map(str::to_string))
        .bind(iteration.map(i64::from))
        .bind(attempt_id)
        .bind(detail.to_string());
}

/// A time as the store writes it.
pub fn time_text(t: DateTime<Utc>) -> String {
    t.to_rfc3339_opts(SecondsFormat::Millis, true)
}

/// The `campaign` row.
#[derive(Debug, Clone)]
pub struct CampaignRow {
    /// Name.
    pub name: String,
    /// Campaign file path as given at the first run.
    pub spec_path: String,
    /// The exact campaign file text of the latest revision (the first run's until the file
    /// is revised; `store::revisions` keeps every one).
    pub spec_text: String,
    /// BLAKE3 of the text.
    pub spec_blake3: String,
    /// The latest revision's number.
    pub revision: i64,
    /// When the workspace was made.
    pub created_at: String,
    /// rondo version that made it.
    pub rondo_version: String,
    /// Random id given to children as `RONDO_WORKSPACE_ID`.
    pub workspace_id: String,
}

/// Read the campaign row, if the workspace has one.
pub async fn campaign_row(pool: &SqlitePool) -> Result<Option<CampaignRow>> {
    use sqlx::Row;
    let row = sqlx::query(
        "SELECT c.name, c.spec_path, coalesce(r.spec_text, c.spec_text) AS spec_text, \
         coalesce(r.spec_blake3, c.spec_blake3) AS spec_blake3, coalesce(r.number, 1) AS revision, \
         c.created_at, c.rondo_version, c.workspace_id FROM campaign c \
         LEFT JOIN revisions r ON r.number = (SELECT max(number) FROM revisions) WHERE c.id = 1",
    )
    .fetch_optional(pool)
    .await?;
    Ok(row.map(|r| CampaignRow {
        name: r.get("name"),
        spec_path: r.get("spec_path"),
        spec_text: r.get("spec_text"),
        spec_blake3: r.get("spec_blake3"),
        revision: r.get("revision"),
        created_at: r.get("created_at"),
        rondo_version: r.get("rondo_version"),
        workspace_id: r.get("workspace_id"),
    }))
}

/// Append to the event log.
pub async fn event<'e, E>(
    ex: E,
    kind: &str,
    point: Option<&str>,
    iteration: Option<u32>,
    attempt_id: Option<i64>,
    detail: &str,
) -> Result<()>
where
    E: sqlx::Executor<'e, Database = sqlx::Sqlite>,
{
    sqlx::query(
        "INSERT INTO events(at, kind, point, iteration, attempt_id, detail) VALUES (?,?,?,?,?,?)",
    )
    .bind(now())
    .bind(kind)
    .bind(point)
    .bind(iteration.map(i64::from))
    .bind(attempt_id)
    .bind(detail)
    .execute(ex)
    .await?;
    Ok(())
}

/// Record an artifact row (idempotent: the first name and time are kept).
pub async fn artifact<'e, E>(ex: E, hash: &str, size: u64, name: &str) -> Result<()>
where
    E: sqlx::Executor<'e, Database = sqlx::Sqlite>,
{
    sqlx::query(
        "INSERT INTO artifacts(hash, size, original_name, created_at) VALUES (?,?,?,?) \
         ON CONFLICT(hash) DO NOTHING",
    )
    .bind(hash)
    .bind(i64::try_from(size).unwrap_or(i64::MAX))
    .bind(name)
    .bind(now())
    .execute(ex)
    .await?;
    Ok(())
}

/// Whether this process may write `path` (`access(2)` with `W_OK`: false on a read-only
/// mount even for root, and for a folder of another user without write permission).
pub fn writable(path: &Path) -> bool {
    use std::os::unix::ffi::OsStrExt;
    let Ok(c) = std::ffi::CString::new(path.as_os_str().as_bytes()) else {
        return false;
    };
    // SAFETY: a valid NUL-terminated path; access only reads it.
    unsafe { libc::access(c.as_ptr(), libc::W_OK) == 0 }
}

/// Refuse an existing database file that SQLite's `PRAGMA quick_check` finds damaged
/// (every page is read, without the index cross-checks of `integrity_check`: linear in the
/// file's size), through a read-only connection, so that nothing — not the workspace lock,
/// not a migration — is written to a damaged workspace. An absent file passes, and so does
/// one that nothing has written since a clean close (its seal matches, store/seal.rs).
pub async fn refuse_damaged(db: &Path) -> Result<()> {
    if !db.exists() {
        return Ok(());
    }
    if seal::matches(db) {
        // Nothing wrote the file since a clean close that found it whole (store/seal.rs).
        return Ok(());
    }
    let opts = SqliteConnectOptions::new()
        .filename(db)
        .read_only(true)
        .busy_timeout(Duration::from_secs(30));
    let pool = SqlitePoolOptions::new()
        .max_connections(1)
        .connect_with(opts)
        .await
        .with_context(|| format!("{}: cannot open the workspace database", db.display()))?;
    let found: Result<Vec<String>, sqlx::Error> = sqlx::query_scalar("PRAGMA quick_check")
        .fetch_all(&pool)
        .await;
    pool.close().await;
    let problems = match found {
        Ok(rows) if rows.len() == 1 && rows[0] == "ok" => return Ok(()),
        Ok(rows) => rows.join("; "),
        Err(e) => e.to_string(),
    };
    bail!(
        "{}: the workspace database is damaged (SQLite quick_check: {}); rondo writes nothing \
         to it: restore rondo.db from a backup, or read what is left with `sqlite3 {} .recover` \
         into a copy, or run the campaign again in a new workspace (--workspace)",
        db.display(),
        problems.chars().take(300).collect::<String>(),
        db.display()
    )
}

fn check_db_file(ws: &Path) -> Result<std::path::PathBuf> {
    let db = ws.join(DB_FILE);
    if !db.is_file() {
        bail!(
            "{}: no rondo workspace here (no {DB_FILE}); give --workspace or run the campaign first",
            ws.display()
        );
    }
    Ok(db)
}

async fn check_campaign(pool: &SqlitePool, db: &Path) -> Result<()> {
    let ok: Option<i64> = sqlx::query_scalar("SELECT count(*) FROM campaign")
        .fetch_optional(pool)
        .await
        .with_context(|| format!("{}: the workspace database is unreadable", db.display()))?;
    if ok.unwrap_or(0) != 1 {
        bail!(
            "{}: the workspace database holds no campaign (an interrupted first run?); run the campaign again",
            db.display()
        );
    }
    Ok(())
}

/// Open an existing workspace's database for reading only, as every command that only
/// reads does (`status`, `trace`, `diff`, `export`): without the workspace lock, and without
/// writing anything, so an archived workspace, another user's, or one on a read-only mount
/// can be read.
///
/// SQLite reads a database in WAL mode through its `-shm` index, which a reader creates if
/// it is missing; since SQLite 3.22 a read-only reader can also use an existing `-shm` it may
/// not write (it then keeps the index in its own memory). So the file is opened `mode=ro`
/// when the folder is writable or both `-wal` and `-shm` exist. When the folder is not
/// writable and there is no `-wal` file (a workspace whose last run ended cleanly, which
/// folds the log into the database and removes both files), the database is opened
/// `immutable=1`: nothing can be in flight, and SQLite then needs no `-shm` at all. The one
/// case left, a `-wal` without `-shm` in a folder that cannot be written, is refused with
/// advice, because reading it as immutable would silently ignore the log's transactions.
pub async fn open_existing(ws: &Path) -> Result<SqlitePool> {
    let db = check_db_file(ws)?;
    let wal = ws.join(format!("{DB_FILE}-wal"));
    let shm = ws.join(format!("{DB_FILE}-shm"));
    let folder_writable = writable(ws);
    let immutable = if folder_writable || (wal.exists() && shm.exists()) {
        false
    } else if wal.metadata().map(|m| m.len()).unwrap_or(0) == 0 {
        true
    } else {
        bail!(
            "{}: the workspace cannot be written here and its database has a write-ahead log ({DB_FILE}-wal) without its index ({DB_FILE}-shm), which SQLite cannot read without writing; copy the workspace to a writable place (cp -a) and read the copy",
            ws.display()
        );
    };
    let opts = SqliteConnectOptions::new()
        .filename(&db)
        .read_only(true)
        .immutable(immutable)
        .foreign_keys(true)
        .busy_timeout(Duration::from_secs(30));
    let pool = SqlitePoolOptions::new()
        .max_connections(1)
        .connect_with(opts)
        .await
        .with_context(|| {
            format!(
                "{}: cannot open the workspace database for reading",
                db.display()
            )
        })?;
    // A workspace of an older rondo needs its migrations, which write: done here when the
    // workspace may be written (as every command did before), refused with advice otherwise.
    let latest = migrator().iter().map(|m| m.version).max().unwrap_or(0);
    let applied: Option<i64> =
        sqlx::query_scalar("SELECT max(version) FROM _sqlx_migrations WHERE success")
            .fetch_optional(&pool)
            .await
            .ok()
            .flatten();
    if applied.unwrap_or(0) < latest {
        pool.close().await;
        if folder_writable && writable(&db) {
            let pool = open(&db).await?;
            check_campaign(&pool, &db).await?;
            return Ok(pool);
        }
        bail!(
            "{}: this workspace was recorded by an older rondo (schema {} of {latest}) and must be upgraded once, which needs write access: run `rondo status` on it as a user who may write it, or copy it (cp -a) and read the copy",
            ws.display(),
            applied.unwrap_or(0)
        );
    }
    check_campaign(&pool, &db).await?;
    Ok(pool)
}

/// Open an existing workspace's database for writing (migrating it if needed), for the
/// commands that record something without running the campaign (`cancel` of a workspace
/// no orchestrator runs, `report`). `what` says what is recorded, for the refusal when the
/// workspace cannot be written.
pub async fn open_existing_rw(ws: &Path, what: &str) -> Result<SqlitePool> {
    let db = check_db_file(ws)?;
    if !(writable(ws) && writable(&db)) {
        bail!(
            "{}: the workspace is read-only here (another user's, or a read-only mount); {what}, which needs write access: run it as the workspace's owner, or copy the workspace (cp -a WORKSPACE COPY) and use the copy",
            ws.display()
        );
    }
    let pool = open(&db).await?;
    check_campaign(&pool, &db).await?;
    Ok(pool)
}

/// File name of the database inside a workspace.
pub const DB_FILE: &str = "rondo.db";

#[cfg(test)]
mod tests {
    use super::*;

    #[tokio::test]
    async fn migrates_a_real_file_and_enforces_keys() -> Result<()> {
        let d = tempfile::tempdir()?;
        let pool = open(&d.path().join("rondo.db")).await?;
        let mode: String = sqlx::query_scalar("PRAGMA journal_mode")
            .fetch_one(&pool)
            .await?;
        assert_eq!(mode, "wal");
        // foreign keys are on: an attempt for an unknown point is refused
        let r = sqlx::query(
            "INSERT INTO attempt_outputs(attempt_id, role, artifact) VALUES (1,'x','y')",
        )
        .execute(&pool)
        .await;
        assert!(r.is_err());
        Ok(())
    }

    #[tokio::test]
    async fn a_script_binds_across_statements_and_is_all_or_nothing() -> Result<()> {
        let d = tempfile::tempdir()?;
        let pool = open(&d.path().join("rondo.db")).await?;
        let mut ok = Script::new();
        ok.stmt("INSERT INTO events(at, kind, detail) VALUES (?, ?, ?)")
            .bind("t1".to_string())
            .bind("a".to_string())
            .bind("first".to_string());
        ok.stmt("INSERT INTO events(at, kind, detail) VALUES (?, 'b', ?)")
            .bind("t2".to_string())
            .bind("second".to_string());
        ok.commit(&pool, Failpoint::EventRecorded).await?;
        let rows: Vec<(String, String, String)> =
            sqlx::query_as("SELECT at, kind, detail FROM events ORDER BY seq")
                .fetch_all(&pool)
                .await?;
        assert_eq!(
            rows,
            vec![
                ("t1".into(), "a".into(), "first".into()),
                ("t2".into(), "b".into(), "second".into())
            ]
        );
        // The second statement breaks a foreign key: the first must not stay.
        let mut bad = Script::new();
        bad.stmt("INSERT INTO events(at, kind, detail) VALUES ('t3', 'c', 'kept?')");
        bad.stmt("INSERT INTO attempt_outputs(attempt_id, role, artifact) VALUES (?, 'x', 'y')")
            .bind(999_i64);
        assert!(bad.commit(&pool, Failpoint::EventRecorded).await.is_err());
        let n: i64 = sqlx::query_scalar("SELECT count(*) FROM events")
            .fetch_one(&pool)
            .await?;
        assert_eq!(n, 2, "a failed script leaves nothing behind");
        // The connection is usable (no transaction left open).
        sqlx::query("INSERT INTO events(at, kind, detail) VALUES ('t4', 'd', 'after')")
            .execute(&pool)
            .await?;
        // Placeholder and value counts must agree.
        let mut short = Script::new();
        short
            .stmt("INSERT INTO events(at, kind, detail) VALUES (?, ?, ?)")
            .bind("t5".to_string());
        assert!(short.commit(&pool, Failpoint::EventRecorded).await.is_err());
        Ok(())
    }

    #[test]
    fn a_lock_left_by_a_dead_holder_is_broken_and_a_live_one_is_not() -> Result<()> {
        // A stale lock as a crashed node leaves it on a shared file system: the flock is
        // still held (here by a child process standing in for the file server's record),
        // but its record names this host and an earlier boot.
        let d = tempfile::tempdir()?;
        let path = d.path().join("lock");
        let stale = fsinfo::LockRecord {
            pid: std::process::id(),
            host: hostname(),
            boot_id: Some("an-earlier-boot".into()),
        };
        std::fs::write(&path, stale.to_text())?;
        let mut holder = std::process::Command::new("flock")
            .args(["-x", path.to_str().expect("utf-8 path"), "sleep", "30"])
            .spawn()
            .context("flock(1) from util-linux")?;
        let held = (0..100).any(|_| {
            std::thread::sleep(Duration::from_millis(20));
            holder_probe(&path)
        });
        assert!(held, "the child took the lock");
        let l = lock(d.path());
        let _ = holder.kill();
        let _ = holder.wait();
        let l = l?;
        let text = std::fs::read_to_string(&path)?;
        let rec = fsinfo::LockRecord::parse(&text).expect("new record");
        assert_eq!(rec.pid, std::process::id());
        assert_eq!(rec.boot_id, fsinfo::boot_id());
        drop(l);

        // A live holder on this host (this very boot, a running pid): refused, named.
        std::fs::write(
            &path,
            fsinfo::LockRecord::this_process(hostname()).to_text(),
        )?;
        let mut holder = std::process::Command::new("flock")
            .args(["-x", path.to_str().expect("utf-8 path"), "sleep", "30"])
            .spawn()
            .context("flock(1) from util-linux")?;
        let held = (0..100).any(|_| {
            std::thread::sleep(Duration::from_millis(20));
            holder_probe(&path)
        });
        assert!(held, "the child took the lock");
        let e = lock(d.path()).expect_err("held by a live process");
        let _ = holder.kill();
        let _ = holder.wait();
        let msg = format!("{e:#}");
        assert!(
            msg.contains(&format!(
                "pid {} on host {}",
                std::process::id(),
                hostname()
            )),
            "{msg}"
        );
        Ok(())
    }

    /// Whether someone holds an exclusive flock on `path`.
    fn holder_probe(path: &Path) -> bool {
        let Ok(f) = File::open(path) else {
            return false;
        };
        // SAFETY: flock on a descriptor we own.
        let r = unsafe { libc::flock(f.as_raw_fd(), libc::LOCK_SH | libc::LOCK_NB) };
        r != 0
    }

    #[test]
    fn journal_mode_is_wal_on_this_machines_disk() -> Result<()> {
        let d = tempfile::tempdir()?;
        let (j, why) = journal_mode(&d.path().join("rondo.db"))?;
        assert_eq!(j, Journal::Wal, "{why}");
        Ok(())
    }

    #[test]
    fn second_lock_names_holder() -> Result<()> {
        let d = tempfile::tempdir()?;
        let _a = lock(d.path())?;
        let e = lock(d.path())
            .err()
            .map(|e| e.to_string())
            .unwrap_or_default();
        assert!(e.contains(&format!("pid {}", std::process::id())), "{e}");
        Ok(())
    }
}
