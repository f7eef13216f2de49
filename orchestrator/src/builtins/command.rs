//! `rondo builtin mix|filter`: the built-in stages as a command on files named on the
//! command line (inputs and outputs by role, `ROLE=PATH`).
//!
//! The engine records this command for every built-in attempt, with rondo's absolute path
//! first and the paths of the attempt's scratch layout (`inputs/ROLE.ext`, the stage's output
//! file names, `inputs/state.json` → `mixer-state.json`, `metrics.json`), and runs the
//! attempt by parsing that very argument list, relative to the scratch folder. So the record
//! is what ran, and running it again in a folder laid out the same way writes the same bytes.
//! The built-ins are [`super::Mix`] and [`super::Filter`] (each a [`super::Builtin`]); this
//! module only maps an argument list onto them and writes the metrics file. Like the
//! built-ins it knows no store and no scheduler.

use std::collections::BTreeMap;
use std::path::{Path, PathBuf};

use clap::{Args, Parser, Subcommand};

use super::{Builtin, Filter, Mix, MixReport, StageFiles};
use crate::spec::{FilterSettings, MixMethod, MixSettings, StageKind};
use crate::validate::{Metric, METRICS_FILE};

/// A built-in stage run on files (`rondo builtin ...`).
#[derive(Subcommand, Debug, Clone, PartialEq)]
pub enum BuiltinCommand {
    /// One mixing step: the inputs (in their order) form one vector, mixed with the history
    /// of `--state` (none at the first step, where the inputs pass through unchanged), split
    /// back into one output per input role; writes the new history to `--state-out`.
    Mix(MixArgs),
    /// Legendre filter of a G(τ) (`--input gtau=PATH`, with `delta` and `levels` for Σ):
    /// writes any of the outputs gtau, giw, sigma, gl.
    Filter(FilterArgs),
}

/// Arguments of `rondo builtin mix` (the `settings:` of a `builtin: mix` stage, and files).
#[derive(Args, Debug, Clone, PartialEq)]
pub struct MixArgs {
    /// Mixing method: linear, anderson or broyden.
    #[arg(long, value_name = "METHOD", value_parser = parse_method)]
    pub method: MixMethod,
    /// Mixing parameter α in (0, 1].
    #[arg(long)]
    pub alpha: f64,
    /// Differences kept by anderson and broyden (default 8).
    #[arg(long, value_name = "N")]
    pub history: Option<usize>,
    /// Regularisation weight of anderson and broyden (default 0).
    #[arg(long)]
    pub w0: Option<f64>,
    /// Reset the history after this many growing residuals in a row (default 3; 0 never).
    #[arg(long, value_name = "N")]
    pub restart_after_growth: Option<usize>,
    /// Weight of an input role in the mixer's metric (repeatable; default 1).
    #[arg(long = "weight", value_name = "ROLE=W", value_parser = parse_weight)]
    pub weights: Vec<(String, f64)>,
    /// A float64 dataset of an HDF5 input to mix (repeatable, in order; the other contents
    /// of the file are copied unchanged).
    #[arg(long = "dataset", value_name = "ROLE=/PATH", value_parser = parse_dataset)]
    pub datasets: Vec<(String, String)>,
    /// A file to mix (repeatable; the order of the inputs is the order of the vector).
    #[arg(long = "input", value_name = "ROLE=PATH", value_parser = parse_file, required = true)]
    pub inputs: Vec<(String, PathBuf)>,
    /// The mixer state written by the previous step (omit at the first step).
    #[arg(long, value_name = "PATH")]
    pub state: Option<PathBuf>,
    /// Where the mixed file of an input role goes (one per input role).
    #[arg(long = "output", value_name = "ROLE=PATH", value_parser = parse_file, required = true)]
    pub outputs: Vec<(String, PathBuf)>,
    /// Where the new mixer state goes.
    #[arg(long, value_name = "PATH")]
    pub state_out: PathBuf,
    /// Also write the metrics as a JSON object to this file.
    #[arg(long, value_name = "PATH")]
    pub metrics: Option<PathBuf>,
}

