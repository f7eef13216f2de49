//! The fuzz properties (fuzz/src: campaign parser and validator, command templates, time
//! limits) in every test run, without a fuzzer: every seed and kept input is replayed, the
//! hand-made campaign seeds must pass the check, and then a seeded mutation smoke runs
//! `RONDO_FUZZ_SMOKE_EXECS` inputs (default 20,000; at most `RONDO_FUZZ_SMOKE_SECONDS`,
//! default 120 s, as a guard) made from the seeds by byte flips, insertions, deletions, line
//! duplications and splices of two seeds. It is random, not coverage-guided: the long runs
//! use AFL++ (`bash scripts/fuzz`, docs/performance.md "Fuzzing"). A failing input is
//! written to `$CARGO_TARGET_TMPDIR/fuzz-smoke-failure` with the seed and execution number;
//! keep it under fuzz/regressions/ once fixed.

#[path = "../../fuzz/src/lib.rs"]
#[allow(dead_code)]
mod rondo_fuzz;

// The fuzz modules name each other as `crate::template` and `crate::words`.
use rondo_fuzz::{template, words};

use std::path::{Path, PathBuf};
use std::time::{Duration, Instant};

use rondo_numerics::rng::SplitMix64;

fn corpus_dir(name: &str) -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR"))
        .join("../fuzz")
        .join(name)
}

/// Every file of a corpus folder, sorted by name.
fn corpus(name: &str) -> Vec<(String, Vec<u8>)> {
    let dir = corpus_dir(name);
    let mut out: Vec<(String, Vec<u8>)> = std::fs::read_dir(&dir)
        .unwrap_or_else(|e| panic!("{}: {e}", dir.display()))
        .flatten()
        .map(|e| {
            let data = std::fs::read(e.path()).unwrap_or_else(|err| panic!("{err}"));
            (e.file_name().to_string_lossy().into_owned(), data)
        })
        .collect();
    out.sort();
    out
}

fn env_num(key: &str, default: u64) -> u64 {
    std::env::var(key)
        .ok()
        .and_then(|v| v.parse().ok())
        .unwrap_or(default)
}

/// One mutation of `data`, drawing from `rng` (and from `other` for a splice).
fn mutate(rng: &mut SplitMix64, data: &[u8], other: &[u8]) -> Vec<u8> {
    let mut d = data.to_vec();
    let rounds = 1 + rng.below(4);
    for _ in 0..rounds {
        let at = |rng: &mut SplitMix64, len: usize| rng.below(len.max(1) as u64) as usize;
        match rng.below(6) {
            // Flip one bit (keep the first byte, which chooses the target).
            0 if d.len() > 1 => {
                let i = 1 + at(rng, d.len() - 1);
                d[i] ^= 1 << rng.below(8);
            }
            // Insert a byte a campaign file is made of, or any byte.
            1 => {
                const BYTES: &[u8] = b" \n:{}[],-\"'#&*|>.0123456789e{{}}";
                let b = if rng.below(4) == 0 {
                    rng.below(256) as u8
                } else {
                    BYTES[at(rng, BYTES.len())]
                };
                let i = 1 + at(rng, d.len());
                d.insert(i.min(d.len()), b);
            }
            // Delete a run of bytes.
            2 if d.len() > 2 => {
                let i = 1 + at(rng, d.len() - 1);
                let n = (1 + rng.below(16) as usize).min(d.len() - i);
                d.drain(i..i + n);
            }
            // Duplicate a line.
            3 => {
                let lines: Vec<&[u8]> = d.split(|&b| b == b'\n').collect();
                if lines.len() > 1 {
                    let k = 1 + at(rng, lines.len() - 1);
                    let mut out = Vec::new();
                    for (j, l) in lines.iter().enumerate() {
                        out.extend_from_slice(l);
                        out.push(b'\n');
                        if j == k {
                            out.extend_from_slice(l);
                            out.push(b'\n');
                        }
                    }
                    d = out;
                }
            }
            // Splice: this input's head, the other's tail, cut at line starts.
            4 if !other.is_empty() => {
                let cut = |rng: &mut SplitMix64, x: &[u8]| {
                    let starts: Vec<usize> = std::iter::once(1)
                        .chain(
                            x.iter()
                                .enumerate()
                                .filter(|(_, &b)| b == b'\n')
                                .map(|(i, _)| i + 1),
                        )
                        .filter(|&i| i <= x.len())
                        .collect();
                    starts[at(rng, starts.len())]
                };
                let a = cut(rng, &d);
                let b = cut(rng, other);
                d.truncate(a);
                d.extend_from_slice(&other[b.max(1).min(other.len())..]);
            }
            // Replace a number-looking byte by a large or odd value.
            _ => {
                const VALUES: &[&[u8]] = &[
                    b"0",
                    b"-1",
                    b"1e308",
                    b"NaN",
                    b"99999999999999999999",
                    b"\"\"",
                    b"{{",
                    b"}}",
                ];
                let v = VALUES[at(rng, VALUES.len())];
                let i = 1 + at(rng, d.len());
                let i = i.min(d.len());
                d.splice(i..i, v.iter().copied());
            }
        }
    }
    d
}

