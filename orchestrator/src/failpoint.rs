//! Failpoints: a name for every step of an attempt's life and for every write to the store,
//! and, in test builds only, a crash on purpose at one of them.
//!
//! Each step calls [`hit`] with its [`Failpoint`] right after the step is done (a store
//! write: after its transaction committed). Built with the cargo feature `failpoints` (off
//! by default; the crate's tests turn it on through a dev-dependency on the crate itself),
//! `RONDO_FAILPOINT=NAME:N` makes the process kill itself with SIGKILL — a real crash, no
//! destructor, no flush, no cleanup — on the `N`-th hit of `NAME`, after printing
//! `rondo: failpoint NAME hit N: crashing` to stderr, and `RONDO_FAILPOINT_LOG=FILE` logs
//! every hit. Without the feature, [`hit`] is an empty inline function: release builds read
//! no variable and carry no crash path.
//!
//! The list below is the one the table of docs/concepts.md ("Failpoints") must show; the
//! test `failpoint_walk::the_list_is_complete` compares them, and checks that every write
//! to the store in the source goes through a named failpoint.

macro_rules! failpoints {
    ($($variant:ident = $name:literal,)*) => {
        /// A named step (see the module documentation).
        #[derive(Clone, Copy, Debug, PartialEq, Eq, Hash)]
        pub enum Failpoint {
            $(#[doc = $name] $variant,)*
        }

        impl Failpoint {
            /// Every failpoint, in the order of an attempt's life.
            pub const ALL: &'static [Failpoint] = &[$(Failpoint::$variant,)*];

            /// The name `RONDO_FAILPOINT` and the docs use.
            pub fn name(self) -> &'static str {
                match self {
                    $(Failpoint::$variant => $name,)*
                }
            }
        }
    };
}

failpoints! {
    StoreMigrated = "store-migrated",
    CampaignCreated = "campaign-created",
    RevisionRecorded = "revision-recorded",
    PointsRestored = "points-restored",
    EventRecorded = "event-recorded",
    AttemptPlanned = "attempt-planned",
    BuiltinStarted = "builtin-started",
    HandoffStarted = "handoff-started",
    HandoffRecorded = "handoff-recorded",
    BatchPlanned = "batch-planned",
    TimeLimitLengthened = "time-limit-lengthened",
    ChildStarted = "child-started",
    JobSubmitted = "job-submitted",
    LaunchesRecorded = "launches-recorded",
    AttemptAdopted = "attempt-adopted",
    ChildEnded = "child-ended",
    OutputHashed = "output-hashed",
    FolderSnapshot = "folder-snapshot",
    OutputStored = "output-stored",
    SuccessRecorded = "success-recorded",
    GroupCommit = "group-commit",
    IterationClosed = "iteration-closed",
    AttemptFailed = "attempt-failed",
    PointStopped = "point-stopped",
    RetentionRecorded = "retention-recorded",
    RetentionRemoved = "retention-removed",
    HookFailed = "hook-failed",
    RunCancelled = "run-cancelled",
    AnalysisRecorded = "analysis-recorded",
    CampaignStageRecorded = "campaign-stage-recorded",
    ReportRecorded = "report-recorded",
    CancelRecorded = "cancel-recorded",
}

/// The environment variable that arms a failpoint: `NAME:N` (N ≥ 1).
pub const VARIABLE: &str = "RONDO_FAILPOINT";

/// The environment variable naming a file to which every hit of every failpoint appends
/// one line, `PID NAME` (test builds only): how a test learns how often a run passes each
/// step, to crash at its last hit too.
pub const LOG_VARIABLE: &str = "RONDO_FAILPOINT_LOG";

/// Parse an armed failpoint, `NAME:N`; the error says what is wrong and lists the names.
pub fn parse(text: &str) -> Result<(Failpoint, u64), String> {
    let names = || {
        Failpoint::ALL
            .iter()
            .map(|f| f.name())
            .collect::<Vec<_>>()
            .join(", ")
    };
    let Some((name, n)) = text.rsplit_once(':') else {
        return Err(format!(
            "{VARIABLE}={text}: expected NAME:N (the N-th hit of NAME crashes); names: {}",
            names()
        ));
    };
    let Some(fp) = Failpoint::ALL.iter().copied().find(|f| f.name() == name) else {
        return Err(format!(
            "{VARIABLE}={text}: `{name}` is not a failpoint; names: {}",
            names()
        ));
    };
    match n.parse::<u64>() {
        Ok(n) if n >= 1 => Ok((fp, n)),
        _ => Err(format!(
            "{VARIABLE}={text}: `{n}` is not a hit count (a whole number from 1)"
        )),
    }
}

