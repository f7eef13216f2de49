//! Shared helpers of the end-to-end tests: the real binaries, temporary campaigns, and
//! read-only looks into a workspace's SQLite store.
#![allow(dead_code)]

use std::path::{Path, PathBuf};
use std::process::{Command, Output};

/// The rondo binary built for these tests.
pub fn rondo() -> PathBuf {
    PathBuf::from(env!("CARGO_BIN_EXE_rondo"))
}

/// The reference model engine binary, built by the same `cargo test --workspace` run
/// (it sits beside rondo in the target directory).
pub fn model_solid() -> PathBuf {
    let p = rondo().with_file_name("model-solid");
    assert!(
        p.is_file(),
        "{} is missing: build the workspace first (cargo build --workspace)",
        p.display()
    );
    p
}

/// The repository root.
pub fn repo() -> PathBuf {
    PathBuf::from(env!("CARGO_MANIFEST_DIR"))
        .parent()
        .map(Path::to_path_buf)
        .unwrap_or_default()
}

/// A test fixture program.
pub fn fixture(name: &str) -> PathBuf {
    repo().join("tests").join("fixtures").join(name)
}

/// Run rondo with arguments in `dir`.
pub fn run_rondo(dir: &Path, args: &[&str]) -> Output {
    Command::new(rondo())
        .args(args)
        .current_dir(dir)
        .env("PATH", path_with_binaries())
        .output()
        .unwrap_or_else(|e| panic!("cannot run rondo: {e}"))
}

/// PATH with the target directory first, so `model-solid` resolves to the fresh build.
pub fn path_with_binaries() -> String {
    let bin = rondo().parent().map(Path::to_path_buf).unwrap_or_default();
    format!(
        "{}:{}",
        bin.display(),
        std::env::var("PATH").unwrap_or_default()
    )
}

/// Text of an output's stderr and stdout, for assertion messages.
pub fn shown(o: &Output) -> String {
    format!(
        "status {:?}\n--- stdout\n{}\n--- stderr\n{}",
        o.status.code(),
        String::from_utf8_lossy(&o.stdout),
        String::from_utf8_lossy(&o.stderr)
    )
}

/// `rondo status --json` of a workspace.
pub fn status_json(dir: &Path, ws: &Path) -> serde_json::Value {
    let ws = ws.display().to_string();
    let o = run_rondo(dir, &["status", "--workspace", &ws, "--json"]);
    assert!(o.status.success(), "{}", shown(&o));
    serde_json::from_slice(&o.stdout)
        .unwrap_or_else(|e| panic!("status --json: {e}\n{}", shown(&o)))
}

/// Run a query against a workspace's database (read only).
pub fn query<T, F>(ws: &Path, f: F) -> T
where
    F: for<'a> FnOnce(
        &'a sqlx::SqlitePool,
    ) -> std::pin::Pin<Box<dyn std::future::Future<Output = T> + 'a>>,
{
    let rt = tokio::runtime::Builder::new_current_thread()
        .enable_all()
        .build()
        .unwrap_or_else(|e| panic!("runtime: {e}"));
    rt.block_on(async {
        let pool = rondo::store::open(&ws.join("rondo.db"))
            .await
            .unwrap_or_else(|e| panic!("open store: {e:#}"));
        let out = f(&pool).await;
        pool.close().await;
        out
    })
}

/// Live processes whose environment tags them with this workspace id.
pub fn processes_of_workspace(ws_id: &str) -> Vec<i32> {
    let mut found = Vec::new();
    let Ok(entries) = std::fs::read_dir("/proc") else {
        return found;
    };
    let needle = format!("RONDO_WORKSPACE_ID={ws_id}");
    for e in entries.flatten() {
        let Some(pid) = e.file_name().to_str().and_then(|s| s.parse::<i32>().ok()) else {
            continue;
        };
        let Ok(env) = std::fs::read(e.path().join("environ")) else {
            continue;
        };
        if env.split(|b| *b == 0).any(|kv| kv == needle.as_bytes()) {
            found.push(pid);
        }
    }
    found
}
