//! The campaign file: typed structs parsed from YAML (strict, with source locations) and the
//! validation pass that turns a file into a checked [`Campaign`] or a list of
//! `file:line:col: what; hint` diagnostics.

use std::collections::{BTreeMap, BTreeSet};
use std::fmt;
use std::path::{Path, PathBuf};
use std::time::Duration;

use rondo_adapters::executor::Resources;
use rondo_adapters::template::{Template, BARE_NAMES};
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
}

/// Where a stage input comes from.
#[derive(Debug, Clone, Deserialize, JsonSchema)]
#[serde(untagged)]
pub enum InputSpec {
    /// `stage.output` of the same iteration, or `start.name`.
    Same(String),
    /// The previous iteration's output.
    Previous(PreviousInput),
}

/// `{ previous: stage.output, initially: start.name }`.
#[derive(Debug, Clone, Deserialize, JsonSchema)]
#[serde(deny_unknown_fields, rename_all = "kebab-case")]
pub struct PreviousInput {
    /// `stage.output` of the previous iteration.
    pub previous: String,
    /// `start.name` used at iteration 1.
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
    /// Named outputs: role → file name the stage writes in its scratch directory.
    #[serde(default)]
    pub outputs: OrderedMap<String>,
    /// Metrics the stage must report in `metrics.json`.
    #[serde(default)]
    pub metrics: Vec<String>,
    /// Batch resources (over `defaults.resources`).
    #[serde(default)]
    pub resources: Option<Resources>,
    /// Wall-time limit.
    #[serde(default)]
    pub time_limit: Option<String>,
    /// Extra attempts after a failure.
    #[serde(default)]
    pub retries: Option<u32>,
    /// Accept NaN/Inf in outputs and metrics.
    #[serde(default)]
    pub allow_nonfinite: bool,
    /// Settings of a built-in stage.
    #[serde(default)]
    pub settings: Option<BuiltinSettings>,
}

/// Settings of a built-in stage: `mix` or `filter`.
#[derive(Debug, Clone, Deserialize, JsonSchema, serde::Serialize)]
#[serde(untagged)]
pub enum BuiltinSettings {
    /// Settings of `mix`.
    Mix(MixSettings),
    /// Settings of `filter`.
    Filter(FilterSettings),
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

/// A checked equation-of-state analysis.
#[derive(Debug, Clone)]
pub struct EosAnalysis {
    /// `stage.metric` of the energy.
    pub energy: String,
    /// Volume axis.
    pub volume: String,
    /// Models.
    pub models: Vec<EosModelName>,
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
    /// The stages of one iteration.
    pub cycle: OrderedMap<StageSpec>,
    /// Stopping rules.
    pub stop: StopSpec,
    /// Campaign-level analyses.
    #[serde(default)]
    pub analysis: AnalysisSpec,
    /// Parameters that follow the loop: name → schedule (usable as `{{param:NAME}}`).
    #[serde(default)]
    pub schedules: OrderedMap<ScheduleSpec>,
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

/// A checked schedule.
#[derive(Debug, Clone)]
pub struct Schedule {
    /// Parameter name.
    pub name: String,
    /// Start value.
    pub start: f64,
    /// Growth factor.
    pub factor: f64,
    /// Cap.
    pub max: f64,
    /// Integer-valued (start and max are integers).
    pub integer: bool,
    /// Watched metric.
    pub metric: String,
    /// Condition.
    pub test: RuleTest,
}

/// One problem found in a campaign file.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct Diagnostic {
    /// 1-based line (0 if unknown).
    pub line: u64,
    /// 1-based column (0 if unknown).
    pub column: u64,
    /// What is wrong.
    pub message: String,
    /// What to do.
    pub hint: String,
}

/// All problems of a campaign file.
#[derive(Debug, Clone)]
pub struct SpecErrors {
    /// The file.
    pub file: PathBuf,
    /// Problems, in file order.
    pub diagnostics: Vec<Diagnostic>,
}

impl fmt::Display for SpecErrors {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        for d in &self.diagnostics {
            writeln!(
                f,
                "{}:{}:{}: {}; hint: {}",
                self.file.display(),
                d.line,
                d.column,
                d.message,
                d.hint
            )?;
        }
        Ok(())
    }
}

impl std::error::Error for SpecErrors {}

/// Where an input comes from, resolved.
#[derive(Debug, Clone, PartialEq, Eq)]
pub enum Source {
    /// Output `role` of stage `stage` in the same iteration.
    Same { stage: String, role: String },
    /// A start file.
    Start(String),
    /// Output of the previous iteration, with the start file used at iteration 1 (if any).
    Previous {
        stage: String,
        role: String,
        initially: Option<String>,
    },
}

/// A checked stage.
#[derive(Debug, Clone)]
pub struct Stage {
    /// Name.
    pub name: String,
    /// What runs.
    pub kind: StageKind,
    /// Inputs in file order: role → source.
    pub inputs: Vec<(String, Source)>,
    /// Outputs in file order: role → file name.
    pub outputs: Vec<(String, String)>,
    /// Metrics that must appear in metrics.json (listed plus those stop rules use).
    pub required_metrics: BTreeSet<String>,
    /// Merged resources.
    pub resources: Resources,
    /// Time limit.
    pub time_limit: Option<Duration>,
    /// Extra attempts after failure.
    pub retries: u32,
    /// Accept NaN/Inf.
    pub allow_nonfinite: bool,
}

/// What a stage runs.
#[derive(Debug, Clone)]
pub enum StageKind {
    /// A program through a command template.
    Command {
        /// Parsed template of the whole `run` list (first element: program name/path).
        template: Template,
        /// Program key (name in `programs`, or the literal first element).
        program: String,
    },
    /// A `/bin/sh -c` script (`shell: true`).
    Shell {
        /// Parsed template of the script (one argument).
        template: Template,
        /// The programs of `programs:` the script names as `{{program:NAME}}`, sorted: what
        /// the stage's recorded program hash covers.
        programs: Vec<String>,
    },
    /// Built-in mixing.
    Mix(MixSettings),
    /// Built-in Legendre filter of a G(τ).
    Filter(FilterSettings),
}

impl StageKind {
    /// Whether the stage runs inside rondo.
    pub fn is_builtin(&self) -> bool {
        !matches!(self, StageKind::Command { .. } | StageKind::Shell { .. })
    }
}

/// A program resolved to a file.
#[derive(Debug, Clone)]
pub struct ResolvedProgram {
    /// Absolute path.
    pub path: PathBuf,
    /// Version flag.
    pub version_flag: Option<String>,
}

