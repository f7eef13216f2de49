//! Attempt rows: the planned row of a new attempt and its inputs, its launch, its end (a
//! success with its output artifacts and metrics, or a failure), and the engine's reads about
//! attempts: the next id, what an earlier orchestrator left outstanding, what each stage of a
//! point's last iteration tried, the program of each stage's last success, the artifact that
//! feeds an input, and how often a stage failed. Knows no campaign rules.

use std::collections::HashMap;

use anyhow::Result;
use sqlx::Row;

use super::{rows, AttemptState, Flushed, Script};

/// A new attempt's planned row. A local child is started before its row reaches the store;
/// the row goes into the store call that records the attempt's end (or the next tick, or a
/// stop), so a short attempt costs one store call instead of two. A crash in between leaves a
/// child with no row: the next run ends it by its environment tag before starting anything,
/// and the attempt number and id are simply used again.
#[derive(Debug, Clone)]
pub struct NewAttempt {
    pub id: i64,
    pub point: String,
    pub iteration: u32,
    pub stage: String,
    pub attempt: u32,
    pub argv_json: String,
    pub workdir: String,
    pub executor: &'static str,
    pub program_path: String,
    pub program_blake3: Option<String>,
    /// Why the program's hash is unknown (`program_blake3` is then NULL).
    pub program_unknown: Option<String>,
    pub program_version: Option<String>,
    pub parameters_json: String,
    pub seed: Option<String>,
    /// The campaign file's revision it runs under.
    pub revision: i64,
    pub created_at: String,
    pub host: Option<String>,
    /// The allow-listed environment passed to the attempt (`crate::environment`), JSON.
    pub env_json: Option<String>,
    /// (role, artifact hash) of every input placed.
    pub inputs: Vec<(String, String)>,
}

/// Start time, host and handle of an ended attempt that its final row records where the
/// launch row did not (`NULL` keeps what the row has).
#[derive(Debug, Clone, Default)]
pub struct LaunchFields {
    pub started: Option<String>,
    pub host: Option<String>,
    pub handle: Option<String>,
}

/// An output stored as an artifact: (role, hash, size, file name).
pub type StoredOutput = (String, String, u64, String);

/// A stored folder's members: (folder hash, [(relative path, content hash, size, mode)]).
pub type FolderMembers = (String, Vec<(String, String, u64, String)>);

/// How a failed attempt ended, as its row records it.
#[derive(Debug, Clone)]
pub struct Failure<'a> {
    pub state: AttemptState,
    pub kind: &'a str,
    pub message: &'a str,
    pub exit_status: Option<i32>,
    pub ended: String,
}

impl Script {
    /// Insert planned attempt rows and their inputs.
    pub fn new_attempts(&mut self, rows_: Vec<NewAttempt>) {
        if rows_.is_empty() {
            return;
        }
        self.stmt(&format!(
            "INSERT INTO attempts(id, point, iteration, stage, attempt, state, argv_json, workdir, \
             executor, program_path, program_blake3, program_unknown, program_version, \
             parameters_json, seed, rondo_version, created_at, host, env_json, revision) \
             VALUES {}",
            rows(rows_.len(), 20)
        ));
        let mut inputs: Vec<(i64, String, String)> = Vec::new();
        for r in rows_ {
            inputs.extend(r.inputs.into_iter().map(|(role, h)| (r.id, role, h)));
            self.bind(r.id)
                .bind(r.point)
                .bind(i64::from(r.iteration))
                .bind(r.stage)
                .bind(i64::from(r.attempt))
                .bind(AttemptState::Planned)
                .bind(r.argv_json)
                .bind(r.workdir)
                .bind(r.executor)
                .bind(r.program_path)
                .bind(r.program_blake3)
                .bind(r.program_unknown)
                .bind(r.program_version)
                .bind(r.parameters_json)
                .bind(r.seed)
                .bind(crate::RONDO_VERSION)
                .bind(r.created_at)
                .bind(r.host)
                .bind(r.env_json)
                .bind(r.revision);
        }
        if !inputs.is_empty() {
            self.stmt(&format!(
                "INSERT INTO attempt_inputs(attempt_id, role, artifact) VALUES {}",
                rows(inputs.len(), 3)
            ));
            for (id, role, h) in inputs {
                self.bind(id).bind(role).bind(h);
            }
        }
    }