#[cfg(feature = "failpoints")]
mod armed {
    use super::{parse, Failpoint, LOG_VARIABLE, VARIABLE};
    use std::io::Write as _;
    use std::sync::atomic::{AtomicU64, Ordering};
    use std::sync::OnceLock;

    static ARMED: OnceLock<Option<(Failpoint, u64)>> = OnceLock::new();
    static HITS: AtomicU64 = AtomicU64::new(0);
    static LOG: OnceLock<Option<std::path::PathBuf>> = OnceLock::new();

    /// Append `PID NAME` to the hit log, if one is named (one short write with O_APPEND, so
    /// lines of several processes do not interleave).
    fn log(fp: Failpoint) {
        let Some(path) = LOG.get_or_init(|| std::env::var_os(LOG_VARIABLE).map(Into::into)) else {
            return;
        };
        let line = format!("{} {}\n", std::process::id(), fp.name());
        let written = std::fs::OpenOptions::new()
            .create(true)
            .append(true)
            .open(path)
            .and_then(|mut f| f.write_all(line.as_bytes()));
        if let Err(e) = written {
            eprintln!("rondo: {LOG_VARIABLE}={}: {e}", path.display());
        }
    }

    /// The armed failpoint, read once; a bad value ends the process with the reason (exit 2).
    fn armed() -> Option<(Failpoint, u64)> {
        *ARMED.get_or_init(|| {
            let text = std::env::var(VARIABLE).ok()?;
            match parse(&text) {
                Ok(a) => Some(a),
                Err(e) => {
                    eprintln!("rondo: {e}");
                    std::process::exit(2);
                }
            }
        })
    }

    pub fn check() -> Result<(), String> {
        match std::env::var(VARIABLE) {
            Ok(text) => parse(&text).map(|_| ()),
            Err(_) => Ok(()),
        }
    }

    pub fn hit(fp: Failpoint) {
        log(fp);
        let Some((want, n)) = armed() else { return };
        if want != fp {
            return;
        }
        let k = HITS.fetch_add(1, Ordering::SeqCst) + 1;
        if k == n {
            eprintln!("rondo: failpoint {} hit {k}: crashing", fp.name());
            // SAFETY: signalling this process; nothing else is touched.
            unsafe {
                libc::kill(libc::getpid(), libc::SIGKILL);
            }
            // SIGKILL cannot be caught; should the call fail, still end without cleanup.
            std::process::abort();
        }
    }
}

/// This step is done: crash here if `RONDO_FAILPOINT` says so (test builds only).
#[cfg(feature = "failpoints")]
pub fn hit(fp: Failpoint) {
    armed::hit(fp);
}

/// This step is done (a build without the `failpoints` feature: nothing happens).
#[cfg(not(feature = "failpoints"))]
#[inline(always)]
pub fn hit(_fp: Failpoint) {}

/// At start: refuse a `RONDO_FAILPOINT` that names no failpoint (test builds only; other
/// builds ignore the variable).
pub fn check_environment() -> Result<(), String> {
    #[cfg(feature = "failpoints")]
    return armed::check();
    #[cfg(not(feature = "failpoints"))]
    Ok(())
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn names_are_unique_and_parse() {
        let mut seen = std::collections::HashSet::new();
        for f in Failpoint::ALL {
            assert!(seen.insert(f.name()), "{} twice", f.name());
            assert_eq!(parse(&format!("{}:3", f.name())), Ok((*f, 3)));
        }
    }

    #[test]
    fn bad_values_are_refused_with_the_names() {
        let e = parse("child-startd:1").unwrap_err();
        assert!(e.contains("`child-startd` is not a failpoint"), "{e}");
        assert!(e.contains("child-started"), "{e}");
        assert!(parse("child-started").unwrap_err().contains("NAME:N"));
        assert!(parse("child-started:0").unwrap_err().contains("hit count"));
        assert!(parse("child-started:x").unwrap_err().contains("hit count"));
    }
}
