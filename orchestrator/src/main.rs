//! The `rondo` command-line entry point: a thin shell over [`rondo::cli::main`].

fn main() -> std::process::ExitCode {
    rondo::cli::main()
}
