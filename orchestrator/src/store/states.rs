//! The states of points, iterations and attempts: one enum each, with the one text each
//! state has in the store (the `state` columns), used by every query and every comparison.
//! A state read back from the store that is not one of these is an error naming the value
//! (a newer rondo's store, or a hand-edited one), never a silent default.
//!
//! Queries bind a state as a parameter (`WHERE state = ?` with `.bind(AttemptState::Succeeded)`;
//! an `IN` list binds each of [`AttemptState::OUTSTANDING`]) and compare decoded enums; no
//! state text is written out anywhere else in the sources (the test
//! `no_state_text_is_written_out_in_the_sources` scans for them).
//! The migrations' SQL keeps its texts (the `point_started` trigger's `'planned'` and
//! `'running'`, the partial index `attempts_one_success ... WHERE state = 'succeeded'`): DDL
//! cannot bind parameters, and the migrations are fixed once released. The test
//! `the_texts_match_the_schema` ties the schema's texts to these enums, and SQLite still plans
//! a bound `state = ?` with the partial index (it plans with the bound value; tested too).

use std::fmt;
use std::str::FromStr;

use sqlx::encode::IsNull;
use sqlx::sqlite::{Sqlite, SqliteArgumentValue, SqliteTypeInfo, SqliteValueRef};

/// Declares a state enum with its store text, `as_str`, `Display`, `FromStr`, `ALL`, and
/// the sqlx mapping to TEXT (so a state binds as `?` and decodes from a `state` column).
macro_rules! states {
    ($(#[$doc:meta])* $name:ident { $($(#[$vdoc:meta])* $variant:ident = $text:literal),+ $(,)? }) => {
        $(#[$doc])*
        #[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, PartialOrd, Ord)]
        pub enum $name {
            $($(#[$vdoc])* $variant),+
        }

        impl $name {
            /// Every state, in declaration order.
            pub const ALL: &'static [$name] = &[$($name::$variant),+];

            /// The text of this state in the store.
            pub const fn as_str(self) -> &'static str {
                match self {
                    $($name::$variant => $text),+
                }
            }
        }

        impl fmt::Display for $name {
            fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
                f.write_str(self.as_str())
            }
        }

        impl FromStr for $name {
            type Err = UnknownState;
            fn from_str(s: &str) -> Result<Self, Self::Err> {
                match s {
                    $($text => Ok($name::$variant),)+
                    other => Err(UnknownState {
                        kind: stringify!($name),
                        value: other.to_string(),
                    }),
                }
            }
        }

        impl sqlx::Type<Sqlite> for $name {
            fn type_info() -> SqliteTypeInfo {
                <&str as sqlx::Type<Sqlite>>::type_info()
            }
            fn compatible(ty: &SqliteTypeInfo) -> bool {
                <&str as sqlx::Type<Sqlite>>::compatible(ty)
            }
        }

        impl<'q> sqlx::Encode<'q, Sqlite> for $name {
            fn encode_by_ref(
                &self,
                buf: &mut Vec<SqliteArgumentValue<'q>>,
            ) -> Result<IsNull, sqlx::error::BoxDynError> {
                <&str as sqlx::Encode<'q, Sqlite>>::encode(self.as_str(), buf)
            }
        }

        impl<'r> sqlx::Decode<'r, Sqlite> for $name {
            fn decode(value: SqliteValueRef<'r>) -> Result<Self, sqlx::error::BoxDynError> {
                let s = <&str as sqlx::Decode<'r, Sqlite>>::decode(value)?;
                Ok(s.parse::<$name>()?)
            }
        }
    };
}

/// A state text the store holds that rondo does not know.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct UnknownState {
    /// Which kind of state (`AttemptState`, …).
    pub kind: &'static str,
    /// The text found.
    pub value: String,
}

impl fmt::Display for UnknownState {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        write!(
            f,
            "unknown {} `{}` in the store (written by a newer rondo, or edited by hand)",
            self.kind, self.value
        )
    }
}

impl std::error::Error for UnknownState {}

