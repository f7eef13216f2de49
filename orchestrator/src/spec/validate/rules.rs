//! `stop:`: the iteration cap, the stopping rules on metrics (each on a metric the stage
//! reports, with exactly one positive test), how the rules combine, and the final window;
//! a campaign without rules gets a warning.

use super::{loc, split_ref, Validator};
use crate::spec::model::{Diagnostic, Rule, RuleTest, FILTER_METRICS};
use crate::spec::raw::{CampaignFile, Combine, RuleSpec, StageSpec};

/// The checked `stop:` section.
pub(super) struct Stop {
    /// Rules on metrics.
    pub(super) rules: Vec<Rule>,
    /// How they combine.
    pub(super) combine: Combine,
    /// Iteration cap.
    pub(super) max_iterations: u32,
    /// Iterations averaged after convergence.
    pub(super) final_window: u32,
    /// Allowed but probably not meant (no rule at all).
    pub(super) warnings: Vec<Diagnostic>,
}

impl Validator<'_> {
    /// `stop:` of `raw`, whose text is `text` (the warning names the line of `stop:`).
    pub(super) fn stop(&mut self, raw: &CampaignFile, text: &str) -> Stop {
        if raw.stop.max_iterations.value == 0 {
            self.push(
                loc(&raw.stop.max_iterations),
                "stop.max-iterations must be at least 1",
                "set max-iterations: N",
            );
        }
        let mut rules = Vec::new();
        for r in &raw.stop.when {
            if let Some(rule) = self.rule(raw, r) {
                rules.push(rule);
            }
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
        Stop {
            rules,
            combine: raw.stop.combine,
            max_iterations: raw.stop.max_iterations.value,
            final_window: raw.stop.final_window,
            warnings,
        }
    }

    /// One rule: `stage.metric` of a metric the stage reports, exactly one positive test,
    /// `for` at least 1, a positive divergence threshold.
    fn rule(&mut self, raw: &CampaignFile, r: &RuleSpec) -> Option<Rule> {
        let at = loc(&r.metric);
        let Some((s, m)) = split_ref(&r.metric.value) else {
            self.push(
                at,
                format!("metric `{}` must be written stage.metric", r.metric.value),
                "e.g. update.n_f",
            );
            return None;
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
            Some(st) => self.rule_metric(at, s, m, st),
        }
        let tests = [
            r.change_below.map(RuleTest::Abs),
            r.relative_change_below.map(RuleTest::Rel),
            r.within_errors.map(RuleTest::Errors),
        ];
        let set: Vec<RuleTest> = tests.into_iter().flatten().collect();
        if set.len() != 1 {
            self.push(at, "a stop rule needs exactly one of change-below, relative-change-below, within-errors", "split it into several rules");
            return None;
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
            return None;
        }
        if r.diverge_above.is_some_and(|x| !(x.is_finite() && x > 0.0)) {
            self.push(
                at,
                "diverge-above must be a positive number",
                "e.g. diverge-above: 0.5",
            );
            return None;
        }
        Some(Rule {
            metric: r.metric.value.clone(),
            test: set[0],
            for_: r.for_,
            compare: r.compare,
            diverge_above: r.diverge_above,
        })
    }

    /// Metric `m` of stage `s` (`st`) is one the stage reports: a built-in's own metrics,
    /// or one of a program stage's `metrics:` when it lists any.
    fn rule_metric(&mut self, at: (u64, u64), s: &str, m: &str, st: &StageSpec) {
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
        } else if !is_mix && st.builtin.is_some() && !FILTER_METRICS.contains(&m) {
            self.push(
                at,
                format!(
                    "built-in stage `{s}` reports {}, not `{m}`",
                    FILTER_METRICS.join(", ")
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