/// Arguments of `rondo builtin filter` (the `settings:` of a `builtin: filter` stage, and
/// files).
#[derive(Args, Debug, Clone, PartialEq)]
pub struct FilterArgs {
    /// Legendre coefficients fitted (at least 1).
    #[arg(long, value_name = "N")]
    pub legendre: usize,
    /// Positive Matsubara frequencies of the giw and sigma outputs (at least 1).
    #[arg(long, value_name = "N")]
    pub matsubara: usize,
    /// An input: gtau (required), delta and levels (both needed for sigma).
    #[arg(long = "input", value_name = "ROLE=PATH", value_parser = parse_file, required = true)]
    pub inputs: Vec<(String, PathBuf)>,
    /// An output to write: gtau, giw, sigma or gl (repeatable).
    #[arg(long = "output", value_name = "ROLE=PATH", value_parser = parse_file, required = true)]
    pub outputs: Vec<(String, PathBuf)>,
    /// Also write the metrics as a JSON object to this file.
    #[arg(long, value_name = "PATH")]
    pub metrics: Option<PathBuf>,
}

/// An argument list as recorded, without rondo's path and `builtin`.
#[derive(Parser, Debug)]
#[command(name = "rondo builtin", no_binary_name = true)]
struct Recorded {
    #[command(subcommand)]
    call: BuiltinCommand,
}

fn parse_method(s: &str) -> Result<MixMethod, String> {
    match s {
        "linear" => Ok(MixMethod::Linear),
        "anderson" => Ok(MixMethod::Anderson),
        "broyden" => Ok(MixMethod::Broyden),
        other => Err(format!(
            "`{other}` is not a mixing method (linear, anderson, broyden)"
        )),
    }
}

fn method_name(m: MixMethod) -> &'static str {
    match m {
        MixMethod::Linear => "linear",
        MixMethod::Anderson => "anderson",
        MixMethod::Broyden => "broyden",
    }
}

/// `ROLE=VALUE`, split at the first `=`.
fn split_role(s: &str) -> Result<(String, &str), String> {
    match s.split_once('=') {
        Some((role, rest)) if !role.is_empty() && !rest.is_empty() => Ok((role.into(), rest)),
        _ => Err(format!("`{s}` is not ROLE=VALUE")),
    }
}

fn parse_dataset(s: &str) -> Result<(String, String), String> {
    split_role(s).map(|(r, d)| (r, d.to_string()))
}

fn parse_file(s: &str) -> Result<(String, PathBuf), String> {
    split_role(s).map(|(r, p)| (r, PathBuf::from(p)))
}

fn parse_weight(s: &str) -> Result<(String, f64), String> {
    let (role, w) = split_role(s)?;
    let w: f64 = w
        .parse()
        .map_err(|e| format!("weight `{w}` of `{role}`: {e}"))?;
    Ok((role, w))
}

fn unique(what: &str, roles: impl IntoIterator<Item = String>) -> Result<(), String> {
    let mut seen = std::collections::BTreeSet::new();
    for r in roles {
        if !seen.insert(r.clone()) {
            return Err(format!("{what} `{r}` is given twice"));
        }
    }
    Ok(())
}