states! {
    /// Where a point stands.
    PointState {
        /// Recorded, nothing run yet.
        Planned = "planned",
        /// Its loop is going (an attempt was recorded).
        Running = "running",
        /// Its stopping rules held.
        Converged = "converged",
        /// It reached its iteration cap.
        Capped = "capped",
        /// A stage failed for good (or its program changed, or it diverged).
        Failed = "failed",
        /// Stopped by `rondo cancel`.
        Cancelled = "cancelled",
    }
}

impl PointState {
    /// Whether the point has stopped (no more iterations unless something changes).
    pub fn stopped(self) -> bool {
        !matches!(self, PointState::Planned | PointState::Running)
    }
}

states! {
    /// Where one iteration of a point stands.
    IterationState {
        /// Its stages are running.
        Running = "running",
        /// Every stage succeeded and its outputs passed validation.
        Good = "good",
        /// A stage failed for good.
        Failed = "failed",
        /// Stopped by `rondo cancel`.
        Cancelled = "cancelled",
    }
}

states! {
    /// Where one attempt stands.
    AttemptState {
        /// Recorded, not yet handed to an executor.
        Planned = "planned",
        /// Handed to a batch system, not known to run yet.
        Submitted = "submitted",
        /// Running.
        Running = "running",
        /// Ended well; its outputs are in the store.
        Succeeded = "succeeded",
        /// Ended badly (exit status, signal, time limit, bad output, …).
        Failed = "failed",
        /// Its end is unknown (the orchestrator died, the job vanished): run again.
        Lost = "lost",
        /// Ended by `rondo cancel` or a shutdown.
        Cancelled = "cancelled",
    }
}

impl AttemptState {
    /// The states of an attempt that may still be running somewhere.
    pub const OUTSTANDING: [AttemptState; 3] = [
        AttemptState::Planned,
        AttemptState::Submitted,
        AttemptState::Running,
    ];

