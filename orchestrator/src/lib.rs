//! rondo: runs charge self-consistent DFT+DMFT campaigns unattended, resumes them after any
//! crash, and records the provenance of every number they produce.

/// The rondo version recorded with every attempt.
pub const RONDO_VERSION: &str = env!("CARGO_PKG_VERSION");

pub mod artifacts;
pub mod builtins;
pub mod cli;
pub mod engine;
pub mod environment;
pub mod export;
pub mod failpoint;
pub mod fsinfo;
pub mod hooks;
pub mod metrics;
pub mod progress;
pub mod query;
pub mod resident;
pub mod retention;
pub mod revision;
pub mod scratch;
pub mod spec;
pub mod stop;
pub mod store;
pub mod validate;
