//! `stop:`: the iteration cap, the stopping rules on metrics (each on a metric the stage
//! reports, with exactly one positive test), how the rules combine, and the final window;
//! a campaign without rules gets a warning.

use super::{loc, split_ref, yaml_lines, Validator};
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
            // `stop:` carries no location of its own: its line in the text, counted as YAML
            // counts lines (a lone CR breaks one too); written in flow style (no line starts
            // with `stop:`), the place of `max-iterations`, which every `stop:` has.
            let at = yaml_lines(text)
                .position(|l| l.starts_with("stop:"))
                .map(|i| (i as u64 + 1, 1))
                .unwrap_or_else(|| loc(&raw.stop.max_iterations));
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

#[cfg(test)]
mod tests {
    use super::super::testing::*;
    use super::*;
    use crate::spec::raw::Compare;

    /// A cycle of a program stage `p` (metrics `e`, `n`), a mix and a filter, with `stop`.
    fn with_stop(stop: &str) -> (CampaignFile, String) {
        let text = format!(
            "campaign: t
start: {{ s0: x.json }}
cycle:
  p: {{ run: [/bin/true], metrics: [e, n], outputs: {{ y: y.npy, g: g.npy }} }}
  m: {{ builtin: mix, inputs: {{ y: p.y }}, outputs: {{ y: y.npy }} }}
  f: {{ builtin: filter, inputs: {{ gtau: p.g }}, outputs: {{ giw: giw.npy }} }}
stop: {stop}
"
        );
        (raw(&text), text)
    }

    fn stop_of(stop: &str) -> (Stop, Vec<(u64, u64, String)>) {
        let (raw, text) = with_stop(stop);
        let mut v = validator();
        let s = v.stop(&raw, &text);
        (s, found(&v))
    }

    #[test]
    fn rules_on_reported_metrics_are_kept_with_their_settings() {
        let (s, d) = stop_of(
            "{ max-iterations: 9, combine: any, final-window: 3, when: [
    { metric: p.e, change-below: 1.0e-6, for: 2, compare: window },
    { metric: m.residual_norm_y, relative-change-below: 0.01, diverge-above: 5 },
    { metric: f.density_per_spin, within-errors: 2 } ] }",
        );
        assert!(d.is_empty(), "{d:?}");
        assert_eq!(
            (s.combine, s.max_iterations, s.final_window, s.rules.len()),
            (Combine::Any, 9, 3, 3)
        );
        let r = &s.rules[0];
        assert_eq!(
            (r.metric.as_str(), r.for_, r.compare),
            ("p.e", 2, Compare::Window)
        );
        assert!(matches!(r.test, RuleTest::Abs(x) if x == 1.0e-6));
        assert!(matches!(s.rules[1].test, RuleTest::Rel(x) if x == 0.01));
        assert_eq!(s.rules[1].diverge_above, Some(5.0));
        assert!(matches!(s.rules[2].test, RuleTest::Errors(k) if k == 2.0));
        assert!(s.warnings.is_empty());
    }

    #[test]
    fn no_rule_is_a_warning_at_the_stop_line_and_a_zero_cap_an_error_at_its_value() {
        let (s, d) = stop_of("{ max-iterations: 0 }");
        assert_eq!(
            d,
            vec![(7, 25, "stop.max-iterations must be at least 1".to_string())]
        );
        let w: Vec<(u64, u64, &str)> = s
            .warnings
            .iter()
            .map(|w| (w.line, w.column, w.message.as_str()))
            .collect();
        assert_eq!(
            w,
            [(
                7,
                1,
                "no stopping rule: every point runs max-iterations iterations"
            )]
        );
    }

    #[test]
    fn a_rule_on_a_metric_its_stage_does_not_report_is_reported_at_the_metric() {
        let cases = [
            ("nodot", "metric `nodot` must be written stage.metric"),
            ("q.e", "stop rule names unknown stage `q`"),
            ("p.x", "stage `p` does not list metric `x`"),
            (
                "m.energy",
                "built-in stage `m` reports residual_norm, residual_norm_ROLE (several inputs), history and resets, not `energy`",
            ),
            (
                "f.residual",
                "built-in stage `f` reports legendre_kept, legendre_dropped, density_per_spin, tail_c1, not `residual`",
            ),
        ];
        for (metric, want) in cases {
            let (s, d) = stop_of(&format!(
                "{{ max-iterations: 1, when: [{{ metric: {metric}, change-below: 0.1 }}] }}"
            ));
            assert_eq!(d, vec![(7, 45, want.to_string())], "{metric}");
            // only a rule that cannot be split into stage and metric is dropped
            assert_eq!(s.rules.len(), usize::from(metric != "nodot"), "{metric}");
        }
    }

    #[test]
    fn a_rule_needs_exactly_one_positive_test_and_a_positive_divergence_bound() {
        let cases = [
            (
                "change-below: 0.1, within-errors: 2",
                "a stop rule needs exactly one of change-below, relative-change-below, within-errors",
            ),
            ("", "a stop rule needs exactly one of change-below, relative-change-below, within-errors"),
            ("change-below: -1", "tolerances must be positive numbers and `for` at least 1"),
            ("change-below: 0.1, for: 0", "tolerances must be positive numbers and `for` at least 1"),
            ("change-below: 0.1, diverge-above: 0", "diverge-above must be a positive number"),
        ];
        for (test, want) in cases {
            let (s, d) = stop_of(&format!(
                "{{ max-iterations: 1, when: [{{ metric: p.e, {test} }}] }}"
            ));
            assert_eq!(d, vec![(7, 45, want.to_string())], "{test}");
            assert!(s.rules.is_empty(), "{test}");
        }
    }
}
