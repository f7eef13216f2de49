//! The engine's one door to the store. Writes are composed as [`Script`]s (one transaction
//! each); records the engine holds back for a group commit (short successes, planned rows of
//! local children) wait here and go first into the next transaction; and reads are methods of
//! [`Flushed`], which only [`Ledger::flush`] returns, so the engine cannot read the store
//! while anything it has decided is still held back. This module knows no campaign rules.

use anyhow::Result;
use sqlx::SqlitePool;

use super::attempts::NewAttempt;
use super::Script;

/// The store as the running engine sees it: the pool plus what is held back.
pub struct Ledger {
    pool: SqlitePool,
    /// Records of short successes not yet committed, and how many successes they hold.
    held: Script,
    held_successes: usize,
    /// Planned rows of started local attempts, not yet written.
    planned: Vec<NewAttempt>,
}

/// A view of the store in which everything held back has been committed: the only way to
/// read. It borrows the ledger, so nothing can be held back while it is alive.
pub struct Flushed<'a> {
    pub(super) pool: &'a SqlitePool,
}

impl Ledger {
    /// A ledger over an open store.
    pub fn new(pool: SqlitePool) -> Ledger {
        Ledger {
            pool,
            held: Script::new(),
            held_successes: 0,
            planned: Vec::new(),
        }
    }

    /// Keep a local attempt's planned row for the next transaction (see
    /// [`NewAttempt`]: its child already runs).
    pub fn plan_later(&mut self, row: NewAttempt) {
        self.planned.push(row);
    }

    /// Whether nothing is held back.
    pub fn is_idle(&self) -> bool {
        self.held.is_empty() && self.planned.is_empty()
    }

    /// Start the script of a new transaction: the held-back successes (and how many), then
    /// the planned rows not yet written. The caller commits it or holds it again.
    pub fn begin(&mut self) -> (Script, usize) {
        let mut script = std::mem::take(&mut self.held);
        script.new_attempts(std::mem::take(&mut self.planned));
        (script, std::mem::take(&mut self.held_successes))
    }

    /// Hold a script back for a later group commit; `successes` is how many it records.
    pub fn hold(&mut self, script: Script, successes: usize) {
        self.held = script;
        self.held_successes = successes;
    }

    /// Commit a script (which [`Ledger::begin`] started, so nothing held back is skipped).
    pub async fn commit(&self, script: Script) -> Result<()> {
        script.commit(&self.pool).await
    }

    /// Write everything down in one transaction: what is held back, then `build`'s
    /// statements.
    pub async fn write(&mut self, build: impl FnOnce(&mut Script)) -> Result<()> {
        let (mut script, _) = self.begin();
        build(&mut script);
        script.commit(&self.pool).await
    }

    /// Commit what is held back and open the store for reading.
    pub async fn flush(&mut self) -> Result<Flushed<'_>> {
        if !self.is_idle() {
            let (script, _) = self.begin();
            script.commit(&self.pool).await?;
        }
        Ok(Flushed { pool: &self.pool })
    }

    /// Close the pool (at the end of a run; anything held back must be flushed first).
    pub async fn close(&self) {
        self.pool.close().await;
    }
}

impl Flushed<'_> {
    /// The pool, for read models outside the store that take one (the analysis at the end
    /// of a run).
    pub fn pool(&self) -> &SqlitePool {
        self.pool
    }
}
