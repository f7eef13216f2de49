//! Every diagnostic of the campaign file, through the real `rondo check`: one table row per
//! place in orchestrator/src/spec/ that reports a problem, each with a campaign broken in
//! exactly that way, a fragment of the message, and the `line:col` the report must name.
//!
//! The table is checked against the source: every `self.push(` under src/spec/ must have a row
//! whose `site` is the message literal of that call (so a new diagnostic without a row fails
//! here), and every row's site must still exist there.

use std::collections::BTreeSet;
use std::path::Path;
use std::process::Command;

/// One broken campaign.
struct Case {
    /// The message literal of the reporting call under src/spec/ (`format!` text as written);
    /// `SAPHYR` for the YAML/type errors of the parser, `READ` for an unreadable file.
    site: &'static str,
    /// A fragment the printed message must contain.
    says: &'static str,
    /// The broken campaign file.
    yaml: &'static str,
    /// Where the diagnostic must point (1-based; 0:0 means "the whole file").
    at: (u64, u64),
}

const SAPHYR: &str = "(parser)";
const READ: &str = "cannot read the campaign file: {e}";

/// Cases whose broken campaign cannot avoid a second diagnostic: site → fragment of the
/// other message that must come with it.
const COMPANIONS: [(&str, &str); 1] = [(
    "built-in stage `{sname}`: the input role `state` is reserved for the mixer's history",
    "the mixer's `state` output is implicit",
)];

/// Written beside every campaign (a start file the valid parts may name).
const START_FILE: &str = "x.json";