    /// Whether the attempt has ended.
    pub fn ended(self) -> bool {
        !Self::OUTSTANDING.contains(&self)
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use std::path::{Path, PathBuf};

    #[test]
    fn every_state_reads_back_from_its_text_and_the_texts_are_distinct() {
        fn check<T: Copy + Eq + fmt::Debug + FromStr>(all: &[T], text: impl Fn(T) -> &'static str)
        where
            T::Err: fmt::Debug,
        {
            let mut seen = std::collections::BTreeSet::new();
            for &s in all {
                assert!(seen.insert(text(s)), "duplicate text {}", text(s));
                assert_eq!(text(s).parse::<T>().expect("parses"), s);
            }
        }
        check(PointState::ALL, PointState::as_str);
        check(IterationState::ALL, IterationState::as_str);
        check(AttemptState::ALL, AttemptState::as_str);
        let e = "done".parse::<AttemptState>().expect_err("unknown");
        assert_eq!(e.value, "done");
        assert!(e.to_string().contains("AttemptState `done`"));
    }

    /// The texts are the ones the schema's comments and the JSON output document.
    #[test]
    fn the_texts_match_the_schema() {
        let schema = include_str!("../../migrations/0001_initial.sql");
        let line = |col: &str| {
            schema
                .lines()
                .find(|l| l.contains(col))
                .unwrap_or_default()
                .to_string()
        };
        let points = line("-- planned | running | converged");
        for s in PointState::ALL {
            assert!(points.contains(s.as_str()), "{s} in {points}");
        }
        let its = line("-- running | good | failed");
        for s in IterationState::ALL {
            assert!(its.contains(s.as_str()), "{s} in {its}");
        }
        let atts = line("-- planned | submitted | running | succeeded");
        for s in AttemptState::ALL {
            assert!(atts.contains(s.as_str()), "{s} in {atts}");
        }
    }

    #[tokio::test]
    async fn states_bind_and_decode_through_sqlite() -> anyhow::Result<()> {
        let pool = sqlx::SqlitePool::connect("sqlite::memory:").await?;
        sqlx::query("CREATE TABLE t (state TEXT NOT NULL)")
            .execute(&pool)
            .await?;
        for s in AttemptState::ALL {
            sqlx::query("INSERT INTO t VALUES (?)")
                .bind(*s)
                .execute(&pool)
                .await?;
        }
        let n: i64 = sqlx::query_scalar("SELECT count(*) FROM t WHERE state = ?")
            .bind(AttemptState::Succeeded)
            .fetch_one(&pool)
            .await?;
        assert_eq!(n, 1);
        let back: Vec<AttemptState> = sqlx::query_scalar("SELECT state FROM t ORDER BY rowid")
            .fetch_all(&pool)
            .await?;
        assert_eq!(back, AttemptState::ALL);
        sqlx::query("INSERT INTO t VALUES ('done')")
            .execute(&pool)
            .await?;
        let err = sqlx::query_scalar::<_, AttemptState>("SELECT state FROM t WHERE state = 'done'")
            .fetch_one(&pool)
            .await
            .expect_err("unknown state");
        assert!(err.to_string().contains("done"), "{err}");
        Ok(())
    }

    /// With the state bound (`a.state = ?`), SQLite still finds the one succeeded attempt of a
    /// point, iteration and stage through the partial index `attempts_one_success` (whose
    /// `WHERE state = 'succeeded'` is written out in the migration): it plans with the bound
    /// value, so another state does not use that index.
    #[tokio::test]
    async fn a_bound_state_still_uses_the_partial_index() -> anyhow::Result<()> {
        let d = tempfile::tempdir()?;
        let pool = crate::store::open(&d.path().join("rondo.db")).await?;
        let plan = |state: AttemptState| {
            let pool = pool.clone();
            async move {
                let rows = sqlx::query(
                    "EXPLAIN QUERY PLAN SELECT o.artifact FROM attempts a \
                     JOIN attempt_outputs o ON o.attempt_id = a.id \
                     WHERE a.point = ? AND a.iteration = ? AND a.stage = ? AND a.state = ? \
                     AND o.role = ?",
                )
                .bind("p001")
                .bind(1_i64)
                .bind("s")
                .bind(state)
                .bind("out")
                .fetch_all(&pool)
                .await?;
                rows.iter()
                    .map(|r| sqlx::Row::try_get::<String, _>(r, "detail"))
                    .collect::<Result<Vec<String>, _>>()
            }
        };
        let succeeded = plan(AttemptState::Succeeded).await?;
        assert!(
            succeeded
                .iter()
                .any(|d| d.starts_with("SEARCH a ") && d.contains(" attempts_one_success ")),
            "{succeeded:?}"
        );
        let failed = plan(AttemptState::Failed).await?;
        assert!(
            !failed.iter().any(|d| d.contains("attempts_one_success")),
            "{failed:?}"
        );
        Ok(())
    }

    /// The state texts, each once.
    fn texts() -> Vec<&'static str> {
        let mut t: Vec<&'static str> = PointState::ALL.iter().map(|s| s.as_str()).collect();
        t.extend(IterationState::ALL.iter().map(|s| s.as_str()));
        t.extend(AttemptState::ALL.iter().map(|s| s.as_str()));
        t.sort_unstable();
        t.dedup();
        t
    }

    /// What is wrong with one line of code: a state text quoted as an SQL literal
    /// (`'succeeded'`: no Rust token has that form, so it sits in a string, in SQL), or a
    /// state text compared (`== "converged"`, `"failed" != x`) or matched (`"failed" =>`,
    /// `"converged" | "capped"`) as a Rust string. (Plain substring tests: the crate has no
    /// regex dependency, and these forms need none.)
    fn offences(line: &str) -> Vec<String> {
        let mut found = Vec::new();
        for t in texts() {
            if line.contains(&format!("'{t}'")) {
                found.push(format!("SQL literal '{t}'"));
            }
            let quoted = format!("\"{t}\"");
            for (i, _) in line.match_indices(&quoted) {
                let before = line[..i].trim_end();
                let after = line[i + quoted.len()..].trim_start();
                let compared = before.ends_with("==")
                    || before.ends_with("!=")
                    || after.starts_with("==")
                    || after.starts_with("!=");
                let matched = after.starts_with("=>") || after.starts_with('|');
                if compared || matched {
                    found.push(format!("string comparison with \"{t}\""));
                }
            }
        }
        found
    }

    #[test]
    fn the_scan_finds_state_texts_in_sql_and_comparisons_and_nothing_else() {
        for bad in [
            "\"SELECT id FROM attempts WHERE state = 'succeeded'\",",
            "         WHERE a.point = ? AND a.state IN ('planned', 'submitted') \\",
            "if s == \"converged\" {",
            "if \"failed\" != state {",
            "\"converged\" | \"capped\" => false,",
            "\"lost\" => true,",
        ] {
            assert!(!offences(bad).is_empty(), "not found in: {bad}");
        }
        for fine in [
            "\"SELECT id FROM attempts WHERE state = ?\",",
            ".bind(AttemptState::Succeeded)",
            "kind: \"lost\".into(),",
            "failed(\"lost\", reason.clone(), None, true, AttemptState::Lost)",
            "files.push((\"state\".into(), STATE_FILE.into()));",
            "fn f<'a>(x: &'a str) -> &'static str { x }",
        ] {
            assert!(
                offences(fine).is_empty(),
                "found in: {fine}: {:?}",
                offences(fine)
            );
        }
    }

    /// Every `.rs` file under `dir`, recursively.
    fn rust_files(dir: &Path, out: &mut Vec<PathBuf>) {
        let entries = std::fs::read_dir(dir)
            .unwrap_or_else(|e| panic!("{}: cannot list: {e}", dir.display()));
        for e in entries {
            let path = e
                .unwrap_or_else(|e| panic!("{}: cannot list: {e}", dir.display()))
                .path();
            if path.is_dir() {
                rust_files(&path, out);
            } else if path.extension().is_some_and(|x| x == "rs") {
                out.push(path);
            }
        }
    }

    /// No state text creeps back into the sources: every state goes through these enums.
    /// Test modules (`#[cfg(test)] mod ...` to the end of the file) may keep the texts: they
    /// check what the store holds. Comment lines are not code.
    #[test]
    fn no_state_text_is_written_out_in_the_sources() {
        let src = Path::new(env!("CARGO_MANIFEST_DIR")).join("src");
        let mut files = Vec::new();
        rust_files(&src, &mut files);
        files.sort();
        let mut scanned = Vec::new();
        let mut offenders = Vec::new();
        for path in files {
            let rel = path
                .strip_prefix(&src)
                .unwrap_or(&path)
                .to_string_lossy()
                .replace('\\', "/");
            // store/states.rs: this module, where the texts are defined.
            // spec.rs, spec/: the campaign file's modules, under another change at the moment.
            if rel == "store/states.rs" || rel.starts_with("spec") {
                continue;
            }
            let text = std::fs::read_to_string(&path)
                .unwrap_or_else(|e| panic!("{}: cannot read: {e}", path.display()));
            let lines: Vec<&str> = text.lines().collect();
            for (n, line) in lines.iter().enumerate() {
                let test_module = line.trim() == "#[cfg(test)]"
                    && lines
                        .get(n + 1)
                        .is_some_and(|l| l.trim_start().starts_with("mod "));
                if test_module {
                    break;
                }
                if line.trim_start().starts_with("//") {
                    continue;
                }
                for what in offences(line) {
                    offenders.push(format!("src/{rel}:{}: {what}: {}", n + 1, line.trim()));
                }
            }
            scanned.push(rel);
        }
        for must in [
            "engine/settle.rs",
            "store/attempts.rs",
            "cli/mod.rs",
            "query/target.rs",
            "export/report/data.rs",
            "store/mod.rs",
            "store/overview.rs",
            "store/reads/metrics.rs",
            "builtins/command.rs",
        ] {
            assert!(
                scanned.iter().any(|s| s == must),
                "{must} was not scanned: {scanned:?}"
            );
        }
        assert!(
            offenders.is_empty(),
            "state texts written out (bind the state enum instead, see store::states):\n{}",
            offenders.join("\n")
        );
    }
}
