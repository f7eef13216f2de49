//! Reference model engine: a charge self-consistent DMFT of an invented model f-electron
//! solid (periodic Anderson model on a simple cubic lattice), split into stages.
//!
//! Modules: `model` (invented parameters and 2×2 algebra), `io` (file formats), `band`,
//! `project`, `solve` (solver dispatch + Hubbard-I), `update` (μ search, occupations, energy).
//! The command-line entry points live in `src/main.rs` (the `model-solid` binary).

pub mod band;
pub mod ctqmc;
pub mod io;
pub mod model;
pub mod project;
pub mod solve;
pub mod update;
