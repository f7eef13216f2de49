//! The campaign file as written: the serde types that YAML is read into, strictly (unknown
//! keys are errors) and with the source location of every key a diagnostic may name.
//!
//! The JSON Schema of the file (`rondo schema`, `schemas/campaign.schema.json`) is derived
//! from these types and their doc comments, so a doc comment here is user-facing text.
//! Nothing here checks meaning; that is `validate`'s work. Types a checked campaign keeps as
//! they are (the built-in settings, `Combine`, `Compare`, `EosModelName`, `Scalar`) live here
//! too, because the schema derives from them.

use std::collections::BTreeMap;
use std::fmt;

use rondo_adapters::executor::Resources;
use schemars::JsonSchema;
use serde::de::{MapAccess, Visitor};
use serde::{Deserialize, Deserializer};
use serde_saphyr::Spanned;

/// A map that keeps the file's key order and each key's location.
#[derive(Debug, Clone)]
pub struct OrderedMap<V>(pub Vec<(Spanned<String>, V)>);

impl<V> Default for OrderedMap<V> {
    fn default() -> Self {
        OrderedMap(Vec::new())
    }
}

impl<V> OrderedMap<V> {
    /// Value for a key.
    pub fn get(&self, key: &str) -> Option<&V> {
        self.0.iter().find(|(k, _)| k.value == key).map(|(_, v)| v)
    }
    /// Keys in file order.
    pub fn keys(&self) -> impl Iterator<Item = &str> {
        self.0.iter().map(|(k, _)| k.value.as_str())
    }
    /// Entries in file order.
    pub fn iter(&self) -> impl Iterator<Item = (&str, &V)> {
        self.0.iter().map(|(k, v)| (k.value.as_str(), v))
    }
    /// Number of entries.
    pub fn len(&self) -> usize {
        self.0.len()
    }
    /// Whether empty.
    pub fn is_empty(&self) -> bool {
        self.0.is_empty()
    }
}

impl<'de, V: Deserialize<'de>> Deserialize<'de> for OrderedMap<V> {
    fn deserialize<D: Deserializer<'de>>(d: D) -> Result<Self, D::Error> {
        struct V2<V>(std::marker::PhantomData<V>);
        impl<'de, V: Deserialize<'de>> Visitor<'de> for V2<V> {
            type Value = OrderedMap<V>;
            fn expecting(&self, f: &mut fmt::Formatter) -> fmt::Result {
                f.write_str("a mapping")
            }
            fn visit_map<A: MapAccess<'de>>(self, mut m: A) -> Result<Self::Value, A::Error> {
                let mut out: Vec<(Spanned<String>, V)> = Vec::new();
                while let Some(k) = m.next_key::<Spanned<String>>()? {
                    if out.iter().any(|(o, _)| o.value == k.value) {
                        return Err(serde::de::Error::custom(format!(
                            "duplicate key `{}`",
                            k.value
                        )));
                    }
                    let v = m.next_value()?;
                    out.push((k, v));
                }
                Ok(OrderedMap(out))
            }
        }
        d.deserialize_map(V2(std::marker::PhantomData))
    }
}

impl<V: JsonSchema> JsonSchema for OrderedMap<V> {
    fn schema_name() -> std::borrow::Cow<'static, str> {
        format!("Map_of_{}", V::schema_name()).into()
    }
    fn json_schema(g: &mut schemars::SchemaGenerator) -> schemars::Schema {
        <BTreeMap<String, V>>::json_schema(g)
    }
    fn inline_schema() -> bool {
        true
    }
}

/// A parameter or sweep value.
#[derive(Debug, Clone, PartialEq, Deserialize, JsonSchema, serde::Serialize)]
#[serde(untagged)]
pub enum Scalar {
    /// true / false
    Bool(bool),
    /// An integer.
    Int(i64),
    /// A real number.
    Real(f64),
    /// Text.
    Text(String),
}

impl fmt::Display for Scalar {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        match self {
            Scalar::Bool(b) => write!(f, "{b}"),
            Scalar::Int(i) => write!(f, "{i}"),
            Scalar::Real(x) => write!(f, "{x:?}"),
            Scalar::Text(s) => f.write_str(s),
        }
    }
}

impl Scalar {
    /// As JSON.
    pub fn to_json(&self) -> serde_json::Value {
        serde_json::to_value(self).unwrap_or(serde_json::Value::Null)
    }
}