    /// A local child's launch, written while it runs (its planned row is written already).
    pub fn attempt_running(&mut self, id: i64, handle: String, host: String, started_at: String) {
        self.stmt(
            "UPDATE attempts SET state = ?, handle_id = ?, host = ?, \
             started_at = coalesce(started_at, ?) WHERE id = ? AND state = ?",
        )
        .bind(AttemptState::Running)
        .bind(handle)
        .bind(host)
        .bind(started_at)
        .bind(id)
        .bind(AttemptState::Planned);
    }

    /// Attempt `id` is hand-off `number` to the resident process `pid`, which attempt
    /// `started_by` started at `started_at` (docs/resident.md).
    pub fn handoff(&mut self, id: i64, number: u64, pid: i32, started_by: i64, started_at: String) {
        self.stmt(
            "INSERT INTO handoffs (attempt_id, number, process_id, started_by, \
             process_started_at) VALUES (?, ?, ?, ?, ?)",
        )
        .bind(id)
        .bind(i64::try_from(number).unwrap_or(i64::MAX))
        .bind(pid)
        .bind(started_by)
        .bind(started_at);
    }

    /// A built-in attempt starts in this process.
    pub fn builtin_started(&mut self, id: i64, started_at: String, host: String) {
        self.stmt("UPDATE attempts SET state = ?, started_at = ?, host = ? WHERE id = ?")
            .bind(AttemptState::Running)
            .bind(started_at)
            .bind(host)
            .bind(id);
    }

    /// A batch job was submitted for a planned attempt.
    pub fn attempt_submitted(&mut self, id: i64, handle: String, host: String, at: String) {
        self.stmt(
            "UPDATE attempts SET state = ?, handle_id = ?, host = ?, \
             started_at = coalesce(started_at, ?) WHERE id = ? AND state = ?",
        )
        .bind(AttemptState::Submitted)
        .bind(handle)
        .bind(host)
        .bind(at)
        .bind(id)
        .bind(AttemptState::Planned);
    }

    /// A job an earlier orchestrator submitted was found by its tag: record its id.
    pub fn attempt_adopted(&mut self, id: i64, handle: String, host: String) {
        self.stmt("UPDATE attempts SET state = ?, handle_id = ?, host = ? WHERE id = ?")
            .bind(AttemptState::Submitted)
            .bind(handle)
            .bind(host)
            .bind(id);
    }

    /// An attempt's output artifacts (their rows are idempotent: the first name is kept).
    pub fn attempt_outputs(&mut self, id: i64, outs: &[StoredOutput], now: &str) {
        if outs.is_empty() {
            return;
        }
        self.stmt(&format!(
            "INSERT INTO artifacts(hash, size, original_name, created_at) VALUES {} \
             ON CONFLICT(hash) DO NOTHING",
            rows(outs.len(), 4)
        ));
        for (_, h, size, file) in outs {
            self.bind(h.clone())
                .bind(i64::try_from(*size).unwrap_or(i64::MAX))
                .bind(file.clone())
                .bind(now.to_string());
        }
        self.stmt(&format!(
            "INSERT INTO attempt_outputs(attempt_id, role, artifact) VALUES {}",
            rows(outs.len(), 3)
        ));
        for (role, h, _, _) in outs {
            self.bind(id).bind(role.clone()).bind(h.clone());
        }
    }

