//! Time limits: the campaign check's `rondo::spec::parse_duration` and the Slurm executor's
//! `parse_slurm_time` read every text alike; neither panics (no overflow on huge fields); a
//! duration reads back the same from its own `[days-]hh:mm:ss` form; and what the executors
//! make of it for `sbatch` (`format_slurm_time`, `lengthen_limit` after a wall-time kill)
//! neither panics nor shortens it.

use std::time::Duration;

use rondo::spec::parse_duration;
use rondo_adapters::slurm::{format_slurm_time, lengthen_limit, parse_slurm_time};

/// Check one time-limit text.
pub fn check(text: &str) {
    let d = parse_duration(text);
    assert_eq!(
        d,
        parse_slurm_time(text).ok(),
        "the campaign check and the Slurm executor read `{text}` differently"
    );
    let Some(d) = d else {
        return;
    };
    let s = d.as_secs();
    let (days, rest) = (s / 86_400, s % 86_400);
    let (h, m, sec) = (rest / 3600, rest % 3600 / 60, rest % 60);
    let back = if days > 0 {
        format!("{days}-{h:02}:{m:02}:{sec:02}")
    } else {
        format!("{h:02}:{m:02}:{sec:02}")
    };
    assert_eq!(
        parse_duration(&back),
        Some(d),
        "`{text}` reads as {d:?}, its form `{back}` does not"
    );
    // Whole minutes for sbatch, rounded up: never shorter, less than a minute longer.
    let formatted = format_slurm_time(d);
    if let Ok(f) = parse_slurm_time(&formatted) {
        assert!(
            f >= d
                && f < d
                    .max(Duration::from_secs(60))
                    .saturating_add(Duration::from_secs(60)),
            "`{text}` ({d:?}) is formatted as `{formatted}` ({f:?})"
        );
    }
    for factor in [0.5, 1.0, 1.5, 2.0, f64::NAN, f64::INFINITY, 1e300] {
        let longer = lengthen_limit(d, factor);
        assert!(
            longer >= d.min(Duration::from_secs(u64::MAX / 60 * 60)),
            "lengthening {d:?} by {factor} shortened it to {longer:?}"
        );
    }
}
