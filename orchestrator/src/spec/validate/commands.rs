//! What a program stage runs: an argument list (`run: [program, args...]`, no shell) or,
//! with `shell: true`, one `/bin/sh -c` script; and the placeholders of either, which must
//! all name something the stage has.

use std::collections::{BTreeMap, BTreeSet};

use rondo_adapters::template::{Template, BARE_NAMES};
use serde_saphyr::Spanned;

use super::stages::{Cycle, StageAt};
use super::{loc, Validator};
use crate::spec::model::{ResolvedProgram, Section, StageKind};

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
        let campaign = s.section == Section::AfterCampaign;
        let mut ok = true;
        for p in template.placeholder_refs() {
            let at = at_of(p.arg);
            let known = match p.namespace {
                Some("param") => params.contains(p.name),
                Some("input") => inputs.iter().any(|(k, _)| k == p.name),
                Some("output") => st.outputs.get(p.name).is_some(),
                Some("point") => !campaign && (p.name == "id" || p.name == "index"),
                Some("group") => campaign && st.group_by.iter().any(|g| g.value == p.name),
                Some("program") => shell_programs.is_some_and(|d| d.contains(p.name)),
                // A campaign-level stage has no iteration and no per-point seed.
                None => {
                    BARE_NAMES.contains(&p.name)
                        && !(campaign && matches!(p.name, "iteration" | "seed"))
                }
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

#[cfg(test)]
mod tests {
    use std::path::PathBuf;

    use super::super::stages::with_stage;
    use super::super::testing::*;
    use super::*;

    /// Stage `s` (written by the test) with one input `x`, one output `y` and the program
    /// `engine` declared.
    fn stage(s: &str) -> crate::spec::raw::CampaignFile {
        raw(&format!(
            "campaign: t
programs: {{ engine: {{ path: /bin/sh }} }}
parameters: {{ u: 6.0 }}
start: {{ s0: x.json }}
cycle:
  {s}
stop: {{ max-iterations: 1 }}
"
        ))
    }

    const IO: &str = "inputs: { x: start.s0 }, outputs: { y: y.json }";

    fn command_of(s: &str) -> (Option<StageKind>, Vec<(u64, u64, String)>) {
        let raw = stage(s);
        with_stage(&raw, "s", |v, cx, st| {
            let Some(Spanned {
                value: crate::spec::raw::RunSpec::List(list),
                ..
            }) = &st.spec.run
            else {
                panic!("an argument list: {s}")
            };
            v.command(cx, st, list, &mut BTreeMap::new())
        })
    }

    fn shell_of(s: &str) -> (Option<StageKind>, Vec<(u64, u64, String)>) {
        let raw = stage(s);
        let programs = BTreeMap::from([(
            "engine".to_string(),
            ResolvedProgram {
                path: PathBuf::from("/bin/sh"),
                version_flag: None,
            },
        )]);
        with_stage(&raw, "s", |v, cx, st| {
            let Some(run) = &st.spec.run else {
                panic!("a run: {s}")
            };
            let crate::spec::raw::RunSpec::Script(script) = &run.value else {
                panic!("a script: {s}")
            };
            v.shell_script(cx, st, script, loc(run), &programs)
        })
    }

    #[test]
    fn an_argument_list_with_known_placeholders_becomes_a_command() {
        let (k, d) = command_of(&format!(
            "s: {{ run: [engine, \"{{{{param:u}}}}\", \"{{{{input:x}}}}\", \"{{{{output:y}}}}\", \"{{{{point:id}}}}\", \"{{{{seed}}}}\"], {IO} }}"
        ));
        assert!(d.is_empty(), "{d:?}");
        assert!(matches!(k, Some(StageKind::Command { program, .. }) if program == "engine"));
    }

    #[test]
    fn an_empty_list_or_settings_on_a_command_are_reported() {
        let (k, d) = command_of("s: { run: [] }");
        assert!(k.is_none());
        assert_eq!(d, vec![(6, 3, "stage `s`: `run` is empty".to_string())]);
        let (k, d) = command_of("s: { run: [engine], settings: { legendre: 4, matsubara: 8 } }");
        assert!(
            k.is_some(),
            "the settings are reported, the stage still checked"
        );
        assert_eq!(
            d,
            vec![(
                6,
                14,
                "stage `s`: `settings` is for built-in stages".to_string()
            )]
        );
    }

    #[test]
    fn undefined_placeholders_are_reported_at_their_argument_with_what_exists() {
        let cases = [
            (
                "\"{{param:v}}\"",
                "stage `s`: undefined placeholder `{{param:v}}`",
            ),
            (
                "\"{{input:z}}\"",
                "stage `s`: undefined placeholder `{{input:z}}`",
            ),
            (
                "\"{{output:z}}\"",
                "stage `s`: undefined placeholder `{{output:z}}`",
            ),
            (
                "\"{{point:name}}\"",
                "stage `s`: undefined placeholder `{{point:name}}`",
            ),
            (
                "\"{{other:z}}\"",
                "stage `s`: undefined placeholder `{{other:z}}`",
            ),
            (
                "\"{{program:engine}}\"",
                "stage `s`: `{{program:engine}}` is for shell scripts",
            ),
        ];
        for (arg, want) in cases {
            let (k, d) = command_of(&format!("s: {{ run: [engine, --a, {arg}], {IO} }}"));
            assert!(k.is_none(), "{arg}");
            assert_eq!(d, vec![(6, 27, want.to_string())], "{arg}");
        }
        let raw = stage(&format!(
            "s: {{ run: [engine, \"{{{{param:v}}}}\"], {IO} }}"
        ));
        let ((), _) = with_stage(&raw, "s", |_, cx, st| {
            assert_eq!(
                placeholder_hint(st, Some("param"), cx.params),
                "parameters and sweep axes: u"
            );
            assert_eq!(
                placeholder_hint(st, Some("input"), cx.params),
                "inputs of `s`: x"
            );
            assert_eq!(
                placeholder_hint(st, Some("output"), cx.params),
                "outputs of `s`: y"
            );
        });
    }

    #[test]
    fn a_shell_script_records_the_programs_it_names() {
        let (k, d) = shell_of(&format!(
            "s: {{ run: \"{{{{program:engine}}}} -c true {{{{param:u}}}} > log\", shell: true, {IO} }}"
        ));
        assert!(d.is_empty(), "{d:?}");
        assert!(
            matches!(&k, Some(StageKind::Shell { programs, .. }) if programs == &["engine".to_string()]),
            "{k:?}"
        );
    }

    #[test]
    fn an_empty_script_a_quoted_placeholder_or_an_undeclared_program_are_reported() {
        let cases = [
            ("\"  \"", "stage `s`: the script is empty"),
            ("\"/bin/echo {{param:\"", "stage `s`: character 11: "),
            (
                "\"/bin/echo '{{param:u}}'\"",
                "stage `s`: placeholder `{{param:u}}` (character 12) is inside quotes in the script; rondo single-quotes every value itself",
            ),
            ("\"{{program:nope}} hi\"", "stage `s`: no program `nope` under `programs:`"),
        ];
        for (script, want) in cases {
            let (k, d) = shell_of(&format!("s: {{ run: {script}, shell: true }}"));
            assert!(k.is_none(), "{script}");
            assert_eq!(d.len(), 1, "{script}: {d:?}");
            assert_eq!((d[0].0, d[0].1), (6, 13), "{script}");
            assert!(d[0].2.starts_with(want), "{script}: {d:?}");
        }
    }
}