/// A program the stages run.
#[derive(Debug, Clone, Deserialize, JsonSchema)]
#[serde(deny_unknown_fields, rename_all = "kebab-case")]
pub struct Program {
    /// Absolute, relative to the campaign file (contains `/`), or a name looked up on PATH
    /// and then beside the rondo executable.
    #[schemars(with = "String")]
    pub path: Spanned<String>,
    /// Flag that makes the program print its version (recorded with every attempt).
    #[serde(default)]
    pub version_flag: Option<String>,
}

/// The sweep: every combination (`product`) or values taken together (`zip`).
#[derive(Debug, Clone, Deserialize, JsonSchema)]
#[serde(deny_unknown_fields, rename_all = "kebab-case")]
pub struct Sweep {
    /// Every combination; the first axis varies slowest.
    #[serde(default)]
    pub product: Option<OrderedMap<Vec<Scalar>>>,
    /// Equal-length lists taken together.
    #[serde(default)]
    pub zip: Option<OrderedMap<Vec<Scalar>>>,
}

/// Settings for every stage.
#[derive(Debug, Clone, Default, Deserialize, JsonSchema)]
#[serde(deny_unknown_fields, rename_all = "kebab-case")]
pub struct Defaults {
    /// Batch resources.
    #[serde(default)]
    pub resources: Option<Resources>,
    /// Wall-time limit, `[days-]hh:mm:ss`, `mm:ss` or minutes.
    #[serde(default)]
    pub time_limit: Option<String>,
    /// Extra attempts after a failure.
    #[serde(default)]
    pub retries: Option<u32>,
    /// A retry after a time-limit kill asks for this many times the limit (default 2).
    #[serde(default)]
    pub timeout_factor: Option<f64>,
}

/// Where a stage input comes from.
#[derive(Debug, Clone, Deserialize, JsonSchema)]
#[serde(untagged)]
pub enum InputSpec {
    /// `stage.output` of the same iteration, or `start.name`.
    Same(String),
    /// The previous iteration's output.
    Previous(PreviousInput),
    /// After-campaign stages only: outputs or final values of the points selected.
    Points(PointsInput),
}

/// An input of an `after-campaign:` stage that reads per-point results: which results
/// (`outputs: stage.role` or `finals: [stage.metric, ...]`) and of which points (`points:`).
#[derive(Debug, Clone, Deserialize, JsonSchema)]
#[serde(deny_unknown_fields, rename_all = "kebab-case")]
pub struct PointsInput {
    /// `stage.role`: that output of each selected point's last good iteration, laid out as
    /// one folder `inputs/ROLE/POINT.EXT`.
    #[serde(default)]
    #[schemars(with = "Option<String>")]
    pub outputs: Option<Spanned<String>>,
    /// `stage.metric` names: each selected point's final values, as one JSON file.
    #[serde(default)]
    #[schemars(with = "Option<Vec<String>>")]
    pub finals: Option<Vec<Spanned<String>>>,
    /// Which points: `all` (every point that converged or was capped), `converged`, or
    /// `group` (the points of the stage's group, with `group-by`).
    #[serde(default)]
    #[schemars(with = "Option<String>")]
    pub points: Option<Spanned<String>>,
}

/// `{ previous: stage.output, initially: start.name }`.
#[derive(Debug, Clone, Deserialize, JsonSchema)]
#[serde(deny_unknown_fields, rename_all = "kebab-case")]
pub struct PreviousInput {
    /// `stage.output` of the previous iteration.
    pub previous: String,
    /// `start.name` (or `STAGE.ROLE` of a `before:` stage) used at iteration 1.
    #[serde(default)]
    pub initially: Option<String>,
}

/// Mixing method of the built-in `mix` stage.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Deserialize, JsonSchema, serde::Serialize)]
#[serde(rename_all = "kebab-case")]
pub enum MixMethod {
    /// x ← x + α (F(x) − x).
    Linear,
    /// Anderson (Pulay) mixing.
    Anderson,
    /// Modified Broyden mixing.
    Broyden,
}