impl BuiltinCommand {
    /// `mix` or `filter`.
    pub fn name(&self) -> &'static str {
        match self {
            BuiltinCommand::Mix(_) => "mix",
            BuiltinCommand::Filter(_) => "filter",
        }
    }

    /// The command of an attempt of a built-in stage, in the attempt's scratch layout:
    /// `inputs` are the placed inputs (role, path relative to the scratch folder) in the
    /// stage's order, the mixer's `state` among them when there is one; `outputs` are the
    /// stage's (role, file name). `None` for a stage that runs a program.
    pub fn for_stage<'a>(
        kind: &StageKind,
        inputs: impl IntoIterator<Item = (&'a str, &'a Path)>,
        outputs: &[(String, String)],
    ) -> Option<BuiltinCommand> {
        let mut files: Vec<(String, PathBuf)> = Vec::new();
        let mut state = None;
        for (role, path) in inputs {
            if role == "state" && matches!(kind, StageKind::Mix(_)) {
                state = Some(path.to_path_buf());
            } else {
                files.push((role.to_string(), path.to_path_buf()));
            }
        }
        let outs: Vec<(String, PathBuf)> = outputs
            .iter()
            .map(|(r, f)| (r.clone(), PathBuf::from(f)))
            .collect();
        let metrics = Some(PathBuf::from(METRICS_FILE));
        match kind {
            StageKind::Mix(with) => {
                // Every option that determines the step, defaults resolved.
                let c = super::config(with);
                Some(BuiltinCommand::Mix(MixArgs {
                    method: with.method,
                    alpha: c.alpha,
                    history: Some(c.history),
                    w0: Some(c.w0),
                    restart_after_growth: Some(c.restart_after_growth),
                    weights: with
                        .weights
                        .iter()
                        .flatten()
                        .map(|(r, w)| (r.clone(), *w))
                        .collect(),
                    datasets: with
                        .datasets
                        .iter()
                        .flatten()
                        .flat_map(|(r, ds)| ds.iter().map(move |d| (r.clone(), d.clone())))
                        .collect(),
                    inputs: files,
                    state,
                    outputs: outs,
                    state_out: PathBuf::from(super::STATE_FILE),
                    metrics,
                }))
            }
            StageKind::Filter(with) => Some(BuiltinCommand::Filter(FilterArgs {
                legendre: with.legendre,
                matsubara: with.matsubara,
                inputs: files,
                outputs: outs,
                metrics,
            })),
            StageKind::Command { .. } | StageKind::Shell { .. } | StageKind::Eos(_) => None,
        }
    }

    /// The full argument list: `program builtin NAME --option=value ...`.
    pub fn to_argv(&self, program: &Path) -> Vec<String> {
        let mut argv = vec![
            program.display().to_string(),
            "builtin".to_string(),
            self.name().to_string(),
        ];
        let file = |flag: &str, (role, path): &(String, PathBuf)| {
            format!("--{flag}={role}={}", path.display())
        };
        let path = |flag: &str, p: &Path| format!("--{flag}={}", p.display());
        match self {
            BuiltinCommand::Mix(a) => {
                argv.push(format!("--method={}", method_name(a.method)));
                argv.push(format!("--alpha={:?}", a.alpha));
                if let Some(h) = a.history {
                    argv.push(format!("--history={h}"));
                }
                if let Some(w0) = a.w0 {
                    argv.push(format!("--w0={w0:?}"));
                }
                if let Some(n) = a.restart_after_growth {
                    argv.push(format!("--restart-after-growth={n}"));
                }
                for (role, w) in &a.weights {
                    argv.push(format!("--weight={role}={w:?}"));
                }
                for (role, d) in &a.datasets {
                    argv.push(format!("--dataset={role}={d}"));
                }
                argv.extend(a.inputs.iter().map(|f| file("input", f)));
                if let Some(s) = &a.state {
                    argv.push(path("state", s));
                }
                argv.extend(a.outputs.iter().map(|f| file("output", f)));
                argv.push(path("state-out", &a.state_out));
                if let Some(m) = &a.metrics {
                    argv.push(path("metrics", m));
                }
            }
            BuiltinCommand::Filter(a) => {
                argv.push(format!("--legendre={}", a.legendre));
                argv.push(format!("--matsubara={}", a.matsubara));
                argv.extend(a.inputs.iter().map(|f| file("input", f)));
                argv.extend(a.outputs.iter().map(|f| file("output", f)));
                if let Some(m) = &a.metrics {
                    argv.push(path("metrics", m));
                }
            }
        }
        argv
    }

    /// Parse a full argument list as [`BuiltinCommand::to_argv`] writes it (the program in
    /// front is not looked at).
    pub fn from_argv(argv: &[String]) -> Result<BuiltinCommand, String> {
        match argv.get(1).map(String::as_str) {
            Some("builtin") => {}
            _ => return Err(format!("{argv:?} is not a `rondo builtin` command")),
        }
        Recorded::try_parse_from(&argv[2..])
            .map(|r| r.call)
            .map_err(|e| format!("{argv:?}: {}", e.to_string().trim_end()))
    }

    /// Run the built-in with every relative path taken from `base`: read the inputs, write
    /// the outputs (and the metrics file when asked). Errors name the file and what is
    /// wrong.
    pub fn run(&self, base: &Path) -> Result<MixReport, String> {
        let (stage, files, metrics) = self.stage(base)?;
        let report = stage.run(&files)?;
        if let Some(m) = metrics {
            write_metrics(&m, &report.metrics)?;
        }
        Ok(report)
    }

    /// The built-in this command runs, its files and the metrics file (if any), every
    /// relative path taken from `base`, after the checks of the arguments themselves (a
    /// role given twice, a weight for no input, sizes of at least 1).
    fn stage(&self, base: &Path) -> Result<Stage, String> {
        let at = |p: &Path| base.join(p);
        let resolved = |files: &[(String, PathBuf)]| -> Vec<(String, PathBuf)> {
            files.iter().map(|(r, p)| (r.clone(), at(p))).collect()
        };
        match self {
            BuiltinCommand::Mix(a) => {
                unique("input", a.inputs.iter().map(|(r, _)| r.clone()))?;
                unique("output", a.outputs.iter().map(|(r, _)| r.clone()))?;
                unique("weight of", a.weights.iter().map(|(r, _)| r.clone()))?;
                if let Some((r, _)) = a
                    .weights
                    .iter()
                    .find(|(r, _)| !a.inputs.iter().any(|(i, _)| i == r))
                {
                    return Err(format!("weight for `{r}`, which is not an input role"));
                }
                let mix = Mix {
                    settings: MixSettings {
                        method: a.method,
                        alpha: a.alpha,
                        history: a.history,
                        w0: a.w0,
                        restart_after_growth: a.restart_after_growth,
                        weights: (!a.weights.is_empty())
                            .then(|| a.weights.iter().cloned().collect::<BTreeMap<_, _>>()),
                        datasets: (!a.datasets.is_empty()).then(|| {
                            let mut m: BTreeMap<String, Vec<String>> = BTreeMap::new();
                            for (r, d) in &a.datasets {
                                m.entry(r.clone()).or_default().push(d.clone());
                            }
                            m
                        }),
                    },
                    state: a.state.as_deref().map(at),
                    state_out: at(&a.state_out),
                };
                let files = StageFiles {
                    inputs: resolved(&a.inputs),
                    outputs: resolved(&a.outputs),
                };
                Ok((Box::new(mix), files, a.metrics.as_deref().map(at)))
            }
            BuiltinCommand::Filter(a) => {
                if a.legendre == 0 || a.matsubara == 0 {
                    return Err("--legendre and --matsubara must be at least 1".into());
                }
                unique("input", a.inputs.iter().map(|(r, _)| r.clone()))?;
                unique("output", a.outputs.iter().map(|(r, _)| r.clone()))?;
                let filter = Filter {
                    settings: FilterSettings {
                        legendre: a.legendre,
                        matsubara: a.matsubara,
                    },
                };
                let files = StageFiles {
                    inputs: resolved(&a.inputs),
                    outputs: resolved(&a.outputs),
                };
                Ok((Box::new(filter), files, a.metrics.as_deref().map(at)))
            }
        }
    }
}

