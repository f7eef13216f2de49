//! The engine's one door to the store. Writes are composed as [`Script`]s (one transaction
//! each); records the engine holds back for a group commit (short successes, planned rows of
//! local children) wait here and go first into the next transaction; and reads are methods of
//! [`Flushed`], which only [`Ledger::flush`] returns, so the engine cannot read the store
//! while anything it has decided is still held back. This module knows no campaign rules.

use anyhow::Result;
use sqlx::SqlitePool;

use super::attempts::NewAttempt;
use super::Script;
use crate::failpoint::{self, Failpoint};

/// The store as the running engine sees it: the pool plus what is held back.
pub struct Ledger {
    pool: SqlitePool,
    /// Records of short successes not yet committed, and how many successes they hold.
    held: Script,
    held_successes: usize,
    /// Planned rows of started local attempts, not yet written.
    planned: Vec<NewAttempt>,
    /// Whether the script [`Ledger::begin`] handed out carries held-back records (its
    /// commit is then a group commit).
    carried: bool,
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
            carried: false,
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
        self.carried = !self.is_idle();
        let mut script = std::mem::take(&mut self.held);
        script.new_attempts(std::mem::take(&mut self.planned));
        (script, std::mem::take(&mut self.held_successes))
    }

    /// Hold a script back for a later group commit; `successes` is how many it records.
    pub fn hold(&mut self, script: Script, successes: usize) {
        self.carried = false;
        self.held = script;
        self.held_successes = successes;
    }

    /// Commit a script (which [`Ledger::begin`] started, so nothing held back is skipped);
    /// `at` names the write. One that carries held-back records is also a group commit.
    pub async fn commit(&mut self, script: Script, at: Failpoint) -> Result<()> {
        let group = std::mem::take(&mut self.carried);
        script.commit(&self.pool, at).await?;
        if group {
            failpoint::hit(Failpoint::GroupCommit);
        }
        Ok(())
    }

    /// Write everything down in one transaction: what is held back, then `build`'s
    /// statements; `at` names the write.
    pub async fn write(&mut self, at: Failpoint, build: impl FnOnce(&mut Script)) -> Result<()> {
        let (mut script, _) = self.begin();
        build(&mut script);
        self.commit(script, at).await
    }

    /// Commit what is held back (a group commit) and open the store for reading.
    pub async fn flush(&mut self) -> Result<Flushed<'_>> {
        if !self.is_idle() {
            let (script, _) = self.begin();
            self.carried = false;
            script.commit(&self.pool, Failpoint::GroupCommit).await?;
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
