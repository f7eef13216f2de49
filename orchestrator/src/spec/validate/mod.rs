//! The check that turns a parsed [`CampaignFile`] into a [`Campaign`], or into every problem
//! of the file as `line:col: what; hint` diagnostics.
//!
//! [`Validator::run`] calls one function per section of the file, in file order (campaign
//! name, programs, start files, sweep, schedules, stages, stopping rules, stage order,
//! analysis, hooks, budget); each section lives in its own file here, reports through
//! [`Validator::push`] and returns its part of the model. Diagnostics are sorted by location
//! at the end (a stable sort, so problems at one place keep the order in which they were
//! found).
//! No file I/O beyond looking for the programs and start files the campaign names.

mod analysis;
mod builtins;
mod commands;
mod folders;
mod hooks;
mod metric_sources;
mod programs;
mod resident;
mod resources;
mod rules;
mod schedules;
mod stage_env;
mod stages;
mod start;
mod sweep;

use std::path::{Path, PathBuf};

use serde_saphyr::Spanned;

use super::model::{Campaign, Diagnostic, Section, SpecErrors};
use super::raw::CampaignFile;

pub use programs::{is_executable, resolve_program};
pub use resources::parse_duration;

/// Collects the diagnostics of one campaign file while its sections are checked.
pub(super) struct Validator<'a> {
    /// The campaign file (names it in diagnostics; its folder anchors relative paths).
    file: &'a Path,
    /// Problems found so far, in the order found.
    diags: Vec<Diagnostic>,
}

/// The `(line, column)` of a located value.
fn loc<T>(s: &Spanned<T>) -> (u64, u64) {
    (s.referenced.line(), s.referenced.column())
}

/// The lines of `text` as YAML numbers them (YAML 1.2, 5.4 "Line Break Characters"): a
/// line ends at CR LF, at LF, or at a CR alone, so that a line found here has the number the
/// parser's locations give it.
fn yaml_lines(text: &str) -> impl Iterator<Item = &str> {
    let mut rest = Some(text).filter(|t| !t.is_empty());
    std::iter::from_fn(move || {
        let t = rest?;
        match t.find(['\r', '\n']) {
            Some(i) => {
                let skip = if t[i..].starts_with("\r\n") { 2 } else { 1 };
                rest = Some(&t[i + skip..]).filter(|r| !r.is_empty());
                Some(&t[..i])
            }
            None => {
                rest = None;
                Some(t)
            }
        }
    })
}

/// `a.b` → `(a, b)`, both non-empty.
fn split_ref(s: &str) -> Option<(&str, &str)> {
    let (a, b) = s.split_once('.')?;
    (!a.is_empty() && !b.is_empty()).then_some((a, b))
}

impl<'a> Validator<'a> {
    /// A validator for the campaign file `file`, with no diagnostics yet.
    pub(super) fn new(file: &'a Path) -> Self {
        Validator {
            file,
            diags: Vec::new(),
        }
    }

    fn push(&mut self, at: (u64, u64), message: impl Into<String>, hint: impl Into<String>) {
        self.diags.push(Diagnostic {
            line: at.0,
            column: at.1,
            message: message.into(),
            hint: hint.into(),
        });
    }

    /// Check every section of `raw` (whose text is `text`) and build the campaign.
    pub(super) fn run(mut self, raw: CampaignFile, text: &str) -> Result<Campaign, SpecErrors> {
        let base = self.folder();
        let name = self.campaign_name(&raw);
        let mut programs = self.programs(&raw, &base);
        let start = self.start_files(&raw, &base);
        let parameters = sweep::parameters(&raw);
        let points = self.points(&raw);
        let mut params = sweep::param_names(&parameters, &points);
        let schedules = self.schedules(&raw, &mut params);
        let before = self.section_stages(&raw, Section::Before, &params, &mut programs, &base);
        let cycle = self.stages(&raw, &params, &mut programs, &base);
        let after_point =
            self.section_stages(&raw, Section::AfterPoint, &params, &mut programs, &base);
        // A campaign-level stage has no point: only the campaign's own parameters.
        let campaign_params = parameters.iter().map(|(k, _)| k.clone()).collect();
        let mut after_campaign = self.section_stages(
            &raw,
            Section::AfterCampaign,
            &campaign_params,
            &mut programs,
            &base,
        );
        let stop = self.stop(&raw, text);
        let before = self.order(&raw, &before);
        let cycle = self.order(&raw, &cycle);
        let after_point = self.order(&raw, &after_point);
        let (n_before, n_cycle) = (before.len(), cycle.len());
        let stages: Vec<_> = before.into_iter().chain(cycle).chain(after_point).collect();
        let eos = self.eos(&raw, &points);
        if let Some(e) = &eos {
            self.eos_as_stage(&raw, e, &mut after_campaign);
        }
        let hooks = self.hooks(&raw, &base);
        let budget_core_hours = self.budget(&raw);
        let warm_start = self.warm_start(&raw, &points);
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
            stages,
            n_before,
            n_cycle,
            after_campaign,
            points,
            rules: stop.rules,
            combine: stop.combine,
            max_iterations: stop.max_iterations,
            seed: raw.seed.unwrap_or(0),
            final_window: stop.final_window,
            eos,
            schedules,
            warnings: stop.warnings,
            hooks,
            budget_core_hours,
            warm_start,
        })
    }

    /// The campaign file's folder (`.` for a bare file name): relative paths start here.
    fn folder(&self) -> PathBuf {
        let base = self
            .file
            .parent()
            .map(Path::to_path_buf)
            .unwrap_or_default();
        if base.as_os_str().is_empty() {
            PathBuf::from(".")
        } else {
            base
        }
    }

    /// `campaign:`: letters, digits, `-` and `_`.
    fn campaign_name(&mut self, raw: &CampaignFile) -> String {
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
        name
    }
}

