//! Command templates and executors for rondo.
//!
//! The engine in `orchestrator` talks to executors only through the [`executor::Executor`]
//! trait defined here; nothing in the engine knows which batch system (if any) runs a stage.

pub mod executor;
pub mod local;
pub mod pbs;
pub mod slurm;
pub mod template;
