//! `case-folder:` of a stage: the working folder it keeps from one iteration to the next. Its
//! name is a plain name in the scratch directory, `initially` names a start entry, the stage
//! runs a program (built-ins keep nothing), and the output role it is recorded under is free.

use super::{loc, split_ref, Validator};
use crate::spec::model::{CaseFolder, StageKind, CASE_FOLDER_ROLE};
use crate::spec::raw::{CampaignFile, StageSpec};

impl Validator<'_> {
    /// The checked `case-folder` of a stage (`None` when absent or wrong).
    pub(super) fn case_folder(
        &mut self,
        raw: &CampaignFile,
        sname: &str,
        st: &StageSpec,
        kind: &StageKind,
    ) -> Option<CaseFolder> {
        let spec = st.case_folder.as_ref()?;
        if kind.is_builtin() {
            self.push(
                loc(spec),
                format!("built-in stage `{sname}` cannot keep a case folder"),
                "remove `case-folder:`; only command and shell stages keep a working folder",
            );
            return None;
        }
        let mut ok = true;
        if let Some((k, _)) = st
            .outputs
            .0
            .iter()
            .find(|(k, _)| k.value == CASE_FOLDER_ROLE)
        {
            self.push(
                loc(k),
                format!(
                    "stage `{sname}`: the output role `{CASE_FOLDER_ROLE}` is its case folder's"
                ),
                "rename this output: the case folder is recorded under that role",
            );
            ok = false;
        }
        let path = match &spec.value.path {
            Some(p) => {
                let v = p.value.as_str();
                let clash = st
                    .outputs
                    .0
                    .iter()
                    .any(|(_, o)| o.file().trim_end_matches('/') == v);
                if v.is_empty()
                    || v.contains('/')
                    || v.starts_with('.')
                    || matches!(v, "inputs" | "metrics.json" | "stdout.txt" | "stderr.txt")
                    || clash
                {
                    self.push(
                        loc(p),
                        format!("stage `{sname}`: case folder name `{v}` is not allowed"),
                        "use a plain folder name (no '/', not `inputs`, not an output's name), \
                         e.g. `case`",
                    );
                    ok = false;
                }
                v.to_string()
            }
            None => "case".to_string(),
        };
        let initially = match &spec.value.initially {
            Some(i) => match split_ref(&i.value) {
                Some(("start", name)) if raw.start.get(name).is_some() => Some(name.to_string()),
                _ => {
                    self.push(
                        loc(i),
                        format!(
                            "stage `{sname}`: `initially: {}` names no start entry",
                            i.value
                        ),
                        "write `start.NAME` with NAME a key of `start:` (a folder there)",
                    );
                    ok = false;
                    None
                }
            },
            None => None,
        };
        ok.then_some(CaseFolder { path, initially })
    }
}

#[cfg(test)]
mod tests {
    use super::super::testing::*;

    #[test]
    fn a_case_folder_defaults_to_case_and_names_a_start_folder() {
        let text = "campaign: t
start:
  seed: seed-case
cycle:
  s:
    run: [/bin/true]
    case-folder: { initially: start.seed }
stop: { max-iterations: 1 }
";
        let mut v = validator();
        let raw = raw(text);
        let st = &raw.cycle.0[0].1;
        let kind = crate::spec::model::StageKind::Command {
            template: rondo_adapters::template::Template::parse(&["x".to_string()])
                .unwrap_or_else(|e| panic!("{e}")),
            program: "x".into(),
        };
        let cf = v.case_folder(&raw, "s", st, &kind);
        assert!(v.diags.is_empty(), "{:?}", found(&v));
        assert_eq!(
            cf,
            Some(crate::spec::model::CaseFolder {
                path: "case".into(),
                initially: Some("seed".into()),
            })
        );
    }
}