/// Settings of the built-in `mix` stage.
#[derive(Debug, Clone, Deserialize, JsonSchema, serde::Serialize)]
#[serde(deny_unknown_fields, rename_all = "kebab-case")]
pub struct MixSettings {
    /// Method.
    pub method: MixMethod,
    /// Mixing parameter α in (0, 1].
    pub alpha: f64,
    /// History length (Anderson, Broyden).
    #[serde(default)]
    pub history: Option<usize>,
    /// Broyden w0 weight.
    #[serde(default)]
    pub w0: Option<f64>,
    /// Restart the history after this many residual increases in a row.
    #[serde(default)]
    pub restart_after_growth: Option<usize>,
    /// Per-role weights (input role → positive number, default 1): the mixer works on the
    /// vector whose block of each role is multiplied by its weight, so the residual norm and
    /// the least-squares fits of Anderson and Broyden count that role's residual `weight`
    /// times; linear mixing is unaffected.
    #[serde(default)]
    pub weights: Option<BTreeMap<String, f64>>,
    /// HDF5 inputs: input role → absolute paths of the float64 datasets mixed (in this
    /// order); the output is a copy of the input file with those datasets replaced, every
    /// other group, dataset and attribute unchanged.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub datasets: Option<BTreeMap<String, Vec<String>>>,
}

/// A stage's `run`: an argument list, or one script string for a shell stage.
#[derive(Debug, Clone)]
pub enum RunSpec {
    /// `[program, args...]`: run without a shell, one argument per element.
    List(Vec<Spanned<String>>),
    /// `"script"`: run by `/bin/sh -c` (with `shell: true`).
    Script(String),
}

impl<'de> Deserialize<'de> for RunSpec {
    fn deserialize<D: Deserializer<'de>>(d: D) -> Result<Self, D::Error> {
        struct V;
        impl<'de> Visitor<'de> for V {
            type Value = RunSpec;
            fn expecting(&self, f: &mut fmt::Formatter) -> fmt::Result {
                f.write_str(
                    "an argument list [program, args...] or, with `shell: true`, one script string",
                )
            }
            fn visit_str<E: serde::de::Error>(self, v: &str) -> Result<RunSpec, E> {
                Ok(RunSpec::Script(v.to_string()))
            }
            fn visit_string<E: serde::de::Error>(self, v: String) -> Result<RunSpec, E> {
                Ok(RunSpec::Script(v))
            }
            fn visit_seq<A: serde::de::SeqAccess<'de>>(
                self,
                mut a: A,
            ) -> Result<RunSpec, A::Error> {
                let mut out = Vec::new();
                while let Some(x) = a.next_element::<Spanned<String>>()? {
                    out.push(x);
                }
                Ok(RunSpec::List(out))
            }
        }
        d.deserialize_any(V)
    }
}

/// The JSON Schema form of [`RunSpec`].
#[derive(JsonSchema)]
#[serde(untagged)]
#[allow(dead_code)]
enum RunSchema {
    /// `[program, args...]`: the first element names a program of `programs:` (or is a
    /// path); every element becomes one argument, never parsed by a shell.
    List(Vec<String>),
    /// With `shell: true`: one `/bin/sh -c` script; `{{program:NAME}}` stands for a
    /// program of `programs:` and every substituted value is single-quoted.
    Script(String),
}

