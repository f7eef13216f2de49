//! End-to-end tests of the Slurm executor on the real one-node Slurm (scripts/dev-slurm):
//! the demo campaign (reduced) run through `rondo run --executor slurm`.

#[test]
fn slurm_e2e_placeholder() {}
