//! The states of points, iterations and attempts: one enum each, with the one text each
//! state has in the store (the `state` columns), used by every query and every comparison.
//! A state read back from the store that is not one of these is an error naming the value
//! (a newer rondo's store, or a hand-edited one), never a silent default.

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
}