/// One stage of the cycle.
#[derive(Debug, Clone, Deserialize, JsonSchema)]
#[serde(deny_unknown_fields, rename_all = "kebab-case")]
pub struct StageSpec {
    /// Command template: an argument list whose first element is a program name from
    /// `programs` (or a path), or, with `shell: true`, one script string.
    #[serde(default)]
    #[schemars(with = "Option<RunSchema>")]
    pub run: Option<Spanned<RunSpec>>,
    /// Built-in stage instead of `run`: `mix`.
    #[serde(default)]
    #[schemars(with = "Option<String>")]
    pub builtin: Option<Spanned<String>>,
    /// Run `run`, one script string, with `/bin/sh -c` (substituted values are
    /// single-quoted; programs are named `{{program:NAME}}`).
    #[serde(default)]
    pub shell: bool,
    /// Named inputs.
    #[serde(default)]
    pub inputs: OrderedMap<InputSpec>,
    /// Named outputs: role → file name the stage writes in its scratch directory, or
    /// `{ file: NAME.h5, hdf5: [/group/dataset, ...] }` for an HDF5 file that must hold
    /// those datasets, numeric and finite.
    #[serde(default)]
    pub outputs: OrderedMap<OutputSpec>,
    /// Metrics the stage must report: in `metrics.json`, unless `read-metrics` names them.
    #[serde(default)]
    pub metrics: Vec<String>,
    /// Metrics read from files the program writes: metric name → source, e.g.
    /// `{ file: scf.log, pattern: 'total energy += *(\S+) Ry', unit: Ry }`,
    /// `{ json: out.json, pointer: /scf/energy }`,
    /// `{ hdf5: impurity.h5, dataset: /impurity/n_f }`.
    #[serde(default)]
    pub read_metrics: OrderedMap<MetricSourceSpec>,
    /// Batch resources (over `defaults.resources`).
    #[serde(default)]
    pub resources: Option<Resources>,
    /// Wall-time limit.
    #[serde(default)]
    pub time_limit: Option<String>,
    /// Extra attempts after a failure.
    #[serde(default)]
    pub retries: Option<u32>,
    /// A retry after a time-limit kill asks for this many times the limit (default 2; 1
    /// keeps it).
    #[serde(default)]
    pub timeout_factor: Option<f64>,
    /// Accept NaN/Inf in outputs and metrics.
    #[serde(default)]
    pub allow_nonfinite: bool,
    /// Input roles the program rewrites in place: each gets a private writable copy (a
    /// copy-on-write clone where the file system can, else a copy). Every other input is a
    /// read-only hard link to the stored file.
    #[serde(default)]
    #[schemars(with = "Vec<String>")]
    pub writable_inputs: Vec<Spanned<String>>,
    /// Which iterations' content of an output role stays in the store (retention), per
    /// role: `{ last: N }`, `{ every: K }` or both. Roles not named keep every iteration.
    #[serde(default)]
    #[schemars(with = "BTreeMap<String, KeepSpec>")]
    pub keep: OrderedMap<Spanned<KeepSpec>>,
    /// Where a command or shell stage runs when the campaign runs on a batch system:
    /// `batch` (default: as a batch job of its own) or `host` (where rondo runs: the login
    /// node, or inside the allocation under `rondo submit`). Built-ins always run in rondo.
    #[serde(default)]
    #[schemars(with = "Option<Placement>")]
    pub placement: Option<Spanned<Placement>>,
    /// Whether the stage's program, run where rondo runs, keeps running when rondo is
    /// killed (default `true`): the next `rondo run` watches it again, or adopts its result
    /// when it ended meanwhile. `false`: it is ended as soon as rondo is gone, and run again.
    /// A stop of rondo by a signal or `rondo cancel` ends it either way.
    #[serde(default)]
    pub outlive_rondo: Option<bool>,
    /// A resident program: `run` starts it once and it stays alive across iterations,
    /// taking each attempt's work through hand-off files (docs/resident.md); `time-limit`
    /// applies to each hand-off.
    #[serde(default)]
    #[schemars(with = "Option<bool>")]
    pub resident: Option<Spanned<bool>>,
    /// Settings of a built-in stage.
    #[serde(default)]
    pub settings: Option<BuiltinSettings>,
    /// A working folder the stage keeps from one iteration to the next: laid out before
    /// every attempt from the stage's last good snapshot (iteration 1: `initially`, or
    /// empty), recorded after each success as the folder output `folder`.
    #[serde(default)]
    #[schemars(with = "Option<CaseFolderSpec>")]
    pub case_folder: Option<Spanned<CaseFolderSpec>>,
    /// Environment variables for the stage's program, name → value (for example
    /// `OMP_NUM_THREADS: 4`). Recorded with every attempt; names starting with `RONDO_` and
    /// names that mark a secret are refused.
    #[serde(default)]
    #[schemars(with = "BTreeMap<String, Scalar>")]
    pub env: OrderedMap<Spanned<Scalar>>,
    /// Programs of `programs:` that the stage's program (a wrapper script) runs in turn: their
    /// hashes and version texts are recorded with the stage's own, and a change of any of
    /// them between iterations stops the point like a change of the stage's program.
    #[serde(default)]
    #[schemars(with = "Vec<String>")]
    pub also_runs: Vec<Spanned<String>>,
    /// `after-campaign:` stages only: sweep axes whose values split the points into groups;
    /// the stage runs once per group (`{{group:AXIS}}` is the group's value), and an input
    /// with `points: group` reads that group's points.
    #[serde(default)]
    #[schemars(with = "Vec<String>")]
    pub group_by: Vec<Spanned<String>>,
}

/// `case-folder:` of a command or shell stage.
#[derive(Debug, Clone, Deserialize, JsonSchema)]
#[serde(deny_unknown_fields, rename_all = "kebab-case")]
pub struct CaseFolderSpec {
    /// The folder's name inside the scratch directory (default `case`).
    #[serde(default)]
    #[schemars(with = "Option<String>")]
    pub path: Option<Spanned<String>>,
    /// `start.NAME` of a start folder laid out at iteration 1 (default: an empty folder).
    #[serde(default)]
    #[schemars(with = "Option<String>")]
    pub initially: Option<Spanned<String>>,
}

