//! `cycle:`: each stage's inputs (`stage.output`, `start.name`, or the previous iteration's
//! output), its output file names, the metrics it must report, its limits and what it runs
//! (an argument list or a shell script, see `commands`; a built-in, see `builtins`); then
//! the order of the stages within one iteration, which must have no cycle.

use std::collections::{BTreeMap, BTreeSet};
use std::path::Path;

use serde_saphyr::Spanned;

use super::{loc, split_ref, Validator};
use crate::spec::model::{ResolvedProgram, Source, Stage, StageKind};
use crate::spec::raw::{CampaignFile, InputSpec, PreviousInput, RunSpec, StageSpec};

/// What every stage of the cycle is checked against.
pub(super) struct Cycle<'r> {
    /// The file.
    pub(super) raw: &'r CampaignFile,
    /// The campaign file's folder.
    pub(super) base: &'r Path,
    /// Names a `{{param:NAME}}` may use: parameters, sweep axes, schedules.
    pub(super) params: &'r BTreeSet<String>,
    /// The names under `programs:`.
    pub(super) declared: BTreeSet<String>,
}

/// The stage being checked, with its inputs as checked so far.
pub(super) struct StageAt<'s> {
    /// Its name.
    pub(super) name: &'s str,
    /// Its key's location.
    pub(super) at: (u64, u64),
    /// As written.
    pub(super) spec: &'s StageSpec,
    /// Its good inputs, role → source, in file order.
    pub(super) inputs: &'s [(String, Source)],
}

