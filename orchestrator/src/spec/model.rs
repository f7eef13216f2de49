//! The validated campaign: what the engine, the CLI and the reports read once a campaign
//! file has passed every check (`Campaign`, `Stage`, `StageKind`, `Source`, `Rule`, ...),
//! the `Diagnostic`s a failed check reports, and what the built-in stages declare to the
//! checker (the metrics they report, the roles they take).
//!
//! Every value here is checked: names resolve, paths exist, numbers are in range.

use std::collections::{BTreeMap, BTreeSet};
use std::fmt;
use std::path::PathBuf;
use std::time::Duration;

use rondo_adapters::executor::Resources;
use rondo_adapters::template::Template;

pub use super::raw::Placement;
use super::raw::{
    Combine, Compare, EosModelName, FilterSettings, MixSettings, Scalar, WarmEstimate,
};

/// The role of the single input of the older one-array form of the built-in `mix`
/// (`inputs: { new: ... }`), whose one output may have any role name.
pub const LEGACY_ROLE: &str = "new";

/// The metrics the filter built-in reports (stopping rules may name them).
pub const FILTER_METRICS: [&str; 4] = [
    "legendre_kept",
    "legendre_dropped",
    "density_per_spin",
    "tail_c1",
];

/// The name of the shipped equation-of-state stage that `analysis: eos:` stands for.
pub const EOS_STAGE: &str = "eos";

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

/// Which section of the campaign file a stage belongs to.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default)]
pub enum Section {
    /// `before:`: once per point, first in iteration 1.
    Before,
    /// `cycle:`: every iteration.
    #[default]
    Cycle,
    /// `after-point:`: once per point that converged or was capped, recorded with its last
    /// good iteration.
    AfterPoint,
    /// `after-campaign:`: once per campaign (or group) after every point stopped.
    AfterCampaign,
}

impl Section {
    /// The key of the section in the campaign file.
    pub fn key(self) -> &'static str {
        match self {
            Section::Before => "before",
            Section::Cycle => "cycle",
            Section::AfterPoint => "after-point",
            Section::AfterCampaign => "after-campaign",
        }
    }
}

/// What an iteration-1 input without a previous iteration starts from.
#[derive(Debug, Clone, PartialEq, Eq)]
pub enum Initial {
    /// A start file.
    Start(String),
    /// An output of a `before:` stage.
    Before { stage: String, role: String },
}

impl fmt::Display for Initial {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        match self {
            Initial::Start(n) => write!(f, "start.{n}"),
            Initial::Before { stage, role } => write!(f, "{stage}.{role}"),
        }
    }
}

/// Which points an `after-campaign:` input reads.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum PointSelection {
    /// Every point that converged or was capped.
    All,
    /// The converged points.
    Converged,
    /// The converged or capped points of the stage's group (`group-by`).
    Group,
}

/// What an `after-campaign:` input reads of each selected point.
#[derive(Debug, Clone, PartialEq, Eq)]
pub enum PointsRead {
    /// An output of the last good iteration.
    Output { stage: String, role: String },
    /// Final values of metrics (`stage.metric`).
    Finals(Vec<String>),
}

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
        initially: Option<Initial>,
    },
    /// An output of a `before:` stage (recorded at iteration 1), whatever the iteration.
    Before { stage: String, role: String },
    /// `after-campaign:` stages: per-point results of the selected points.
    Points {
        read: PointsRead,
        points: PointSelection,
    },
}

/// A checked stage.
#[derive(Debug, Clone)]
pub struct Stage {
    /// Name.
    pub name: String,
    /// Its section of the campaign file.
    pub section: Section,
    /// `after-campaign:` stages: the sweep axes it groups the points by (empty: once).
    pub group_by: Vec<String>,
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
    /// A retry after a time-limit kill runs with the limit times this (`timeout-factor`,
    /// ≥ 1), once more for every earlier time-limit kill of the same iteration.
    pub timeout_factor: f64,
    /// Accept NaN/Inf.
    pub allow_nonfinite: bool,
    /// Input roles placed as private writable copies (`writable-inputs`).
    pub writable_inputs: BTreeSet<String>,
    /// Where it runs under a batch executor (`placement`).
    pub placement: Placement,
    /// Whether a local attempt's program runs on when rondo is killed (`outlive-rondo`,
    /// default true): the next rondo watches it again or adopts its result.
    pub outlive_rondo: bool,
    /// The program stays alive across iterations and takes each attempt's work through
    /// hand-off files (`resident: true`, docs/resident.md).
    pub resident: bool,
    /// Retention policies per output role (`keep`); roles not listed keep everything.
    pub keep: Vec<(String, Keep)>,
    /// The working folder kept from one iteration to the next (`case-folder`).
    pub case_folder: Option<CaseFolder>,
    /// Metrics read from what the program writes (`read-metrics`), in file order.
    pub metric_sources: Vec<MetricSource>,
    /// HDF5 outputs: role → the dataset paths the file must hold (`outputs: { ROLE: {
    /// file: F, hdf5: [...] } }`), in file order.
    pub hdf5_outputs: Vec<(String, Vec<String>)>,
    /// Environment variables set for the program (`env`), name → value, in file order.
    pub env: Vec<(String, String)>,
    /// Further programs of `programs:` that the stage's program runs (`also-runs`), sorted:
    /// their hashes join the stage's recorded program.
    pub also_runs: Vec<String>,
}

