//! `schedules:`: parameters that follow the loop, `start × factor^k` capped at `max`.

use std::collections::BTreeSet;

use serde_saphyr::Spanned;

use super::{loc, split_ref, Validator};
use crate::spec::model::{RuleTest, Schedule};
use crate::spec::raw::{CampaignFile, Scalar, ScheduleSpec};

impl Validator<'_> {
    /// Every schedule of the file; each good one's name joins `params` (the names a
    /// `{{param:NAME}}` may use).
    pub(super) fn schedules(
        &mut self,
        raw: &CampaignFile,
        params: &mut BTreeSet<String>,
    ) -> Vec<Schedule> {
        let mut schedules = Vec::new();
        for (k, sc) in &raw.schedules.0 {
            if let Some(s) = self.schedule(raw, k, sc, params) {
                params.insert(k.value.clone());
                schedules.push(s);
            }
        }
        schedules
    }

    /// One schedule `k`: a new name, numeric start and max, a positive factor, exactly one
    /// positive condition, and a metric of a stage of the cycle.
    fn schedule(
        &mut self,
        raw: &CampaignFile,
        k: &Spanned<String>,
        sc: &ScheduleSpec,
        params: &BTreeSet<String>,
    ) -> Option<Schedule> {
        let at = loc(k);
        if params.contains(&k.value) {
            self.push(
                at,
                format!(
                    "`{}` is both a schedule and a parameter or sweep axis",
                    k.value
                ),
                "keep one",
            );
            return None;
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
            return None;
        };
        if !(sc.factor.is_finite() && sc.factor > 0.0 && start.is_finite() && max.is_finite()) {
            self.push(
                at,
                format!("schedule `{}`: factor must be a positive number", k.value),
                "e.g. factor: 2",
            );
            return None;
        }
        let test = match (sc.within_errors, sc.change_below) {
            (Some(e), None) if e > 0.0 => RuleTest::Errors(e),
            (None, Some(c)) if c > 0.0 => RuleTest::Abs(c),
            _ => {
                self.push(at, format!("schedule `{}` needs exactly one positive condition: within-errors or change-below", k.value), "e.g. within-errors: 2");
                return None;
            }
        };
        match split_ref(&sc.metric.value) {
            Some((st, _)) if raw.cycle.get(st).is_some() => {}
            _ => {
                self.push(
                    loc(&sc.metric),
                    format!(
                        "schedule `{}`: metric `{}` must be stage.metric of a stage of the cycle",
                        k.value, sc.metric.value
                    ),
                    "e.g. metric: solve.n_f",
                );
                return None;
            }
        }
        Some(Schedule {
            name: k.value.clone(),
            start,
            factor: sc.factor,
            max,
            integer: si && mi,
            metric: sc.metric.value.clone(),
            test,
        })
    }
}

#[cfg(test)]
mod tests {
    use super::super::testing::*;
    use super::*;

    fn with_schedule(schedule: &str) -> CampaignFile {
        raw(&format!(
            "campaign: t
parameters: {{ u: 6.0 }}
cycle:
  solve: {{ run: [/bin/true], metrics: [n_f] }}
stop: {{ max-iterations: 1 }}
schedules:
  {schedule}
"
        ))
    }

    #[test]
    fn a_good_schedule_is_kept_and_its_name_becomes_a_parameter() {
        let raw = with_schedule(
            "sweeps: { start: 20000, factor: 2, max: 320000, metric: solve.n_f, within-errors: 2 }",
        );
        let mut v = validator();
        let mut params = BTreeSet::from(["u".to_string()]);
        let s = v.schedules(&raw, &mut params);
        assert!(v.diags.is_empty(), "{:?}", found(&v));
        assert_eq!(s.len(), 1);
        let s = &s[0];
        assert_eq!(
            (
                s.name.as_str(),
                s.start,
                s.factor,
                s.max,
                s.integer,
                s.metric.as_str()
            ),
            ("sweeps", 20000.0, 2.0, 320000.0, true, "solve.n_f")
        );
        assert!(matches!(s.test, RuleTest::Errors(e) if e == 2.0));
        assert!(params.contains("sweeps"));
    }

    #[test]
    fn a_schedule_named_like_a_parameter_or_with_text_values_is_reported_at_its_name() {
        let cases = [
            (
                "u: { start: 1, factor: 2, max: 4, metric: solve.n_f, change-below: 0.1 }",
                "`u` is both a schedule and a parameter or sweep axis",
            ),
            (
                "w: { start: a, factor: 2, max: 4, metric: solve.n_f, change-below: 0.1 }",
                "schedule `w`: start and max must be numbers",
            ),
            (
                "w: { start: 1, factor: 0, max: 4, metric: solve.n_f, change-below: 0.1 }",
                "schedule `w`: factor must be a positive number",
            ),
            (
                "w: { start: 1, factor: 2, max: 4, metric: solve.n_f }",
                "schedule `w` needs exactly one positive condition: within-errors or change-below",
            ),
        ];
        for (text, want) in cases {
            let mut v = validator();
            let mut params = BTreeSet::from(["u".to_string()]);
            let s = v.schedules(&with_schedule(text), &mut params);
            assert!(s.is_empty());
            assert_eq!(found(&v), vec![(7, 3, want.to_string())], "{text}");
        }
    }

    #[test]
    fn a_schedule_metric_of_no_stage_is_reported_at_the_metric() {
        let mut v = validator();
        let mut params = BTreeSet::new();
        let raw = with_schedule(
            "w: { start: 1, factor: 2, max: 4, metric: other.n_f, change-below: 0.1 }",
        );
        assert!(v.schedules(&raw, &mut params).is_empty());
        assert_eq!(
            found(&v),
            vec![(
                7,
                45,
                "schedule `w`: metric `other.n_f` must be stage.metric of a stage of the cycle"
                    .to_string()
            )]
        );
        assert!(params.is_empty());
    }
}
