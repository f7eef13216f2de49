//! Numerical kernels shared by rondo's built-in stages and the reference model engine.
//!
//! One place for every kernel (no copies elsewhere in the workspace): Matsubara sums,
//! lattice sums, Legendre transforms, mixing, equation-of-state fits, binning analysis,
//! a portable random generator, physical constants and `.npy` input/output.

pub mod binning;
pub mod eos;
pub mod lattice;
pub mod legendre;
pub mod matsubara;
pub mod mixing;
pub mod npy;
pub mod rng;
pub mod units;