/// A retention policy of one output role: the content of the last `last` good iterations,
/// and of every `every`-th, stays; the rest is removed from the store once it can no longer
/// be needed (the hash and the record stay). The latest good iteration and a converged
/// point's final window always stay.
#[derive(Debug, Clone, Copy, Deserialize, JsonSchema, serde::Serialize)]
#[serde(deny_unknown_fields)]
pub struct KeepSpec {
    /// Keep the last N good iterations (N ≥ 1).
    #[serde(default)]
    pub last: Option<u32>,
    /// Keep every K-th iteration (K ≥ 1), counted from iteration 1.
    #[serde(default)]
    pub every: Option<u32>,
}

/// A declared output: a file name, or an HDF5 file with the datasets it must hold.
#[derive(Debug, Clone, Deserialize, JsonSchema)]
#[serde(untagged)]
pub enum OutputSpec {
    /// The file name the stage writes in its scratch directory.
    File(String),
    /// An HDF5 file and the datasets it must hold.
    Hdf5(Hdf5Output),
}

impl OutputSpec {
    /// The file name.
    pub fn file(&self) -> &str {
        match self {
            OutputSpec::File(f) => f,
            OutputSpec::Hdf5(h) => &h.file,
        }
    }
}

/// `{ file: impurity.h5, hdf5: [/impurity/sigma] }`.
#[derive(Debug, Clone, Deserialize, JsonSchema)]
#[serde(deny_unknown_fields, rename_all = "kebab-case")]
pub struct Hdf5Output {
    /// The file name the stage writes in its scratch directory.
    pub file: String,
    /// Absolute paths of datasets the file must hold, each of a numeric type with every
    /// value finite (unless `allow-nonfinite`).
    pub hdf5: Vec<String>,
}

/// Where one metric of `read-metrics` comes from: exactly one of `file` (a text file, with
/// `pattern`), `stdout: true` (the program's standard output, with `pattern`), `json` (with
/// `pointer`) or `hdf5` (with `dataset`, or `attribute`).
#[derive(Debug, Clone, Deserialize, JsonSchema)]
#[serde(deny_unknown_fields, rename_all = "kebab-case")]
pub struct MetricSourceSpec {
    /// A text file: an output role of the stage or a file name in its scratch folder.
    #[serde(default)]
    #[schemars(with = "Option<String>")]
    pub file: Option<Spanned<String>>,
    /// The program's standard output (`stdout.txt` of the scratch folder).
    #[serde(default)]
    pub stdout: bool,
    /// For `file` and `stdout`: a regular expression with exactly one capture group, the
    /// number (Rust `regex` syntax; `(?m)` makes `^`/`$` match at line ends).
    #[serde(default)]
    #[schemars(with = "Option<String>")]
    pub pattern: Option<Spanned<String>>,
    /// For `file` and `stdout`: take the `first` or the `last` match (default: the last,
    /// since programs print the converged value last).
    #[serde(default, rename = "match")]
    #[schemars(with = "Option<MatchWhich>")]
    pub match_: Option<Spanned<MatchWhich>>,
    /// The energy unit the file writes the number in, converted to eV: `Ry`, `Ha` (or
    /// `hartree`), `eV`. Absent: stored as written.
    #[serde(default)]
    #[schemars(with = "Option<String>")]
    pub unit: Option<Spanned<String>>,
    /// A JSON file: an output role of the stage or a file name in its scratch folder.
    #[serde(default)]
    #[schemars(with = "Option<String>")]
    pub json: Option<Spanned<String>>,
    /// For `json`: a JSON pointer (RFC 6901), e.g. `/scf/energy` or `/bands/0` (`""`: the
    /// whole document).
    #[serde(default)]
    #[schemars(with = "Option<String>")]
    pub pointer: Option<Spanned<String>>,
    /// An HDF5 file: an output role of the stage or a file name in its scratch folder.
    #[serde(default)]
    #[schemars(with = "Option<String>")]
    pub hdf5: Option<Spanned<String>>,
    /// For `hdf5`: the absolute path of a numeric dataset holding one element, or of any
    /// numeric dataset with `index`.
    #[serde(default)]
    #[schemars(with = "Option<String>")]
    pub dataset: Option<Spanned<String>>,
    /// For `dataset`: the index of the element, one number per dimension.
    #[serde(default)]
    pub index: Option<Vec<usize>>,
    /// For `hdf5`: a scalar numeric attribute, `OBJECT@NAME`: the absolute path of the
    /// group or dataset carrying it, `@`, the attribute's name (`/@version` for the root
    /// group, `/impurity@mu`, `/impurity/sigma@beta`).
    #[serde(default)]
    #[schemars(with = "Option<String>")]
    pub attribute: Option<Spanned<String>>,
}

