//! The properties rondo's input parsers must hold for any input, checked on one fuzz input at a
//! time: [`run`] panics exactly when a property fails (or when rondo itself panics), so a
//! coverage-guided fuzzer (cargo-afl, `src/bin/rondo_afl.rs`) reports it as a crash and
//! `rondo-fuzz-replay` reproduces it outside the fuzzer.
//!
//! One input drives one of three targets, chosen by its first byte:
//! - `c` (and any byte ≡ 0 mod 3): the rest is a campaign file for `rondo::spec::parse`
//!   ([`campaign`]): the parser and every validator section, the path and reference parsers
//!   they call (`band.hk`, `{ previous: .., initially: .. }`, output names, time limits), and
//!   the templates of the stages that pass.
//! - `t` (≡ 1): a command template and the values its placeholders take ([`template`]).
//! - `d` (≡ 2): a time limit for `rondo::spec::parse_duration` ([`duration`]).
//!
//! The main workspace compiles these modules into orchestrator/tests/fuzz_smoke.rs as well,
//! which replays the seeds and kept inputs and runs a short seeded mutation smoke in every
//! test run (no fuzzer needed). This crate only reads rondo's public API; it changes
//! nothing in rondo and touches no file outside its own scratch folder ([`campaign::base`]).

pub mod campaign;
pub mod duration;
pub mod template;
pub mod words;

/// Check one fuzz input (see the module doc for its format). Panics on a broken property.
pub fn run(data: &[u8]) {
    let Some((&first, rest)) = data.split_first() else {
        return;
    };
    let text = String::from_utf8_lossy(rest);
    let target = match first {
        b'c' => 0,
        b't' => 1,
        b'd' => 2,
        b => b % 3,
    };
    match target {
        0 => campaign::check(&text),
        1 => template::check(&text),
        _ => duration::check(&text),
    }
}
