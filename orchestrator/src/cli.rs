//! Command-line interface (being written).

/// Entry point.
pub fn main() -> std::process::ExitCode {
    std::process::ExitCode::from(1)
}
