//! Stopping rules: after each good iteration, decide from the metric history of a point
//! whether it has converged, has hit the iteration cap, or goes on.
//!
//! A rule holds at iteration j when the change of its metric between iterations j−1 and j
//! passes the rule's test; it is satisfied at iteration n when it held at each of the last
//! `for` iterations n−for+1..n. Iteration 1 has no change, so no rule holds there. With
//! `compare: window` the value of iteration j−1 must pass the test against every value of
//! j..n, not only against x_j: the rule is satisfied when all pairs of the last `for` + 1
//! values agree, which a slow drift hidden in the noise of each step does not.

use std::collections::BTreeMap;

use serde::Serialize;

use crate::spec::{Combine, Compare, Rule, RuleTest};

/// A metric value with its standard error (if noisy), at one iteration.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Sample {
    /// Value.
    pub value: f64,
    /// Standard error.
    pub error: Option<f64>,
}

/// Evaluation of one rule at the latest iteration (recorded as JSON with the iteration).
#[derive(Debug, Clone, Serialize, PartialEq)]
pub struct RuleState {
    /// `stage.metric`.
    pub metric: String,
    /// |x_n − x_{n−1}|, if both exist.
    pub change: Option<f64>,
    /// The threshold the change was compared with at iteration n.
    pub threshold: Option<f64>,
    /// Consecutive iterations (ending at n) at which the test held.
    pub streak: u32,
    /// Needed streak.
    pub needed: u32,
    /// Whether the rule is satisfied.
    pub satisfied: bool,
}

/// The evaluation of the rules after a good iteration (recorded as the iteration's
/// `stop_json`); the engine combines it with the final window into the point's fate.
#[derive(Debug, Clone, Serialize, PartialEq)]
pub struct Decision {
    /// The rules, evaluated.
    pub rules: Vec<RuleState>,
    /// All (or any) rules satisfied at this iteration.
    pub rules_met: bool,
    /// The iteration cap is reached.
    pub at_cap: bool,
    /// Why the point is diverging, if a rule's change exceeds its `diverge-above`.
    pub diverged: Option<String>,
}

/// Whether the test holds between a previous and a current sample; also the threshold used.
pub fn holds(test: RuleTest, prev: Sample, cur: Sample) -> (bool, Option<f64>) {
    let change = (cur.value - prev.value).abs();
    let threshold = match test {
        RuleTest::Abs(tol) => Some(tol),
        RuleTest::Rel(tol) => Some(tol * cur.value.abs()),
        RuleTest::Errors(k) => match (prev.error, cur.error) {
            (Some(a), Some(b)) => Some(k * (a * a + b * b).sqrt()),
            _ => None,
        },
    };
    match (test, threshold) {
        (RuleTest::Errors(_), Some(t)) => (change <= t, Some(t)),
        (_, Some(t)) => (change < t, Some(t)),
        (_, None) => (false, None),
    }
}