/// Which match of a pattern a metric takes.
#[derive(Debug, Clone, Copy, Default, PartialEq, Eq, Deserialize, JsonSchema)]
#[serde(rename_all = "lowercase")]
pub enum MatchWhich {
    /// The first match in the file.
    First,
    /// The last match in the file.
    #[default]
    Last,
}

/// Where a stage runs under a batch executor.
#[derive(Debug, Clone, Copy, Default, PartialEq, Eq, Deserialize, JsonSchema, serde::Serialize)]
#[serde(rename_all = "lowercase")]
pub enum Placement {
    /// A batch job of its own (the default: nothing runs on a login node unasked).
    #[default]
    Batch,
    /// Where rondo runs, as a local child process.
    Host,
}

/// Settings of a built-in stage: `mix` or `filter`.
#[derive(Debug, Clone, Deserialize, JsonSchema, serde::Serialize)]
#[serde(untagged)]
pub enum BuiltinSettings {
    /// Settings of `mix`.
    Mix(MixSettings),
    /// Settings of `filter`.
    Filter(FilterSettings),
    /// Settings of `eos` (an `after-campaign:` stage; read by the checker, never written).
    #[serde(skip_serializing)]
    Eos(EosSpec),
}

/// Settings of the built-in `filter` stage (Legendre noise filter of a G(τ)).
#[derive(Debug, Clone, Deserialize, JsonSchema, serde::Serialize)]
#[serde(deny_unknown_fields, rename_all = "kebab-case")]
pub struct FilterSettings {
    /// Legendre coefficients fitted (fewer are kept when the input has error bars and the
    /// higher ones drown in noise).
    pub legendre: usize,
    /// Positive Matsubara frequencies of the G(iω_n) and Σ(iω_n) outputs.
    pub matsubara: usize,
}

/// How stop rules combine.
#[derive(Debug, Clone, Copy, Default, PartialEq, Eq, Deserialize, JsonSchema)]
#[serde(rename_all = "kebab-case")]
pub enum Combine {
    /// Every rule must hold.
    #[default]
    All,
    /// One rule suffices.
    Any,
}

/// A stopping rule on one metric.
#[derive(Debug, Clone, Deserialize, JsonSchema)]
#[serde(deny_unknown_fields, rename_all = "kebab-case")]
pub struct RuleSpec {
    /// `stage.metric`.
    #[schemars(with = "String")]
    pub metric: Spanned<String>,
    /// |x_n − x_{n−1}| < tolerance.
    #[serde(default)]
    pub change_below: Option<f64>,
    /// |x_n − x_{n−1}| < tolerance · |x_n|.
    #[serde(default)]
    pub relative_change_below: Option<f64>,
    /// |x_n − x_{n−1}| ≤ k · sqrt(e_n² + e_{n−1}²) with the reported errors.
    #[serde(default)]
    pub within_errors: Option<f64>,
    /// Number of consecutive iterations the condition must hold.
    #[serde(default = "one", rename = "for")]
    pub for_: u32,
    /// `successive` (default): each of the last `for` changes x_j − x_{j−1} passes the test.
    /// `window`: every pair of the last `for` + 1 values passes it, so a slow drift that
    /// stays below the noise from one iteration to the next but accumulates over the window
    /// is not taken for convergence.
    #[serde(default)]
    pub compare: Compare,
    /// Fail the point as diverging when |x_n − x_{n−1}| exceeds this (from iteration 3 on).
    #[serde(default)]
    pub diverge_above: Option<f64>,
}

fn one() -> u32 {
    1
}

/// Which values a stopping rule compares.
#[derive(Debug, Clone, Copy, Default, PartialEq, Eq, Deserialize, JsonSchema)]
#[serde(rename_all = "kebab-case")]
pub enum Compare {
    /// Each value with the one before it.
    #[default]
    Successive,
    /// Every pair of values of the window of the last `for` + 1 iterations.
    Window,
}

/// Stopping rules.
#[derive(Debug, Clone, Deserialize, JsonSchema)]
#[serde(deny_unknown_fields, rename_all = "kebab-case")]
pub struct StopSpec {
    /// Rules on metrics.
    #[serde(default)]
    pub when: Vec<RuleSpec>,
    /// `all` (default) or `any`.
    #[serde(default)]
    pub combine: Combine,
    /// Iteration cap: a point that reaches it without converging is `capped`.
    #[schemars(with = "u32")]
    pub max_iterations: Spanned<u32>,
    /// After the rules are met, run this many more iterations and report the metrics
    /// averaged over them, with binning error bars (0: stop at once).
    #[serde(default)]
    pub final_window: u32,
}