/// A stopping rule, checked.
#[derive(Debug, Clone)]
pub struct Rule {
    /// `stage.metric`.
    pub metric: String,
    /// The condition.
    pub test: RuleTest,
    /// Consecutive iterations.
    pub for_: u32,
    /// Successive changes or all pairs of the window.
    pub compare: Compare,
    /// Divergence threshold on the change.
    pub diverge_above: Option<f64>,
}

/// A stopping condition.
#[derive(Debug, Clone, Copy)]
pub enum RuleTest {
    /// Absolute change below.
    Abs(f64),
    /// Relative change below.
    Rel(f64),
    /// Within k combined standard errors.
    Errors(f64),
}

/// One point of the sweep.
#[derive(Debug, Clone)]
pub struct PointSpec {
    /// `p001`, ...
    pub id: String,
    /// 1-based index.
    pub index: usize,
    /// Axis → value, in axis order.
    pub values: Vec<(String, Scalar)>,
}

/// A validated campaign.
#[derive(Debug, Clone)]
pub struct Campaign {
    /// File it came from.
    pub file: PathBuf,
    /// Exact text.
    pub text: String,
    /// Name.
    pub name: String,
    /// Parameters.
    pub parameters: Vec<(String, Scalar)>,
    /// Programs by key (including literal paths used as `run[0]`).
    pub programs: BTreeMap<String, ResolvedProgram>,
    /// Start files: name → absolute path.
    pub start: BTreeMap<String, PathBuf>,
    /// Stages in topological order.
    pub stages: Vec<Stage>,
    /// Points.
    pub points: Vec<PointSpec>,
    /// Rules.
    pub rules: Vec<Rule>,
    /// Combination.
    pub combine: Combine,
    /// Cap.
    pub max_iterations: u32,
    /// Base seed.
    pub seed: u64,
    /// Iterations averaged after convergence.
    pub final_window: u32,
    /// Equation-of-state analysis.
    pub eos: Option<EosAnalysis>,
    /// Loop-driven parameters.
    pub schedules: Vec<Schedule>,
    /// Things that are allowed but probably not meant (`rondo check` prints them).
    pub warnings: Vec<Diagnostic>,
}

impl Campaign {
    /// Stage by name.
    pub fn stage(&self, name: &str) -> Option<&Stage> {
        self.stages.iter().find(|s| s.name == name)
    }

    /// The warnings as `file:line:col: warning: what; hint: what to do` lines.
    pub fn warnings_text(&self) -> String {
        self.warnings
            .iter()
            .map(|d| {
                format!(
                    "{}:{}:{}: warning: {}; hint: {}\n",
                    self.file.display(),
                    d.line,
                    d.column,
                    d.message,
                    d.hint
                )
            })
            .collect()
    }
}

/// Whether this process may execute `path` (`access(2)` with `X_OK`).
pub fn is_executable(path: &Path) -> bool {
    use std::os::unix::ffi::OsStrExt;
    let Ok(c) = std::ffi::CString::new(path.as_os_str().as_bytes()) else {
        return false;
    };
    // SAFETY: a valid NUL-terminated path; access only reads it.
    path.is_file() && unsafe { libc::access(c.as_ptr(), libc::X_OK) == 0 }
}

/// Parse a Slurm-style duration: `[days-]hh:mm:ss`, `hh:mm:ss`, `mm:ss`, or minutes.
pub fn parse_duration(s: &str) -> Option<Duration> {
    let (days, rest) = match s.split_once('-') {
        Some((d, r)) => (d.trim().parse::<u64>().ok()?, r),
        None => (0, s),
    };
    let parts: Vec<u64> = rest
        .split(':')
        .map(|p| p.trim().parse::<u64>())
        .collect::<Result<_, _>>()
        .ok()?;
    let secs = match (days > 0, parts.as_slice()) {
        (false, [m]) => m * 60,
        (true, [h]) => h * 3600,
        (_, [a, b]) if days > 0 => a * 3600 + b * 60,
        (_, [m, sec]) => m * 60 + sec,
        (_, [h, m, sec]) => h * 3600 + m * 60 + sec,
        _ => return None,
    };
    Some(Duration::from_secs(days * 86400 + secs))
}

fn loc<T>(s: &Spanned<T>) -> (u64, u64) {
    (s.referenced.line(), s.referenced.column())
}

/// Find a program file: absolute, relative to `base` (contains '/'), or a bare name on PATH
/// and then beside the running executable.
pub fn resolve_program(name: &str, base: &Path) -> Option<PathBuf> {
    let p = Path::new(name);
    if p.is_absolute() {
        return p.is_file().then(|| p.to_path_buf());
    }
    if name.contains('/') {
        let q = base.join(p);
        return q.is_file().then(|| std::path::absolute(&q).unwrap_or(q));
    }
    if let Some(path) = std::env::var_os("PATH") {
        for dir in std::env::split_paths(&path) {
            let q = dir.join(name);
            // As the shell does: a file on PATH that cannot be executed is passed over.
            if is_executable(&q) {
                return Some(std::path::absolute(&q).unwrap_or(q));
            }
        }
    }
    let exe = std::env::current_exe().ok()?;
    let q = exe.parent()?.join(name);
    q.is_file().then_some(q)
}

/// Read, parse and validate a campaign file.
pub fn load(file: &Path) -> Result<Campaign, SpecErrors> {
    let err = |line, column, message: String, hint: &str| SpecErrors {
        file: file.to_path_buf(),
        diagnostics: vec![Diagnostic {
            line,
            column,
            message,
            hint: hint.to_string(),
        }],
    };
    let text = std::fs::read_to_string(file).map_err(|e| {
        err(
            0,
            0,
            format!("cannot read the campaign file: {e}"),
            "check the path",
        )
    })?;
    parse(file, &text)
}

/// Parse and validate campaign text (`file` names it in diagnostics and anchors paths).
pub fn parse(file: &Path, text: &str) -> Result<Campaign, SpecErrors> {
    let raw: CampaignFile = serde_saphyr::from_str(text).map_err(|e| {
        let (line, column) = e
            .location()
            .map(|l| (l.line(), l.column()))
            .unwrap_or((0, 0));
        let msg = e.to_string();
        // The library's message may carry a rendered snippet after the first line.
        let first = msg
            .lines()
            .next()
            .unwrap_or("invalid YAML")
            .trim()
            .to_string();
        SpecErrors {
            file: file.to_path_buf(),
            diagnostics: vec![Diagnostic {
                line,
                column,
                message: first,
                hint: "see docs/campaign-file.md for the keys and their types".into(),
            }],
        }
    })?;
    Validator {
        file,
        diags: Vec::new(),
    }
    .run(raw, text)
}