/// Evaluate the rules at the last iteration of `history` (iteration → metric → sample; the
/// iterations must be the good ones 1..=n of one point).
pub fn decide(
    rules: &[Rule],
    combine: Combine,
    max_iterations: u32,
    history: &BTreeMap<u32, BTreeMap<String, Sample>>,
) -> Decision {
    let n = history.keys().next_back().copied().unwrap_or(0);
    let mut states = Vec::with_capacity(rules.len());
    for rule in rules {
        let sample = |j: u32| history.get(&j).and_then(|m| m.get(&rule.metric)).copied();
        let mut streak = 0;
        let mut change = None;
        let mut threshold = None;
        let mut j = n;
        'back: while j >= 2 {
            let (Some(cur), Some(prev)) = (sample(j), sample(j - 1)) else {
                break;
            };
            let (ok, t) = holds(rule.test, prev, cur);
            if j == n {
                change = Some((cur.value - prev.value).abs());
                threshold = t;
            }
            if !ok {
                break;
            }
            if rule.compare == Compare::Window {
                // x_{j−1} against the later values of the window too.
                for later in j + 1..=n {
                    match sample(later) {
                        Some(x) if holds(rule.test, prev, x).0 => {}
                        _ => break 'back,
                    }
                }
            }
            streak += 1;
            if streak >= rule.for_ {
                break;
            }
            j -= 1;
        }
        states.push(RuleState {
            metric: rule.metric.clone(),
            change,
            threshold,
            streak,
            needed: rule.for_,
            satisfied: streak >= rule.for_,
        });
    }
    let rules_met = !states.is_empty()
        && match combine {
            Combine::All => states.iter().all(|s| s.satisfied),
            Combine::Any => states.iter().any(|s| s.satisfied),
        };
    let diverged = rules.iter().zip(&states).find_map(|(r, s)| {
        let limit = r.diverge_above?;
        let change = s.change?;
        (n >= 3 && change > limit).then(|| {
            format!(
                "{} changed by {change:.3e} at iteration {n}, above diverge-above {limit:.3e}",
                r.metric
            )
        })
    });
    Decision {
        rules: states,
        rules_met,
        at_cap: n >= max_iterations,
        diverged,
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn hist(values: &[f64]) -> BTreeMap<u32, BTreeMap<String, Sample>> {
        values
            .iter()
            .enumerate()
            .map(|(i, v)| {
                let mut m = BTreeMap::new();
                m.insert(
                    "update.n_f".to_string(),
                    Sample {
                        value: *v,
                        error: Some(0.01),
                    },
                );
                (i as u32 + 1, m)
            })
            .collect()
    }

    fn rule(test: RuleTest, k: u32) -> Rule {
        Rule {
            metric: "update.n_f".into(),
            test,
            for_: k,
            compare: Compare::Successive,
            diverge_above: Some(0.5),
        }
    }

    #[test]
    fn change_below_for_k() {
        let r = [rule(RuleTest::Abs(1e-3), 2)];
        // changes: 0.1, 1e-4 (holds once) → not yet
        let d = decide(&r, Combine::All, 10, &hist(&[1.0, 1.1, 1.1001]));
        assert!(!d.rules_met);
        assert_eq!(d.rules[0].streak, 1);
        let d = decide(&r, Combine::All, 10, &hist(&[1.0, 1.1, 1.1001, 1.1002]));
        assert!(d.rules_met, "{d:?}");
        // cap
        let d = decide(&r, Combine::All, 3, &hist(&[1.0, 1.1, 1.2]));
        assert!(d.at_cap && !d.rules_met);
        // divergence: a change above 0.5 from iteration 3 on
        let d = decide(&r, Combine::All, 9, &hist(&[1.0, 1.1, 1.2, 2.0]));
        assert!(d.diverged.is_some_and(|m| m.contains("diverge-above")));
    }

    #[test]
    fn relative_and_noise_aware() {
        let r = [rule(RuleTest::Rel(1e-3), 1)];
        assert!(decide(&r, Combine::All, 9, &hist(&[100.0, 100.05])).rules_met);
        assert!(!decide(&r, Combine::All, 9, &hist(&[1.0, 1.05])).rules_met);
        // within 2 combined errors: 2 * sqrt(2) * 0.01 = 0.0283
        let r = [rule(RuleTest::Errors(2.0), 1)];
        assert!(decide(&r, Combine::All, 9, &hist(&[1.0, 1.02])).rules_met);
        assert!(!decide(&r, Combine::All, 9, &hist(&[1.0, 1.03])).rules_met);
    }

    #[test]
    fn a_window_rule_sees_a_drift_hidden_in_the_noise_of_each_step() {
        // Errors 0.01: two combined errors are 0.0283. Steps of 0.02 pass one by one, but
        // over three steps the drift is 0.06.
        let drift = hist(&[1.0, 1.02, 1.04, 1.06]);
        let successive = [rule(RuleTest::Errors(2.0), 3)];
        assert!(decide(&successive, Combine::All, 9, &drift).rules_met);
        let mut window = successive.clone();
        window[0].compare = Compare::Window;
        let d = decide(&window, Combine::All, 9, &drift);
        assert!(!d.rules_met, "{d:?}");
        // 1.06 passes against 1.04 only: the window that agrees ends with a streak of 1.
        assert_eq!(d.rules[0].streak, 1);
        // Noise around a plateau passes both.
        let plateau = hist(&[1.0, 1.02, 1.0, 1.015, 0.998]);
        assert!(decide(&window, Combine::All, 9, &plateau).rules_met);
        assert!(decide(&successive, Combine::All, 9, &plateau).rules_met);
    }
}