/// One metric read from a file the stage writes (`read-metrics:`), checked.
#[derive(Debug, Clone)]
pub struct MetricSource {
    /// Metric name (without the stage prefix).
    pub name: String,
    /// The file, relative to the attempt's scratch folder (`stdout.txt` for the stdout).
    pub file: String,
    /// How the number is found in the file.
    pub kind: SourceKind,
    /// The unit the file writes the number in; the metric is stored in `unit.target()`.
    pub unit: Option<EnergyUnit>,
}

/// How a metric is found in its file.
#[derive(Debug, Clone)]
pub enum SourceKind {
    /// A regular expression with exactly one capture group, over the text.
    Text {
        /// The compiled pattern.
        regex: regex::Regex,
        /// The first match (`true`) or the last (`false`, the default).
        first: bool,
    },
    /// A JSON pointer (RFC 6901) into a JSON document.
    Json {
        /// The pointer, `""` for the whole document.
        pointer: String,
    },
    /// A dataset of an HDF5 file: a scalar, or one element by index.
    Hdf5Dataset {
        /// Absolute path of the dataset.
        path: String,
        /// Index of the element (none: the dataset holds exactly one element).
        index: Option<Vec<usize>>,
    },
    /// A scalar attribute of a group or dataset of an HDF5 file.
    Hdf5Attribute {
        /// Absolute path of the object carrying it (`/` for the file's root group).
        object: String,
        /// Attribute name.
        name: String,
    },
}

/// Energy units a metric source may convert from; every one is converted to eV.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum EnergyUnit {
    /// Rydberg.
    Ry,
    /// Hartree.
    Ha,
    /// Electronvolt (the identity).
    Ev,
}

impl EnergyUnit {
    /// The Rydberg energy hc R∞ in eV: CODATA 2018 recommended value (NIST, "Fundamental
    /// Physical Constants", 2019), 13.605 693 122 994(26) eV; examples/casebook prints in Ry
    /// with the same number.
    pub const RYDBERG_EV: f64 = 13.605_693_122_994;
    /// The Hartree energy E_h in eV: CODATA 2018 recommended value, 27.211 386 245 988(53) eV
    /// (exactly twice the Rydberg energy in that adjustment).
    pub const HARTREE_EV: f64 = 27.211_386_245_988;

    /// The names accepted in `unit:` and what they mean.
    pub const NAMES: [(&'static str, EnergyUnit); 5] = [
        ("Ry", EnergyUnit::Ry),
        ("Ha", EnergyUnit::Ha),
        ("hartree", EnergyUnit::Ha),
        ("eV", EnergyUnit::Ev),
        ("ev", EnergyUnit::Ev),
    ];

    /// The unit a `unit:` name stands for.
    pub fn parse(name: &str) -> Option<EnergyUnit> {
        Self::NAMES
            .iter()
            .find(|(n, _)| *n == name)
            .map(|(_, u)| *u)
    }

    /// A value in this unit, in eV (one multiplication, so the result is the nearest double
    /// to the exact product of the two doubles).
    pub fn to_ev(self, x: f64) -> f64 {
        match self {
            EnergyUnit::Ry => x * Self::RYDBERG_EV,
            EnergyUnit::Ha => x * Self::HARTREE_EV,
            EnergyUnit::Ev => x,
        }
    }
}

/// Which iterations of an output role keep their content (see [`crate::retention`]).
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct Keep {
    /// The last N good iterations.
    pub last: Option<u32>,
    /// Every K-th iteration.
    pub every: Option<u32>,
}

impl fmt::Display for Keep {
    /// The policy as the store records it: `last:2`, `every:10`, `last:2,every:10`.
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        let mut parts = Vec::new();
        if let Some(n) = self.last {
            parts.push(format!("last:{n}"));
        }
        if let Some(k) = self.every {
            parts.push(format!("every:{k}"));
        }
        write!(f, "{}", parts.join(","))
    }
}

