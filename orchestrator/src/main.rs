//! The `rondo` command-line entry point: a thin shell over [`rondo::cli::main`]. Started
//! as `rondo __keep ...` by rondo itself, it is the keeper of one local attempt instead
//! (see `rondo_adapters::local::keeper`).

fn main() -> std::process::ExitCode {
    if let Some(code) = rondo_adapters::local::keeper::run_if_asked() {
        return code;
    }
    if let Err(e) = rondo::failpoint::check_environment() {
        eprintln!("rondo: {e}");
        return std::process::ExitCode::from(2);
    }
    rondo_adapters::local::use_this_binary();
    rondo::cli::main()
}
