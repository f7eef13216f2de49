//! `cycle:`: each stage's inputs (`stage.output`, `start.name`, or the previous iteration's
//! output), its output file names, the metrics it must report, its limits and what it runs
//! (an argument list or a shell script, see `commands`; a built-in, see `builtins`); then
//! the order of the stages within one iteration, which must have no cycle.

use std::collections::{BTreeMap, BTreeSet};
use std::path::Path;

use serde_saphyr::Spanned;

use super::{loc, split_ref, Validator};
use crate::spec::model::{
    Initial, Keep, Placement, PointSelection, PointsRead, ResolvedProgram, Section, Source, Stage,
    StageKind,
};
use crate::spec::raw::{
    CampaignFile, InputSpec, OrderedMap, PointsInput, PreviousInput, RunSpec, StageSpec,
};

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
    /// The section of the file being checked.
    pub(super) section: Section,
}

/// The stages of one section of the file.
pub(super) fn section_map(raw: &CampaignFile, section: Section) -> &OrderedMap<StageSpec> {
    match section {
        Section::Before => &raw.before,
        Section::Cycle => &raw.cycle,
        Section::AfterPoint => &raw.after_point,
        Section::AfterCampaign => &raw.after_campaign,
    }
}

/// The sections whose stages' outputs a stage of `section` may read by `stage.output`.
fn readable_sections(section: Section) -> &'static [Section] {
    match section {
        Section::Before => &[Section::Before],
        Section::Cycle => &[Section::Cycle, Section::Before],
        Section::AfterPoint | Section::AfterCampaign => {
            &[Section::Cycle, Section::Before, Section::AfterPoint]
        }
    }
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
    /// Its section of the file.
    pub(super) section: Section,
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
        if raw.cycle.is_empty() {
            self.push(
                (0, 0),
                "the cycle has no stages",
                "add stages under `cycle:`",
            );
        }
        self.section_stages(raw, Section::Cycle, params, programs, base)
    }

    /// Every good stage of one section of the file (`before:`, `cycle:`, `after-point:`,
    /// `after-campaign:`), in file order.
    pub(super) fn section_stages(
        &mut self,
        raw: &CampaignFile,
        section: Section,
        params: &BTreeSet<String>,
        programs: &mut BTreeMap<String, ResolvedProgram>,
        base: &Path,
    ) -> Vec<Stage> {
        let cx = Cycle {
            raw,
            base,
            params,
            declared: raw.programs.keys().map(str::to_string).collect(),
            section,
        };
        let stop_metrics: Vec<(String, String)> = raw
            .stop
            .when
            .iter()
            .filter_map(|r| split_ref(&r.metric.value).map(|(a, b)| (a.into(), b.into())))
            .collect();
        let mut stages = Vec::new();
        for (key, st) in &section_map(raw, section).0 {
            if section != Section::Cycle && self.name_taken(raw, section, key) {
                continue;
            }
            if let Some(mut s) = self.stage(&cx, key, st, &stop_metrics, programs) {
                s.section = section;
                s.group_by = self.group_by(raw, section, &key.value, st);
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
        let inputs = self.inputs(cx.raw, cx.section, st);
        let outputs: Vec<(String, String)> = st
            .outputs
            .iter()
            .map(|(k, v)| (k.to_string(), v.file().to_string()))
            .collect();
        self.output_names(st);
        let hdf5_outputs = self.hdf5_outputs(st);
        let metric_sources = self.metric_sources(&sname, st);
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
            section: cx.section,
        };
        let mut writable_inputs = BTreeSet::new();
        for w in &st.writable_inputs {
            if st.inputs.get(&w.value).is_some() {
                writable_inputs.insert(w.value.clone());
            } else {
                self.push(
                    loc(w),
                    format!(
                        "stage `{sname}`: `writable-inputs` names `{}`, which is not one of its inputs",
                        w.value
                    ),
                    "list input roles of this stage (the keys under `inputs:`)",
                );
            }
        }
        let kind = self.stage_kind(cx, &s, programs)?;
        let placement = self.placement(&sname, st, &kind);
        let keep = self.keep(&sname, st);
        let case_folder = self.case_folder(cx.raw, &sname, st, &kind);
        if let (Some(cf), false) = (&st.case_folder, cx.section == Section::Cycle) {
            self.push(
                loc(cf),
                format!("stage `{sname}`: `case-folder` keeps a folder from one iteration to the next, which only a cycle stage has"),
                "remove `case-folder:`; write the folder as an output (`name/`) and read it as an input",
            );
        }
        let env = self.stage_env(&sname, st, &kind);
        let also_runs = self.also_runs(&sname, st, &kind, &cx.declared, programs);
        let resident = self.resident(&sname, st, &kind, &metric_sources);
        if let (Some(r), true) = (
            st.resident.as_ref().filter(|r| r.value),
            cx.section != Section::Cycle,
        ) {
            self.push(
                loc(r),
                format!("stage `{sname}`: `resident` keeps a program alive from one iteration to the next, which only a cycle stage has"),
                "remove `resident: true`",
            );
        }
        Some(Stage {
            name: sname,
            section: Section::Cycle,
            group_by: Vec::new(),
            kind,
            inputs,
            outputs,
            required_metrics: required,
            resources: limits.resources,
            time_limit: limits.time_limit,
            retries: limits.retries,
            timeout_factor: limits.timeout_factor,
            allow_nonfinite: st.allow_nonfinite,
            writable_inputs,
            placement,
            outlive_rondo: st.outlive_rondo.unwrap_or(true) && !resident,
            resident,
            keep,
            case_folder,
            metric_sources,
            hdf5_outputs,
            env,
            also_runs,
        })
    }

    /// `keep:` of a stage: retention policies of its output roles.
    fn keep(&mut self, sname: &str, st: &StageSpec) -> Vec<(String, Keep)> {
        let mut out = Vec::new();
        for (role, policy) in &st.keep.0 {
            if st.outputs.get(&role.value).is_none() {
                self.push(
                    loc(role),
                    format!(
                        "stage `{sname}`: `keep` names `{}`, which is not one of its outputs",
                        role.value
                    ),
                    "name output roles of this stage (the keys under `outputs:`)",
                );
                continue;
            }
            let p = policy.value;
            if p.last.is_none() && p.every.is_none() {
                self.push(
                    loc(policy),
                    format!(
                        "stage `{sname}`: `keep.{}` keeps nothing it names",
                        role.value
                    ),
                    "give `last: N` (the last N iterations), `every: K` (every K-th), or both",
                );
                continue;
            }
            if p.last == Some(0) || p.every == Some(0) {
                self.push(
                    loc(policy),
                    format!(
                        "stage `{sname}`: `keep.{}` counts must be at least 1",
                        role.value
                    ),
                    "use `last: 1` to keep only the latest iteration",
                );
                continue;
            }
            out.push((
                role.value.clone(),
                Keep {
                    last: p.last,
                    every: p.every,
                },
            ));
        }
        out
    }

    /// `placement:` of a stage: only command and shell stages have one.
    fn placement(&mut self, sname: &str, st: &StageSpec, kind: &StageKind) -> Placement {
        let Some(p) = &st.placement else {
            return Placement::default();
        };
        if kind.is_builtin() {
            self.push(
                loc(p),
                format!("stage `{sname}`: `placement` applies to command and shell stages; a built-in always runs inside rondo"),
                "remove `placement:` from this stage",
            );
        }
        p.value
    }

    /// The good inputs of a stage of `section`, role → source, in file order.
    fn inputs(
        &mut self,
        raw: &CampaignFile,
        section: Section,
        st: &StageSpec,
    ) -> Vec<(String, Source)> {
        let mut inputs = Vec::new();
        for (ik, spec) in &st.inputs.0 {
            let iat = loc(ik);
            let src = match spec {
                InputSpec::Same(r) => self.same_input(raw, section, r, iat),
                InputSpec::Previous(p) => self.previous_input(raw, section, st, ik, p),
                InputSpec::Points(p) => self.points_input(raw, section, p, iat),
            };
            if let Some(src) = src {
                inputs.push((ik.value.clone(), src));
            }
        }
        inputs
    }

    /// `stage.output` or `start.name`: a `before:` stage's output reads as recorded at
    /// iteration 1; an `after-campaign:` stage must say which points' output it reads.
    fn same_input(
        &mut self,
        raw: &CampaignFile,
        section: Section,
        r: &str,
        iat: (u64, u64),
    ) -> Option<Source> {
        let (s, o, from) = self.source_ref(raw, section, r, iat, false)?;
        if s == "start" {
            return Some(Source::Start(o));
        }
        if section == Section::AfterCampaign && from != Section::AfterCampaign {
            self.push(
                iat,
                format!("input `{r}` of an after-campaign stage names a per-point output without saying which points"),
                format!("write `{{ outputs: {r}, points: all }}` (or `points: converged`, `points: group`)"),
            );
            return None;
        }
        if from == Section::Before && section != Section::Before {
            return Some(Source::Before { stage: s, role: o });
        }
        Some(Source::Same { stage: s, role: o })
    }

    /// `{ previous: stage.output, initially: start.name }` (cycle stages only): only a
    /// built-in stage may go without `initially`, which may name a `before:` stage's output.
    fn previous_input(
        &mut self,
        raw: &CampaignFile,
        section: Section,
        st: &StageSpec,
        ik: &Spanned<String>,
        p: &PreviousInput,
    ) -> Option<Source> {
        let iat = loc(ik);
        if section != Section::Cycle {
            self.push(
                iat,
                format!(
                    "input `{}`: stages under `{}:` have no previous iteration",
                    ik.value,
                    section.key()
                ),
                "name the output directly: stage.output (its last good iteration's, after a point)",
            );
            return None;
        }
        let prev = self
            .source_ref(raw, section, &p.previous, iat, true)
            .map(|(s, o, _)| (s, o));
        let init = match &p.initially {
            Some(i) => match self.source_ref(raw, section, i, iat, false) {
                Some((s, o, _)) if s == "start" => Some(Some(Initial::Start(o))),
                Some((s, o, Section::Before)) => Some(Some(Initial::Before { stage: s, role: o })),
                Some(_) => {
                    self.push(
                        iat,
                        format!("`initially: {i}` must name a start file or a `before:` stage's output"),
                        "write `initially: start.NAME` or `initially: STAGE.OUTPUT` of a stage under `before:`",
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

    /// `{ outputs: stage.role | finals: [stage.metric, ...], points: all|converged|group }`
    /// of an `after-campaign:` stage.
    fn points_input(
        &mut self,
        raw: &CampaignFile,
        section: Section,
        p: &PointsInput,
        iat: (u64, u64),
    ) -> Option<Source> {
        if section != Section::AfterCampaign {
            self.push(
                iat,
                "only an `after-campaign:` stage reads the outputs or final values of several points",
                "name one output as stage.output",
            );
            return None;
        }
        let points = match &p.points {
            None => {
                self.push(
                    iat,
                    "this input reads per-point results without saying which points",
                    "add `points: all` (every point that converged or was capped), `points: converged` or `points: group`",
                );
                return None;
            }
            Some(s) => match s.value.as_str() {
                "all" => PointSelection::All,
                "converged" => PointSelection::Converged,
                "group" => PointSelection::Group,
                other => {
                    self.push(
                        iat,
                        format!("unknown point selection `{other}`"),
                        "write `points: all`, `points: converged` or `points: group`",
                    );
                    return None;
                }
            },
        };
        let read = match (&p.outputs, &p.finals) {
            (Some(o), None) => {
                let (s, r, _) = self.source_ref(raw, Section::AfterPoint, &o.value, iat, true)?;
                PointsRead::Output { stage: s, role: r }
            }
            (None, Some(f)) if !f.is_empty() => {
                let mut names = Vec::new();
                for m in f {
                    let known = split_ref(&m.value).is_some_and(|(s, _)| {
                        raw.cycle.get(s).is_some() || raw.after_point.get(s).is_some()
                    });
                    if !known {
                        self.push(
                            iat,
                            format!("`finals` names `{}`, which is no stage.metric of a per-point stage", m.value),
                            format!(
                                "stages: {}",
                                raw.cycle.keys().chain(raw.after_point.keys()).collect::<Vec<_>>().join(", ")
                            ),
                        );
                        continue;
                    }
                    names.push(m.value.clone());
                }
                if names.len() != f.len() {
                    return None;
                }
                PointsRead::Finals(names)
            }
            _ => {
                self.push(
                    iat,
                    "a points input reads either `outputs: stage.output` or `finals: [stage.metric, ...]`",
                    "give exactly one of them",
                );
                return None;
            }
        };
        Some(Source::Points { read, points })
    }

    /// Check `stage.output` / `start.name` as read by a stage of `section`; `previous` allows
    /// any stage of the section (even later ones). Returns the stage (or `start`), the
    /// output and the section the stage is in.
    fn source_ref(
        &mut self,
        raw: &CampaignFile,
        section: Section,
        r: &str,
        at: (u64, u64),
        previous: bool,
    ) -> Option<(String, String, Section)> {
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
            return Some((s.into(), o.into(), section));
        }
        let readable = readable_sections(section);
        let found = readable
            .iter()
            .find_map(|sec| section_map(raw, *sec).get(s).map(|st| (*sec, st)));
        let Some((from, st)) = found else {
            let names: Vec<&str> = readable
                .iter()
                .flat_map(|sec| section_map(raw, *sec).keys())
                .collect();
            self.push(
                at,
                format!("input `{r}` names unknown stage `{s}`"),
                format!("stages it may read: {}", names.join(", ")),
            );
            return None;
        };
        let implicit_state = st.builtin.is_some() && o == "state";
        let case_folder = st.case_folder.is_some() && o == crate::spec::model::CASE_FOLDER_ROLE;
        if st.outputs.get(o).is_none() && !implicit_state && !case_folder {
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
        Some((s.into(), o.into(), from))
    }

    /// Whether a stage name of `section` is used by an earlier section already (reported).
    fn name_taken(&mut self, raw: &CampaignFile, section: Section, key: &Spanned<String>) -> bool {
        let earlier = [
            Section::Before,
            Section::Cycle,
            Section::AfterPoint,
            Section::AfterCampaign,
        ];
        let taken = earlier.iter().filter(|s| **s != section).find(|s| {
            section_map(raw, **s).get(&key.value).is_some()
                && (**s == Section::Cycle || (**s as u8) < (section as u8))
        });
        if let Some(other) = taken {
            self.push(
                loc(key),
                format!("stage `{}` is also a stage of `{}`", key.value, other.key()),
                "give every stage of the campaign its own name",
            );
            return true;
        }
        false
    }

    /// `group-by:` of a stage: `after-campaign:` stages only, sweep axes.
    fn group_by(
        &mut self,
        raw: &CampaignFile,
        section: Section,
        sname: &str,
        st: &StageSpec,
    ) -> Vec<String> {
        let axes = super::sweep::axis_names(raw);
        let mut out = Vec::new();
        for g in &st.group_by {
            if section != Section::AfterCampaign {
                self.push(
                    loc(g),
                    format!("stage `{sname}`: `group-by` is for `after-campaign:` stages"),
                    "remove `group-by:`",
                );
            } else if !axes.contains(&g.value) {
                self.push(
                    loc(g),
                    format!(
                        "stage `{sname}`: `group-by` names `{}`, which is no sweep axis",
                        g.value
                    ),
                    format!("sweep axes: {}", axes.join(", ")),
                );
            } else {
                out.push(g.value.clone());
            }
        }
        let uses_group = st.inputs.0.iter().any(|(_, i)| {
            matches!(i, InputSpec::Points(p) if p.points.as_ref().is_some_and(|s| s.value == "group"))
        });
        if uses_group && st.group_by.is_empty() && section == Section::AfterCampaign {
            let at = st.inputs.0.first().map(|(k, _)| loc(k)).unwrap_or((0, 0));
            self.push(
                at,
                format!("stage `{sname}` reads `points: group` but has no `group-by:`"),
                "add `group-by: [AXIS, ...]`, or read `points: all`",
            );
        }
        out
    }

    /// Output file names are plain names in the scratch directory, or files inside the
    /// stage's case folder (`case/case.log`: the program's own file, recorded as it is).
    fn output_names(&mut self, st: &StageSpec) {
        let case_path = st
            .case_folder
            .as_ref()
            .map(|c| c.value.path.as_ref().map_or("case", |p| p.value.as_str()));
        for (ok, ov) in &st.outputs.0 {
            // `name/`: a folder output; a name with `*` or `?`: a glob, its matches one folder.
            let ov = ov.file();
            if let Some(inside) = case_path.and_then(|c| case_member(ov, c)) {
                if !inside {
                    self.push(
                        loc(ok),
                        format!("output file name `{ov}` is not allowed"),
                        "name one file inside the case folder by a relative path without `.`, `..` \
                         or a glob, e.g. case/case.log",
                    );
                }
                continue;
            }
            let plain = ov.strip_suffix('/').unwrap_or(ov);
            if plain.is_empty()
                || plain.contains('/')
                || plain == "metrics.json"
                || plain.starts_with('.')
            {
                self.push(
                    loc(ok),
                    format!("output file name `{ov}` is not allowed"),
                    "use a plain file name (no '/', not metrics.json) written in the scratch directory, \
                     `name/` for a folder, a glob such as `*.dat`, or a file of the stage's case \
                     folder such as case/case.log",
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
                "mix" if s.section != Section::AfterCampaign => self.mix(s),
                "filter" if s.section != Section::AfterCampaign => self.filter(s),
                "eos" if s.section == Section::AfterCampaign => self.eos_builtin(cx, s),
                _ => {
                    let known = if s.section == Section::AfterCampaign {
                        "built-ins of an after-campaign stage: eos"
                    } else {
                        "built-ins: mix, filter (eos is an after-campaign stage)"
                    };
                    self.push(loc(b), format!("unknown built-in `{}`", b.value), known);
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
                let at = [
                    raw.before.0.iter(),
                    raw.cycle.0.iter(),
                    raw.after_point.0.iter(),
                ]
                .into_iter()
                .flatten()
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

/// Run `f` on stage `name` of `raw` as the stage loop would (its inputs checked first), with
/// the parameters of `raw` as the only `{{param:}}` names; the diagnostics of both.
#[cfg(test)]
pub(super) fn with_stage<R>(
    raw: &CampaignFile,
    name: &str,
    f: impl FnOnce(&mut Validator, &Cycle, &StageAt) -> R,
) -> (R, Vec<(u64, u64, String)>) {
    let params: BTreeSet<String> = raw.parameters.keys().map(str::to_string).collect();
    let cx = Cycle {
        raw,
        base: Path::new("."),
        params: &params,
        declared: raw.programs.keys().map(str::to_string).collect(),
        section: Section::Cycle,
    };
    let Some((key, st)) = raw.cycle.0.iter().find(|(k, _)| k.value == name) else {
        panic!("no stage `{name}`")
    };
    let mut v = super::testing::validator();
    let inputs = v.inputs(raw, Section::Cycle, st);
    let s = StageAt {
        name,
        at: loc(key),
        spec: st,
        inputs: &inputs,
        section: Section::Cycle,
    };
    let r = f(&mut v, &cx, &s);
    (r, super::testing::found(&v))
}

/// Whether output name `ov` lies in the case folder `case` (`None`: it does not start with
/// `case/`), and if so whether it names one file there: relative components that are not
/// empty, `.`, `..` or hidden, and no glob characters.
fn case_member(ov: &str, case: &str) -> Option<bool> {
    let rest = ov.strip_prefix(case)?.strip_prefix('/')?;
    Some(
        !rest.is_empty()
            && !crate::artifacts::folder::is_glob(rest)
            && rest
                .split('/')
                .all(|c| !c.is_empty() && !c.starts_with('.')),
    )
}

#[cfg(test)]
mod tests {
    use super::super::testing::*;
    use super::*;

    #[test]
    fn an_output_may_be_one_file_of_the_case_folder() {
        assert_eq!(case_member("case/case.log", "case"), Some(true));
        assert_eq!(case_member("case/out/scf.h5", "case"), Some(true));
        assert_eq!(case_member("other/case.log", "case"), None);
        assert_eq!(case_member("casefile", "case"), None);
        for bad in [
            "case/",
            "case/../x",
            "case/./x",
            "case/.hidden",
            "case/*.dat",
            "case//x",
        ] {
            assert_eq!(case_member(bad, "case"), Some(false), "{bad}");
        }
    }

    /// A cycle of three stages (`stages` replaces the third), one start file.
    fn cycle(third: &str) -> CampaignFile {
        raw(&format!(
            "campaign: t
start: {{ s0: x.json }}
cycle:
  a:
    run: [/bin/true, \"{{{{input:x}}}}\"]
    inputs: {{ x: {{ previous: c.y, initially: start.s0 }} }}
    outputs: {{ x: x.json }}
  b:
    run: [/bin/true]
    inputs: {{ x: a.x, s: start.s0 }}
    outputs: {{ y: y.json }}
  {third}
stop: {{ max-iterations: 1, when: [{{ metric: b.m, change-below: 0.1 }}] }}
"
        ))
    }

    const C: &str = "c: { run: [/bin/true], inputs: { y: b.y }, outputs: { y: y.json } }";

    fn stages_of(raw: &CampaignFile) -> (Vec<Stage>, Vec<(u64, u64, String)>) {
        let mut v = validator();
        let s = v.stages(raw, &BTreeSet::new(), &mut BTreeMap::new(), Path::new("."));
        (s, found(&v))
    }

    #[test]
    fn stages_resolve_their_inputs_and_take_the_metrics_of_stopping_rules() {
        let (s, d) = stages_of(&cycle(C));
        assert!(d.is_empty(), "{d:?}");
        let names: Vec<&str> = s.iter().map(|s| s.name.as_str()).collect();
        assert_eq!(names, ["a", "b", "c"]);
        assert_eq!(
            s[0].inputs,
            [(
                "x".to_string(),
                Source::Previous {
                    stage: "c".into(),
                    role: "y".into(),
                    initially: Some(Initial::Start("s0".into()))
                }
            )]
        );
        assert_eq!(
            s[1].inputs,
            [
                (
                    "x".to_string(),
                    Source::Same {
                        stage: "a".into(),
                        role: "x".into()
                    }
                ),
                ("s".to_string(), Source::Start("s0".into())),
            ]
        );
        assert_eq!(s[1].required_metrics, BTreeSet::from(["m".to_string()]));
        assert!(matches!(&s[2].kind, StageKind::Command { program, .. } if program == "/bin/true"));
    }

    #[test]
    fn an_empty_cycle_is_reported_at_the_whole_file() {
        let raw = raw("campaign: t\ncycle: {}\nstop: { max-iterations: 1 }\n");
        let (s, d) = stages_of(&raw);
        assert!(s.is_empty());
        assert_eq!(d, vec![(0, 0, "the cycle has no stages".to_string())]);
    }

    #[test]
    fn inputs_naming_nothing_are_reported_at_the_input() {
        let cases = [
            (
                "x: nodot",
                "input `nodot` must be written stage.output or start.name",
            ),
            ("x: start.none", "unknown start file `none`"),
            ("x: zz.y", "input `zz.y` names unknown stage `zz`"),
            ("x: b.nope", "stage `b` declares no output `nope`"),
            (
                "x: { previous: start.s0 }",
                "`previous:` must name a stage output",
            ),
            (
                "x: { previous: b.y, initially: b.y }",
                "`initially: b.y` must name a start file or a `before:` stage's output",
            ),
            (
                "x: { previous: b.y }",
                "input `x` has no value at iteration 1",
            ),
        ];
        for (input, want) in cases {
            let c = format!(
                "c: {{ run: [/bin/true], inputs: {{ {input} }}, outputs: {{ y: y.json }} }}"
            );
            let (s, d) = stages_of(&cycle(&c));
            assert_eq!(d, vec![(12, 36, want.to_string())], "{input}");
            // the stage stays (without the bad input) unless only iteration 1 lacks a value
            let kept = s.iter().find(|s| s.name == "c").map(|s| s.inputs.len());
            let want_inputs = usize::from(want.contains("iteration 1"));
            assert_eq!(kept, Some(want_inputs), "{input}");
        }
    }

    #[test]
    fn output_file_names_with_a_folder_or_the_metrics_file_are_refused_at_the_role() {
        for name in ["sub/y.json", "metrics.json", ".hidden", "\"\""] {
            let c = format!("c: {{ run: [/bin/true], outputs: {{ y: y.json, z: {name} }} }}");
            let (_, d) = stages_of(&cycle(&c));
            let want = format!(
                "output file name `{}` is not allowed",
                name.trim_matches('"')
            );
            assert_eq!(d, vec![(12, 48, want)], "{name}");
        }
    }

    #[test]
    fn a_stage_runs_exactly_one_thing_of_the_right_form() {
        let cases = [
            (
                "c: { run: [/bin/true], builtin: mix }",
                (12, 3),
                "stage `c` has both `run` and `builtin`",
            ),
            (
                "c: { outputs: { y: y.json } }",
                (12, 3),
                "stage `c` has neither `run` nor `builtin`",
            ),
            ("c: { builtin: sort }", (12, 17), "unknown built-in `sort`"),
            (
                "c: { run: [/bin/true], shell: true }",
                (12, 13),
                "stage `c`: `shell: true` takes one script string, not a list",
            ),
            (
                "c: { run: \"/bin/true\" }",
                (12, 13),
                "stage `c`: `run` is one string, which only a shell stage takes",
            ),
        ];
        for (c, at, want) in cases {
            let raw = cycle(c);
            let (kind, d) = with_stage(&raw, "c", |v, cx, s| {
                v.stage_kind(cx, s, &mut BTreeMap::new())
            });
            assert!(kind.is_none(), "{c}");
            assert_eq!(d, vec![(at.0, at.1, want.to_string())], "{c}");
        }
    }

    #[test]
    fn a_cycle_within_one_iteration_is_reported_at_a_stage_on_it() {
        let raw = cycle(
            "c: { run: [/bin/true], inputs: { y: b.y, x: d.z }, outputs: { y: y.json } }
  d: { run: [/bin/true], inputs: { y: c.y }, outputs: { z: z.json } }",
        );
        let (stages, d) = stages_of(&raw);
        assert!(d.is_empty(), "{d:?}");
        let mut v = validator();
        assert!(v.order(&raw, &stages).is_empty());
        assert_eq!(
            found(&v),
            vec![(
                13,
                3,
                "stage `d` is part of a cycle within one iteration".to_string()
            )]
        );
        // without the loop the order puts every same-iteration input first
        let (stages, _) = stages_of(&cycle(C));
        let mut v = validator();
        let names: Vec<String> = v
            .order(&cycle(C), &stages)
            .into_iter()
            .map(|s| s.name)
            .collect();
        assert_eq!(names, ["a", "b", "c"]);
        assert!(v.diags.is_empty());
    }
}
