//! `defaults:` and a stage's own `resources`, `time-limit`, `retries` and `timeout-factor`:
//! what a stage may use, the stage's value over the default.

use std::time::Duration;

use rondo_adapters::executor::Resources;
use rondo_adapters::slurm::parse_slurm_time;

use super::Validator;
use crate::spec::raw::{CampaignFile, StageSpec};

/// Parse a Slurm-style duration: `[days-]hh:mm:ss`, `hh:mm:ss`, `mm:ss`, minutes,
/// `days-hh` or `days-hh:mm`. The grammar is the Slurm executor's own
/// ([`parse_slurm_time`]), so that a limit this check passes is one `sbatch` is given as
/// written (`0-5` is five hours in both); `None` also for a limit too long to count in
/// seconds.
pub fn parse_duration(s: &str) -> Option<Duration> {
    parse_slurm_time(s).ok()
}

/// A stage's limits, its own settings over `defaults:`.
pub(super) struct Limits {
    /// Merged batch resources.
    pub(super) resources: Resources,
    /// Wall-time limit: the stage's, the default's, or the resources' `time`.
    pub(super) time_limit: Option<Duration>,
    /// Extra attempts after a failure.
    pub(super) retries: u32,
    /// The factor of a retry's time limit after a time-limit kill.
    pub(super) timeout_factor: f64,
}

/// The `timeout-factor` when none is given: a retry after a time-limit kill asks for twice
/// the limit, since the same limit would most likely be used up again.
pub const DEFAULT_TIMEOUT_FACTOR: f64 = 2.0;
/// The largest `timeout-factor` accepted.
const MAX_TIMEOUT_FACTOR: f64 = 100.0;

impl Validator<'_> {
    /// The limits of stage `sname` (`at`: its key); a time limit that is not a duration is
    /// reported.
    pub(super) fn limits(
        &mut self,
        raw: &CampaignFile,
        sname: &str,
        at: (u64, u64),
        st: &StageSpec,
    ) -> Limits {
        let defaults_res = raw.defaults.resources.clone().unwrap_or_default();
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
        let factor = st
            .timeout_factor
            .or(raw.defaults.timeout_factor)
            .unwrap_or(DEFAULT_TIMEOUT_FACTOR);
        let timeout_factor = if (1.0..=MAX_TIMEOUT_FACTOR).contains(&factor) {
            factor
        } else {
            self.push(
                at,
                format!(
                    "stage `{sname}`: timeout-factor `{factor}` is not between 1 and {MAX_TIMEOUT_FACTOR}"
                ),
                "write e.g. `timeout-factor: 2` (a retry after a time-limit kill asks for twice \
                 the limit) or 1 to keep the limit",
            );
            DEFAULT_TIMEOUT_FACTOR
        };
        Limits {
            resources,
            time_limit,
            retries: st.retries.or(raw.defaults.retries).unwrap_or(0),
            timeout_factor,
        }
    }
}

#[cfg(test)]
mod tests {
    use super::super::testing::*;
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

    fn limits_of(text: &str) -> (Limits, Vec<(u64, u64, String)>) {
        let raw = raw(text);
        let mut v = validator();
        let (k, st) = &raw.cycle.0[0];
        let l = v.limits(
            &raw,
            &k.value,
            (k.referenced.line(), k.referenced.column()),
            st,
        );
        (l, found(&v))
    }

    #[test]
    fn a_stage_setting_wins_over_the_default_and_the_default_over_nothing() {
        let (l, d) = limits_of(
            "campaign: t
defaults: { time-limit: \"00:05:00\", retries: 2 }
cycle:
  s: { run: [/bin/true], time-limit: \"10\" }
stop: { max-iterations: 1 }
",
        );
        assert!(d.is_empty(), "{d:?}");
        assert_eq!(
            (l.time_limit, l.retries),
            (Some(Duration::from_secs(600)), 2)
        );
        let (l, d) = limits_of(
            "campaign: t
cycle:
  s: { run: [/bin/true] }
stop: { max-iterations: 1 }
",
        );
        assert!(d.is_empty(), "{d:?}");
        assert_eq!((l.time_limit, l.retries), (None, 0));
    }

    #[test]
    fn a_time_limit_that_is_no_duration_is_reported_at_the_stage() {
        let (l, d) = limits_of(
            "campaign: t
defaults: { time-limit: soon }
cycle:
  s: { run: [/bin/true] }
stop: { max-iterations: 1 }
",
        );
        assert_eq!(l.time_limit, None);
        assert_eq!(
            d,
            vec![(
                4,
                3,
                "stage `s`: time limit `soon` is not a duration".to_string()
            )]
        );
    }
}