/// A built-in ready to run: the stage, its files, and where its metrics file goes.
type Stage = (Box<dyn Builtin>, StageFiles, Option<PathBuf>);

/// Run a recorded argument list in the folder `base` (the engine's way of running a
/// built-in attempt: exactly what it recorded).
pub fn run_argv(argv: &[String], base: &Path) -> Result<MixReport, String> {
    BuiltinCommand::from_argv(argv)?.run(base)
}

/// The metrics as `metrics.json` holds those of a program: one JSON object, name → value
/// (or `{"value": v, "error": e}`), every number written as the shortest text that reads
/// back to the same double.
fn write_metrics(path: &Path, metrics: &[Metric]) -> Result<(), String> {
    let mut obj = serde_json::Map::new();
    for m in metrics {
        let finite = m.value.is_finite() && m.error.is_none_or(f64::is_finite);
        if !finite {
            return Err(format!(
                "{}: the metric `{}` is not finite ({:?})",
                path.display(),
                m.name,
                m.value
            ));
        }
        let v = match m.error {
            None => serde_json::Value::from(m.value),
            Some(e) => serde_json::json!({ "value": m.value, "error": e }),
        };
        obj.insert(m.name.clone(), v);
    }
    let mut text = serde_json::to_string_pretty(&serde_json::Value::Object(obj))
        .map_err(|e| format!("cannot encode the metrics: {e}"))?;
    text.push('\n');
    rondo_numerics::npy::write_atomic(path, text.as_bytes())
        .map_err(|e| format!("{}: {e}", path.display()))
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::validate;

    fn strings(v: &[&str]) -> Vec<String> {
        v.iter().map(|s| s.to_string()).collect()
    }

    /// What the engine records for a mix stage parses back to the same call, with every
    /// number the same double, and names the scratch layout.
    #[test]
    fn a_mix_stage_argv_round_trips() -> Result<(), String> {
        let kind = StageKind::Mix(MixSettings {
            method: MixMethod::Broyden,
            alpha: 0.1 + 0.2,
            history: None,
            w0: Some(1e-3),
            restart_after_growth: Some(0),
            weights: Some(BTreeMap::from([("density".to_string(), 10.0 / 3.0)])),
            datasets: None,
        });
        let inputs = [
            ("sigma", Path::new("inputs/sigma.npy")),
            ("density", Path::new("inputs/density.json")),
            ("state", Path::new("inputs/state.json")),
        ];
        let outputs = vec![
            ("sigma".to_string(), "sigma.npy".to_string()),
            ("density".to_string(), "density.json".to_string()),
        ];
        let call = BuiltinCommand::for_stage(&kind, inputs, &outputs).ok_or("a built-in")?;
        let argv = call.to_argv(Path::new("/opt/rondo/bin/rondo"));
        assert_eq!(
            argv,
            strings(&[
                "/opt/rondo/bin/rondo",
                "builtin",
                "mix",
                "--method=broyden",
                "--alpha=0.30000000000000004",
                "--history=8",
                "--w0=0.001",
                "--restart-after-growth=0",
                "--weight=density=3.3333333333333335",
                "--input=sigma=inputs/sigma.npy",
                "--input=density=inputs/density.json",
                "--state=inputs/state.json",
                "--output=sigma=sigma.npy",
                "--output=density=density.json",
                "--state-out=mixer-state.json",
                "--metrics=metrics.json",
            ])
        );
        let back = BuiltinCommand::from_argv(&argv)?;
        assert_eq!(back, call);
        let BuiltinCommand::Mix(a) = &back else {
            return Err("not a mix".into());
        };
        assert_eq!(a.alpha.to_bits(), (0.1f64 + 0.2).to_bits());
        // The first iteration has no state, and the option is then absent.
        let first = BuiltinCommand::for_stage(&kind, inputs.into_iter().take(2), &outputs)
            .ok_or("a built-in")?;
        let argv = first.to_argv(Path::new("rondo"));
        assert!(!argv.iter().any(|a| a.starts_with("--state=")), "{argv:?}");
        assert_eq!(BuiltinCommand::from_argv(&argv)?, first);
        Ok(())
    }

    /// The filter's recorded argv parses back to the same call (the end-to-end rerun is
    /// `the_recorded_argv_of_a_builtin_attempt_reruns_it_bit_for_bit` in tests/e2e_core.rs).
    #[test]
    fn a_filter_stage_argv_round_trips() -> Result<(), String> {
        let kind = StageKind::Filter(FilterSettings {
            legendre: 40,
            matsubara: 512,
        });
        let inputs = [
            ("gtau", Path::new("inputs/gtau.npy")),
            ("delta", Path::new("inputs/delta.npy")),
            ("levels", Path::new("inputs/levels.json")),
        ];
        let outputs = vec![
            ("sigma".to_string(), "sigma.npy".to_string()),
            ("gl".to_string(), "gl.npy".to_string()),
        ];
        let call = BuiltinCommand::for_stage(&kind, inputs, &outputs).ok_or("a built-in")?;
        let argv = call.to_argv(Path::new("/r"));
        assert_eq!(
            argv,
            strings(&[
                "/r",
                "builtin",
                "filter",
                "--legendre=40",
                "--matsubara=512",
                "--input=gtau=inputs/gtau.npy",
                "--input=delta=inputs/delta.npy",
                "--input=levels=inputs/levels.json",
                "--output=sigma=sigma.npy",
                "--output=gl=gl.npy",
                "--metrics=metrics.json",
            ])
        );
        assert_eq!(BuiltinCommand::from_argv(&argv)?, call);
        Ok(())
    }

    /// Arguments a reader may get wrong are refused with a message naming them, and nothing
    /// is written.
    #[test]
    fn bad_arguments_are_refused_by_name() -> Result<(), Box<dyn std::error::Error>> {
        let d = tempfile::tempdir()?;
        let parse = |rest: &[&str]| {
            let mut argv = strings(&["rondo", "builtin"]);
            argv.extend(strings(rest));
            BuiltinCommand::from_argv(&argv)
        };
        let e = parse(&["mix", "--method=pulay", "--alpha=0.5"]);
        assert!(e.is_err_and(|m| m.contains("not a mixing method")));
        let e = parse(&["mix", "--method=linear", "--alpha=0.5", "--input=x"]);
        assert!(e.is_err_and(|m| m.contains("ROLE=VALUE")));
        assert!(BuiltinCommand::from_argv(&strings(&["rondo", "mix"]))
            .is_err_and(|m| m.contains("not a `rondo builtin` command")));
        let run = |rest: &[&str]| -> Result<MixReport, String> { parse(rest)?.run(d.path()) };
        std::fs::write(d.path().join("x.json"), "{\"x\": 1.0}")?;
        let e = run(&[
            "mix",
            "--method=linear",
            "--alpha=0.5",
            "--input=x=x.json",
            "--input=x=x.json",
            "--output=x=o.json",
            "--state-out=s.json",
        ]);
        assert!(e.is_err_and(|m| m.contains("input `x` is given twice")));
        let e = run(&[
            "mix",
            "--method=linear",
            "--alpha=0.5",
            "--weight=y=2",
            "--input=x=x.json",
            "--output=x=o.json",
            "--state-out=s.json",
        ]);
        assert!(e.is_err_and(|m| m.contains("weight for `y`")));
        let e = run(&[
            "filter",
            "--legendre=10",
            "--matsubara=8",
            "--input=gtau=g.npy",
            "--output=giw=giw.npy",
            "--output=chi=chi.npy",
        ]);
        assert!(e.is_err_and(|m| m.contains("no output `chi`")));
        let left: Vec<_> = std::fs::read_dir(d.path())?.flatten().collect();
        assert_eq!(left.len(), 1, "only x.json: {left:?}");
        Ok(())
    }

    /// The metrics file reads back (as a program's `metrics.json`) to the same doubles.
    #[test]
    fn the_metrics_file_reads_back_bit_for_bit() -> Result<(), Box<dyn std::error::Error>> {
        let d = tempfile::tempdir()?;
        let m = |name: &str, value: f64| Metric {
            name: name.into(),
            value,
            error: None,
        };
        let written = vec![
            m("history", 3.0),
            m("residual_norm", 0.1 + 0.2),
            m("tail_c1", 1.0 - 1e-17 - 2f64.powi(-52)),
        ];
        write_metrics(&d.path().join(METRICS_FILE), &written)?;
        let mut read =
            validate::read_metrics(d.path(), &Default::default(), false).map_err(|e| e.message)?;
        read.sort_by(|a, b| a.name.cmp(&b.name));
        assert_eq!(read.len(), 3);
        for (r, w) in read.iter().zip(&written) {
            assert_eq!((&r.name, r.value.to_bits()), (&w.name, w.value.to_bits()));
        }
        let e = write_metrics(&d.path().join("bad.json"), &[m("x", f64::NAN)]);
        assert!(e.is_err_and(|e| e.contains("not finite")));
        assert!(!d.path().join("bad.json").exists());
        Ok(())
    }
}