#[test]
fn seeds_and_kept_inputs_hold_every_property() {
    let mut n = 0;
    for dir in ["seeds", "regressions"] {
        for (name, data) in corpus(dir) {
            if std::panic::catch_unwind(|| rondo_fuzz::run(&data)).is_err() {
                panic!("fuzz/{dir}/{name} breaks a property (see the panic above)");
            }
            n += 1;
        }
    }
    assert!(n >= 100, "{n} inputs");
}

/// The hand-made campaigns pass the check, so mutations start from campaigns that reach
/// the template and warning properties.
#[test]
fn hand_made_campaign_seeds_pass_the_check() {
    for name in ["c-hand-full", "c-hand-filter", "c-example-model-sweep"] {
        let data = std::fs::read(corpus_dir("seeds").join(name)).unwrap_or_else(|e| panic!("{e}"));
        let text = String::from_utf8_lossy(&data[1..]);
        let file = rondo_fuzz::campaign::base().join("c.yaml");
        if let Err(e) = rondo::spec::parse(&file, &text) {
            panic!("{name}:\n{e}");
        }
    }
}

#[test]
fn a_seeded_mutation_smoke_breaks_no_property() {
    let seeds: Vec<Vec<u8>> = corpus("seeds")
        .into_iter()
        .chain(corpus("regressions"))
        .map(|(_, d)| d)
        .filter(|d| !d.is_empty())
        .collect();
    let execs = env_num("RONDO_FUZZ_SMOKE_EXECS", 20_000);
    let cap = Duration::from_secs(env_num("RONDO_FUZZ_SMOKE_SECONDS", 120));
    let seed = env_num("RONDO_FUZZ_SMOKE_SEED", 20_261_204);
    let mut rng = SplitMix64::new(seed);
    // The panics are expected to be caught and reported here, not printed one by one.
    let hook = std::panic::take_hook();
    std::panic::set_hook(Box::new(|_| {}));
    let start = Instant::now();
    let mut done = 0u64;
    let mut failure = None;
    while done < execs && start.elapsed() < cap {
        let a = &seeds[rng.below(seeds.len() as u64) as usize];
        let b = &seeds[rng.below(seeds.len() as u64) as usize];
        let input = mutate(&mut rng, a, b);
        done += 1;
        if std::panic::catch_unwind(|| rondo_fuzz::run(&input)).is_err() {
            failure = Some(input);
            break;
        }
    }
    std::panic::set_hook(hook);
    let secs = start.elapsed().as_secs_f64();
    eprintln!(
        "fuzz smoke (seed {seed}): {done} executions in {secs:.1} s ({:.0}/s), {}",
        done as f64 / secs.max(1e-9),
        if failure.is_some() {
            "a failure"
        } else {
            "0 failures"
        }
    );
    if let Some(input) = failure {
        let path = Path::new(env!("CARGO_TARGET_TMPDIR")).join("fuzz-smoke-failure");
        std::fs::write(&path, &input).unwrap_or_else(|e| panic!("{e}"));
        // Run it once more with the hook back, so the property's message is shown.
        let _ = std::panic::catch_unwind(|| rondo_fuzz::run(&input));
        panic!(
            "execution {done} (seed {seed}) breaks a property; the input is in {} (replay: \
             bash scripts/fuzz replay {})",
            path.display(),
            path.display()
        );
    }
    assert!(
        done >= 1000.min(execs),
        "only {done} executions within {cap:?}"
    );
}
