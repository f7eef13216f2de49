//! The SQL of the read side: every query the read models (`crate::query`) and the exports
//! (`crate::export`) need, as typed functions returning plain rows. This is the only place
//! outside the rest of `store/` where SQL text is written; states are bound as the enums of
//! [`crate::store::states`], never written out.
//!
//! The read side records one kind of row itself: a generation (a report, an
//! equation-of-state analysis) and its outputs and sources, in the report provenance
//! tables ([`reports`]). Those writes live here too, so no SQL sits outside `store/`.
//!
//! This module knows the schema and nothing of campaign rules: it decides no convergence,
//! no lineage and no layout, and it imports nothing of the engine, the scheduler, `query`
//! or `export`.

pub mod artifacts;
pub mod attempts;
pub mod metrics;
pub mod points;
pub mod reports;
pub mod tables;