    /// The member files of folder artifacts (recorded by `attempt_outputs` in the same
    /// script): per folder, (relative path, content hash, size, mode). The same folder again
    /// adds nothing.
    pub fn folder_members(&mut self, folders: &[FolderMembers]) {
        for (folder, members) in folders {
            for chunk in members.chunks(1000) {
                self.stmt(&format!(
                    "INSERT INTO folder_members(folder, path, artifact, size, mode) VALUES {} \
                     ON CONFLICT(folder, path) DO NOTHING",
                    rows(chunk.len(), 5)
                ));
                for (path, hash, size, mode) in chunk {
                    self.bind(folder.clone())
                        .bind(path.clone())
                        .bind(hash.clone())
                        .bind(i64::try_from(*size).unwrap_or(i64::MAX))
                        .bind(mode.clone());
                }
            }
        }
    }

    /// An attempt's metrics: (full name `stage.metric`, value, error).
    pub fn attempt_metrics(&mut self, id: i64, metrics: &[(String, f64, Option<f64>)]) {
        for chunk in metrics.chunks(200) {
            self.stmt(&format!(
                "INSERT INTO metrics(attempt_id, name, value, error) VALUES {}",
                rows(chunk.len(), 4)
            ));
            for (name, value, error) in chunk {
                self.bind(id).bind(name.clone()).bind(*value).bind(*error);
            }
        }
    }

    /// An attempt succeeded.
    pub fn attempt_succeeded(&mut self, id: i64, ended: String, launch: LaunchFields) {
        self.stmt(
            "UPDATE attempts SET state = ?, exit_status = 0, ended_at = ?, \
             started_at = coalesce(?, started_at), host = coalesce(?, host), \
             handle_id = coalesce(?, handle_id) WHERE id = ?",
        )
        .bind(AttemptState::Succeeded)
        .bind(ended)
        .bind(launch.started)
        .bind(launch.host)
        .bind(launch.handle)
        .bind(id);
    }

    /// What an attempt's program cost, as its executor measured it (`source`: `wait4`,
    /// `job-script` or `sacct`), added to its point's and stage's totals. Written once per
    /// attempt: a second call for the same attempt changes nothing.
    pub fn attempt_usage(&mut self, id: i64, u: &rondo_adapters::executor::Usage, source: &str) {
        let rss = u.max_rss_kib.and_then(|k| i64::try_from(k).ok());
        let wall = u.wall_s.unwrap_or(0.0);
        self.stmt(
            "INSERT INTO usage_totals(point, stage, attempts, cpu_user_s, cpu_system_s, wall_s, \
             max_rss_kib) SELECT point, stage, 1, ?, ?, ?, ? FROM attempts \
             WHERE id = ? AND usage_source IS NULL \
             ON CONFLICT(point, stage) DO UPDATE SET attempts = attempts + 1, \
             cpu_user_s = cpu_user_s + excluded.cpu_user_s, \
             cpu_system_s = cpu_system_s + excluded.cpu_system_s, \
             wall_s = wall_s + excluded.wall_s, \
             max_rss_kib = max(coalesce(max_rss_kib, 0), coalesce(excluded.max_rss_kib, 0))",
        )
        .bind(u.user_s)
        .bind(u.system_s)
        .bind(wall)
        .bind(rss)
        .bind(id);
        self.stmt(
            "UPDATE attempts SET cpu_user_s = ?, cpu_system_s = ?, max_rss_kib = ?, \
             wall_s = ?, usage_source = ? WHERE id = ? AND usage_source IS NULL",
        )
        .bind(u.user_s)
        .bind(u.system_s)
        .bind(rss)
        .bind(u.wall_s)
        .bind(source.to_string())
        .bind(id);
    }

