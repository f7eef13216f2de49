//! The iteration's decisions: metric histories, the stopping rules' verdict, the loop-driven
//! parameters (schedules), and stopping a point as failed.

use super::*;

/// The failpoints of a verdict recorded (or held back) with the last stage's success: the
/// iteration closed and, when the verdict stops the point, the point stopped.
pub(super) fn verdict_failpoints(v: &Verdict) {
    failpoint::hit(Failpoint::IterationClosed);
    if v.fate.is_some() {
        failpoint::hit(Failpoint::PointStopped);
    }
}

/// Write a verdict: the iteration is good (with the rules' evaluation, `stop_json`), and
/// either the point stops or its next iteration begins.
pub(super) fn record_verdict(
    script: &mut store::Script,
    point_id: &str,
    v: &Verdict,
    stop_json: String,
) {
    let n = v.iteration;
    script.iteration_good(point_id, n, stop_json);
    if let Some((state, reason)) = &v.fate {
        script.point_state(point_id, *state, Some(reason));
        script.event(
            &format!("point-{state}"),
            Some(point_id),
            Some(n),
            None,
            reason,
        );
    } else {
        script.iterations_begun(&[(point_id.to_string(), n + 1)]);
    }
}

impl Engine<'_> {
    /// Read a point's metric history from the store unless it is already in memory: the
    /// metrics of its good iterations and of the current one, and the start of its final
    /// window. A resumed run reads exactly what an uninterrupted one kept in memory.
    pub(super) async fn ensure_history(&mut self, p: usize) -> Result<()> {
        if self.points[p].history.is_some() {
            return Ok(());
        }
        let point_id = self.points[p].spec.id.clone();
        let n = self.points[p].iteration;
        let store = self.ledger.flush().await?;
        let rows = store.metric_history(&point_id, n).await?;
        let first_met = store.first_rules_met(&point_id).await?;
        let mut history = History::new();
        history.entry(n).or_default();
        for (it, name, value, error) in rows {
            history
                .entry(it)
                .or_default()
                .insert(name, Sample { value, error });
        }
        let pr = &mut self.points[p];
        pr.history = Some(history);
        pr.first_met = first_met;
        Ok(())
    }

    /// Stop point `p` as failed at `iteration`, in one transaction: the iteration and the
    /// point are marked failed with `reason`, and a `point-failed` event (after `event`, if
    /// given, with the same text) names the attempt that ended it, if any.
    pub(super) async fn fail_point(
        &mut self,
        p: usize,
        iteration: u32,
        attempt: Option<i64>,
        reason: &str,
        event: Option<&str>,
    ) -> Result<()> {
        self.points[p].phase = PointPhase::Done;
        let point_id = self.points[p].spec.id.clone();
        self.ledger
            .write(Failpoint::PointStopped, |s| {
                s.iteration_ended(&point_id, iteration, IterationState::Failed);
                s.point_state(&point_id, PointState::Failed, Some(reason));
                for kind in event.into_iter().chain(["point-failed"]) {
                    let at = if kind == "point-failed" {
                        attempt
                    } else {
                        None
                    };
                    s.event(kind, Some(&point_id), Some(iteration), at, reason);
                }
            })
            .await?;
        self.hooks
            .point_stopped(&self.points[p].spec, PointState::Failed, iteration, reason);
        self.progress.line(format!("{point_id} failed: {reason}"));
        Ok(())
    }

    /// Values of the loop-driven parameters for a point's iteration, from the metrics of its
    /// earlier good iterations (so a resumed run computes the same values).
    pub(super) async fn schedule_values(
        &mut self,
        p: usize,
        iteration: u32,
    ) -> Result<Vec<(String, String)>> {
        let mut out = Vec::new();
        if self.campaign.schedules.is_empty() {
            return Ok(out);
        }
        self.ensure_history(p).await?;
        let history = self.points[p].history.as_ref();
        for sc in &self.campaign.schedules {
            // Every iteration before the current one in the history is a good one.
            let samples: Vec<Sample> = history
                .into_iter()
                .flat_map(|h| h.range(..iteration))
                .filter_map(|(_, m)| m.get(&sc.metric).copied())
                .collect();
            let held = samples
                .windows(2)
                .filter(|w| stop::holds(sc.test, w[0], w[1]).0)
                .count();
            let mut v = sc.start;
            for _ in 0..held {
                v *= sc.factor;
                if v >= sc.max {
                    break;
                }
            }
            let v = v.min(sc.max);
            out.push((
                sc.name.clone(),
                if sc.integer {
                    format!("{}", v.round() as i64)
                } else {
                    format!("{v:?}")
                },
            ));
        }
        Ok(out)
    }

    /// All stages of the point's iteration succeeded (found so on resume): apply the
    /// stopping rules. Normally the verdict is recorded with the last stage's success.
    pub(super) async fn finish_iteration(&mut self, p: usize) -> Result<()> {
        self.ensure_history(p).await?;
        let v = self.judge(p)?;
        let point_id = self.points[p].spec.id.clone();
        let stop_json = serde_json::to_string(&v.decision)?;
        self.ledger
            .write(Failpoint::IterationClosed, |s| {
                record_verdict(s, &point_id, &v, stop_json)
            })
            .await?;
        if v.fate.is_some() {
            failpoint::hit(Failpoint::PointStopped);
        }
        self.apply_verdict(p, v);
        self.retain(p).await
    }

    /// After a good iteration: let go of stored content the retention policies no longer
    /// keep (nothing without `keep:`; a few index look-ups per policy otherwise).
    pub(super) async fn retain(&mut self, p: usize) -> Result<()> {
        if self.policies.is_empty() {
            return Ok(());
        }
        let point = self.points[p].spec.id.clone();
        let store = self.ledger.flush().await?;
        let done = crate::retention::after_iteration(
            store.pool(),
            &self.artifacts,
            &self.policies,
            &point,
        )
        .await?;
        if done.files > 0 {
            tracing::debug!(point, files = done.files, bytes = done.bytes, "retention");
        }
        Ok(())
    }

    /// At the start of a run after an unclean end: one retention pass over every point, and
    /// the files of recorded removals deleted. A crash between an iteration's record and its
    /// pass, or between a removal's record and its file's deletion, leaves content the
    /// policies no longer keep; a point that stopped right then has no later pass to catch
    /// it. After a clean end (the seal matched) there is nothing to catch up.
    pub(super) async fn retain_everywhere(&mut self) -> Result<()> {
        if self.policies.is_empty() || self.ended_cleanly {
            return Ok(());
        }
        let store = self.ledger.flush().await?;
        let done = crate::retention::whole_workspace(store.pool(), &self.artifacts, &self.policies)
            .await?;
        if done.files > 0 {
            tracing::debug!(files = done.files, bytes = done.bytes, "retention at start");
        }
        Ok(())
    }

    /// The stopping rules on the point's history (which holds its current iteration).
    pub(super) fn judge(&mut self, p: usize) -> Result<Verdict> {
        let pr = &mut self.points[p];
        let n = pr.iteration;
        let Some(history) = pr.history.as_mut() else {
            bail!("internal: metric history of {} not read", pr.spec.id);
        };
        history.entry(n).or_default();
        let decision = stop::decide(
            &self.campaign.rules,
            self.campaign.combine,
            self.campaign.max_iterations,
            history,
        );
        let summary = decision
            .rules
            .iter()
            .map(|r| {
                format!(
                    "{} Δ={}",
                    r.metric,
                    r.change
                        .map(|c| format!("{c:.3e}"))
                        .unwrap_or_else(|| "–".into())
                )
            })
            .collect::<Vec<_>>()
            .join(", ");
        let first_met = pr.first_met.or(decision.rules_met.then_some(n));
        let window = self.campaign.final_window;
        let fate = if let Some(why) = &decision.diverged {
            Some((PointState::Failed, format!("diverging: {why}")))
        } else if let Some(f) = first_met {
            if n >= f + window {
                Some((
                    PointState::Converged,
                    if window > 0 {
                        format!(
                            "stopping rules met at iteration {f}; averaged over iterations {}..{n}",
                            f + 1
                        )
                    } else {
                        format!("stopping rules met at iteration {n}")
                    },
                ))
            } else if decision.at_cap {
                Some((
                    PointState::Converged,
                    format!("stopping rules met at iteration {f}; final window cut short by max-iterations at {n}"),
                ))
            } else {
                None
            }
        } else if decision.at_cap && self.campaign.rules.is_empty() {
            Some((
                PointState::Capped,
                format!(
                    "ran all {n} iterations of max-iterations: the campaign has no stopping rule"
                ),
            ))
        } else if decision.at_cap {
            Some((
                PointState::Capped,
                format!("reached max-iterations ({n}) without meeting the stopping rules"),
            ))
        } else {
            None
        };
        Ok(Verdict {
            iteration: n,
            decision,
            fate,
            summary,
            first_met,
        })
    }

    /// After the verdict is committed: move the point on in memory and log it.
    pub(super) fn apply_verdict(&mut self, p: usize, v: Verdict) {
        let nstages = self.campaign.stages.len();
        let pr = &mut self.points[p];
        let point_id = pr.spec.id.clone();
        let n = v.iteration;
        pr.first_met = v.first_met;
        let rules = if v.summary.is_empty() {
            String::new()
        } else {
            format!(" ({})", v.summary)
        };
        if let Some((state, reason)) = &v.fate {
            let after = matches!(state, PointState::Converged | PointState::Capped)
                && self.campaign.stages.len() > self.campaign.cycle_end();
            if after {
                // Its `after-point:` stages run next, on this (good) iteration.
                pr.phase = PointPhase::After;
                pr.next_stage = self.campaign.cycle_end();
            } else {
                pr.phase = PointPhase::Done;
            }
            self.hooks.point_stopped(&pr.spec, *state, n, reason);
            let why = if v.summary.is_empty() {
                format!(": {reason}")
            } else {
                rules
            };
            self.progress
                .line(format!("{point_id} {state} at iteration {n}{why}"));
        } else {
            pr.iteration = n + 1;
            pr.next_stage = self.campaign.first_stage(n + 1);
            pr.attempts = vec![0; nstages];
            if let Some(h) = pr.history.as_mut() {
                h.entry(n + 1).or_default();
            }
            let note = if v.first_met.is_some() {
                " [final window]"
            } else {
                ""
            };
            self.progress
                .line(format!("{point_id} iteration {n} good{rules}{note}"));
        }
    }
}
