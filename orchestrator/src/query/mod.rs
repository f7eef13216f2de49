//! The read models of a workspace: what a user points at ([`target`]), the records of
//! attempts and generations ([`records`], [`generations`]), the upstream lineage of a
//! target and its text view ([`lineage`], [`trace_text`]), the comparison of two points
//! ([`diff`], [`diff_text`]), and campaign results: final values, final-window averages
//! and equation-of-state fits with the attempts behind them ([`analysis`]).
//!
//! Every read goes through the typed functions of [`crate::store::reads`]; no SQL is
//! written here. This module knows no engine, no scheduler and no command line, and does
//! not import [`crate::export`] (the exports build on these models, not the other way).
//! The one write is [`analysis::record_eos`], the recording of an analysis result.

pub mod analysis;
pub mod diff;
pub mod diff_text;
pub mod format;
pub mod generations;
pub mod lineage;
pub mod plan;
pub mod records;
pub mod target;
pub mod trace_text;
pub mod usage;

pub use diff::{
    diff, InputDiff, MetricDivergence, PointDiff, PointSide, ProgramChange, ProgramDiff, StopDiff,
    ValueDiff, METRIC_RTOL,
};
pub use format::format_measurement;
pub use generations::{load_report, producing_reports, report_ids};
pub use lineage::{lineage, lineage_of, Depth, Lineage, DEFAULT_DEPTH};
pub use records::{
    campaign, load_attempt, stop_section, AttemptRecord, CampaignRef, MetricValue, ProgramRef,
    StartFile,
};
pub use target::{
    hash_file_with_progress, resolve, resolve_point, resolve_target, FinalTarget, MetricTarget,
    Target, MIN_PREFIX,
};
pub use trace_text::TextView;