    /// An attempt failed, was lost or was cancelled.
    pub fn attempt_ended_badly(&mut self, id: i64, f: &Failure<'_>, launch: LaunchFields) {
        self.stmt(
            "UPDATE attempts SET state = ?, failure_kind = ?, failure_message = ?, \
             exit_status = ?, ended_at = ?, started_at = coalesce(?, started_at), \
             host = coalesce(?, host), handle_id = coalesce(?, handle_id) WHERE id = ?",
        )
        .bind(f.state)
        .bind(f.kind.to_string())
        .bind(f.message.to_string())
        .bind(f.exit_status)
        .bind(f.ended.clone())
        .bind(launch.started)
        .bind(launch.host)
        .bind(launch.handle)
        .bind(id);
    }
}

/// An attempt an earlier orchestrator left planned, submitted or running.
#[derive(Debug, Clone)]
pub struct Outstanding {
    pub id: i64,
    pub point: String,
    pub iteration: u32,
    pub stage: String,
    pub attempt: u32,
    pub executor: String,
    pub handle_id: Option<String>,
    pub host: Option<String>,
    pub workdir: String,
    pub program_path: Option<String>,
    pub program_blake3: Option<String>,
    pub program_version: Option<String>,
}

/// Attempts of each point's last iteration (see [`Flushed::last_iteration_attempts`]).
pub(crate) const LAST_ITERATION_ATTEMPTS: &str =
    "SELECT a.point, a.stage, max(a.attempt), max(a.state = ?) FROM points p \
     CROSS JOIN attempts a ON a.point = p.id \
     AND a.iteration = (SELECT max(iteration) FROM iterations WHERE point = p.id) \
     GROUP BY a.point, a.stage";

/// The last succeeded attempt of one stage at every point (see [`Flushed::last_programs`]).
pub(crate) const LAST_PROGRAMS: &str =
    "SELECT p.id, a.iteration, a.program_path, a.program_blake3, a.program_version \
     FROM points p CROSS JOIN attempts a ON a.id = (SELECT x.id FROM attempts x \
     WHERE x.point = p.id AND x.stage = ? AND x.state = ? ORDER BY x.iteration DESC LIMIT 1)";

/// The id the next attempt gets (the rowid's maximum: one look-up).
pub(crate) const NEXT_ATTEMPT_ID: &str = "SELECT coalesce(max(id), 0) + 1 FROM attempts";

/// Attempts left outstanding (through the index on the state).
pub(crate) fn outstanding_sql() -> String {
    format!(
        "SELECT id, point, iteration, stage, attempt, executor, handle_id, host, workdir, \
         program_path, program_blake3, program_version FROM attempts \
         WHERE state IN {} ORDER BY id",
        rows(1, AttemptState::OUTSTANDING.len())
    )
}

/// The program of a stage's last succeeded attempt at a point.
#[derive(Debug, Clone)]
pub struct LastProgram {
    pub iteration: u32,
    pub path: Option<String>,
    pub hash: Option<String>,
    pub version: Option<String>,
}