struct Validator<'a> {
    file: &'a Path,
    diags: Vec<Diagnostic>,
}

fn split_ref(s: &str) -> Option<(&str, &str)> {
    let (a, b) = s.split_once('.')?;
    (!a.is_empty() && !b.is_empty()).then_some((a, b))
}

impl Validator<'_> {
    fn push(&mut self, at: (u64, u64), message: impl Into<String>, hint: impl Into<String>) {
        self.diags.push(Diagnostic {
            line: at.0,
            column: at.1,
            message: message.into(),
            hint: hint.into(),
        });
    }

    fn run(mut self, raw: CampaignFile, text: &str) -> Result<Campaign, SpecErrors> {
        let base = self
            .file
            .parent()
            .map(Path::to_path_buf)
            .unwrap_or_default();
        let base = if base.as_os_str().is_empty() {
            PathBuf::from(".")
        } else {
            base
        };
        let name = raw.campaign.value.clone();
        if name.is_empty()
            || !name
                .chars()
                .all(|c| c.is_ascii_alphanumeric() || c == '-' || c == '_')
        {
            self.push(
                loc(&raw.campaign),
                format!("campaign name `{name}` is not allowed"),
                "use letters, digits, '-' and '_'",
            );
        }

        // Programs.
        let mut programs = BTreeMap::new();
        for (k, p) in &raw.programs.0 {
            match resolve_program(&p.path.value, &base) {
                Some(path) if !is_executable(&path) => self.push(
                    loc(&p.path),
                    format!("program `{}` ({}) is not executable", p.path.value, path.display()),
                    format!("make it executable (chmod +x {}) or name another program", path.display()),
                ),
                Some(path) => {
                    programs.insert(
                        k.value.clone(),
                        ResolvedProgram { path, version_flag: p.version_flag.clone() },
                    );
                }
                None => self.push(
                    loc(&p.path),
                    format!("program `{}` not found", p.path.value),
                    "give an absolute path, a path relative to the campaign file, or a name on PATH",
                ),
            }
        }

        // Start files.
        let mut start = BTreeMap::new();
        for (k, v) in &raw.start.0 {
            let p = base.join(v);
            if p.is_file() {
                start.insert(k.value.clone(), std::path::absolute(&p).unwrap_or(p));
            } else {
                self.push(
                    loc(k),
                    format!("start file `{v}` not found (looked for {})", p.display()),
                    "paths in `start:` are relative to the campaign file's folder",
                );
            }
        }

        // Sweep.
        let parameters: Vec<(String, Scalar)> = raw
            .parameters
            .iter()
            .map(|(k, v)| (k.to_string(), v.clone()))
            .collect();
        let points = self.points(&raw);
        let mut param_names: BTreeSet<String> = parameters.iter().map(|(k, _)| k.clone()).collect();
        if let Some(p) = points.first() {
            for (k, _) in &p.values {
                param_names.insert(k.clone());
            }
        }
        let mut schedules = Vec::new();
        for (k, sc) in &raw.schedules.0 {
            let at = loc(k);
            if param_names.contains(&k.value) {
                self.push(
                    at,
                    format!(
                        "`{}` is both a schedule and a parameter or sweep axis",
                        k.value
                    ),
                    "keep one",
                );
                continue;
            }
            let num = |v: &Scalar| match v {
                Scalar::Int(i) => Some((*i as f64, true)),
                Scalar::Real(x) => Some((*x, false)),
                _ => None,
            };
            let (Some((start, si)), Some((max, mi))) = (num(&sc.start), num(&sc.max)) else {
                self.push(
                    at,
                    format!("schedule `{}`: start and max must be numbers", k.value),
                    "e.g. start: 20000, max: 320000",
                );
                continue;
            };
            if !(sc.factor.is_finite() && sc.factor > 0.0 && start.is_finite() && max.is_finite()) {
                self.push(
                    at,
                    format!("schedule `{}`: factor must be a positive number", k.value),
                    "e.g. factor: 2",
                );
                continue;
            }
            let test = match (sc.within_errors, sc.change_below) {
                (Some(e), None) if e > 0.0 => RuleTest::Errors(e),
                (None, Some(c)) if c > 0.0 => RuleTest::Abs(c),
                _ => {
                    self.push(at, format!("schedule `{}` needs exactly one positive condition: within-errors or change-below", k.value), "e.g. within-errors: 2");
                    continue;
                }
            };
            match split_ref(&sc.metric.value) {
                Some((st, _)) if raw.cycle.get(st).is_some() => {}
                _ => {
                    self.push(loc(&sc.metric), format!("schedule `{}`: metric `{}` must be stage.metric of a stage of the cycle", k.value, sc.metric.value), "e.g. metric: solve.n_f");
                    continue;
                }
            }
            param_names.insert(k.value.clone());
            schedules.push(Schedule {
                name: k.value.clone(),
                start,
                factor: sc.factor,
                max,
                integer: si && mi,
                metric: sc.metric.value.clone(),
                test,
            });
        }

        // Stages.
        let stage_names: BTreeSet<&str> = raw.cycle.keys().collect();
        let declared: BTreeSet<String> = raw.programs.keys().map(str::to_string).collect();
        let defaults_res = raw.defaults.resources.clone().unwrap_or_default();
        let stop_metrics: Vec<(String, String)> = raw
            .stop
            .when
            .iter()
            .filter_map(|r| split_ref(&r.metric.value).map(|(a, b)| (a.into(), b.into())))
            .collect();
        let mut stages = Vec::new();
        if raw.cycle.is_empty() {
            self.push(
                (0, 0),
                "the cycle has no stages",
                "add stages under `cycle:`",
            );
        }
        for (key, st) in &raw.cycle.0 {
            let sname = key.value.clone();
            let at = loc(key);
            let mut inputs = Vec::new();
            for (ik, spec) in &st.inputs.0 {
                let iat = loc(ik);
                let src = match spec {
                    InputSpec::Same(r) => self.source_ref(&raw, r, iat, false).map(|(s, o)| {
                        if s == "start" {
                            Source::Start(o)
                        } else {
                            Source::Same { stage: s, role: o }
                        }
                    }),
                    InputSpec::Previous(p) => {
                        let prev = self.source_ref(&raw, &p.previous, iat, true);
                        let init = match &p.initially {
                            Some(i) => match self.source_ref(&raw, i, iat, false) {
                                Some((s, o)) if s == "start" => Some(Some(o)),
                                Some(_) => {
                                    self.push(
                                        iat,
                                        format!("`initially: {i}` must name a start file"),
                                        "write `initially: start.NAME`",
                                    );
                                    None
                                }
                                None => None,
                            },
                            None => Some(None),
                        };
                        match (prev, init) {
                            (Some((stage, role)), Some(initially)) => {
                                if initially.is_none() && st.builtin.is_none() {
                                    self.push(
                                        iat,
                                        format!("input `{}` has no value at iteration 1", ik.value),
                                        "add `initially: start.NAME` (only built-in stages may go without)",
                                    );
                                }
                                Some(Source::Previous {
                                    stage,
                                    role,
                                    initially,
                                })
                            }
                            _ => None,
                        }
                    }
                };
                if let Some(src) = src {
                    inputs.push((ik.value.clone(), src));
                }
            }
            let outputs: Vec<(String, String)> = st
                .outputs
                .iter()
                .map(|(k, v)| (k.to_string(), v.clone()))
                .collect();
            for (ok, ov) in &st.outputs.0 {
                if ov.is_empty() || ov.contains('/') || ov == "metrics.json" || ov.starts_with('.')
                {
                    self.push(
                        loc(ok),
                        format!("output file name `{ov}` is not allowed"),
                        "use a plain file name (no '/', not metrics.json) written in the scratch directory",
                    );
                }
            }
            let mut required: BTreeSet<String> = st.metrics.iter().cloned().collect();
            for (s, m) in &stop_metrics {
                if *s == sname {
                    required.insert(m.clone());
                }
            }
            let resources = st.resources.clone().unwrap_or_default().over(&defaults_res);
            let tl_text = st
                .time_limit
                .clone()
                .or_else(|| raw.defaults.time_limit.clone())
                .or_else(|| resources.time.clone());
            let time_limit = match &tl_text {
                Some(t) => match parse_duration(t) {
                    Some(d) => Some(d),
                    None => {
                        self.push(
                            at,
                            format!("stage `{sname}`: time limit `{t}` is not a duration"),
                            "write [days-]hh:mm:ss, mm:ss or a number of minutes",
                        );
                        None
                    }
                },
                None => None,
            };
            let kind = match (&st.run, &st.builtin) {
                (Some(run), None) => match (&run.value, st.shell) {
                    (RunSpec::List(list), false) => self.command(
                        &sname,
                        at,
                        st,
                        list,
                        &param_names,
                        &mut programs,
                        &declared,
                        &base,
                        &inputs,
                    ),
                    (RunSpec::Script(script), true) => self.shell_script(
                        &sname,
                        st,
                        script,
                        loc(run),
                        &param_names,
                        &programs,
                        &declared,
                        &inputs,
                    ),
                    (RunSpec::List(_), true) => {
                        self.push(
                            loc(run),
                            format!("stage `{sname}`: `shell: true` takes one script string, not a list"),
                            "write run: \"{{program:NAME}} --x {{param:x}} | tee log\" (every substituted value is single-quoted), or drop `shell: true` to run an argument list without a shell",
                        );
                        None
                    }
                    (RunSpec::Script(_), false) => {
                        self.push(
                            loc(run),
                            format!("stage `{sname}`: `run` is one string, which only a shell stage takes"),
                            "add `shell: true` to run it with /bin/sh -c, or write an argument list: run: [program, --x, \"{{param:x}}\"]",
                        );
                        None
                    }
                },
                (None, Some(b)) => match b.value.as_str() {
                    "mix" => self.mix(&sname, st, at, &inputs),
                    "filter" => self.filter(&sname, st, at, &inputs),
                    _ => {
                        self.push(
                            loc(b),
                            format!("unknown built-in `{}`", b.value),
                            "built-ins: mix, filter",
                        );
                        None
                    }
                },
                (Some(_), Some(_)) => {
                    self.push(
                        at,
                        format!("stage `{sname}` has both `run` and `builtin`"),
                        "keep one",
                    );
                    None
                }
                (None, None) => {
                    self.push(
                        at,
                        format!("stage `{sname}` has neither `run` nor `builtin`"),
                        "add `run: [program, args...]`",
                    );
                    None
                }
            };
            let _ = &stage_names;
            if let Some(kind) = kind {
                stages.push(Stage {
                    name: sname,
                    kind,
                    inputs,
                    outputs,
                    required_metrics: required,
                    resources,
                    time_limit,
                    retries: st.retries.or(raw.defaults.retries).unwrap_or(0),
                    allow_nonfinite: st.allow_nonfinite,
                });
            }
        }

        // Stop rules.
        let mut rules = Vec::new();
        if raw.stop.max_iterations.value == 0 {
            self.push(
                loc(&raw.stop.max_iterations),
                "stop.max-iterations must be at least 1",
                "set max-iterations: N",
            );
        }
        for r in &raw.stop.when {
            let at = loc(&r.metric);
            let Some((s, m)) = split_ref(&r.metric.value) else {
                self.push(
                    at,
                    format!("metric `{}` must be written stage.metric", r.metric.value),
                    "e.g. update.n_f",
                );
                continue;
            };
            match raw.cycle.get(s) {
                None => self.push(
                    at,
                    format!("stop rule names unknown stage `{s}`"),
                    format!(
                        "stages: {}",
                        raw.cycle.keys().collect::<Vec<_>>().join(", ")
                    ),
                ),
                Some(st) => {
                    let is_mix = st.builtin.as_ref().is_some_and(|b| b.value == "mix");
                    let mix_metric = |m: &str| {
                        ["residual_norm", "history", "resets"].contains(&m)
                            || m.strip_prefix("residual_norm_")
                                .is_some_and(|r| st.inputs.get(r).is_some())
                    };
                    if is_mix && !mix_metric(m) {
                        self.push(
                            at,
                            format!("built-in stage `{s}` reports residual_norm, residual_norm_ROLE (several inputs), history and resets, not `{m}`"),
                            format!("use `{s}.residual_norm`"),
                        );
                    } else if !is_mix
                        && st.builtin.is_some()
                        && !crate::builtins::FILTER_METRICS.contains(&m)
                    {
                        self.push(
                            at,
                            format!(
                                "built-in stage `{s}` reports {}, not `{m}`",
                                crate::builtins::FILTER_METRICS.join(", ")
                            ),
                            format!("use e.g. `{s}.density_per_spin`"),
                        );
                    } else if st.builtin.is_none()
                        && !st.metrics.is_empty()
                        && !st.metrics.iter().any(|x| x == m)
                    {
                        self.push(
                            at,
                            format!("stage `{s}` does not list metric `{m}`"),
                            format!(
                                "add `{m}` to the stage's `metrics:` or use one of: {}",
                                st.metrics.join(", ")
                            ),
                        );
                    }
                }
            }
            let tests = [
                r.change_below.map(RuleTest::Abs),
                r.relative_change_below.map(RuleTest::Rel),
                r.within_errors.map(RuleTest::Errors),
            ];
            let set: Vec<RuleTest> = tests.into_iter().flatten().collect();
            if set.len() != 1 {
                self.push(at, "a stop rule needs exactly one of change-below, relative-change-below, within-errors", "split it into several rules");
                continue;
            }
            let bad = match set[0] {
                RuleTest::Abs(x) | RuleTest::Rel(x) | RuleTest::Errors(x) => {
                    !(x.is_finite() && x > 0.0)
                }
            };
            if bad || r.for_ == 0 {
                self.push(
                    at,
                    "tolerances must be positive numbers and `for` at least 1",
                    "e.g. change-below: 1.0e-6, for: 2",
                );
                continue;
            }
            if r.diverge_above.is_some_and(|x| !(x.is_finite() && x > 0.0)) {
                self.push(
                    at,
                    "diverge-above must be a positive number",
                    "e.g. diverge-above: 0.5",
                );
                continue;
            }
            rules.push(Rule {
                metric: r.metric.value.clone(),
                test: set[0],
                for_: r.for_,
                compare: r.compare,
                diverge_above: r.diverge_above,
            });
        }

        let mut warnings = Vec::new();
        if raw.stop.when.is_empty() {
            // `stop:` carries no location of its own: its line in the text.
            let at = text
                .lines()
                .position(|l| l.starts_with("stop:"))
                .map(|i| (i as u64 + 1, 1))
                .unwrap_or((0, 0));
            warnings.push(Diagnostic {
                line: at.0,
                column: at.1,
                message: "no stopping rule: every point runs max-iterations iterations".into(),
                hint: format!(
                    "add rules under `stop.when` (e.g. - {{ metric: STAGE.METRIC, change-below: 1.0e-6, for: 2 }}) if the loop should stop when it converges; as it is, every point ends `capped` after {} iteration(s)",
                    raw.stop.max_iterations.value
                ),
            });
        }

        // Graph: order and same-iteration cycles.
        let ordered = match crate::graph::order(&stages) {
            Ok(o) => o,
            Err(cycle_stage) => {
                let at = raw
                    .cycle
                    .0
                    .iter()
                    .find(|(k, _)| k.value == cycle_stage)
                    .map(|(k, _)| loc(k))
                    .unwrap_or((0, 0));
                self.push(
                    at,
                    format!("stage `{cycle_stage}` is part of a cycle within one iteration"),
                    "break it with `{ previous: stage.output, initially: start.NAME }`",
                );
                Vec::new()
            }
        };

        // Campaign-level analysis.
        let eos = raw.analysis.eos.as_ref().and_then(|e| {
            let at = loc(&e.energy);
            let volume = e.volume.clone().unwrap_or_else(|| "volume".into());
            let axes: Vec<&str> = points
                .first()
                .map(|p| p.values.iter().map(|(k, _)| k.as_str()).collect())
                .unwrap_or_default();
            if !axes.contains(&volume.as_str()) {
                self.push(
                    at,
                    format!("the eos analysis needs the sweep axis `{volume}`"),
                    format!(
                        "sweep axes: {}; set `volume:` to the axis holding the volume",
                        axes.join(", ")
                    ),
                );
                return None;
            }
            let Some((st, m)) = split_ref(&e.energy.value) else {
                self.push(
                    at,
                    "eos `energy` must be written stage.metric",
                    "e.g. energy: update.energy",
                );
                return None;
            };
            match raw.cycle.get(st) {
                None => {
                    self.push(
                        at,
                        format!("eos energy names unknown stage `{st}`"),
                        "use stage.metric",
                    );
                    return None;
                }
                Some(sp) if sp.builtin.is_none() && !sp.metrics.iter().any(|x| x == m) => {
                    self.push(
                        at,
                        format!("stage `{st}` does not list metric `{m}`"),
                        format!("add `{m}` to the stage's `metrics:`"),
                    );
                    return None;
                }
                Some(_) => {}
            }
            Some(EosAnalysis {
                energy: e.energy.value.clone(),
                volume,
                models: e
                    .models
                    .clone()
                    .unwrap_or_else(|| vec![EosModelName::BirchMurnaghan, EosModelName::Vinet]),
            })
        });

        if !self.diags.is_empty() {
            self.diags.sort_by_key(|d| (d.line, d.column));
            return Err(SpecErrors {
                file: self.file.to_path_buf(),
                diagnostics: self.diags,
            });
        }
        Ok(Campaign {
            file: self.file.to_path_buf(),
            text: text.to_string(),
            name,
            parameters,
            programs,
            start,
            stages: ordered,
            points,
            rules,
            combine: raw.stop.combine,
            max_iterations: raw.stop.max_iterations.value,
            seed: raw.seed.unwrap_or(0),
            final_window: raw.stop.final_window,
            eos,
            schedules,
            warnings,
        })
    }

    /// Check `stage.output` / `start.name`; `previous` allows any stage (even later ones).
    fn source_ref(
        &mut self,
        raw: &CampaignFile,
        r: &str,
        at: (u64, u64),
        previous: bool,
    ) -> Option<(String, String)> {
        let Some((s, o)) = split_ref(r) else {
            self.push(
                at,
                format!("input `{r}` must be written stage.output or start.name"),
                "e.g. solve.sigma",
            );
            return None;
        };
        if s == "start" {
            if previous {
                self.push(
                    at,
                    "`previous:` must name a stage output",
                    "use `initially: start.NAME` for the start file",
                );
                return None;
            }
            if raw.start.get(o).is_none() {
                self.push(
                    at,
                    format!("unknown start file `{o}`"),
                    format!(
                        "start files: {}",
                        raw.start.keys().collect::<Vec<_>>().join(", ")
                    ),
                );
                return None;
            }
            return Some((s.into(), o.into()));
        }
        let Some(st) = raw.cycle.get(s) else {
            self.push(
                at,
                format!("input `{r}` names unknown stage `{s}`"),
                format!(
                    "stages: {}",
                    raw.cycle.keys().collect::<Vec<_>>().join(", ")
                ),
            );
            return None;
        };
        let implicit_state = st.builtin.is_some() && o == "state";
        if st.outputs.get(o).is_none() && !implicit_state {
            self.push(
                at,
                format!("stage `{s}` declares no output `{o}`"),
                format!(
                    "its outputs: {}",
                    st.outputs.keys().collect::<Vec<_>>().join(", ")
                ),
            );
            return None;
        }
        Some((s.into(), o.into()))
    }

    #[allow(clippy::too_many_arguments)]
    fn command(
        &mut self,
        sname: &str,
        at: (u64, u64),
        st: &StageSpec,
        run: &[Spanned<String>],
        params: &BTreeSet<String>,
        programs: &mut BTreeMap<String, ResolvedProgram>,
        declared: &BTreeSet<String>,
        base: &Path,
        inputs: &[(String, Source)],
    ) -> Option<StageKind> {
        let Some(first) = run.first() else {
            // an empty list carries no location: name the stage
            self.push(
                at,
                format!("stage `{sname}`: `run` is empty"),
                "write run: [program, args...]",
            );
            return None;
        };
        if st.settings.is_some() {
            self.push(
                loc(first),
                format!("stage `{sname}`: `settings` is for built-in stages"),
                "remove `settings`",
            );
        }
        let args: Vec<String> = run.iter().map(|s| s.value.clone()).collect();
        let template = match Template::parse(&args) {
            Ok(t) => t,
            Err(e) => {
                let s = &run[e.arg];
                self.push(loc(s), format!("stage `{sname}`: {}", e.message), e.hint);
                return None;
            }
        };
        let program = first.value.clone();
        if program.contains("{{") {
            self.push(
                loc(first),
                "the program (first element of `run`) cannot be a placeholder",
                "name a program from `programs:` or a path",
            );
        } else if declared.contains(&program) {
            // Declared under `programs:`: resolved there (or reported there, once).
        } else if !programs.contains_key(&program) {
            match resolve_program(&program, base) {
                Some(path) if !is_executable(&path) => self.push(
                    loc(first),
                    format!("program `{program}` ({}) is not executable", path.display()),
                    format!(
                        "make it executable (chmod +x {}) or name another program",
                        path.display()
                    ),
                ),
                Some(path) => {
                    programs.insert(
                        program.clone(),
                        ResolvedProgram {
                            path,
                            version_flag: None,
                        },
                    );
                }
                None => self.push(
                    loc(first),
                    format!("program `{program}` not found"),
                    "declare it under `programs:` or give a path relative to the campaign file",
                ),
            }
        }
        let ok = self.check_placeholders(
            sname,
            st,
            &template,
            &|arg| loc(&run[arg]),
            params,
            None,
            inputs,
        );
        ok.then_some(StageKind::Command { template, program })
    }

    /// A shell stage: `run` is one script string for `/bin/sh -c`.
    #[allow(clippy::too_many_arguments)]
    fn shell_script(
        &mut self,
        sname: &str,
        st: &StageSpec,
        script: &str,
        at: (u64, u64),
        params: &BTreeSet<String>,
        programs: &BTreeMap<String, ResolvedProgram>,
        declared: &BTreeSet<String>,
        inputs: &[(String, Source)],
    ) -> Option<StageKind> {
        if script.trim().is_empty() {
            self.push(
                at,
                format!("stage `{sname}`: the script is empty"),
                "write run: \"{{program:NAME}} --x {{param:x}}\"",
            );
            return None;
        }
        if st.settings.is_some() {
            self.push(
                at,
                format!("stage `{sname}`: `settings` is for built-in stages"),
                "remove `settings`",
            );
        }
        let template = match Template::parse(&[script.to_string()]) {
            Ok(t) => t,
            Err(e) => {
                self.push(
                    at,
                    format!("stage `{sname}`: character {}: {}", e.column, e.message),
                    e.hint,
                );
                return None;
            }
        };
        let mut ok = self.check_placeholders(
            sname,
            st,
            &template,
            &|_| at,
            params,
            Some(declared),
            inputs,
        );
        for p in template.placeholders_in_shell_quotes() {
            ok = false;
            let ns = p.namespace.map(|n| format!("{n}:")).unwrap_or_default();
            self.push(
                at,
                format!(
                    "stage `{sname}`: placeholder `{{{{{ns}{}}}}}` (character {}) is inside quotes in the script; rondo single-quotes every value itself",
                    p.name, p.column
                ),
                "write it bare: --x={{param:x}}, not \"--x={{param:x}}\"",
            );
        }
        let used: BTreeSet<String> = template
            .placeholders()
            .filter(|(ns, _, _)| *ns == Some("program"))
            .map(|(_, n, _)| n.to_string())
            .collect();
        // A declared program that could not be resolved was reported at its entry.
        if used.iter().any(|n| !programs.contains_key(n)) {
            ok = false;
        }
        ok.then(|| StageKind::Shell {
            template,
            programs: used.into_iter().collect(),
        })
    }

    /// Report undefined placeholders of a stage's template; `shell_programs` is `Some(the
    /// declared programs)` for a shell script, which may name them as `{{program:NAME}}`.
    #[allow(clippy::too_many_arguments)]
    fn check_placeholders(
        &mut self,
        sname: &str,
        st: &StageSpec,
        template: &Template,
        at_of: &dyn Fn(usize) -> (u64, u64),
        params: &BTreeSet<String>,
        shell_programs: Option<&BTreeSet<String>>,
        inputs: &[(String, Source)],
    ) -> bool {
        let mut ok = true;
        for p in template.placeholder_refs() {
            let at = at_of(p.arg);
            let known = match p.namespace {
                Some("param") => params.contains(p.name),
                Some("input") => inputs.iter().any(|(k, _)| k == p.name),
                Some("output") => st.outputs.get(p.name).is_some(),
                Some("point") => p.name == "id" || p.name == "index",
                Some("program") => shell_programs.is_some_and(|d| d.contains(p.name)),
                None => BARE_NAMES.contains(&p.name),
                Some(_) => false,
            };
            if known {
                continue;
            }
            ok = false;
            if p.namespace == Some("program") {
                match shell_programs {
                    Some(d) => self.push(
                        at,
                        format!("stage `{sname}`: no program `{}` under `programs:`", p.name),
                        format!(
                            "declare it under `programs:`; declared: {}",
                            d.iter().cloned().collect::<Vec<_>>().join(", ")
                        ),
                    ),
                    None => self.push(
                        at,
                        format!(
                            "stage `{sname}`: `{{{{program:{}}}}}` is for shell scripts",
                            p.name
                        ),
                        "in an argument list the program is the first element of `run`",
                    ),
                }
                continue;
            }
            let ns = p.namespace.map(|n| format!("{n}:")).unwrap_or_default();
            let hint = match p.namespace {
                Some("param") => format!(
                    "parameters and sweep axes: {}",
                    params.iter().cloned().collect::<Vec<_>>().join(", ")
                ),
                Some("input") => format!(
                    "inputs of `{sname}`: {}",
                    inputs
                        .iter()
                        .map(|(k, _)| k.as_str())
                        .collect::<Vec<_>>()
                        .join(", ")
                ),
                Some("output") => format!(
                    "outputs of `{sname}`: {}",
                    st.outputs.keys().collect::<Vec<_>>().join(", ")
                ),
                Some("point") => "use {{point:id}} or {{point:index}}".into(),
                None => format!("names without namespace: {}", BARE_NAMES.join(", ")),
                Some(_) => {
                    "namespaces: param, input, output, point (and program in shell scripts)".into()
                }
            };
            self.push(
                at,
                format!(
                    "stage `{sname}`: undefined placeholder `{{{{{ns}{}}}}}`",
                    p.name
                ),
                hint,
            );
        }
        ok
    }

    fn mix(
        &mut self,
        sname: &str,
        st: &StageSpec,
        at: (u64, u64),
        inputs: &[(String, Source)],
    ) -> Option<StageKind> {
        let Some(BuiltinSettings::Mix(with)) = st.settings.clone() else {
            self.push(
                at,
                format!(
                    "built-in stage `{sname}` needs `settings: {{ method: linear, alpha: 0.5 }}`"
                ),
                "add `settings:` with the mixer settings",
            );
            return None;
        };
        if !(with.alpha > 0.0 && with.alpha <= 1.0) {
            self.push(
                at,
                format!("stage `{sname}`: alpha must be in (0, 1]"),
                "e.g. alpha: 0.5",
            );
        }
        let legacy = inputs.len() == 1 && inputs[0].0 == crate::builtins::LEGACY_ROLE;
        if inputs.is_empty() {
            self.push(
                at,
                format!("built-in stage `{sname}` has no inputs to mix"),
                "write inputs: { sigma: solve.sigma, density: update.density }",
            );
        }
        if inputs.iter().any(|(r, _)| r == "state") {
            self.push(
                at,
                format!("built-in stage `{sname}`: the input role `state` is reserved for the mixer's history"),
                "rename the input",
            );
        }
        for (ok, ov) in &st.outputs.0 {
            if !(ov.ends_with(".npy") || ov.ends_with(".json")) {
                self.push(
                    loc(ok),
                    format!("mix output `{}` = `{ov}` is neither .npy nor .json", ok.value),
                    "the mixed file has the type of its input: NAME.npy for arrays, NAME.json for JSON objects",
                );
            }
        }
        if legacy {
            if st.outputs.len() != 1 {
                self.push(
                    at,
                    format!("built-in stage `{sname}` with the single input `new` has exactly one output (the mixed array)"),
                    "write outputs: { NAME: NAME.npy }",
                );
            }
        } else if !inputs.is_empty() {
            let in_roles: Vec<&str> = inputs.iter().map(|(r, _)| r.as_str()).collect();
            for (ok, _) in &st.outputs.0 {
                if !in_roles.contains(&ok.value.as_str()) {
                    self.push(
                        loc(ok),
                        format!(
                            "mix output `{}` is not one of the stage's input roles ({})",
                            ok.value,
                            in_roles.join(", ")
                        ),
                        "a mix stage writes one output per input role, with the same role name",
                    );
                }
            }
            for r in &in_roles {
                if st.outputs.get(r).is_none() {
                    self.push(
                        at,
                        format!("built-in stage `{sname}` mixes input `{r}` but declares no output `{r}`"),
                        format!("add `{r}: {r}.npy` (or .json) to its outputs"),
                    );
                }
            }
        }
        for (role, w) in with.weights.iter().flatten() {
            if !inputs.iter().any(|(r, _)| r == role) {
                self.push(
                    at,
                    format!("stage `{sname}`: weight for `{role}`, which is not an input role"),
                    "weights name input roles of the mix stage",
                );
            }
            if !(w.is_finite() && *w > 0.0) {
                self.push(
                    at,
                    format!("stage `{sname}`: weight of `{role}` is {w}, not a positive number"),
                    "e.g. weights: { density: 10 }",
                );
            }
        }
        if st.outputs.get("state").is_some() {
            self.push(
                at,
                "the mixer's `state` output is implicit",
                "rename the output",
            );
        }
        if let Some(h) = with.history {
            if h == 0 {
                self.push(
                    at,
                    format!("stage `{sname}`: history must be at least 1"),
                    "e.g. history: 8 (use method linear for no history)",
                );
            }
        }
        Some(StageKind::Mix(with))
    }

    fn filter(
        &mut self,
        sname: &str,
        st: &StageSpec,
        at: (u64, u64),
        inputs: &[(String, Source)],
    ) -> Option<StageKind> {
        let Some(BuiltinSettings::Filter(with)) = st.settings.clone() else {
            self.push(
                at,
                format!(
                    "built-in stage `{sname}` needs `settings: {{ legendre: 40, matsubara: 512 }}`"
                ),
                "add `settings:` with the filter settings",
            );
            return None;
        };
        if with.legendre == 0 || with.matsubara == 0 {
            self.push(
                at,
                format!("stage `{sname}`: legendre and matsubara must be at least 1"),
                "e.g. legendre: 40, matsubara: 512",
            );
        }
        let roles: Vec<&str> = inputs.iter().map(|(r, _)| r.as_str()).collect();
        if !roles.contains(&"gtau")
            || roles
                .iter()
                .any(|r| !["gtau", "delta", "levels"].contains(r))
        {
            self.push(
                at,
                format!(
                    "built-in stage `{sname}` takes inputs `gtau` (and `delta`, `levels` for Σ)"
                ),
                "write inputs: { gtau: solve.gtau }",
            );
        }
        let outs: Vec<&str> = st.outputs.keys().collect();
        if outs.is_empty()
            || outs
                .iter()
                .any(|r| !["gtau", "giw", "sigma", "gl"].contains(r))
        {
            self.push(
                at,
                format!("built-in stage `{sname}` writes some of the outputs gtau, giw, sigma, gl"),
                "write outputs: { giw: giw.npy, sigma: sigma.npy }",
            );
        }
        if outs.contains(&"sigma") && !(roles.contains(&"delta") && roles.contains(&"levels")) {
            self.push(
                at,
                format!(
                    "stage `{sname}`: the output `sigma` needs the inputs `delta` and `levels`"
                ),
                "add them or drop `sigma`",
            );
        }
        Some(StageKind::Filter(with))
    }

    fn points(&mut self, raw: &CampaignFile) -> Vec<PointSpec> {
        let mut combos: Vec<Vec<(String, Scalar)>> = vec![Vec::new()];
        if let Some(spanned) = &raw.sweep {
            let sw = &spanned.value;
            match (&sw.product, &sw.zip) {
                (Some(_), Some(_)) | (None, None) => {
                    self.push(
                        loc(spanned),
                        "the sweep needs exactly one of `product` or `zip`",
                        "write sweep: { product: { axis: [values] } }",
                    );
                }
                (Some(p), None) => {
                    for (k, vals) in &p.0 {
                        if vals.is_empty() {
                            self.push(
                                loc(k),
                                format!("sweep axis `{}` is empty", k.value),
                                "give at least one value",
                            );
                        }
                        let mut next = Vec::new();
                        for c in &combos {
                            for v in vals {
                                let mut c2 = c.clone();
                                c2.push((k.value.clone(), v.clone()));
                                next.push(c2);
                            }
                        }
                        combos = next;
                    }
                }
                (None, Some(z)) => {
                    let n = z.0.first().map(|(_, v)| v.len()).unwrap_or(0);
                    for (k, vals) in &z.0 {
                        if vals.len() != n {
                            self.push(
                                loc(k),
                                format!("zip axis `{}` has {} values, the first axis has {n}", k.value, vals.len()),
                                "zip axes must have equal lengths (use `product` for every combination)",
                            );
                        }
                    }
                    combos = (0..n)
                        .map(|i| {
                            z.0.iter()
                                .filter_map(|(k, v)| v.get(i).map(|x| (k.value.clone(), x.clone())))
                                .collect()
                        })
                        .collect();
                }
            }
            let axes: Vec<&str> = sw
                .product
                .iter()
                .chain(sw.zip.iter())
                .flat_map(|m| m.keys())
                .collect();
            for (k, _) in &raw.parameters.0 {
                if axes.contains(&k.value.as_str()) {
                    self.push(
                        loc(k),
                        format!("`{}` is both a parameter and a sweep axis", k.value),
                        "keep one",
                    );
                }
            }
        }
        let width = combos.len().to_string().len().max(3);
        combos
            .into_iter()
            .enumerate()
            .map(|(i, values)| PointSpec {
                id: format!("p{:0width$}", i + 1),
                index: i + 1,
                values,
            })
            .collect()
    }
}

