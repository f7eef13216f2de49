//! The campaign file, from its text to the validated model: the serde types the YAML is
//! read into and the JSON Schema derived from them (`raw`), the checked campaign the rest
//! of rondo works from (`model`), the checks between the two, one file per section of the
//! campaign file (`validate`), and the order of the stages within one iteration (`graph`).
//!
//! A problem in the file comes back as [`SpecErrors`]: every problem found, each as
//! `file:line:col: what; hint: what to do`, sorted by place.
//!
//! This module may not touch the store (no SQL), the executors, or the engine: it knows
//! files and their meaning, nothing about running them. It looks at the file system only
//! to find the programs and start files a campaign names. Other modules depend on it, never
//! the reverse; the built-in stages import from it what they report and take.

pub mod graph;
mod model;
mod raw;
mod validate;

use std::path::Path;

pub use model::{
    BadInput, Campaign, CaseFolder, Diagnostic, DiskFree, EnergyUnit, EosAnalysis, Hooks, Initial,
    Keep, MetricSource, Placement, PointSelection, PointSpec, PointsRead, ResolvedProgram, Rule,
    RuleTest, Schedule, Section, Source, SourceKind, SpecErrors, Stage, StageKind, WarmStart,
    CASE_FOLDER_ROLE, EOS_STAGE, FILTER_METRICS, HOOK_EVENTS, LEGACY_ROLE,
};
pub use raw::{
    AnalysisSpec, BuiltinSettings, CampaignFile, Combine, Compare, Defaults, EosModelName, EosSpec,
    FilterSettings, InputSpec, MetricSourceSpec, MixMethod, MixSettings, OrderedMap, OutputSpec,
    PointsInput, PreviousInput, Program, RuleSpec, RunSpec, Scalar, ScheduleSpec, StageSpec,
    StopSpec, Sweep, WarmEstimate,
};
pub use validate::{is_executable, parse_duration, resolve_program};

use validate::Validator;

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
    Validator::new(file).run(raw, text)
}

/// The JSON Schema of the campaign file, pretty-printed with a trailing newline.
pub fn json_schema() -> String {
    let schema = schemars::schema_for!(CampaignFile);
    let mut s = serde_json::to_string_pretty(&schema).unwrap_or_default();
    s.push('\n');
    s
}
