//! Built-in stages that run inside rondo instead of as a program: the mixer (`mix`, several
//! arrays as one vector) and the Legendre noise filter (`filter`), and `rondo builtin
//! mix|filter`, the argument list recorded and run for every built-in attempt (`command`);
//! and the linear blend of two files in the mixer's formats that starts a warm-started
//! point between two converged neighbours (`blend`).
//!
//! Every built-in is a [`Builtin`]: it holds its stage's settings, receives its input and
//! output files by role ([`StageFiles`]), and returns its metrics and any event
//! ([`MixReport`]). Its `run` is a plain synchronous function with no async and no shared
//! state, so it may be called on a blocking thread (`tokio::task::spawn_blocking`). The
//! built-ins know no store and no scheduler: they read and write files only.

use std::path::{Path, PathBuf};

use crate::validate::Metric;

mod blend;
mod command;
mod filter;
mod hdf5_blocks;
mod layout;
mod mix;

pub use blend::blend;
pub use command::{run_argv, BuiltinCommand, FilterArgs, MixArgs};
pub use filter::{filter, Filter};
pub use mix::{config, mix, mix_pairs, Mix, STATE_FILE};

/// The files of one run of a built-in, by role, each path as it is to be opened.
#[derive(Debug, Clone, Default, PartialEq)]
pub struct StageFiles {
    /// Input files (role, path), in the stage's order (for `mix`, the order of the vector).
    pub inputs: Vec<(String, PathBuf)>,
    /// Output files (role, path).
    pub outputs: Vec<(String, PathBuf)>,
}

impl StageFiles {
    /// The file of the input `role`, if given.
    pub fn input(&self, role: &str) -> Option<&Path> {
        self.inputs
            .iter()
            .find(|(r, _)| r == role)
            .map(|(_, p)| p.as_path())
    }
}

/// An in-process stage: its settings are its own, the files are given per run. `Send` and
/// `Sync`, so a boxed built-in moves onto a blocking thread.
pub trait Builtin: Send + Sync {
    /// The stage's name on the command line (`mix`, `filter`).
    fn name(&self) -> &'static str;

    /// Read the inputs, write the outputs, return the metrics. Errors are messages naming
    /// the file and what is wrong; synchronous, so callable inside `spawn_blocking`.
    fn run(&self, files: &StageFiles) -> Result<MixReport, String>;
}

/// What a built-in step reports.
#[derive(Debug, Clone)]
pub struct MixReport {
    /// Metrics: `residual_norm` (from the second step on; with several roles also
    /// `residual_norm_ROLE` per role), `history`, `resets`.
    pub metrics: Vec<Metric>,
    /// Out-of-the-ordinary event for the log (history reset, fallback).
    pub event: Option<String>,
}

/// A metric without an error bar.
fn metric(name: &str, value: f64) -> Metric {
    Metric {
        name: name.into(),
        value,
        error: None,
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::spec::{MixMethod, MixSettings};

    /// A built-in runs through the trait on a blocking thread: the first mixing step passes
    /// a JSON object through unchanged, writes the state it starts from and reports no
    /// residual.
    #[tokio::test]
    async fn a_boxed_builtin_runs_on_a_blocking_thread() -> Result<(), Box<dyn std::error::Error>> {
        let d = tempfile::tempdir()?;
        let p = |n: &str| d.path().join(n);
        std::fs::write(p("x.json"), "{\"x\": 0.25, \"label\": \"a\"}")?;
        let stage: Box<dyn Builtin> = Box::new(Mix {
            settings: MixSettings {
                method: MixMethod::Linear,
                alpha: 0.5,
                history: None,
                w0: None,
                restart_after_growth: None,
                weights: None,
                datasets: None,
            },
            state: None,
            state_out: p("state.json"),
        });
        let files = StageFiles {
            inputs: vec![("x".into(), p("x.json"))],
            outputs: vec![("x".into(), p("out.json"))],
        };
        let report = tokio::task::spawn_blocking(move || stage.run(&files)).await??;
        let out: serde_json::Value = serde_json::from_slice(&std::fs::read(p("out.json"))?)?;
        assert_eq!(out, serde_json::json!({"x": 0.25, "label": "a"}));
        let state: serde_json::Value = serde_json::from_slice(&std::fs::read(p("state.json"))?)?;
        assert_eq!(state["layout"][0]["role"], "x");
        // The first step has no residual: only the history (empty) and the reset count.
        let names: Vec<&str> = report.metrics.iter().map(|m| m.name.as_str()).collect();
        assert_eq!(names, ["history", "resets"]);
        Ok(())
    }
}