/// Equation-of-state model names.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Deserialize, JsonSchema, serde::Serialize)]
#[serde(rename_all = "kebab-case")]
pub enum EosModelName {
    /// Third-order Birch–Murnaghan.
    BirchMurnaghan,
    /// Vinet.
    Vinet,
}

/// The equation-of-state analysis of a campaign.
#[derive(Debug, Clone, Deserialize, JsonSchema)]
#[serde(deny_unknown_fields, rename_all = "kebab-case")]
pub struct EosSpec {
    /// The energy per site, `stage.metric` (eV).
    #[schemars(with = "String")]
    pub energy: Spanned<String>,
    /// The sweep axis holding the volume per site (Å³); default `volume`.
    #[serde(default)]
    pub volume: Option<String>,
    /// Models to fit; default both.
    #[serde(default)]
    pub models: Option<Vec<EosModelName>>,
}

/// Campaign-level analyses, run when every point has stopped.
#[derive(Debug, Clone, Default, Deserialize, JsonSchema)]
#[serde(deny_unknown_fields, rename_all = "kebab-case")]
pub struct AnalysisSpec {
    /// Energy versus volume, fitted per group of the other sweep axes.
    #[serde(default)]
    pub eos: Option<EosSpec>,
}

/// The campaign file as written.
#[derive(Debug, Clone, Deserialize, JsonSchema)]
#[serde(deny_unknown_fields, rename_all = "kebab-case")]
pub struct CampaignFile {
    /// Name: letters, digits, `-`, `_`.
    #[schemars(with = "String")]
    pub campaign: Spanned<String>,
    /// Free text.
    #[serde(default)]
    pub about: Option<String>,
    /// Programs the stages run.
    #[serde(default)]
    pub programs: OrderedMap<Program>,
    /// Parameters: scalars.
    #[serde(default)]
    pub parameters: OrderedMap<Scalar>,
    /// Sweep; absent: one point.
    #[serde(default)]
    #[schemars(with = "Option<Sweep>")]
    pub sweep: Option<Spanned<Sweep>>,
    /// Initial files (relative to the campaign file).
    #[serde(default)]
    pub start: OrderedMap<String>,
    /// Defaults for every stage.
    #[serde(default)]
    pub defaults: Defaults,
    /// Base seed for `{{seed}}`.
    #[serde(default)]
    pub seed: Option<u64>,
    /// Stages run once per point before its first iteration (iteration 1's first stages).
    #[serde(default)]
    pub before: OrderedMap<StageSpec>,
    /// The stages of one iteration.
    pub cycle: OrderedMap<StageSpec>,
    /// Stages run once per point after it converged or was capped, on its last good
    /// iteration's outputs.
    #[serde(default)]
    pub after_point: OrderedMap<StageSpec>,
    /// Stages run once per campaign (or per group, `group-by`) after every point stopped,
    /// over the selected points' outputs or final values; `builtin: eos` is shipped.
    #[serde(default)]
    pub after_campaign: OrderedMap<StageSpec>,
    /// Stopping rules.
    pub stop: StopSpec,
    /// Campaign-level analyses.
    #[serde(default)]
    pub analysis: AnalysisSpec,
    /// Parameters that follow the loop: name → schedule (usable as `{{param:NAME}}`).
    #[serde(default)]
    pub schedules: OrderedMap<ScheduleSpec>,
    /// Programs run when something happens (a point fails or converges, the campaign is
    /// done, the disk runs low); each gets a JSON description of the event on stdin.
    #[serde(default)]
    pub hooks: HooksSpec,
    /// What the campaign may cost; `rondo plan` warns when its estimate could exceed it.
    #[serde(default)]
    pub budget: Option<BudgetSpec>,
    /// Where points added by a revision start: from the nearest converged point along the
    /// named sweep axes (equal on every other axis) instead of the start files.
    #[serde(default)]
    pub warm_start: Option<WarmStartSpec>,
}

/// `warm-start: { along: [volume] }`: a point added to a workspace by a revision takes,
/// for every `previous:` input of its first iteration, the last good iteration's outputs of
/// converged points along these axes (among the points equal to it on every other sweep
/// axis): interpolated between the two that enclose it (`estimate: linear`, the default),
/// or the nearest one's; without any it starts from the start files.
#[derive(Debug, Clone, Deserialize, JsonSchema)]
#[serde(deny_unknown_fields, rename_all = "kebab-case")]
pub struct WarmStartSpec {
    /// Sweep axes along which distance is measured (numeric values).
    #[schemars(with = "Vec<String>")]
    pub along: Spanned<Vec<Spanned<String>>>,
    /// How the start is made from the converged points (default `linear`).
    #[serde(default)]
    pub estimate: WarmEstimate,
}

