//! Time-limit arithmetic the fuzzer's checks (fuzz/src/duration.rs) found to overflow: Slurm
//! times too long to count in seconds are refused with a message, and lengthening a limit
//! after a wall-time kill saturates instead of panicking.

use std::time::Duration;

use rondo_adapters::slurm::{lengthen_limit, parse_slurm_time};

#[test]
fn a_slurm_time_past_u64_seconds_is_an_error_not_a_wrap_or_panic() {
    for t in [
        "9999999999999999:00:00",
        "213503982334602-00:00:00",
        "307445734561825861",
        "1-18446744073709551615:00",
    ] {
        let err = parse_slurm_time(t).expect_err(t);
        assert!(err.contains("too long"), "{t}: {err}");
    }
    assert_eq!(
        parse_slurm_time("5124095576030431:00:15"),
        Ok(Duration::from_secs(u64::MAX))
    );
}

#[test]
fn lengthening_the_longest_limit_saturates() {
    let max = Duration::from_secs(u64::MAX);
    for factor in [1.0, 2.0, 1e300, f64::INFINITY] {
        assert_eq!(lengthen_limit(max, factor), max, "{factor}");
    }
    assert_eq!(lengthen_limit(Duration::MAX, 2.0), max);
    // Ordinary limits are unchanged by the fix: twice, rounded up to minutes.
    assert_eq!(
        lengthen_limit(Duration::from_secs(90), 2.0),
        Duration::from_secs(180)
    );
}