/// A stage's kept working folder.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct CaseFolder {
    /// Its name in the scratch directory.
    pub path: String,
    /// The start folder laid out at iteration 1 (`start:` name), else an empty folder.
    pub initially: Option<String>,
}

/// The output role under which a stage's case folder is recorded after each success.
pub const CASE_FOLDER_ROLE: &str = "folder";

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
    /// Built-in equation-of-state fit (an `after-campaign:` stage).
    Eos(EosAnalysis),
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
    /// The per-point stages: `before:` (in their order), the cycle (in topological order),
    /// then `after-point:`; [`Campaign::cycle_start`] and [`Campaign::cycle_end`] delimit the
    /// cycle.
    pub stages: Vec<Stage>,
    /// Number of `before:` stages at the front of `stages`.
    pub n_before: usize,
    /// Number of cycle stages after them.
    pub n_cycle: usize,
    /// The `after-campaign:` stages, in file order (an `analysis: eos:` section is one more,
    /// the built-in `eos`).
    pub after_campaign: Vec<Stage>,
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
    /// Programs run on events.
    pub hooks: Hooks,
    /// The campaign's budget in core-hours, if it states one.
    pub budget_core_hours: Option<f64>,
    /// `warm-start:`: where points added by a revision start (none: from the start files).
    pub warm_start: Option<WarmStart>,
}

/// `warm-start: { along, estimate }`, checked.
#[derive(Debug, Clone, PartialEq)]
pub struct WarmStart {
    /// The sweep axes a point is warm-started along (numeric, at least one).
    pub along: Vec<String>,
    /// Interpolate between two enclosing converged points, or take the nearest.
    pub estimate: WarmEstimate,
}

/// The events a hook may be named for, as the campaign file and the event JSON spell them.
pub const HOOK_EVENTS: [&str; 5] = [
    "point-failed",
    "point-converged",
    "point-capped",
    "campaign-done",
    "disk-low",
];

/// Free space under which `disk-low` fires.
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum DiskFree {
    /// Below this percentage of the file system's size.
    Percent(f64),
    /// Below this many bytes.
    Bytes(u64),
    /// Below 10 GiB or below 5 %, whichever comes first (the default).
    Default,
}

impl DiskFree {
    /// Whether `free` bytes of a file system of `total` bytes are below the threshold.
    pub fn is_low(self, free: u64, total: u64) -> bool {
        let below_percent = |p: f64| total > 0 && (free as f64) < p / 100.0 * total as f64;
        match self {
            DiskFree::Percent(p) => below_percent(p),
            DiskFree::Bytes(b) => free < b,
            DiskFree::Default => free < 10 << 30 || below_percent(5.0),
        }
    }
}

/// The hooks of a campaign.
#[derive(Debug, Clone, PartialEq)]
pub struct Hooks {
    /// Event (one of [`HOOK_EVENTS`]) → argument list (program first).
    pub commands: BTreeMap<String, Vec<String>>,
    /// Longest a hook may run.
    pub time_limit: Duration,
    /// When `disk-low` fires.
    pub disk_free_below: DiskFree,
}

impl Default for Hooks {
    fn default() -> Hooks {
        Hooks {
            commands: BTreeMap::new(),
            time_limit: Duration::from_secs(30),
            disk_free_below: DiskFree::Default,
        }
    }
}

impl Campaign {
    /// Stage by name.
    pub fn stage(&self, name: &str) -> Option<&Stage> {
        self.stages.iter().find(|s| s.name == name)
    }

    /// Index of the first stage an iteration runs: 0 at iteration 1 (the `before:` stages
    /// come first), the first cycle stage after it.
    pub fn first_stage(&self, iteration: u32) -> usize {
        if iteration <= 1 {
            0
        } else {
            self.n_before
        }
    }

    /// Index of the first cycle stage.
    pub fn cycle_start(&self) -> usize {
        self.n_before
    }

    /// Index one past the last cycle stage (the first `after-point:` stage, if any).
    pub fn cycle_end(&self) -> usize {
        self.n_before + self.n_cycle
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

/// An error caused by the user's input, not by the machine: the command line exits with
/// code 2 for it.
#[derive(Debug, thiserror::Error)]
#[error("{0}")]
pub struct BadInput(pub String);