fn cases() -> Vec<Case> {
    vec![
        // ------------------------------------------------------------ parser and file
        Case {
            site: SAPHYR,
            says: "unknown field `bogus`",
            yaml: "campaign: t
cycle:
  s: { run: [/bin/true] }
stop: { max-iterations: 1, bogus: 2 }
",
            at: (4, 28),
        },
        Case {
            site: SAPHYR,
            says: "missing field `stop`",
            yaml: "campaign: t
cycle:
  s: { run: [/bin/true] }
",
            // the parser names the last key of the mapping that lacks the field
            at: (2, 1),
        },
        Case {
            site: SAPHYR,
            says: "missing field `max-iterations`",
            yaml: "campaign: t
cycle:
  s: { run: [/bin/true] }
stop:
  final-window: 2
  when: []
",
            at: (6, 3),
        },
        Case {
            site: SAPHYR,
            says: "invalid",
            yaml: "campaign: t
cycle:
  s: { run: [/bin/true] }
stop:
  max-iterations: many
",
            at: (5, 19),
        },
        Case {
            site: READ,
            says: "cannot read the campaign file",
            // not UTF-8 (the bytes are written as Latin-1, see `write_case`)
            yaml: "campaign: caf\u{e9}\n",
            at: (0, 0),
        },
        // ------------------------------------------------------------ name, programs, start
        Case {
            site: "campaign name `{name}` is not allowed",
            says: "campaign name `bad name` is not allowed",
            yaml: "campaign: bad name
cycle:
  s: { run: [/bin/true] }
stop: { max-iterations: 1 }
",
            at: (1, 11),
        },
        Case {
            site: "program `{}` not found",
            says: "program `/no/such/engine` not found",
            yaml: "campaign: t
programs:
  engine: { path: /no/such/engine }
cycle:
  s: { run: [/bin/true] }
stop: { max-iterations: 1 }
",
            at: (3, 19),
        },
        Case {
            site: "start file `{v}` not found (looked for {})",
            says: "start file `missing.json` not found",
            yaml: "campaign: t
start:
  x: missing.json
cycle:
  s: { run: [/bin/true] }
stop: { max-iterations: 1 }
",
            at: (3, 3),
        },
        // ------------------------------------------------------------ schedules
        Case {
            site: "`{}` is both a schedule and a parameter or sweep axis",
            says: "`sweeps` is both a schedule and a parameter",
            yaml: "campaign: t
parameters: { sweeps: 10 }
schedules:
  sweeps: { start: 1, factor: 2, max: 8, metric: s.x, change-below: 0.1 }
cycle:
  s: { run: [/bin/true], metrics: [x] }
stop: { max-iterations: 1 }
",
            at: (4, 3),
        },
        Case {
            site: "schedule `{}`: start and max must be numbers",
            says: "schedule `sweeps`: start and max must be numbers",
            yaml: "campaign: t
schedules:
  sweeps: { start: many, factor: 2, max: 8, metric: s.x, change-below: 0.1 }
cycle:
  s: { run: [/bin/true], metrics: [x] }
stop: { max-iterations: 1 }
",
            at: (3, 3),
        },
        Case {
            site: "schedule `{}`: factor must be a positive number",
            says: "schedule `sweeps`: factor must be a positive number",
            yaml: "campaign: t
schedules:
  sweeps: { start: 1, factor: -2, max: 8, metric: s.x, change-below: 0.1 }
cycle:
  s: { run: [/bin/true], metrics: [x] }
stop: { max-iterations: 1 }
",
            at: (3, 3),
        },
        Case {
            site: "schedule `{}` needs exactly one positive condition: within-errors or change-below",
            says: "schedule `sweeps` needs exactly one positive condition",
            yaml: "campaign: t
schedules:
  sweeps: { start: 1, factor: 2, max: 8, metric: s.x, change-below: 0.1, within-errors: 2 }
cycle:
  s: { run: [/bin/true], metrics: [x] }
stop: { max-iterations: 1 }
",
            at: (3, 3),
        },
        Case {
            site: "schedule `{}`: metric `{}` must be stage.metric of a stage of the cycle",
            says: "schedule `sweeps`: metric `solve.x` must be stage.metric",
            yaml: "campaign: t
schedules:
  sweeps: { start: 1, factor: 2, max: 8, metric: solve.x, change-below: 0.1 }
cycle:
  s: { run: [/bin/true], metrics: [x] }
stop: { max-iterations: 1 }
",
            at: (3, 50),
        },
        // ------------------------------------------------------------ stages
        Case {
            site: "the cycle has no stages",
            says: "the cycle has no stages",
            yaml: "campaign: t
cycle: {}
stop: { max-iterations: 1 }
",
            // The map of stages carries no location of its own (an empty `cycle:` is found
            // at once); the diagnostic names the whole file.
            at: (0, 0),
        },
        Case {
            site: "`initially: {i}` must name a start file or a `before:` stage's output",
            says: "`initially: a.o` must name a start file",
            yaml: "campaign: t
cycle:
  a: { run: [/bin/true], outputs: { o: o.txt } }
  b:
    run: [/bin/true]
    inputs: { i: { previous: a.o, initially: a.o } }
stop: { max-iterations: 1 }
",
            at: (6, 15),
        },
        Case {
            site: "input `{}` has no value at iteration 1",
            says: "input `i` has no value at iteration 1",
            yaml: "campaign: t
cycle:
  a: { run: [/bin/true], outputs: { o: o.txt } }
  b:
    run: [/bin/true]
    inputs:
      i: { previous: a.o }
stop: { max-iterations: 1 }
",
            at: (7, 7),
        },
        Case {
            site: "output file name `{ov}` is not allowed",
            says: "output file name `sub/o.txt` is not allowed",
            yaml: "campaign: t
cycle:
  a:
    run: [/bin/true]
    outputs: { o: sub/o.txt }
stop: { max-iterations: 1 }
",
            at: (5, 16),
        },
        Case {
            site: "stage `{sname}`: timeout-factor `{factor}` is not between 1 and {MAX_TIMEOUT_FACTOR}",
            says: "stage `a`: timeout-factor `0.5` is not between 1 and 100",
            yaml: "campaign: t
cycle:
  a:
    run: [/bin/true]
    timeout-factor: 0.5
stop: { max-iterations: 1 }
",
            // the stage (the factor may come from `defaults:`)
            at: (3, 3),
        },
        Case {
            site: "stage `{sname}`: time limit `{t}` is not a duration",
            says: "stage `a`: time limit `soon` is not a duration",
            yaml: "campaign: t
cycle:
  a:
    run: [/bin/true]
    time-limit: soon
stop: { max-iterations: 1 }
",
            // the stage (the limit may come from `defaults:`)
            at: (3, 3),
        },
        Case {
            site: "unknown built-in `{}`",
            says: "unknown built-in `blend`",
            yaml: "campaign: t
cycle:
  a:
    builtin: blend
stop: { max-iterations: 1 }
",
            at: (4, 14),
        },
        Case {
            site: "stage `{sname}` has both `run` and `builtin`",
            says: "stage `a` has both `run` and `builtin`",
            yaml: "campaign: t
cycle:
  a:
    run: [/bin/true]
    builtin: mix
stop: { max-iterations: 1 }
",
            at: (3, 3),
        },
        Case {
            site: "stage `{sname}` has neither `run` nor `builtin`",
            says: "stage `a` has neither `run` nor `builtin`",
            yaml: "campaign: t
cycle:
  z: { run: [/bin/true] }
  a: { metrics: [x] }
stop: { max-iterations: 1 }
",
            at: (4, 3),
        },
        // ------------------------------------------------------------ stop rules
        Case {
            site: "stop.max-iterations must be at least 1",
            says: "stop.max-iterations must be at least 1",
            yaml: "campaign: t
cycle:
  s: { run: [/bin/true] }
stop:
  max-iterations: 0
",
            at: (5, 19),
        },
        Case {
            site: "metric `{}` must be written stage.metric",
            says: "metric `x` must be written stage.metric",
            yaml: "campaign: t
cycle:
  s: { run: [/bin/true], metrics: [x] }
stop:
  when:
    - { metric: x, change-below: 0.1 }
  max-iterations: 1
",
            at: (6, 17),
        },
        Case {
            site: "stop rule names unknown stage `{s}`",
            says: "stop rule names unknown stage `solve`",
            yaml: "campaign: t
cycle:
  s: { run: [/bin/true], metrics: [x] }
stop:
  when:
    - { metric: solve.x, change-below: 0.1 }
  max-iterations: 1
",
            at: (6, 17),
        },
        Case {
            site: "built-in stage `{s}` reports residual_norm, residual_norm_ROLE (several inputs), history and resets, not `{m}`",
            says: "built-in stage `m` reports residual_norm",
            yaml: "campaign: t
start: { x: x.json }
cycle:
  a:
    run: [/bin/true]
    inputs: { x: { previous: m.x, initially: start.x } }
    outputs: { x: x.json }
  m:
    builtin: mix
    inputs: { x: a.x }
    outputs: { x: x.json }
    settings: { method: linear, alpha: 0.5 }
stop:
  when:
    - { metric: m.residual, change-below: 0.1 }
  max-iterations: 1
",
            at: (15, 17),
        },
        Case {
            site: "built-in stage `{s}` reports {}, not `{m}`",
            says: "built-in stage `f` reports legendre_kept, legendre_dropped, density_per_spin, tail_c1, not `kept`",
            yaml: "campaign: t
cycle:
  solve:
    run: [/bin/true]
    outputs: { gtau: gtau.npy }
  f:
    builtin: filter
    inputs: { gtau: solve.gtau }
    outputs: { giw: giw.npy }
    settings: { legendre: 40, matsubara: 512 }
stop:
  when:
    - { metric: f.kept, change-below: 0.1 }
  max-iterations: 1
",
            at: (13, 17),
        },
        Case {
            site: "stage `{s}` does not list metric `{m}`",
            says: "stage `s` does not list metric `y`",
            yaml: "campaign: t
cycle:
  s: { run: [/bin/true], metrics: [x] }
stop:
  when:
    - { metric: s.y, change-below: 0.1 }
  max-iterations: 1
",
            at: (6, 17),
        },
        Case {
            site: "a stop rule needs exactly one of change-below, relative-change-below, within-errors",
            says: "a stop rule needs exactly one of change-below",
            yaml: "campaign: t
cycle:
  s: { run: [/bin/true], metrics: [x] }
stop:
  when:
    - { metric: s.x, change-below: 0.1, within-errors: 2 }
  max-iterations: 1
",
            at: (6, 17),
        },
        Case {
            site: "tolerances must be positive numbers and `for` at least 1",
            says: "tolerances must be positive numbers",
            yaml: "campaign: t
cycle:
  s: { run: [/bin/true], metrics: [x] }
stop:
  when:
    - { metric: s.x, change-below: -0.1 }
  max-iterations: 1
",
            at: (6, 17),
        },
        Case {
            site: "diverge-above must be a positive number",
            says: "diverge-above must be a positive number",
            yaml: "campaign: t
cycle:
  s: { run: [/bin/true], metrics: [x] }
stop:
  when:
    - { metric: s.x, change-below: 0.1, diverge-above: 0 }
  max-iterations: 1
",
            at: (6, 17),
        },
        Case {
            site: "stage `{cycle_stage}` is part of a cycle within one iteration",
            says: "is part of a cycle within one iteration",
            yaml: "campaign: t
cycle:
  a:
    run: [/bin/true]
    inputs: { i: b.o }
    outputs: { o: o.txt }
  b:
    run: [/bin/true]
    inputs: { i: a.o }
    outputs: { o: o.txt }
stop: { max-iterations: 1 }
",
            // the stage at which the ordering found the cycle (both are part of it)
            at: (7, 3),
        },
        // ------------------------------------------------------------ the eos analysis
        Case {
            site: "the eos analysis needs the sweep axis `{volume}`",
            says: "the eos analysis needs the sweep axis `volume`",
            yaml: "campaign: t
sweep: { product: { v: [1.0, 2.0] } }
cycle:
  s: { run: [/bin/true], metrics: [e] }
stop: { max-iterations: 1 }
analysis:
  eos: { energy: s.e }
",
            at: (7, 18),
        },
        Case {
            site: "eos `energy` must be written stage.metric",
            says: "eos `energy` must be written stage.metric",
            yaml: "campaign: t
sweep: { product: { volume: [1.0, 2.0] } }
cycle:
  s: { run: [/bin/true], metrics: [e] }
stop: { max-iterations: 1 }
analysis:
  eos: { energy: e }
",
            at: (7, 18),
        },
        Case {
            site: "eos energy names unknown stage `{st}`",
            says: "eos energy names unknown stage `update`",
            yaml: "campaign: t
sweep: { product: { volume: [1.0, 2.0] } }
cycle:
  s: { run: [/bin/true], metrics: [e] }
stop: { max-iterations: 1 }
analysis:
  eos: { energy: update.e }
",
            at: (7, 18),
        },
        Case {
            site: "stage `{st}` does not list metric `{m}`",
            says: "stage `s` does not list metric `energy`",
            yaml: "campaign: t
sweep: { product: { volume: [1.0, 2.0] } }
cycle:
  s: { run: [/bin/true], metrics: [e] }
stop: { max-iterations: 1 }
analysis:
  eos: { energy: s.energy }
",
            at: (7, 18),
        },
        // ------------------------------------------------------------ input references
        Case {
            site: "input `{r}` must be written stage.output or start.name",
            says: "input `density` must be written stage.output or start.name",
            yaml: "campaign: t
cycle:
  s:
    run: [/bin/true]
    inputs: { d: density }
stop: { max-iterations: 1 }
",
            at: (5, 15),
        },
        Case {
            site: "`previous:` must name a stage output",
            says: "`previous:` must name a stage output",
            yaml: "campaign: t
start: { x: x.json }
cycle:
  s:
    run: [/bin/true]
    inputs:
      d: { previous: start.x, initially: start.x }
stop: { max-iterations: 1 }
",
            at: (7, 7),
        },
        Case {
            site: "unknown start file `{o}`",
            says: "unknown start file `y`",
            yaml: "campaign: t
start: { x: x.json }
cycle:
  s:
    run: [/bin/true]
    inputs: { d: start.y }
stop: { max-iterations: 1 }
",
            at: (6, 15),
        },
        Case {
            site: "input `{r}` names unknown stage `{s}`",
            says: "input `band.hk` names unknown stage `band`",
            yaml: "campaign: t
cycle:
  s:
    run: [/bin/true]
    inputs: { hk: band.hk }
stop: { max-iterations: 1 }
",
            at: (5, 15),
        },
        Case {
            site: "stage `{s}` declares no output `{o}`",
            says: "stage `a` declares no output `hk`",
            yaml: "campaign: t
cycle:
  a: { run: [/bin/true], outputs: { o: o.txt } }
  s:
    run: [/bin/true]
    inputs: { hk: a.hk }
stop: { max-iterations: 1 }
",
            at: (6, 15),
        },
        // ------------------------------------------------------------ commands
        Case {
            site: "stage `{sname}`: `run` is empty",
            says: "stage `a`: `run` is empty",
            yaml: "campaign: t
cycle:
  z: { run: [/bin/true] }
  a:
    run: []
stop: { max-iterations: 1 }
",
            // the stage: an empty list has nothing else to point at
            at: (4, 3),
        },
        Case {
            site: "stage `{sname}`: `settings` is for built-in stages",
            says: "stage `a`: `settings` is for built-in stages",
            yaml: "campaign: t
cycle:
  a:
    run: [/bin/true]
    settings: { method: linear, alpha: 0.5 }
stop: { max-iterations: 1 }
",
            at: (4, 11),
        },
        Case {
            site: "stage `{sname}`: {}",
            says: "stage `a`: `{{` without a closing `}}`",
            yaml: r#"campaign: t
cycle:
  a:
    run: [/bin/true, "--x={{param:x"]
stop: { max-iterations: 1 }
"#,
            at: (4, 22),
        },
        Case {
            site: "stage `{sname}`: {}",
            says: "stage `a`: `{{` inside a placeholder",
            yaml: r#"campaign: t
cycle:
  a:
    run: [/bin/true, "{{a{{b}}"]
stop: { max-iterations: 1 }
"#,
            at: (4, 22),
        },
        Case {
            site: "stage `{sname}`: {}",
            says: "stage `a`: empty namespace in placeholder `{{:x}}`",
            yaml: r#"campaign: t
cycle:
  a:
    run: [/bin/true, "{{:x}}"]
stop: { max-iterations: 1 }
"#,
            at: (4, 22),
        },
        Case {
            site: "stage `{sname}`: {}",
            says: "stage `a`: invalid name `9x` in placeholder `{{param:9x}}`",
            yaml: r#"campaign: t
cycle:
  a:
    run: [/bin/true, "{{param:9x}}"]
stop: { max-iterations: 1 }
"#,
            at: (4, 22),
        },
        Case {
            site: "the program (first element of `run`) cannot be a placeholder",
            says: "the program (first element of `run`) cannot be a placeholder",
            yaml: r#"campaign: t
parameters: { prog: /bin/true }
cycle:
  a:
    run: ["{{param:prog}}"]
stop: { max-iterations: 1 }
"#,
            at: (5, 11),
        },
        Case {
            site: "program `{program}` not found",
            says: "program `./no-such-program` not found",
            yaml: "campaign: t
cycle:
  a:
    run: [./no-such-program, x]
stop: { max-iterations: 1 }
",
            at: (4, 11),
        },
        Case {
            site: "stage `{sname}`: undefined placeholder `{{{{{ns}{}}}}}`",
            says: "stage `a`: undefined placeholder `{{param:volume}}`",
            yaml: r#"campaign: t
parameters: { u: 6 }
cycle:
  a:
    run: [/bin/true, --u, "{{param:u}}", --v, "{{param:volume}}"]
stop: { max-iterations: 1 }
"#,
            at: (5, 47),
        },
        Case {
            site: "stage `{sname}`: undefined placeholder `{{{{{ns}{}}}}}`",
            says: "stage `a`: undefined placeholder `{{input:hk}}`",
            yaml: r#"campaign: t
cycle:
  a:
    run: [/bin/true, "{{input:hk}}"]
stop: { max-iterations: 1 }
"#,
            at: (4, 22),
        },
        Case {
            site: "stage `{sname}`: undefined placeholder `{{{{{ns}{}}}}}`",
            says: "stage `a`: undefined placeholder `{{output:hk}}`",
            yaml: r#"campaign: t
cycle:
  a:
    run: [/bin/true, "{{output:hk}}"]
stop: { max-iterations: 1 }
"#,
            at: (4, 22),
        },
        Case {
            site: "stage `{sname}`: undefined placeholder `{{{{{ns}{}}}}}`",
            says: "stage `a`: undefined placeholder `{{point:name}}`",
            yaml: r#"campaign: t
cycle:
  a:
    run: [/bin/true, "{{point:name}}"]
stop: { max-iterations: 1 }
"#,
            at: (4, 22),
        },
        Case {
            site: "stage `{sname}`: undefined placeholder `{{{{{ns}{}}}}}`",
            says: "stage `a`: undefined placeholder `{{volume}}`",
            yaml: r#"campaign: t
cycle:
  a:
    run: [/bin/true, "{{volume}}"]
stop: { max-iterations: 1 }
"#,
            at: (4, 22),
        },
        Case {
            site: "stage `{sname}`: undefined placeholder `{{{{{ns}{}}}}}`",
            says: "stage `a`: undefined placeholder `{{env:HOME}}`",
            yaml: r#"campaign: t
cycle:
  a:
    run: [/bin/true, "{{env:HOME}}"]
stop: { max-iterations: 1 }
"#,
            at: (4, 22),
        },
        // ------------------------------------------------------------ the mix built-in
        Case {
            site: "built-in stage `{sname}` needs `settings: {{ method: linear, alpha: 0.5 }}`",
            says: "built-in stage `m` needs `settings: { method: linear, alpha: 0.5 }`",
            yaml: "campaign: t
start: { x: x.json }
cycle:
  a:
    run: [/bin/true]
    inputs: { x: { previous: m.x, initially: start.x } }
    outputs: { x: x.json }
  m:
    builtin: mix
    inputs: { x: a.x }
    outputs: { x: x.json }
stop: { max-iterations: 1 }
",
            at: (8, 3),
        },
        Case {
            site: "stage `{sname}`: alpha must be in (0, 1]",
            says: "stage `m`: alpha must be in (0, 1]",
            yaml: "campaign: t
start: { x: x.json }
cycle:
  a:
    run: [/bin/true]
    inputs: { x: { previous: m.x, initially: start.x } }
    outputs: { x: x.json }
  m:
    builtin: mix
    inputs: { x: a.x }
    outputs: { x: x.json }
    settings: { method: linear, alpha: 1.5 }
stop: { max-iterations: 1 }
",
            at: (8, 3),
        },
        Case {
            site: "built-in stage `{sname}` has no inputs to mix",
            says: "built-in stage `m` has no inputs to mix",
            yaml: "campaign: t
cycle:
  a: { run: [/bin/true] }
  m:
    builtin: mix
    settings: { method: linear, alpha: 0.5 }
stop: { max-iterations: 1 }
",
            at: (4, 3),
        },
        Case {
            site: "built-in stage `{sname}`: the input role `state` is reserved for the mixer's history",
            says: "built-in stage `m`: the input role `state` is reserved",
            yaml: "campaign: t
cycle:
  a: { run: [/bin/true], outputs: { x: x.json } }
  m:
    builtin: mix
    inputs: { state: a.x }
    outputs: { state: state.json }
    settings: { method: linear, alpha: 0.5 }
stop: { max-iterations: 1 }
",
            // a mix stage writes one output per input role, so the role `state` always
            // brings the refused output `state` along (see COMPANIONS)
            at: (4, 3),
        },
        Case {
            site: "mix output `{}` = `{ov}` does not end as its input's type needs",
            says: "mix output `x` = `x.txt` does not end as its input's type needs",
            yaml: "campaign: t
cycle:
  a: { run: [/bin/true], outputs: { x: x.json } }
  m:
    builtin: mix
    inputs: { x: a.x }
    outputs: { x: x.txt }
    settings: { method: linear, alpha: 0.5 }
stop: { max-iterations: 1 }
",
            at: (7, 16),
        },
        Case {
            site: "built-in stage `{sname}` with the single input `new` has exactly one output (the mixed array)",
            says: "built-in stage `m` with the single input `new` has exactly one output",
            yaml: "campaign: t
cycle:
  a: { run: [/bin/true], outputs: { s: s.npy } }
  m:
    builtin: mix
    inputs: { new: a.s }
    outputs: { s: s.npy, t: t.npy }
    settings: { method: linear, alpha: 0.5 }
stop: { max-iterations: 1 }
",
            at: (4, 3),
        },
        Case {
            site: "mix output `{}` is not one of the stage's input roles ({})",
            says: "mix output `y` is not one of the stage's input roles (x)",
            yaml: "campaign: t
cycle:
  a: { run: [/bin/true], outputs: { x: x.json } }
  m:
    builtin: mix
    inputs: { x: a.x }
    outputs: { x: x.json, y: y.json }
    settings: { method: linear, alpha: 0.5 }
stop: { max-iterations: 1 }
",
            at: (7, 27),
        },
        Case {
            site: "built-in stage `{sname}` mixes input `{r}` but declares no output `{r}`",
            says: "built-in stage `m` mixes input `y` but declares no output `y`",
            yaml: "campaign: t
cycle:
  a: { run: [/bin/true], outputs: { x: x.json, y: y.npy } }
  m:
    builtin: mix
    inputs: { x: a.x, y: a.y }
    outputs: { x: x.json }
    settings: { method: linear, alpha: 0.5 }
stop: { max-iterations: 1 }
",
            at: (4, 3),
        },
        Case {
            site: "stage `{sname}`: weight for `{role}`, which is not an input role",
            says: "stage `m`: weight for `rho`, which is not an input role",
            yaml: "campaign: t
cycle:
  a: { run: [/bin/true], outputs: { x: x.json } }
  m:
    builtin: mix
    inputs: { x: a.x }
    outputs: { x: x.json }
    settings: { method: anderson, alpha: 0.5, weights: { rho: 2 } }
stop: { max-iterations: 1 }
",
            at: (4, 3),
        },
        Case {
            site: "stage `{sname}`: weight of `{role}` is {w}, not a positive number",
            says: "stage `m`: weight of `x` is -1, not a positive number",
            yaml: "campaign: t
cycle:
  a: { run: [/bin/true], outputs: { x: x.json } }
  m:
    builtin: mix
    inputs: { x: a.x }
    outputs: { x: x.json }
    settings: { method: anderson, alpha: 0.5, weights: { x: -1 } }
stop: { max-iterations: 1 }
",
            at: (4, 3),
        },
        Case {
            site: "the mixer's `state` output is implicit",
            says: "the mixer's `state` output is implicit",
            yaml: "campaign: t
cycle:
  a: { run: [/bin/true], outputs: { new: new.npy } }
  m:
    builtin: mix
    inputs: { new: a.new }
    outputs: { state: state.npy }
    settings: { method: linear, alpha: 0.5 }
stop: { max-iterations: 1 }
",
            at: (4, 3),
        },
        Case {
            site: "stage `{sname}`: history must be at least 1",
            says: "stage `m`: history must be at least 1",
            yaml: "campaign: t
cycle:
  a: { run: [/bin/true], outputs: { x: x.json } }
  m:
    builtin: mix
    inputs: { x: a.x }
    outputs: { x: x.json }
    settings: { method: anderson, alpha: 0.5, history: 0 }
stop: { max-iterations: 1 }
",
            at: (4, 3),
        },
        // ------------------------------------------------------------ the filter built-in
        Case {
            site: "built-in stage `{sname}` needs `settings: {{ legendre: 40, matsubara: 512 }}`",
            says: "built-in stage `f` needs `settings: { legendre: 40, matsubara: 512 }`",
            yaml: "campaign: t
cycle:
  solve: { run: [/bin/true], outputs: { gtau: gtau.npy } }
  f:
    builtin: filter
    inputs: { gtau: solve.gtau }
    outputs: { giw: giw.npy }
stop: { max-iterations: 1 }
",
            at: (4, 3),
        },
        Case {
            site: "stage `{sname}`: legendre and matsubara must be at least 1",
            says: "stage `f`: legendre and matsubara must be at least 1",
            yaml: "campaign: t
cycle:
  solve: { run: [/bin/true], outputs: { gtau: gtau.npy } }
  f:
    builtin: filter
    inputs: { gtau: solve.gtau }
    outputs: { giw: giw.npy }
    settings: { legendre: 0, matsubara: 512 }
stop: { max-iterations: 1 }
",
            at: (4, 3),
        },
        Case {
            site: "built-in stage `{sname}` takes inputs `gtau` (and `delta`, `levels` for Σ)",
            says: "built-in stage `f` takes inputs `gtau`",
            yaml: "campaign: t
cycle:
  solve: { run: [/bin/true], outputs: { g: g.npy } }
  f:
    builtin: filter
    inputs: { g: solve.g }
    outputs: { giw: giw.npy }
    settings: { legendre: 40, matsubara: 512 }
stop: { max-iterations: 1 }
",
            at: (4, 3),
        },
        Case {
            site: "built-in stage `{sname}` writes some of the outputs gtau, giw, sigma, gl",
            says: "built-in stage `f` writes some of the outputs gtau, giw, sigma, gl",
            yaml: "campaign: t
cycle:
  solve: { run: [/bin/true], outputs: { gtau: gtau.npy } }
  f:
    builtin: filter
    inputs: { gtau: solve.gtau }
    outputs: { g: g.npy }
    settings: { legendre: 40, matsubara: 512 }
stop: { max-iterations: 1 }
",
            at: (4, 3),
        },
        Case {
            site: "stage `{sname}`: the output `sigma` needs the inputs `delta` and `levels`",
            says: "stage `f`: the output `sigma` needs the inputs `delta` and `levels`",
            yaml: "campaign: t
cycle:
  solve: { run: [/bin/true], outputs: { gtau: gtau.npy } }
  f:
    builtin: filter
    inputs: { gtau: solve.gtau }
    outputs: { sigma: sigma.npy }
    settings: { legendre: 40, matsubara: 512 }
stop: { max-iterations: 1 }
",
            at: (4, 3),
        },
        // ------------------------------------------------------------ the sweep
        Case {
            site: "the sweep needs exactly one of `product` or `zip`",
            says: "the sweep needs exactly one of `product` or `zip`",
            yaml: "campaign: t
sweep:
  product: { a: [1, 2] }
  zip: { b: [1, 2] }
cycle:
  s: { run: [/bin/true] }
stop: { max-iterations: 1 }
",
            at: (3, 3),
        },
        Case {
            site: "the sweep's product makes {n} points; at most {MAX_POINTS} are allowed",
            says: "the sweep's product makes 100000000 points; at most 100000 are allowed",
            yaml: "campaign: t
sweep:
  product:
    a: [1, 2, 3, 4, 5, 6, 7, 8, 9, 10]
    b: [1, 2, 3, 4, 5, 6, 7, 8, 9, 10]
    c: [1, 2, 3, 4, 5, 6, 7, 8, 9, 10]
    d: [1, 2, 3, 4, 5, 6, 7, 8, 9, 10]
    e: [1, 2, 3, 4, 5, 6, 7, 8, 9, 10]
    f: [1, 2, 3, 4, 5, 6, 7, 8, 9, 10]
    g: [1, 2, 3, 4, 5, 6, 7, 8, 9, 10]
    h: [1, 2, 3, 4, 5, 6, 7, 8, 9, 10]
cycle:
  s: { run: [/bin/true] }
stop: { max-iterations: 1 }
",
            at: (3, 3),
        },
        Case {
            site: "sweep axis `{}` is empty",
            says: "sweep axis `a` is empty",
            yaml: "campaign: t
sweep:
  product:
    a: []
cycle:
  s: { run: [/bin/true] }
stop: { max-iterations: 1 }
",
            at: (4, 5),
        },
        Case {
            site: "zip axis `{}` has {} values, the first axis has {n}",
            says: "zip axis `b` has 1 values, the first axis has 2",
            yaml: "campaign: t
sweep:
  zip:
    a: [1, 2]
    b: [1]
cycle:
  s: { run: [/bin/true] }
stop: { max-iterations: 1 }
",
            at: (5, 5),
        },
        Case {
            site: "`{}` is both a parameter and a sweep axis",
            says: "`a` is both a parameter and a sweep axis",
            yaml: "campaign: t
parameters:
  a: 1
sweep:
  product: { a: [1, 2] }
cycle:
  s: { run: [/bin/true] }
stop: { max-iterations: 1 }
",
            at: (3, 3),
        },
        // ------------------------------------------------------------ programs and shell stages
        Case {
            site: "program `{}` ({}) is not executable",
            says: "is not executable",
            yaml: "campaign: t
programs:
  p: { path: ./x.json }
cycle:
  s: { run: [p] }
stop: { max-iterations: 1 }
",
            at: (3, 14),
        },
        Case {
            site: "program `{program}` ({}) is not executable",
            says: "is not executable",
            yaml: "campaign: t
cycle:
  s: { run: [./x.json] }
stop: { max-iterations: 1 }
",
            at: (3, 14),
        },
        Case {
            site: "stage `{sname}`: `shell: true` takes one script string, not a list",
            says: "takes one script string",
            yaml: "campaign: t
cycle:
  s: { run: [/bin/echo, hi], shell: true }
stop: { max-iterations: 1 }
",
            at: (3, 13),
        },
        Case {
            site: "stage `{sname}`: `run` is one string, which only a shell stage takes",
            says: "only a shell stage takes",
            yaml: "campaign: t
cycle:
  s: { run: \"/bin/echo hi\" }
stop: { max-iterations: 1 }
",
            at: (3, 13),
        },
        Case {
            site: "stage `{sname}`: `{{{{program:{}}}}}` is for shell scripts",
            says: "is for shell scripts",
            yaml: "campaign: t
programs:
  p: { path: /bin/echo }
cycle:
  s: { run: [p, \"{{program:p}}\"] }
stop: { max-iterations: 1 }
",
            at: (5, 17),
        },
        Case {
            site: "stage `{sname}`: character {}: {}",
            says: "character",
            yaml: "campaign: t
cycle:
  s: { run: \"/bin/echo {{param:\", shell: true }
stop: { max-iterations: 1 }
",
            at: (3, 13),
        },
        Case {
            site: "stage `{sname}`: no program `{}` under `programs:`",
            says: "no program `nope` under `programs:`",
            yaml: "campaign: t
cycle:
  s: { run: \"{{program:nope}} hi\", shell: true }
stop: { max-iterations: 1 }
",
            at: (3, 13),
        },
        Case {
            site: "stage `{sname}`: placeholder `{{{{{ns}{}}}}}` (character {}) is inside quotes in the script; rondo single-quotes every value itself",
            says: "is inside quotes in the script",
            yaml: "campaign: t
parameters: { a: 1 }
cycle:
  s: { run: \"/bin/echo '{{param:a}}'\", shell: true }
stop: { max-iterations: 1 }
",
            at: (4, 13),
        },
        Case {
            site: "stage `{sname}`: the script is empty",
            says: "the script is empty",
            yaml: "campaign: t
cycle:
  s: { run: \"  \", shell: true }
stop: { max-iterations: 1 }
",
            at: (3, 13),
        },
        Case {
            site: "stage `{sname}`: `writable-inputs` names `{}`, which is not one of its inputs",
            says: "`writable-inputs` names `y`",
            yaml: "campaign: t
start: { x: x.json }
cycle:
  s:
    run: [/bin/true, \"{{input:x}}\"]
    inputs: { x: start.x }
    writable-inputs: [y]
stop: { max-iterations: 1 }
",
            at: (7, 23),
        },
        Case {
            site: "stage `{sname}`: `placement` applies to command and shell stages; a built-in always runs inside rondo",
            says: "`placement` applies to command and shell stages",
            yaml: "campaign: t
start: { x: x.json }
cycle:
  m:
    builtin: mix
    inputs: { x: start.x }
    outputs: { x: x.json }
    settings: { method: linear, alpha: 0.5 }
    placement: host
stop: { max-iterations: 1 }
",
            at: (9, 16),
        },
        Case {
            site: "built-in stage `{sname}` takes no `env`: it runs inside rondo",
            says: "built-in stage `m` takes no `env`",
            yaml: "campaign: t
start: { x: x.json }
cycle:
  m:
    builtin: mix
    inputs: { x: start.x }
    outputs: { x: x.json }
    settings: { method: linear, alpha: 0.5 }
    env: { OMP_NUM_THREADS: 2 }
stop: { max-iterations: 1 }
",
            at: (9, 12),
        },
        Case {
            site: "stage `{sname}`: `env` names `{name}`, which is not a variable name",
            says: "`env` names `2THREADS`, which is not a variable name",
            yaml: "campaign: t
cycle:
  s:
    run: [/bin/true]
    env: { 2THREADS: 2 }
stop: { max-iterations: 1 }
",
            at: (5, 12),
        },
        Case {
            site: "stage `{sname}`: `env` sets `{name}`; names starting with RONDO_ are rondo's",
            says: "`env` sets `RONDO_POINT`; names starting with RONDO_ are rondo's",
            yaml: "campaign: t
cycle:
  s:
    run: [/bin/true]
    env:
      RONDO_POINT: p1
stop: { max-iterations: 1 }
",
            at: (6, 7),
        },
        Case {
            site: "stage `{sname}`: `env` sets `{name}`, whose name marks a secret; the campaign file is recorded in the workspace",
            says: "`env` sets `API_TOKEN`, whose name marks a secret",
            yaml: "campaign: t
cycle:
  s:
    run: [/bin/true]
    env:
      OMP_NUM_THREADS: 2
      API_TOKEN: abc
stop: { max-iterations: 1 }
",
            at: (7, 7),
        },
        Case {
            site: "built-in stage `{sname}` takes no `also-runs`: it runs inside rondo",
            says: "built-in stage `m` takes no `also-runs`",
            yaml: "campaign: t
programs: { t: { path: /bin/true } }
start: { x: x.json }
cycle:
  m:
    builtin: mix
    inputs: { x: start.x }
    outputs: { x: x.json }
    settings: { method: linear, alpha: 0.5 }
    also-runs: [t]
stop: { max-iterations: 1 }
",
            at: (10, 17),
        },
        Case {
            site: "stage `{sname}`: `also-runs` names `{}`, which is not under `programs:`",
            says: "`also-runs` names `solver`, which is not under `programs:`",
            yaml: "campaign: t
programs: { t: { path: /bin/true } }
cycle:
  s:
    run: [t]
    also-runs: [t, solver]
stop: { max-iterations: 1 }
",
            at: (6, 20),
        },
        Case {
            site: "hooks: time limit `{}` is not a duration",
            says: "hooks: time limit `soon` is not a duration",
            yaml: "campaign: t
cycle:
  s: { run: [/bin/true] }
stop: { max-iterations: 1 }
hooks: { time-limit: soon }
",
            at: (5, 22),
        },
        Case {
            site: "hooks: `disk-free-below: {}` is neither a percentage nor a size",
            says: "`disk-free-below: lots` is neither a percentage nor a size",
            yaml: "campaign: t
cycle:
  s: { run: [/bin/true] }
stop: { max-iterations: 1 }
hooks: { disk-free-below: lots }
",
            at: (5, 27),
        },
        Case {
            site: "hook `{name}`: the command is empty",
            says: "hook `point-failed`: the command is empty",
            yaml: "campaign: t
cycle:
  s: { run: [/bin/true] }
stop: { max-iterations: 1 }
hooks: { point-failed: [] }
",
            at: (5, 24),
        },
        Case {
            site: "hook `{name}`: `{}` has a placeholder; hooks take none",
            says: "hook `point-failed`: `{{point}}` has a placeholder",
            yaml: "campaign: t
cycle:
  s: { run: [/bin/true] }
stop: { max-iterations: 1 }
hooks: { point-failed: [./n.sh, \"{{point}}\"] }
",
            at: (5, 33),
        },
        Case {
            site: "budget `{}` is not a positive number of core-hours",
            says: "budget `200 node-hours` is not a positive number of core-hours",
            yaml: "campaign: t
cycle:
  s: { run: [/bin/true] }
stop: { max-iterations: 1 }
budget: { core-hours: 200 node-hours }
",
            at: (5, 23),
        },
        Case {
            site: "warm-start names no sweep axis",
            says: "warm-start names no sweep axis",
            yaml: "campaign: t
sweep: { product: { v: [1.0, 2.0] } }
cycle:
  s: { run: [/bin/true] }
stop: { max-iterations: 1 }
warm-start: { along: [] }
",
            at: (6, 22),
        },
        Case {
            site: "warm-start axis `{axis}` is not a sweep axis",
            says: "warm-start axis `volume` is not a sweep axis",
            yaml: "campaign: t
sweep: { product: { v: [1.0, 2.0] } }
cycle:
  s: { run: [/bin/true] }
stop: { max-iterations: 1 }
warm-start: { along: [volume] }
",
            at: (6, 23),
        },
        Case {
            site: "warm-start axis `{axis}` has values that are not numbers",
            says: "warm-start axis `phase` has values that are not numbers",
            yaml: "campaign: t
sweep: { product: { phase: [a, b] } }
cycle:
  s: { run: [/bin/true] }
stop: { max-iterations: 1 }
warm-start: { along: [phase] }
",
            at: (6, 23),
        },
        Case {
            site: "warm-start axis `{axis}` is named twice",
            says: "warm-start axis `v` is named twice",
            yaml: "campaign: t
sweep: { product: { v: [1.0, 2.0] } }
cycle:
  s: { run: [/bin/true] }
stop: { max-iterations: 1 }
warm-start: { along: [v, v] }
",
            at: (6, 26),
        },
        Case {
            site: "stage `{sname}`: `keep` names `{}`, which is not one of its outputs",
            says: "`keep` names `wfc`, which is not one of its outputs",
            yaml: "campaign: t
cycle:
  s:
    run: [/bin/true]
    outputs: { restart: r.bin }
    keep: { wfc: { last: 2 } }
stop: { max-iterations: 1 }
",
            at: (6, 13),
        },
        Case {
            site: "stage `{sname}`: `keep.{}` keeps nothing it names",
            says: "`keep.restart` keeps nothing it names",
            yaml: "campaign: t
cycle:
  s:
    run: [/bin/true]
    outputs: { restart: r.bin }
    keep: { restart: {} }
stop: { max-iterations: 1 }
",
            at: (6, 22),
        },
        Case {
            site: "stage `{sname}`: `keep.{}` counts must be at least 1",
            says: "`keep.restart` counts must be at least 1",
            yaml: "campaign: t
cycle:
  s:
    run: [/bin/true]
    outputs: { restart: r.bin }
    keep: { restart: { last: 0 } }
stop: { max-iterations: 1 }
",
            at: (6, 22),
        },
        // ------------------------------------------------------------ case folders
        Case {
            site: "built-in stage `{sname}` cannot keep a case folder",
            says: "built-in stage `m` cannot keep a case folder",
            yaml: "campaign: t
start: { x: x.json }
cycle:
  m:
    builtin: mix
    inputs: { x: start.x }
    outputs: { x: x.json }
    settings: { method: linear, alpha: 0.5 }
    case-folder: { path: case }
stop: { max-iterations: 1 }
",
            at: (9, 18),
        },
        Case {
            // a file of the case folder is an output, but only as a plain relative path
            site: "output file name `{ov}` is not allowed",
            says: "output file name `case/../o.txt` is not allowed",
            yaml: "campaign: t
cycle:
  s:
    run: [/bin/true]
    outputs: { o: case/../o.txt }
    case-folder: {}
stop: { max-iterations: 1 }
",
            at: (5, 16),
        },
        Case {
            site: "stage `{sname}`: the output role `{CASE_FOLDER_ROLE}` is its case folder's",
            says: "stage `s`: the output role `folder` is its case folder's",
            yaml: "campaign: t
cycle:
  s:
    run: [/bin/true]
    outputs: { folder: f.txt }
    case-folder: {}
stop: { max-iterations: 1 }
",
            at: (5, 16),
        },
        Case {
            site: "stage `{sname}`: case folder name `{v}` is not allowed",
            says: "stage `s`: case folder name `inputs` is not allowed",
            yaml: "campaign: t
cycle:
  s:
    run: [/bin/true]
    case-folder: { path: inputs }
stop: { max-iterations: 1 }
",
            at: (5, 26),
        },
        Case {
            site: "stage `{sname}`: `initially: {}` names no start entry",
            says: "stage `s`: `initially: start.nope` names no start entry",
            yaml: "campaign: t
start: { x: x.json }
cycle:
  s:
    run: [/bin/true]
    case-folder: { initially: start.nope }
stop: { max-iterations: 1 }
",
            at: (6, 31),
        },
        // ------------------------------------------------------------ resident programs
        Case {
            site: "built-in stage `{sname}` cannot be resident",
            says: "built-in stage `m` cannot be resident",
            yaml: "campaign: t
start: { x: x.json }
cycle:
  m:
    builtin: mix
    inputs: { x: start.x }
    outputs: { x: x.json }
    settings: { method: linear, alpha: 0.5 }
    resident: true
stop: { max-iterations: 1 }
",
            at: (9, 15),
        },
        Case {
            site: "stage `{sname}`: a resident program's command cannot use `{{{{{shown}}}}}`",
            says: "stage `s`: a resident program's command cannot use `{{input:x}}`",
            yaml: "campaign: t
start: { x: x.json }
cycle:
  s:
    run: [/bin/cat, \"{{input:x}}\"]
    inputs: { x: start.x }
    resident: true
stop: { max-iterations: 1 }
",
            at: (7, 15),
        },
        Case {
            site: "stage `{sname}`: a resident program never outlives rondo",
            says: "stage `s`: a resident program never outlives rondo",
            yaml: "campaign: t
cycle:
  s:
    run: [/bin/true]
    resident: true
    outlive-rondo: true
stop: { max-iterations: 1 }
",
            at: (5, 15),
        },
        Case {
            site: "stage `{sname}`: a resident stage's case folder cannot be named `{HANDOFF_DIR}`",
            says: "stage `s`: a resident stage's case folder cannot be named `handoff`",
            yaml: "campaign: t
cycle:
  s:
    run: [/bin/true]
    resident: true
    case-folder: { path: handoff }
stop: { max-iterations: 1 }
",
            at: (6, 18),
        },
        Case {
            site: "stage `{sname}`: a resident program's standard output spans every hand-off",
            says: "stage `s`: a resident program's standard output spans every hand-off",
            yaml: "campaign: t
cycle:
  s:
    run: [/bin/true]
    resident: true
    read-metrics:
      e: { stdout: true, pattern: 'e (.+)' }
stop: { max-iterations: 1 }
",
            at: (5, 15),
        },
        Case {
            site: "stage `{sname}`: `read-metrics` applies to command and shell stages",
            says: "`read-metrics` applies to command and shell stages",
            yaml: "campaign: t
start: { x: x.json }
cycle:
  m:
    builtin: mix
    settings: { method: linear, alpha: 0.5 }
    inputs: { d: start.x }
    outputs: { d: d.json }
    read-metrics:
      e: { file: scf.log, pattern: '(\\S+)' }
stop: { max-iterations: 1 }
",
            at: (10, 7),
        },
        Case {
            site: "metric `{name}`: give exactly one of `file`, `stdout: true`, `json` and `hdf5`",
            says: "give exactly one of",
            yaml: "campaign: t
cycle:
  s:
    run: [/bin/true]
    read-metrics:
      e:
        file: a.log
        json: b.json
stop: { max-iterations: 1 }
",
            at: (6, 7),
        },
        Case {
            site: "metric `{name}`: `{v}` is neither an output role of the stage nor a file name in its scratch folder",
            says: "`../a.log` is neither an output role",
            yaml: "campaign: t
cycle:
  s:
    run: [/bin/true]
    read-metrics:
      e:
        file: ../a.log
        pattern: '(\\S+)'
stop: { max-iterations: 1 }
",
            at: (7, 15),
        },
        Case {
            site: "metric `{name}`: unknown unit `{}`",
            says: "unknown unit `kcal`",
            yaml: "campaign: t
cycle:
  s:
    run: [/bin/true]
    read-metrics:
      e:
        file: a.log
        pattern: '(\\S+)'
        unit: kcal
stop: { max-iterations: 1 }
",
            at: (9, 15),
        },
        Case {
            site: "metric `{name}`: `{key}` does not apply to a {kind} source",
            says: "`pattern` does not apply to a JSON source",
            yaml: "campaign: t
cycle:
  s:
    run: [/bin/true]
    read-metrics:
      e:
        json: out.json
        pointer: /scf/energy
        pattern: '(\\S+)'
stop: { max-iterations: 1 }
",
            at: (6, 7),
        },
        Case {
            site: "metric `{name}`: a text source needs `pattern`",
            says: "a text source needs `pattern`",
            yaml: "campaign: t
cycle:
  s:
    run: [/bin/true]
    read-metrics:
      e:
        stdout: true
stop: { max-iterations: 1 }
",
            at: (6, 7),
        },
        Case {
            site: "metric `{name}`: the pattern does not compile: {e}",
            says: "the pattern does not compile",
            yaml: "campaign: t
cycle:
  s:
    run: [/bin/true]
    read-metrics:
      e:
        file: a.log
        pattern: 'energy = (\\S+'
stop: { max-iterations: 1 }
",
            at: (8, 18),
        },
        Case {
            site: "metric `{name}`: the pattern has {groups} capture groups; it needs exactly one",
            says: "the pattern has 2 capture groups",
            yaml: "campaign: t
cycle:
  s:
    run: [/bin/true]
    read-metrics:
      e:
        file: a.log
        pattern: '(\\S+) (\\S+)'
stop: { max-iterations: 1 }
",
            at: (8, 18),
        },
        Case {
            site: "metric `{name}`: the pattern has {groups} capture groups; it needs exactly one",
            says: "the pattern has 0 capture groups",
            yaml: "campaign: t
cycle:
  s:
    run: [/bin/true]
    read-metrics:
      e:
        stdout: true
        pattern: 'energy = \\S+'
stop: { max-iterations: 1 }
",
            at: (8, 18),
        },
        Case {
            site: "metric `{name}`: a JSON source needs `pointer`",
            says: "a JSON source needs `pointer`",
            yaml: "campaign: t
cycle:
  s:
    run: [/bin/true]
    read-metrics:
      e:
        json: out.json
stop: { max-iterations: 1 }
",
            at: (6, 7),
        },
        Case {
            site: "metric `{name}`: `{}` is not a JSON pointer",
            says: "`scf/energy` is not a JSON pointer",
            yaml: "campaign: t
cycle:
  s:
    run: [/bin/true]
    read-metrics:
      e:
        json: out.json
        pointer: scf/energy
stop: { max-iterations: 1 }
",
            at: (8, 18),
        },
        Case {
            site: "metric `{name}`: `index` applies to a dataset, not to an attribute",
            says: "`index` applies to a dataset",
            yaml: "campaign: t
cycle:
  s:
    run: [/bin/true]
    read-metrics:
      e:
        hdf5: imp.h5
        attribute: /impurity@mu
        index: [0]
stop: { max-iterations: 1 }
",
            at: (6, 7),
        },
        Case {
            site: "metric `{name}`: attribute `{}` must be written OBJECT@NAME",
            says: "attribute `/impurity` must be written OBJECT@NAME",
            yaml: "campaign: t
cycle:
  s:
    run: [/bin/true]
    read-metrics:
      e:
        hdf5: imp.h5
        attribute: /impurity
stop: { max-iterations: 1 }
",
            at: (8, 20),
        },
        Case {
            site: "metric `{name}`: an HDF5 source needs exactly one of `dataset` and `attribute`",
            says: "needs exactly one of `dataset` and `attribute`",
            yaml: "campaign: t
cycle:
  s:
    run: [/bin/true]
    read-metrics:
      e:
        hdf5: imp.h5
stop: { max-iterations: 1 }
",
            at: (6, 7),
        },
        Case {
            site: "metric `{name}`: the HDF5 path `{p}` is not absolute",
            says: "the HDF5 path `impurity/n_f` is not absolute",
            yaml: "campaign: t
cycle:
  s:
    run: [/bin/true]
    read-metrics:
      e:
        hdf5: imp.h5
        dataset: impurity/n_f
stop: { max-iterations: 1 }
",
            at: (8, 18),
        },
        Case {
            site: "output `{}`: the HDF5 dataset path `{p}` is not absolute",
            says: "the HDF5 dataset path `impurity/sigma` is not absolute",
            yaml: "campaign: t
cycle:
  s:
    run: [/bin/true]
    outputs:
      imp: { file: imp.h5, hdf5: [/impurity/delta, impurity/sigma] }
stop: { max-iterations: 1 }
",
            at: (6, 7),
        },
        Case {
            site: "stage `{sname}`: `datasets` names `{role}`, which is not an input role",
            says: "`datasets` names `rho`, which is not an input role",
            yaml: "campaign: t
cycle:
  a: { run: [/bin/true], outputs: { x: x.h5 } }
  m:
    builtin: mix
    inputs: { x: a.x }
    outputs: { x: x.h5 }
    settings: { method: linear, alpha: 0.5, datasets: { x: [/impurity/sigma], rho: [/impurity/sigma] } }
stop: { max-iterations: 1 }
",
            at: (4, 3),
        },
        Case {
            site: "stage `{sname}`: the dataset path `{p}` of `{role}` is not absolute",
            says: "the dataset path `impurity/sigma` of `x` is not absolute",
            yaml: "campaign: t
cycle:
  a: { run: [/bin/true], outputs: { x: x.h5 } }
  m:
    builtin: mix
    inputs: { x: a.x }
    outputs: { x: x.h5 }
    settings: { method: linear, alpha: 0.5, datasets: { x: [impurity/sigma] } }
stop: { max-iterations: 1 }
",
            at: (4, 3),
        },
        Case {
            site: "stage `{sname}`: `datasets` of `{role}` is empty",
            says: "`datasets` of `x` is empty",
            yaml: "campaign: t
cycle:
  a: { run: [/bin/true], outputs: { x: x.h5 } }
  m:
    builtin: mix
    inputs: { x: a.x }
    outputs: { x: x.h5 }
    settings: { method: linear, alpha: 0.5, datasets: { x: [] } }
stop: { max-iterations: 1 }
",
            at: (4, 3),
        },
        // ------------------------------------------------------------ stages outside the loop
        Case {
            site: "stage `{sname}`: `resident` keeps a program alive from one iteration to the next, which only a cycle stage has",
            says: "stage `a`: `resident` keeps a program alive",
            yaml: "campaign: t
cycle:
  s: { run: [/bin/true] }
after-point:
  a:
    run: [/bin/cat]
    outputs: { o: o.txt }
    resident: true
stop: { max-iterations: 1 }
",
            at: (8, 15),
        },
        Case {
            site: "`finals` names `{}`, which is no stage.metric of a per-point stage",
            says: "`finals` names `q.e`",
            yaml: "campaign: t
cycle:
  s: { run: [/bin/true], metrics: [e] }
after-campaign:
  a:
    run: [/bin/true]
    inputs: { f: { finals: [q.e], points: all } }
stop: { max-iterations: 1 }
",
            at: (7, 15),
        },
        Case {
            site: "`initially: {i}` must name a start file or a `before:` stage's output",
            says: "`initially: s.x` must name a start file",
            yaml: "campaign: t
cycle:
  s:
    run: [/bin/true]
    inputs: { x: { previous: s.x, initially: s.x } }
    outputs: { x: x.json }
stop: { max-iterations: 1 }
",
            at: (5, 15),
        },
        Case {
            site: "a points input reads either `outputs: stage.output` or `finals: [stage.metric, ...]`",
            says: "reads either",
            yaml: "campaign: t
cycle:
  s: { run: [/bin/true], outputs: { x: x.json }, metrics: [e] }
after-campaign:
  a:
    run: [/bin/true]
    inputs: { f: { outputs: s.x, finals: [s.e], points: all } }
stop: { max-iterations: 1 }
",
            at: (7, 15),
        },
        Case {
            site: "both `analysis: eos:` and an after-campaign stage with `builtin: eos`",
            says: "both `analysis: eos:`",
            yaml: "campaign: t
sweep:
  product:
    volume: [1.0, 2.0, 3.0, 4.0]
cycle:
  s: { run: [/bin/true], metrics: [e] }
after-campaign:
  fit:
    builtin: eos
    settings: { energy: s.e, volume: volume }
stop: { max-iterations: 1 }
analysis:
  eos: { energy: s.e }
",
            at: (13, 18),
        },
        Case {
            site: "input `{r}` of an after-campaign stage names a per-point output without saying which points",
            says: "input `s.x` of an after-campaign stage",
            yaml: "campaign: t
cycle:
  s: { run: [/bin/true], outputs: { x: x.json } }
after-campaign:
  a:
    run: [/bin/true]
    inputs: { x: s.x }
stop: { max-iterations: 1 }
",
            at: (7, 15),
        },
        Case {
            site: "input `{}`: stages under `{}:` have no previous iteration",
            says: "stages under `after-point:` have no previous iteration",
            yaml: "campaign: t
cycle:
  s: { run: [/bin/true], outputs: { x: x.json } }
after-point:
  a:
    run: [/bin/true]
    inputs: { x: { previous: s.x, initially: start.x } }
start:
  x: x.json
stop: { max-iterations: 1 }
",
            at: (7, 15),
        },
        Case {
            site: "only an `after-campaign:` stage reads the outputs or final values of several points",
            says: "only an `after-campaign:` stage",
            yaml: "campaign: t
cycle:
  s: { run: [/bin/true], outputs: { x: x.json } }
after-point:
  a:
    run: [/bin/true]
    inputs: { x: { outputs: s.x, points: all } }
stop: { max-iterations: 1 }
",
            at: (7, 15),
        },
        Case {
            site: "stage `{EOS_STAGE}` is the name of the shipped equation-of-state stage of `analysis: eos:`",
            says: "stage `eos` is the name of the shipped",
            yaml: "campaign: t
sweep:
  product:
    volume: [1.0, 2.0, 3.0, 4.0]
cycle:
  s: { run: [/bin/true], metrics: [e] }
after-campaign:
  eos:
    run: [/bin/true]
stop: { max-iterations: 1 }
analysis:
  eos: { energy: s.e }
",
            at: (8, 3),
        },
        Case {
            site: "stage `{sname}` reads `points: group` but has no `group-by:`",
            says: "stage `a` reads `points: group`",
            yaml: "campaign: t
sweep:
  product:
    v: [1, 2]
cycle:
  s: { run: [/bin/true], outputs: { x: x.json } }
after-campaign:
  a:
    run: [/bin/true]
    inputs: { x: { outputs: s.x, points: group } }
stop: { max-iterations: 1 }
",
            at: (10, 15),
        },
        Case {
            site: "stage `{sname}`: `case-folder` keeps a folder from one iteration to the next, which only a cycle stage has",
            says: "stage `a`: `case-folder` keeps a folder",
            yaml: "campaign: t
cycle:
  s: { run: [/bin/true] }
after-point:
  a:
    run: [/bin/true]
    case-folder: { path: case }
stop: { max-iterations: 1 }
",
            at: (7, 18),
        },
        Case {
            site: "stage `{sname}`: `group-by` is for `after-campaign:` stages",
            says: "`group-by` is for `after-campaign:` stages",
            yaml: "campaign: t
sweep:
  product:
    v: [1, 2]
cycle:
  s: { run: [/bin/true] }
after-point:
  a:
    run: [/bin/true]
    group-by: [v]
stop: { max-iterations: 1 }
",
            at: (10, 16),
        },
        Case {
            site: "stage `{sname}`: `group-by` names `{}`, which is no sweep axis",
            says: "`group-by` names `w`",
            yaml: "campaign: t
sweep:
  product:
    v: [1, 2]
cycle:
  s: { run: [/bin/true] }
after-campaign:
  a:
    run: [/bin/true]
    group-by: [w]
stop: { max-iterations: 1 }
",
            at: (10, 16),
        },
        Case {
            site: "stage `{}` is also a stage of `{}`",
            says: "stage `s` is also a stage of `cycle`",
            yaml: "campaign: t
cycle:
  s: { run: [/bin/true] }
after-point:
  s: { run: [/bin/true] }
stop: { max-iterations: 1 }
",
            at: (5, 3),
        },
        Case {
            site: "stage `{}`: the built-in eos needs `settings: {{ energy: stage.metric, volume: AXIS }}`",
            says: "stage `fit`: the built-in eos needs `settings:",
            yaml: "campaign: t
cycle:
  s: { run: [/bin/true], metrics: [e] }
after-campaign:
  fit:
    builtin: eos
stop: { max-iterations: 1 }
",
            at: (5, 3),
        },
        Case {
            site: "stage `{}`: the built-in eos reads the final energies itself and writes analysis/eos.json",
            says: "the built-in eos reads the final energies itself",
            yaml: "campaign: t
sweep:
  product:
    volume: [1.0, 2.0, 3.0, 4.0]
cycle:
  s: { run: [/bin/true], metrics: [e] }
after-campaign:
  fit:
    builtin: eos
    settings: { energy: s.e, volume: volume }
    outputs: { t: t.json }
stop: { max-iterations: 1 }
",
            at: (8, 3),
        },
        Case {
            site: "this input reads per-point results without saying which points",
            says: "without saying which points",
            yaml: "campaign: t
cycle:
  s: { run: [/bin/true], outputs: { x: x.json } }
after-campaign:
  a:
    run: [/bin/true]
    inputs: { x: { outputs: s.x } }
stop: { max-iterations: 1 }
",
            at: (7, 15),
        },
        Case {
            site: "unknown point selection `{other}`",
            says: "unknown point selection `some`",
            yaml: "campaign: t
cycle:
  s: { run: [/bin/true], outputs: { x: x.json } }
after-campaign:
  a:
    run: [/bin/true]
    inputs: { x: { outputs: s.x, points: some } }
stop: { max-iterations: 1 }
",
            at: (7, 15),
        },
        Case {
            site: "stage `{s}` declares no output `{o}`",
            says: "stage `s` declares no output `sigma`",
            yaml: "campaign: t
cycle:
  s: { run: [/bin/true], outputs: { x: x.json } }
after-point:
  spectral:
    run: [/bin/true]
    inputs: { g: s.sigma }
stop: { max-iterations: 1 }
",
            at: (7, 15),
        },
    ]
}

fn write_case(dir: &Path, c: &Case) -> std::path::PathBuf {
    let f = dir.join("c.yaml");
    let bytes: Vec<u8> = if c.site == READ {
        // Latin-1: é is the single byte 0xE9, which is not UTF-8
        c.yaml.chars().map(|ch| ch as u32 as u8).collect()
    } else {
        c.yaml.as_bytes().to_vec()
    };
    std::fs::write(&f, bytes).unwrap_or_else(|e| panic!("write {}: {e}", f.display()));
    f
}

/// The diagnostic lines `rondo check` printed: (line, col, message) of each
/// `c.yaml:LINE:COL: MESSAGE; hint: ...`.
fn diagnostics(text: &str) -> Vec<(u64, u64, String)> {
    text.lines()
        .filter_map(|l| {
            let rest = l.strip_prefix("c.yaml:")?;
            let mut it = rest.splitn(3, ':');
            let line = it.next()?.parse().ok()?;
            let col = it.next()?.parse().ok()?;
            Some((line, col, it.next()?.trim().to_string()))
        })
        .collect()
}

#[test]
fn every_campaign_file_diagnostic_names_its_message_and_place() {
    let rondo = env!("CARGO_BIN_EXE_rondo");
    let mut failures = Vec::new();
    let all = cases();
    for (i, c) in all.iter().enumerate() {
        let d = tempfile::tempdir().unwrap_or_else(|e| panic!("{e}"));
        std::fs::write(d.path().join(START_FILE), "{\"x\": 0.0}\n")
            .unwrap_or_else(|e| panic!("{e}"));
        write_case(d.path(), c);
        let o = Command::new(rondo)
            .args(["check", "c.yaml"])
            .current_dir(d.path())
            .output()
            .unwrap_or_else(|e| panic!("cannot run {rondo}: {e}"));
        let text = format!(
            "{}{}",
            String::from_utf8_lossy(&o.stdout),
            String::from_utf8_lossy(&o.stderr)
        );
        let mut found = diagnostics(&text);
        let companion = COMPANIONS.iter().find(|(s, _)| *s == c.site).map(|x| x.1);
        let mut problem = None;
        if let Some(other) = companion {
            match found.iter().position(|d| d.2.contains(other)) {
                Some(k) => {
                    found.remove(k);
                }
                None => problem = Some(format!("no companion diagnostic `{other}`")),
            }
        }
        let want = format!("{}:{}: …{}…", c.at.0, c.at.1, c.says);
        problem = problem.or(if o.status.code() != Some(2) {
            Some(format!("exit {:?}, not 2", o.status.code()))
        } else if found.len() != 1 {
            Some(format!("{} diagnostics, not exactly one", found.len()))
        } else if !found[0].2.contains(c.says) {
            Some("another message".to_string())
        } else if (found[0].0, found[0].1) != c.at {
            Some(format!("at {}:{}", found[0].0, found[0].1))
        } else if !found[0].2.contains("; hint: ") {
            Some("no hint".to_string())
        } else {
            None
        });
        if let Some(p) = problem {
            failures.push(format!(
                "case {i} ({}): want {want}; {p}; rondo check printed:\n{text}",
                c.site
            ));
        }
    }
    assert!(
        failures.is_empty(),
        "{} of {} cases failed:\n\n{}",
        failures.len(),
        all.len(),
        failures.join("\n")
    );
}

/// The message literal (first string literal) of every `self.push(` call under src/spec/.
fn push_sites(src: &str) -> Vec<String> {
    let mut out = Vec::new();
    let mut rest = src;
    while let Some(i) = rest.find("self.push(") {
        rest = &rest[i + "self.push(".len()..];
        let Some(open) = rest.find('"') else { break };
        let body = &rest[open + 1..];
        let mut lit = String::new();
        let mut chars = body.chars();
        while let Some(ch) = chars.next() {
            match ch {
                '\\' => {
                    if let Some(n) = chars.next() {
                        lit.push(n);
                    }
                }
                '"' => break,
                _ => lit.push(ch),
            }
        }
        out.push(lit);
    }
    out
}

/// Every `.rs` file under src/spec/ (the campaign-file module), read in path order and
/// joined.
fn spec_source() -> String {
    fn walk(dir: &Path, files: &mut Vec<std::path::PathBuf>) {
        let entries = std::fs::read_dir(dir).unwrap_or_else(|e| panic!("{}: {e}", dir.display()));
        for entry in entries {
            let p = entry
                .unwrap_or_else(|e| panic!("{}: {e}", dir.display()))
                .path();
            if p.is_dir() {
                walk(&p, files);
            } else if p.extension().is_some_and(|x| x == "rs") {
                files.push(p);
            }
        }
    }
    let mut files = Vec::new();
    walk(
        &Path::new(env!("CARGO_MANIFEST_DIR")).join("src/spec"),
        &mut files,
    );
    files.sort();
    assert!(!files.is_empty(), "no .rs file under src/spec/");
    files
        .iter()
        .map(|p| std::fs::read_to_string(p).unwrap_or_else(|e| panic!("{}: {e}", p.display())))
        .collect::<Vec<_>>()
        .join("\n")
}

#[test]
fn the_table_covers_every_diagnostic_of_the_campaign_checker() {
    let src = spec_source();
    let sites = push_sites(&src);
    // the count at the time of writing, as a floor: the scan must not miss calls
    assert!(sites.len() >= 62, "only {} push sites found", sites.len());
    let in_source: BTreeSet<&str> = sites.iter().map(String::as_str).collect();
    let covered: BTreeSet<&str> = cases().iter().map(|c| c.site).collect();
    let missing: Vec<&&str> = in_source.difference(&covered).collect();
    assert!(
        missing.is_empty(),
        "diagnostics under src/spec/ without a case in this table: {missing:#?}"
    );
    let stale: Vec<&&str> = covered
        .difference(&in_source)
        .filter(|s| **s != SAPHYR)
        .filter(|s| !(**s == READ && src.contains("cannot read the campaign file: {e}")))
        .collect();
    assert!(
        stale.is_empty(),
        "cases whose diagnostic is no longer under src/spec/: {stale:#?}"
    );
    eprintln!(
        "{} push sites under src/spec/ ({} distinct messages), {} cases",
        sites.len(),
        in_source.len(),
        cases().len()
    );
}

/// The metrics the filter built-in really reports are accepted by stopping rules (they were
/// refused in favour of a `residual` the filter never reported).
#[test]
fn a_stopping_rule_may_name_every_filter_metric() {
    for m in [
        "legendre_kept",
        "legendre_dropped",
        "density_per_spin",
        "tail_c1",
    ] {
        let d = tempfile::tempdir().unwrap_or_else(|e| panic!("{e}"));
        let yaml = format!(
            "campaign: t
cycle:
  solve:
    run: [/bin/true]
    outputs: {{ gtau: gtau.npy }}
  f:
    builtin: filter
    inputs: {{ gtau: solve.gtau }}
    outputs: {{ giw: giw.npy }}
    settings: {{ legendre: 40, matsubara: 512 }}
stop:
  when:
    - {{ metric: f.{m}, change-below: 0.1 }}
  max-iterations: 2
"
        );
        std::fs::write(d.path().join("c.yaml"), yaml).unwrap_or_else(|e| panic!("{e}"));
        let o = Command::new(env!("CARGO_BIN_EXE_rondo"))
            .args(["check", "c.yaml"])
            .current_dir(d.path())
            .output()
            .unwrap_or_else(|e| panic!("{e}"));
        assert_eq!(
            o.status.code(),
            Some(0),
            "{m}: {}{}",
            String::from_utf8_lossy(&o.stdout),
            String::from_utf8_lossy(&o.stderr)
        );
    }
}