/// Helpers of the section tests: a campaign file from YAML, and the diagnostics a section
/// reported as `(line, column, message)`.
#[cfg(test)]
pub(super) mod testing {
    use super::*;

    /// Parse `yaml` into the file types (panics on a parse error: the tests' inputs parse).
    pub fn raw(yaml: &str) -> CampaignFile {
        serde_saphyr::from_str(yaml).unwrap_or_else(|e| panic!("{e}\n{yaml}"))
    }

    /// A validator for a campaign file named `c.yaml` in the current folder.
    pub fn validator() -> Validator<'static> {
        Validator::new(Path::new("c.yaml"))
    }

    /// The diagnostics so far: `(line, column, message)`.
    pub fn found(v: &Validator) -> Vec<(u64, u64, String)> {
        v.diags
            .iter()
            .map(|d| (d.line, d.column, d.message.clone()))
            .collect()
    }

    /// The hints so far.
    pub fn hints(v: &Validator) -> Vec<String> {
        v.diags.iter().map(|d| d.hint.clone()).collect()
    }
}

#[cfg(test)]
mod tests {
    use super::testing::*;
    use super::*;

    const MINIMAL: &str = "campaign: t
cycle:
  s: { run: [/bin/true] }
stop: { max-iterations: 1 }
";

    #[test]
    fn a_campaign_name_of_letters_digits_dash_and_underscore_passes() {
        let mut v = validator();
        assert_eq!(v.campaign_name(&raw(MINIMAL)), "t");
        let mut v2 = validator();
        v2.campaign_name(&raw(&MINIMAL.replace("campaign: t", "campaign: a-b_9")));
        assert!(v.diags.is_empty() && v2.diags.is_empty());
    }

    #[test]
    fn a_campaign_name_with_a_space_or_empty_is_refused_at_its_value() {
        for name in ["\"a b\"", "\"\""] {
            let mut v = validator();
            v.campaign_name(&raw(
                &MINIMAL.replace("campaign: t", &format!("campaign: {name}"))
            ));
            let want = format!("campaign name `{}` is not allowed", name.trim_matches('"'));
            assert_eq!(found(&v), vec![(1, 11, want)]);
        }
    }

    #[test]
    fn yaml_lines_end_at_cr_lf_lf_or_a_lone_cr() {
        let lines: Vec<&str> = yaml_lines("a\r\nb\rc\n\nd\n").collect();
        assert_eq!(lines, ["a", "b", "c", "", "d"]);
        assert_eq!(yaml_lines("").count(), 0);
    }

    #[test]
    fn the_folder_of_a_bare_file_name_is_the_current_one() {
        assert_eq!(validator().folder(), PathBuf::from("."));
        assert_eq!(
            Validator::new(Path::new("/x/y/c.yaml")).folder(),
            PathBuf::from("/x/y")
        );
    }

    #[test]
    fn problems_come_back_sorted_by_place_and_a_clean_file_gives_a_campaign() {
        let c = validator().run(raw(MINIMAL), MINIMAL);
        let c = c.unwrap_or_else(|e| panic!("{e}"));
        assert_eq!(
            (c.name.as_str(), c.stages.len(), c.max_iterations),
            ("t", 1, 1)
        );
        // two problems, the later one (line 4) found first
        let text = "campaign: \"a b\"
cycle:
  s: { run: [/bin/true] }
stop: { max-iterations: 0 }
";
        let e = validator().run(raw(text), text).err();
        let lines: Vec<(u64, u64)> = e
            .map(|e| e.diagnostics.iter().map(|d| (d.line, d.column)).collect())
            .unwrap_or_default();
        assert_eq!(lines, vec![(1, 11), (4, 25)]);
    }
}