impl Validator<'_> {
    /// Every good stage of the cycle, in file order.
    pub(super) fn stages(
        &mut self,
        raw: &CampaignFile,
        params: &BTreeSet<String>,
        programs: &mut BTreeMap<String, ResolvedProgram>,
        base: &Path,
    ) -> Vec<Stage> {
        let cx = Cycle {
            raw,
            base,
            params,
            declared: raw.programs.keys().map(str::to_string).collect(),
        };
        let stop_metrics: Vec<(String, String)> = raw
            .stop
            .when
            .iter()
            .filter_map(|r| split_ref(&r.metric.value).map(|(a, b)| (a.into(), b.into())))
            .collect();
        let mut stages = Vec::new();
        if raw.cycle.is_empty() {
            self.push(
                (0, 0),
                "the cycle has no stages",
                "add stages under `cycle:`",
            );
        }
        for (key, st) in &raw.cycle.0 {
            if let Some(s) = self.stage(&cx, key, st, &stop_metrics, programs) {
                stages.push(s);
            }
        }
        stages
    }

    /// One stage: inputs, outputs, metrics, limits and what it runs.
    fn stage(
        &mut self,
        cx: &Cycle,
        key: &Spanned<String>,
        st: &StageSpec,
        stop_metrics: &[(String, String)],
        programs: &mut BTreeMap<String, ResolvedProgram>,
    ) -> Option<Stage> {
        let sname = key.value.clone();
        let at = loc(key);
        let inputs = self.inputs(cx.raw, st);
        let outputs: Vec<(String, String)> = st
            .outputs
            .iter()
            .map(|(k, v)| (k.to_string(), v.clone()))
            .collect();
        self.output_names(st);
        let mut required: BTreeSet<String> = st.metrics.iter().cloned().collect();
        for (s, m) in stop_metrics {
            if *s == sname {
                required.insert(m.clone());
            }
        }
        let limits = self.limits(cx.raw, &sname, at, st);
        let s = StageAt {
            name: &sname,
            at,
            spec: st,
            inputs: &inputs,
        };
        let kind = self.stage_kind(cx, &s, programs)?;
        Some(Stage {
            name: sname,
            kind,
            inputs,
            outputs,
            required_metrics: required,
            resources: limits.resources,
            time_limit: limits.time_limit,
            retries: limits.retries,
            allow_nonfinite: st.allow_nonfinite,
        })
    }

    /// The good inputs of a stage, role → source, in file order.
    fn inputs(&mut self, raw: &CampaignFile, st: &StageSpec) -> Vec<(String, Source)> {
        let mut inputs = Vec::new();
        for (ik, spec) in &st.inputs.0 {
            let iat = loc(ik);
            let src = match spec {
                InputSpec::Same(r) => self.source_ref(raw, r, iat, false).map(|(s, o)| {
                    if s == "start" {
                        Source::Start(o)
                    } else {
                        Source::Same { stage: s, role: o }
                    }
                }),
                InputSpec::Previous(p) => self.previous_input(raw, st, ik, p),
            };
            if let Some(src) = src {
                inputs.push((ik.value.clone(), src));
            }
        }
        inputs
    }

    /// `{ previous: stage.output, initially: start.name }`: only a built-in stage may go
    /// without `initially`.
    fn previous_input(
        &mut self,
        raw: &CampaignFile,
        st: &StageSpec,
        ik: &Spanned<String>,
        p: &PreviousInput,
    ) -> Option<Source> {
        let iat = loc(ik);
        let prev = self.source_ref(raw, &p.previous, iat, true);
        let init = match &p.initially {
            Some(i) => match self.source_ref(raw, i, iat, false) {
                Some((s, o)) if s == "start" => Some(Some(o)),
                Some(_) => {
                    self.push(
                        iat,
                        format!("`initially: {i}` must name a start file"),
                        "write `initially: start.NAME`",
                    );
                    None
                }
                None => None,
            },
            None => Some(None),
        };
        match (prev, init) {
            (Some((stage, role)), Some(initially)) => {
                if initially.is_none() && st.builtin.is_none() {
                    self.push(
                        iat,
                        format!("input `{}` has no value at iteration 1", ik.value),
                        "add `initially: start.NAME` (only built-in stages may go without)",
                    );
                }
                Some(Source::Previous {
                    stage,
                    role,
                    initially,
                })
            }
            _ => None,
        }
    }

    /// Check `stage.output` / `start.name`; `previous` allows any stage (even later ones).
    fn source_ref(
        &mut self,
        raw: &CampaignFile,
        r: &str,
        at: (u64, u64),
        previous: bool,
    ) -> Option<(String, String)> {
        let Some((s, o)) = split_ref(r) else {
            self.push(
                at,
                format!("input `{r}` must be written stage.output or start.name"),
                "e.g. solve.sigma",
            );
            return None;
        };
        if s == "start" {
            if previous {
                self.push(
                    at,
                    "`previous:` must name a stage output",
                    "use `initially: start.NAME` for the start file",
                );
                return None;
            }
            if raw.start.get(o).is_none() {
                self.push(
                    at,
                    format!("unknown start file `{o}`"),
                    format!(
                        "start files: {}",
                        raw.start.keys().collect::<Vec<_>>().join(", ")
                    ),
                );
                return None;
            }
            return Some((s.into(), o.into()));
        }
        let Some(st) = raw.cycle.get(s) else {
            self.push(
                at,
                format!("input `{r}` names unknown stage `{s}`"),
                format!(
                    "stages: {}",
                    raw.cycle.keys().collect::<Vec<_>>().join(", ")
                ),
            );
            return None;
        };
        let implicit_state = st.builtin.is_some() && o == "state";
        if st.outputs.get(o).is_none() && !implicit_state {
            self.push(
                at,
                format!("stage `{s}` declares no output `{o}`"),
                format!(
                    "its outputs: {}",
                    st.outputs.keys().collect::<Vec<_>>().join(", ")
                ),
            );
            return None;
        }
        Some((s.into(), o.into()))
    }

    /// Output file names are plain names in the scratch directory.
    fn output_names(&mut self, st: &StageSpec) {
        for (ok, ov) in &st.outputs.0 {
            if ov.is_empty() || ov.contains('/') || ov == "metrics.json" || ov.starts_with('.') {
                self.push(
                    loc(ok),
                    format!("output file name `{ov}` is not allowed"),
                    "use a plain file name (no '/', not metrics.json) written in the scratch directory",
                );
            }
        }
    }

    /// What the stage runs: exactly one of `run` (a list, or a script with `shell: true`)
    /// and `builtin`.
    fn stage_kind(
        &mut self,
        cx: &Cycle,
        s: &StageAt,
        programs: &mut BTreeMap<String, ResolvedProgram>,
    ) -> Option<StageKind> {
        let (sname, st, at) = (s.name, s.spec, s.at);
        match (&st.run, &st.builtin) {
            (Some(run), None) => match (&run.value, st.shell) {
                (RunSpec::List(list), false) => self.command(cx, s, list, programs),
                (RunSpec::Script(script), true) => {
                    self.shell_script(cx, s, script, loc(run), programs)
                }
                (RunSpec::List(_), true) => {
                    self.push(
                        loc(run),
                        format!("stage `{sname}`: `shell: true` takes one script string, not a list"),
                        "write run: \"{{program:NAME}} --x {{param:x}} | tee log\" (every substituted value is single-quoted), or drop `shell: true` to run an argument list without a shell",
                    );
                    None
                }
                (RunSpec::Script(_), false) => {
                    self.push(
                        loc(run),
                        format!("stage `{sname}`: `run` is one string, which only a shell stage takes"),
                        "add `shell: true` to run it with /bin/sh -c, or write an argument list: run: [program, --x, \"{{param:x}}\"]",
                    );
                    None
                }
            },
            (None, Some(b)) => match b.value.as_str() {
                "mix" => self.mix(s),
                "filter" => self.filter(s),
                _ => {
                    self.push(
                        loc(b),
                        format!("unknown built-in `{}`", b.value),
                        "built-ins: mix, filter",
                    );
                    None
                }
            },
            (Some(_), Some(_)) => {
                self.push(
                    at,
                    format!("stage `{sname}` has both `run` and `builtin`"),
                    "keep one",
                );
                None
            }
            (None, None) => {
                self.push(
                    at,
                    format!("stage `{sname}` has neither `run` nor `builtin`"),
                    "add `run: [program, args...]`",
                );
                None
            }
        }
    }

    /// The stages in an order where every same-iteration input comes first; a stage on a
    /// cycle within one iteration is reported (and no stages are returned).
    pub(super) fn order(&mut self, raw: &CampaignFile, stages: &[Stage]) -> Vec<Stage> {
        match crate::spec::graph::order(stages) {
            Ok(o) => o,
            Err(cycle_stage) => {
                let at = raw
                    .cycle
                    .0
                    .iter()
                    .find(|(k, _)| k.value == cycle_stage)
                    .map(|(k, _)| loc(k))
                    .unwrap_or((0, 0));
                self.push(
                    at,
                    format!("stage `{cycle_stage}` is part of a cycle within one iteration"),
                    "break it with `{ previous: stage.output, initially: start.NAME }`",
                );
                Vec::new()
            }
        }
    }
}