/// How a warm-started point's first inputs are made.
#[derive(Debug, Clone, Copy, Default, PartialEq, Eq, Deserialize, JsonSchema, serde::Serialize)]
#[serde(rename_all = "kebab-case")]
pub enum WarmEstimate {
    /// Between two converged points along one axis (equal on every other axis), each input
    /// rondo reads as numbers (the formats of the built-in `mix`) is their linear
    /// interpolation at the point's value; every other input, and a point outside the
    /// converged range, takes the nearest converged point's output.
    #[default]
    Linear,
    /// Every input is the nearest converged point's output.
    Nearest,
}

/// A hook's command: `[program, args...]`, run without a shell and without placeholders
/// (the event is on stdin as JSON and in `RONDO_HOOK_*` environment variables).
pub type HookCommand = Option<Spanned<Vec<Spanned<String>>>>;

/// Programs run on events. A hook that fails, hangs past `time-limit` or is missing is
/// logged (event `hook-failed`) and never stops the campaign.
#[derive(Debug, Clone, Default, Deserialize, JsonSchema)]
#[serde(deny_unknown_fields, rename_all = "kebab-case")]
pub struct HooksSpec {
    /// Run when a point fails (retries used up, diverging, program changed).
    #[serde(default)]
    #[schemars(with = "Option<Vec<String>>")]
    pub point_failed: HookCommand,
    /// Run when a point converges; the event carries its final values.
    #[serde(default)]
    #[schemars(with = "Option<Vec<String>>")]
    pub point_converged: HookCommand,
    /// Run when a point reaches max-iterations without converging.
    #[serde(default)]
    #[schemars(with = "Option<Vec<String>>")]
    pub point_capped: HookCommand,
    /// Run when a run ends with every point stopped.
    #[serde(default)]
    #[schemars(with = "Option<Vec<String>>")]
    pub campaign_done: HookCommand,
    /// Run once each time the workspace's file system falls below `disk-free-below`
    /// (checked every 30 seconds while a run goes on).
    #[serde(default)]
    #[schemars(with = "Option<Vec<String>>")]
    pub disk_low: HookCommand,
    /// Longest a hook may run, `[days-]hh:mm:ss`, `mm:ss` or minutes (default `0:30`).
    #[serde(default)]
    #[schemars(with = "Option<String>")]
    pub time_limit: Option<Spanned<String>>,
    /// Free space under which `disk-low` fires: a percentage of the file system (`5%`) or a
    /// size (`10GiB`, `500MB`). Default: below 10 GiB or below 5 %, whichever comes first.
    #[serde(default)]
    #[schemars(with = "Option<String>")]
    pub disk_free_below: Option<Spanned<String>>,
}

/// A budget for the whole campaign.
#[derive(Debug, Clone, Deserialize, JsonSchema)]
#[serde(deny_unknown_fields, rename_all = "kebab-case")]
pub struct BudgetSpec {
    /// Core-hours (wall time × CPUs of every attempt): a number, or text ending in
    /// `core-hours` (`5000 core-hours`).
    #[schemars(with = "Scalar")]
    pub core_hours: Spanned<Scalar>,
}

/// A parameter driven by the loop: `start × factor^k`, capped at `max`, where k counts the
/// earlier iterations of the point at which the change of `metric` was within
/// `within-errors` combined standard errors (or below `change-below`). Typical use: double
/// the Monte Carlo sweeps once the iteration-to-iteration change is lost in the noise.
#[derive(Debug, Clone, Deserialize, JsonSchema)]
#[serde(deny_unknown_fields, rename_all = "kebab-case")]
pub struct ScheduleSpec {
    /// Value at iteration 1.
    pub start: Scalar,
    /// Factor applied each time the condition held.
    pub factor: f64,
    /// Largest value.
    pub max: Scalar,
    /// `stage.metric` watched.
    #[schemars(with = "String")]
    pub metric: Spanned<String>,
    /// Condition: |Δ| ≤ k · combined standard error.
    #[serde(default)]
    pub within_errors: Option<f64>,
    /// Condition: |Δ| below this.
    #[serde(default)]
    pub change_below: Option<f64>,
}
