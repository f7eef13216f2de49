//! `resident:` of a stage: its program is started once and takes every attempt's work through
//! hand-off files (docs/resident.md). What that rules out: a built-in, a command that differs
//! from one attempt to the next (inputs, outputs, iteration, seed), outliving rondo, a case
//! folder named like the hand-off folder, and metrics from the standard output (which is the
//! process's, not one hand-off's).

use super::{loc, Validator};
use crate::resident::HANDOFF_DIR;
use crate::spec::model::{MetricSource, StageKind};
use crate::spec::raw::StageSpec;

/// Placeholders whose value changes from one attempt to the next.
const PER_ATTEMPT: [(Option<&str>, &str); 4] = [
    (Some("input"), ""),
    (Some("output"), ""),
    (None, "iteration"),
    (None, "seed"),
];

impl Validator<'_> {
    /// Whether the stage is resident (`false` when absent, false, or wrong).
    pub(super) fn resident(
        &mut self,
        sname: &str,
        st: &StageSpec,
        kind: &StageKind,
        sources: &[MetricSource],
    ) -> bool {
        let Some(spec) = st.resident.as_ref().filter(|r| r.value) else {
            return false;
        };
        let at = loc(spec);
        let template = match kind {
            StageKind::Command { template, .. } | StageKind::Shell { template, .. } => template,
            _ => {
                self.push(
                    at,
                    format!("built-in stage `{sname}` cannot be resident"),
                    "remove `resident:`; only a program given with `run` can stay alive",
                );
                return false;
            }
        };
        let mut ok = true;
        let varying = template.placeholders().find(|(ns, name, _)| {
            PER_ATTEMPT
                .iter()
                .any(|(n, m)| n == ns && (m.is_empty() || m == name))
        });
        if let Some((ns, name, _)) = varying {
            let shown = ns.map_or(name.to_string(), |ns| format!("{ns}:{name}"));
            self.push(
                at,
                format!("stage `{sname}`: a resident program's command cannot use `{{{{{shown}}}}}`"),
                "the command starts the program once for many hand-offs: inputs come as files in each hand-off folder (docs/resident.md)",
            );
            ok = false;
        }
        if st.outlive_rondo == Some(true) {
            self.push(
                at,
                format!("stage `{sname}`: a resident program never outlives rondo"),
                "remove `outlive-rondo`: the next run starts the program again from the last good iteration",
            );
            ok = false;
        }
        if let Some(cf) = st.case_folder.as_ref() {
            if cf
                .value
                .path
                .as_ref()
                .is_some_and(|p| p.value == HANDOFF_DIR)
            {
                self.push(
                    loc(cf),
                    format!("stage `{sname}`: a resident stage's case folder cannot be named `{HANDOFF_DIR}`"),
                    "choose another `path`: the hand-off folder has that name",
                );
                ok = false;
            }
        }
        if sources
            .iter()
            .any(|s| s.file == super::metric_sources::STDOUT_FILE)
        {
            self.push(
                at,
                format!(
                    "stage `{sname}`: a resident program's standard output spans every hand-off"
                ),
                "read the metric from a file the program writes into the hand-off's `out/` folder",
            );
            ok = false;
        }
        ok
    }
}