/// The JSON Schema of the campaign file, pretty-printed with a trailing newline.
pub fn json_schema() -> String {
    let schema = schemars::schema_for!(CampaignFile);
    let mut s = serde_json::to_string_pretty(&schema).unwrap_or_default();
    s.push('\n');
    s
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn durations() {
        assert_eq!(parse_duration("00:10:00"), Some(Duration::from_secs(600)));
        assert_eq!(
            parse_duration("1-02:00:00"),
            Some(Duration::from_secs(93600))
        );
        assert_eq!(parse_duration("5"), Some(Duration::from_secs(300)));
        assert_eq!(parse_duration("2:30"), Some(Duration::from_secs(150)));
        assert_eq!(parse_duration("x"), None);
    }

    /// The demo campaign with one replacement, and the diagnostics of parsing it.
    fn demo_with(from: &str, to: &str) -> String {
        let file = Path::new(env!("CARGO_MANIFEST_DIR")).join("../examples/model-sweep.yaml");
        let text = std::fs::read_to_string(&file).unwrap_or_default();
        assert!(text.contains(from), "the demo has no `{from}`");
        match parse(&file, &text.replacen(from, to, 1)) {
            Ok(_) => String::new(),
            Err(e) => e.to_string(),
        }
    }

    /// The multi-array mix stage: outputs are exactly its input roles, files are .npy or
    /// .json, weights name input roles and are positive, stop rules name its metrics; each
    /// refusal is a `file:line:col` diagnostic.
    #[test]
    fn mix_stage_roles_weights_and_metrics() {
        let outs = "outputs: { sigma: sigma.npy, density: density.json }";
        let with = "settings: { method: anderson, alpha: 0.4, history: 8 }";
        // a diagnostic whose message (after file:line:col) is about the mixer
        let mixes = |d: &str| {
            d.lines()
                .any(|l| l.splitn(4, ':').nth(3).is_some_and(|m| m.contains("mix")))
        };
        assert!(!mixes(&demo_with(outs, outs)), "{}", demo_with(outs, outs));
        let cases = [
            (
                outs,
                "outputs: { sigma: sigma.npy, rho: density.json }",
                "mix output `rho` is not one of the stage's input roles",
            ),
            (
                outs,
                "outputs: { sigma: sigma.npy }",
                "mixes input `density` but declares no output `density`",
            ),
            (
                outs,
                "outputs: { sigma: sigma.npy, density: density.txt }",
                "is neither .npy nor .json",
            ),
            (
                with,
                "settings: { method: anderson, alpha: 0.4, weights: { rho: 2 } }",
                "weight for `rho`, which is not an input role",
            ),
            (
                with,
                "settings: { method: anderson, alpha: 0.4, weights: { density: -1 } }",
                "not a positive number",
            ),
            (
                with,
                "settings: { method: anderson, alpha: 0.4, history: 0 }",
                "history must be at least 1",
            ),
            (
                "metric: update.energy,",
                "metric: mix.residual,",
                "reports residual_norm, residual_norm_ROLE",
            ),
            (
                "inputs: { sigma: solve.sigma, density: update.density }",
                "inputs: { sigma: solve.sigma, state: update.density }",
                "reserved",
            ),
        ];
        for (from, to, needle) in cases {
            let e = demo_with(from, to);
            let line = e.lines().find(|l| l.contains(needle));
            let Some(line) = line else {
                panic!("`{to}`: no diagnostic `{needle}` in:\n{e}");
            };
            // file:line:col: message
            let mut it = line.splitn(4, ':');
            let (_, l, c) = (it.next(), it.next(), it.next());
            assert!(
                l.is_some_and(|l| l.parse::<u64>().is_ok_and(|n| n > 0))
                    && c.is_some_and(|c| c.parse::<u64>().is_ok()),
                "{line}"
            );
        }
        // the mixer's metrics, per role too, are valid stop-rule metrics
        let e = demo_with(
            "metric: update.energy,",
            "metric: mix.residual_norm_density,",
        );
        assert!(!mixes(&e), "{e}");
    }
}
