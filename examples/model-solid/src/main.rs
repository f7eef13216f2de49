//! `model-solid` command-line entry point (being written).
fn main() {}
