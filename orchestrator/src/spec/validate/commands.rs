//! What a program stage runs: an argument list (`run: [program, args...]`, no shell) or,
//! with `shell: true`, one `/bin/sh -c` script; and the placeholders of either, which must
//! all name something the stage has.

use std::collections::{BTreeMap, BTreeSet};

use rondo_adapters::template::{Template, BARE_NAMES};
use serde_saphyr::Spanned;

use super::stages::{Cycle, StageAt};
use super::{loc, Validator};
use crate::spec::model::{ResolvedProgram, StageKind};

impl Validator<'_> {
    /// An argument-list stage: a program first, placeholders that resolve.
    pub(super) fn command(
        &mut self,
        cx: &Cycle,
        s: &StageAt,
        run: &[Spanned<String>],
        programs: &mut BTreeMap<String, ResolvedProgram>,
    ) -> Option<StageKind> {
        let sname = s.name;
        let Some(first) = run.first() else {
            // an empty list carries no location: name the stage
            self.push(
                s.at,
                format!("stage `{sname}`: `run` is empty"),
                "write run: [program, args...]",
            );
            return None;
        };
        if s.spec.settings.is_some() {
            self.push(
                loc(first),
                format!("stage `{sname}`: `settings` is for built-in stages"),
                "remove `settings`",
            );
        }
        let args: Vec<String> = run.iter().map(|s| s.value.clone()).collect();
        let template = match Template::parse(&args) {
            Ok(t) => t,
            Err(e) => {
                let s = &run[e.arg];
                self.push(loc(s), format!("stage `{sname}`: {}", e.message), e.hint);
                return None;
            }
        };
        let program = first.value.clone();
        self.run_program(first, programs, &cx.declared, cx.base);
        let ok = self.check_placeholders(s, &template, &|arg| loc(&run[arg]), cx.params, None);
        ok.then_some(StageKind::Command { template, program })
    }

    /// A shell stage: `run` is one script string for `/bin/sh -c` (`at`: its location).
    pub(super) fn shell_script(
        &mut self,
        cx: &Cycle,
        s: &StageAt,
        script: &str,
        at: (u64, u64),
        programs: &BTreeMap<String, ResolvedProgram>,
    ) -> Option<StageKind> {
        let sname = s.name;
        if script.trim().is_empty() {
            self.push(
                at,
                format!("stage `{sname}`: the script is empty"),
                "write run: \"{{program:NAME}} --x {{param:x}}\"",
            );
            return None;
        }
        if s.spec.settings.is_some() {
            self.push(
                at,
                format!("stage `{sname}`: `settings` is for built-in stages"),
                "remove `settings`",
            );
        }
        let template = match Template::parse(&[script.to_string()]) {
            Ok(t) => t,
            Err(e) => {
                self.push(
                    at,
                    format!("stage `{sname}`: character {}: {}", e.column, e.message),
                    e.hint,
                );
                return None;
            }
        };
        let mut ok = self.check_placeholders(s, &template, &|_| at, cx.params, Some(&cx.declared));
        for p in template.placeholders_in_shell_quotes() {
            ok = false;
            let ns = p.namespace.map(|n| format!("{n}:")).unwrap_or_default();
            self.push(
                at,
                format!(
                    "stage `{sname}`: placeholder `{{{{{ns}{}}}}}` (character {}) is inside quotes in the script; rondo single-quotes every value itself",
                    p.name, p.column
                ),
                "write it bare: --x={{param:x}}, not \"--x={{param:x}}\"",
            );
        }
        let used: BTreeSet<String> = template
            .placeholders()
            .filter(|(ns, _, _)| *ns == Some("program"))
            .map(|(_, n, _)| n.to_string())
            .collect();
        // A declared program that could not be resolved was reported at its entry.
        if used.iter().any(|n| !programs.contains_key(n)) {
            ok = false;
        }
        ok.then(|| StageKind::Shell {
            template,
            programs: used.into_iter().collect(),
        })
    }

    /// Report undefined placeholders of a stage's template (`at_of`: the location of an
    /// argument); `shell_programs` is `Some(the declared programs)` for a shell script,
    /// which may name them as `{{program:NAME}}`.
    fn check_placeholders(
        &mut self,
        s: &StageAt,
        template: &Template,
        at_of: &dyn Fn(usize) -> (u64, u64),
        params: &BTreeSet<String>,
        shell_programs: Option<&BTreeSet<String>>,
    ) -> bool {
        let (sname, st, inputs) = (s.name, s.spec, s.inputs);
        let mut ok = true;
        for p in template.placeholder_refs() {
            let at = at_of(p.arg);
            let known = match p.namespace {
                Some("param") => params.contains(p.name),
                Some("input") => inputs.iter().any(|(k, _)| k == p.name),
                Some("output") => st.outputs.get(p.name).is_some(),
                Some("point") => p.name == "id" || p.name == "index",
                Some("program") => shell_programs.is_some_and(|d| d.contains(p.name)),
                None => BARE_NAMES.contains(&p.name),
                Some(_) => false,
            };
            if known {
                continue;
            }
            ok = false;
            if p.namespace == Some("program") {
                match shell_programs {
                    Some(d) => self.push(
                        at,
                        format!("stage `{sname}`: no program `{}` under `programs:`", p.name),
                        format!(
                            "declare it under `programs:`; declared: {}",
                            d.iter().cloned().collect::<Vec<_>>().join(", ")
                        ),
                    ),
                    None => self.push(
                        at,
                        format!(
                            "stage `{sname}`: `{{{{program:{}}}}}` is for shell scripts",
                            p.name
                        ),
                        "in an argument list the program is the first element of `run`",
                    ),
                }
                continue;
            }
            let ns = p.namespace.map(|n| format!("{n}:")).unwrap_or_default();
            let hint = placeholder_hint(s, p.namespace, params);
            self.push(
                at,
                format!(
                    "stage `{sname}`: undefined placeholder `{{{{{ns}{}}}}}`",
                    p.name
                ),
                hint,
            );
        }
        ok
    }
}

/// What a placeholder of namespace `ns` in stage `s` could have named instead.
fn placeholder_hint(s: &StageAt, ns: Option<&str>, params: &BTreeSet<String>) -> String {
    let sname = s.name;
    match ns {
        Some("param") => format!(
            "parameters and sweep axes: {}",
            params.iter().cloned().collect::<Vec<_>>().join(", ")
        ),
        Some("input") => format!(
            "inputs of `{sname}`: {}",
            s.inputs
                .iter()
                .map(|(k, _)| k.as_str())
                .collect::<Vec<_>>()
                .join(", ")
        ),
        Some("output") => format!(
            "outputs of `{sname}`: {}",
            s.spec.outputs.keys().collect::<Vec<_>>().join(", ")
        ),
        Some("point") => "use {{point:id}} or {{point:index}}".into(),
        None => format!("names without namespace: {}", BARE_NAMES.join(", ")),
        Some(_) => "namespaces: param, input, output, point (and program in shell scripts)".into(),
    }
}