impl Flushed<'_> {
    /// The id the next attempt gets.
    pub async fn next_attempt_id(&self) -> Result<i64> {
        Ok(sqlx::query_scalar::<_, i64>(NEXT_ATTEMPT_ID)
            .fetch_one(self.pool)
            .await?)
    }

    /// Attempts left planned, submitted or running, oldest first.
    pub async fn outstanding_attempts(&self) -> Result<Vec<Outstanding>> {
        let sql = outstanding_sql();
        let mut query = sqlx::query(&sql);
        for s in AttemptState::OUTSTANDING {
            query = query.bind(s);
        }
        let rows = query.fetch_all(self.pool).await?;
        Ok(rows
            .into_iter()
            .map(|row| Outstanding {
                id: row.get("id"),
                point: row.get("point"),
                iteration: row.get::<i64, _>("iteration") as u32,
                stage: row.get("stage"),
                attempt: row.get::<i64, _>("attempt") as u32,
                executor: row.get("executor"),
                handle_id: row.get("handle_id"),
                host: row.get("host"),
                workdir: row.get("workdir"),
                program_path: row.get("program_path"),
                program_blake3: row.get("program_blake3"),
                program_version: row.get("program_version"),
            })
            .collect())
    }

    /// Per (point, stage) of each point's last iteration: the highest attempt number and
    /// whether one succeeded (index look-ups per point, whatever the length of the history).
    pub async fn last_iteration_attempts(&self) -> Result<HashMap<(String, String), (u32, bool)>> {
        let mut tried = HashMap::new();
        for (point, stage, max_attempt, succeeded) in
            sqlx::query_as::<_, (String, String, i64, bool)>(LAST_ITERATION_ATTEMPTS)
                .bind(AttemptState::Succeeded)
                .fetch_all(self.pool)
                .await?
        {
            tried.insert((point, stage), (max_attempt as u32, succeeded));
        }
        Ok(tried)
    }

    /// Per (point, stage) for the given stages: the program of the last succeeded attempt
    /// (one index look-up per point and stage, reading back from the last iteration).
    pub async fn last_programs(
        &self,
        stages: &[String],
    ) -> Result<HashMap<(String, String), LastProgram>> {
        type Row = (String, i64, Option<String>, Option<String>, Option<String>);
        let mut built = HashMap::new();
        for stage in stages {
            for (point, it, path, hash, version) in sqlx::query_as::<_, Row>(LAST_PROGRAMS)
                .bind(stage)
                .bind(AttemptState::Succeeded)
                .fetch_all(self.pool)
                .await?
            {
                built.insert(
                    (point, stage.clone()),
                    LastProgram {
                        iteration: it as u32,
                        path,
                        hash,
                        version,
                    },
                );
            }
        }
        Ok(built)
    }

    /// The artifact a stage's succeeded attempt produced in a role at a point's iteration.
    pub async fn output_artifact(
        &self,
        point: &str,
        iteration: u32,
        stage: &str,
        role: &str,
    ) -> Result<Option<String>> {
        Ok(sqlx::query_scalar(
            "SELECT o.artifact FROM attempts a JOIN attempt_outputs o ON o.attempt_id = a.id \
             WHERE a.point = ? AND a.iteration = ? AND a.stage = ? AND a.state = ? AND o.role = ?",
        )
        .bind(point)
        .bind(i64::from(iteration))
        .bind(stage)
        .bind(AttemptState::Succeeded)
        .bind(role)
        .fetch_optional(self.pool)
        .await?)
    }

    /// The file name an artifact was first stored under.
    pub async fn artifact_name(&self, hash: &str) -> Result<String> {
        Ok(
            sqlx::query_scalar::<_, String>("SELECT original_name FROM artifacts WHERE hash = ?")
                .bind(hash)
                .fetch_one(self.pool)
                .await?,
        )
    }

    /// How many attempts of a stage failed at a point's iteration.
    pub async fn failed_attempts(&self, point: &str, iteration: u32, stage: &str) -> Result<i64> {
        Ok(sqlx::query_scalar(
            "SELECT count(*) FROM attempts WHERE point = ? AND iteration = ? AND stage = ? \
             AND state = ?",
        )
        .bind(point)
        .bind(i64::from(iteration))
        .bind(stage)
        .bind(AttemptState::Failed)
        .fetch_one(self.pool)
        .await?)
    }

    /// How many attempts of this point, iteration and stage were ended by their time limit.
    pub async fn timed_out_attempts(
        &self,
        point: &str,
        iteration: u32,
        stage: &str,
    ) -> Result<i64> {
        Ok(sqlx::query_scalar(
            "SELECT count(*) FROM attempts WHERE point = ? AND iteration = ? AND stage = ? \
             AND state = ? AND failure_kind = 'timeout'",
        )
        .bind(point)
        .bind(i64::from(iteration))
        .bind(stage)
        .bind(AttemptState::Failed)
        .fetch_one(self.pool)
        .await?)
    }
}
