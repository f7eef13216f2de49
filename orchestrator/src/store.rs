//! The workspace's SQLite store: opening with WAL, busy timeout and foreign keys, the
//! versioned migrations in `orchestrator/migrations/`, and the workspace lock (a lock file
//! holding pid and host, taken with `flock`).

use std::fs::{File, OpenOptions};
use std::io::{Read, Seek, Write};
use std::os::fd::AsRawFd;
use std::path::Path;
use std::str::FromStr;
use std::time::Duration;

use anyhow::{bail, Context, Result};
use chrono::{DateTime, SecondsFormat, Utc};
use sqlx::migrate::{Migration, MigrationType, Migrator};
use sqlx::sqlite::{
    SqliteConnectOptions, SqliteJournalMode, SqlitePool, SqlitePoolOptions, SqliteSynchronous,
};

/// The schema migrations, in order.
pub fn migrator() -> Migrator {
    let m = vec![
        Migration::new(
            1,
            "initial".into(),
            MigrationType::Simple,
            include_str!("../migrations/0001_initial.sql").into(),
            false,
        ),
        Migration::new(
            2,
            "report provenance".into(),
            MigrationType::Simple,
            include_str!("../migrations/0002_report_provenance.sql").into(),
            false,
        ),
        Migration::new(
            3,
            "point started trigger".into(),
            MigrationType::Simple,
            include_str!("../migrations/0003_point_started_trigger.sql").into(),
            false,
        ),
        Migration::new(
            4,
            "program hash unknown".into(),
            MigrationType::Simple,
            include_str!("../migrations/0004_program_hash_unknown.sql").into(),
            false,
        ),
    ];
    Migrator {
        migrations: m.into(),
        ..Migrator::DEFAULT
    }
}

/// Open (creating) the database file and apply migrations.
pub async fn open(db: &Path) -> Result<SqlitePool> {
    let url = format!("sqlite://{}", db.display());
    let opts = SqliteConnectOptions::from_str(&url)
        .with_context(|| format!("{}: bad database path", db.display()))?
        .create_if_missing(true)
        .journal_mode(SqliteJournalMode::Wal)
        .synchronous(SqliteSynchronous::Normal)
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
    Ok(pool)
}

/// An exclusive lock on a workspace, held while the value lives.
#[derive(Debug)]
pub struct WorkspaceLock {
    _file: File,
}

/// Take the workspace lock, or fail naming the holder's pid and host.
pub fn lock(ws: &Path) -> Result<WorkspaceLock> {
    let path = ws.join("lock");
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
        let mut holder = String::new();
        let _ = f.read_to_string(&mut holder);
        bail!(
            "workspace {} is in use by another rondo ({}); wait for it to finish or stop it with `rondo cancel`",
            ws.display(),
            holder.trim()
        );
    }
    let host = hostname();
    f.set_len(0)?;
    f.rewind()?;
    write!(f, "pid {} on host {}", std::process::id(), host)?;
    f.flush()?;
    Ok(WorkspaceLock { _file: f })
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
    Some(holder.trim().to_string())
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

    /// Run every statement in one transaction (rolled back if any fails).
    pub async fn commit(self, pool: &SqlitePool) -> Result<()> {
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
        let result = sqlx::query_with(&text, self.args).execute(&mut *conn).await;
        if let Err(e) = result {
            // The script stops at the failing statement with the transaction open.
            let _ = sqlx::query("ROLLBACK").execute(&mut *conn).await;
            return Err(e).context("store transaction");
        }
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
    /// The exact campaign file text.
    pub spec_text: String,
    /// BLAKE3 of the text.
    pub spec_blake3: String,
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
        "SELECT name, spec_path, spec_text, spec_blake3, created_at, rondo_version, workspace_id \
         FROM campaign WHERE id = 1",
    )
    .fetch_optional(pool)
    .await?;
    Ok(row.map(|r| CampaignRow {
        name: r.get("name"),
        spec_path: r.get("spec_path"),
        spec_text: r.get("spec_text"),
        spec_blake3: r.get("spec_blake3"),
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

/// Open an existing workspace's database (no migration of a missing file: a clear error).
pub async fn open_existing(ws: &Path) -> Result<SqlitePool> {
    let db = ws.join(DB_FILE);
    if !db.is_file() {
        bail!(
            "{}: no rondo workspace here (no {DB_FILE}); give --workspace or run the campaign first",
            ws.display()
        );
    }
    let pool = open(&db).await?;
    let ok: Option<i64> = sqlx::query_scalar("SELECT count(*) FROM campaign")
        .fetch_optional(&pool)
        .await
        .with_context(|| format!("{}: the workspace database is unreadable", db.display()))?;
    if ok.unwrap_or(0) != 1 {
        bail!(
            "{}: the workspace database holds no campaign (an interrupted first run?); run the campaign again",
            db.display()
        );
    }
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
        ok.commit(&pool).await?;
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
        assert!(bad.commit(&pool).await.is_err());
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
        assert!(short.commit(&pool).await.is_err());
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
