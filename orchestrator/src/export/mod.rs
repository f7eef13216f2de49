//! What a workspace's records are turned into for use outside rondo: a recorded artifact
//! written out to a file ([`extract`]), the provenance as W3C PROV-JSON ([`prov`]), and the
//! campaign report folder with its figures, tables and page ([`report`]).
//!
//! Builds on the read models of [`crate::query`] and reads the store only through
//! [`crate::store::reads`] (no SQL here). Knows no engine, no scheduler and no command line.

pub mod extract;
pub mod prov;
pub mod report;
pub mod tables;
