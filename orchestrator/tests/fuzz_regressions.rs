//! Inputs the fuzzer (fuzz/, `bash scripts/fuzz`) or the writing of its checks found to break
//! the campaign check, each kept as a test of the fixed behaviour: no panic, and a problem in
//! the file reported at its place with a hint. Every fuzz input kept under fuzz/regressions/
//! is replayed here through the campaign parser as well.

use std::path::Path;
use std::time::Duration;

use rondo::spec::{parse, parse_duration, SpecErrors};

/// A campaign with one stage whose `time-limit` is `limit`.
fn with_time_limit(limit: &str) -> String {
    format!(
        "campaign: t
cycle:
  s: {{ run: [/bin/true], time-limit: \"{limit}\" }}
stop: {{ max-iterations: 1 }}
"
    )
}

/// The diagnostics of a campaign that must fail, as `(line, column, message)`.
fn problems(text: &str) -> Vec<(u64, u64, String)> {
    match parse(Path::new("c.yaml"), text) {
        Ok(_) => panic!("accepted:\n{text}"),
        Err(SpecErrors { diagnostics, .. }) => diagnostics
            .into_iter()
            .map(|d| {
                assert!(!d.hint.is_empty(), "no hint: {d:?}");
                (d.line, d.column, d.message)
            })
            .collect(),
    }
}

#[test]
fn a_time_limit_too_long_to_count_in_seconds_is_refused_at_its_stage_not_a_panic() {
    // Each field fits in 64 bits, the total in seconds does not (this overflowed).
    for limit in [
        "9999999999999999:00:00",
        "213503982334602-00:00:00",
        "307445734561825861",
        "1-18446744073709551615:00",
    ] {
        assert_eq!(parse_duration(limit), None, "{limit}");
        let found = problems(&with_time_limit(limit));
        assert_eq!(
            found,
            vec![(
                3,
                3,
                format!("stage `s`: time limit `{limit}` is not a duration")
            )],
            "{limit}"
        );
    }
    // The largest limit that fits is still one.
    assert_eq!(
        parse_duration("5124095576030431:00:15"),
        Some(Duration::from_secs(u64::MAX))
    );
}

#[test]
fn a_time_limit_reads_as_the_slurm_executor_reads_it() {
    // A `days-` prefix of 0 still makes the next field hours, as for sbatch (this read
    // `0-5` as five minutes and `0-1:30` as ninety seconds).
    assert_eq!(parse_duration("0-5"), Some(Duration::from_secs(5 * 3600)));
    assert_eq!(parse_duration("0-1:30"), Some(Duration::from_secs(5400)));
    // Text that sbatch refuses is refused by the check too, at the stage.
    for limit in ["+5", "5 : 30", "1 -02:00:00"] {
        assert_eq!(parse_duration(limit), None, "{limit}");
        assert_eq!(problems(&with_time_limit(limit)).len(), 1, "{limit}");
    }
    assert_eq!(parse_duration(" 00:05:00 "), Some(Duration::from_secs(300)));
}

/// The place of the no-rule warning of a campaign that must pass.
fn no_rule_warning_at(text: &str) -> (u64, u64) {
    let c = parse(Path::new("c.yaml"), text).unwrap_or_else(|e| panic!("{e}\n{text:?}"));
    let w = c
        .warnings
        .iter()
        .find(|w| w.message.starts_with("no stopping rule"))
        .unwrap_or_else(|| panic!("no warning: {:?}", c.warnings));
    (w.line, w.column)
}

#[test]
fn the_no_rule_warning_names_the_stop_line_as_yaml_counts_lines() {
    // A lone CR ends a line for YAML (and so for every other location the check reports);
    // the warning counted only LF and fell to 0:0 here.
    let lone_cr = "campaign: t\rcycle:\r  s: { run: [/bin/true] }\rstop: { max-iterations: 1 }\r";
    assert_eq!(no_rule_warning_at(lone_cr), (4, 1));
    let crlf = lone_cr.replace('\r', "\r\n");
    assert_eq!(no_rule_warning_at(&crlf), (4, 1));
    // With CRs before it, the warning and a parser error agree on the line of `stop:`.
    let mixed = "campaign: t\ncycle:\r\r  s: { run: [/bin/true] }\nstop: { max-iterations: 1 }\n";
    assert_eq!(no_rule_warning_at(mixed), (5, 1));
    let broken = mixed.replace("max-iterations: 1", "max-iterations: x");
    assert_eq!(problems(&broken)[0].0, 5);
}

#[test]
fn the_no_rule_warning_of_a_flow_style_file_is_placed_at_max_iterations() {
    // No line starts with `stop:`: the warning was at 0:0, it is now at the value of
    // `max-iterations`, which every `stop:` has.
    let text = "{campaign: t, cycle: {s: {run: [/bin/true]}}, stop: {max-iterations: 1}}\n";
    let column = text.find("1}}").map(|i| i as u64 + 1);
    assert_eq!(Some(no_rule_warning_at(text)), column.map(|c| (1, c)));
}

/// A campaign whose sweep is the product of `axes` axes of `values` values each.
fn with_product(axes: usize, values: usize) -> String {
    let list: Vec<String> = (1..=values).map(|v| v.to_string()).collect();
    let lines: String = (0..axes)
        .map(|i| format!("    a{i}: [{}]\n", list.join(", ")))
        .collect();
    format!(
        "campaign: t\nsweep:\n  product:\n{lines}cycle:\n  s: {{ run: [/bin/true] }}\nstop: {{ max-iterations: 1 }}\n"
    )
}

#[test]
fn a_sweep_of_too_many_points_is_refused_before_it_is_built() {
    // Eight axes of ten values: 10^8 points, which ran out of memory in the check. Now one
    // diagnostic at the sweep, at once.
    assert_eq!(
        problems(&with_product(8, 10)),
        vec![(
            3,
            3,
            "the sweep's product makes 100000000 points; at most 100000 are allowed".to_string()
        )]
    );
    // Forty axes of three overflow the count itself.
    let found = problems(&with_product(41, 3));
    assert_eq!(found.len(), 1, "{found:?}");
    assert!(found[0].2.contains("makes more than"), "{found:?}");
    // 100,000 points exactly are still a campaign.
    let c = parse(Path::new("c.yaml"), &with_product(5, 10)).unwrap_or_else(|e| panic!("{e}"));
    assert_eq!(c.points.len(), 100_000);
}

/// Every kept fuzz input that is a campaign (first byte `c`) parses or fails without a panic,
/// and each of its problems is placed in the file.
#[test]
fn kept_fuzz_inputs_never_panic_and_place_every_problem() {
    let dir = Path::new(env!("CARGO_MANIFEST_DIR")).join("../fuzz/regressions");
    let Ok(entries) = std::fs::read_dir(&dir) else {
        return;
    };
    let mut n = 0;
    for e in entries.flatten() {
        let data = std::fs::read(e.path()).unwrap_or_else(|err| panic!("{err}"));
        let Some((b'c', rest)) = data.split_first() else {
            continue;
        };
        let text = String::from_utf8_lossy(rest);
        if let Err(errs) = parse(Path::new("c.yaml"), &text) {
            for d in &errs.diagnostics {
                assert!(
                    (d.line >= 1 && d.column >= 1) || d.message == "the cycle has no stages",
                    "{}: no place for {d:?}",
                    e.path().display()
                );
            }
        }
        n += 1;
    }
    assert!(
        n > 0 || !dir.exists(),
        "no campaign among {}",
        dir.display()
    );
}
