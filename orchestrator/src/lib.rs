//! rondo: runs charge self-consistent DFT+DMFT campaigns unattended, resumes them after any
//! crash, and records the provenance of every number they produce.

pub mod artifacts;
pub mod builtins;
pub mod cli;
pub mod engine;
pub mod export;
pub mod fsinfo;
pub mod progress;
pub mod query;
pub mod scratch;
pub mod spec;
pub mod stop;
pub mod store;
pub mod validate;

// Temporary shims: the old paths of the read side, so that engine.rs and cli.rs (being
// restructured at the same time) compile unchanged. To be removed when those use
// `query` and `export` directly.
pub use export::{prov, report};
pub use query::analysis;

/// Temporary shim: the old `audit` path (the read models of [`query`] and `rondo extract`
/// of [`export::extract`]).
pub mod audit {
    pub use crate::export::extract::{extract, Extracted, Refused};
    pub use crate::query::*;
}
