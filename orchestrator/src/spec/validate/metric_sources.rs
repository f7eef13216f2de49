//! `read-metrics:` of a stage (metric name → where the number is in what the program
//! writes: a text file or the stdout by pattern, a JSON file by pointer, an HDF5 dataset or
//! attribute) and the `hdf5:` dataset lists of its outputs. Everything that can be known
//! without running the stage is checked here: the file is an output role or a plain name,
//! the pattern compiles with exactly one capture group, the unit is known, the JSON pointer
//! is well formed, HDF5 paths are absolute.
//!
//! Builds `MetricSource`s of the model; reading the files is `crate::metrics`' work.

use serde_saphyr::Spanned;

use super::{loc, Validator};
use crate::spec::model::{EnergyUnit, MetricSource, SourceKind};
use crate::spec::raw::{MatchWhich, MetricSourceSpec, OutputSpec, StageSpec};

/// File name of the standard output in a scratch folder.
pub(crate) const STDOUT_FILE: &str = "stdout.txt";

/// Which kind of source a `read-metrics` entry is, with its file.
enum Kind<'s> {
    Text(&'s Spanned<String>),
    Stdout,
    Json(&'s Spanned<String>),
    Hdf5(&'s Spanned<String>),
}

impl Validator<'_> {
    /// The checked `read-metrics` of a stage (bad entries are reported and left out).
    pub(super) fn metric_sources(&mut self, sname: &str, st: &StageSpec) -> Vec<MetricSource> {
        let mut out = Vec::new();
        if st.read_metrics.is_empty() {
            return out;
        }
        if st.builtin.is_some() {
            let at = st
                .read_metrics
                .0
                .first()
                .map(|(k, _)| loc(k))
                .unwrap_or((0, 0));
            self.push(
                at,
                format!("stage `{sname}`: `read-metrics` applies to command and shell stages"),
                "a built-in reports its own metrics; remove `read-metrics:` from this stage",
            );
            return out;
        }
        for (key, spec) in &st.read_metrics.0 {
            if let Some(m) = self.metric_source(st, key, spec) {
                out.push(m);
            }
        }
        out
    }

    /// One entry of `read-metrics`.
    fn metric_source(
        &mut self,
        st: &StageSpec,
        key: &Spanned<String>,
        spec: &MetricSourceSpec,
    ) -> Option<MetricSource> {
        let name = key.value.as_str();
        let at = loc(key);
        let mut kinds = Vec::new();
        if let Some(f) = &spec.file {
            kinds.push(Kind::Text(f));
        }
        if spec.stdout {
            kinds.push(Kind::Stdout);
        }
        if let Some(f) = &spec.json {
            kinds.push(Kind::Json(f));
        }
        if let Some(f) = &spec.hdf5 {
            kinds.push(Kind::Hdf5(f));
        }
        if kinds.len() != 1 {
            self.push(
                at,
                format!("metric `{name}`: give exactly one of `file`, `stdout: true`, `json` and `hdf5`"),
                "e.g. { file: scf.log, pattern: 'energy = (\\S+)' } or { json: out.json, pointer: /energy }",
            );
            return None;
        }
        let unit = self.unit(name, spec);
        let (file, kind) = match kinds.remove(0) {
            Kind::Text(f) => (self.source_file(st, name, f)?, self.text(name, at, spec)?),
            Kind::Stdout => (STDOUT_FILE.to_string(), self.text(name, at, spec)?),
            Kind::Json(f) => (self.source_file(st, name, f)?, self.json(name, at, spec)?),
            Kind::Hdf5(f) => (self.source_file(st, name, f)?, self.hdf5(name, at, spec)?),
        };
        Some(MetricSource {
            name: name.to_string(),
            file,
            kind,
            unit: unit?,
        })
    }

    /// An output role of the stage (its file) or a plain file name of the scratch folder.
    fn source_file(&mut self, st: &StageSpec, name: &str, f: &Spanned<String>) -> Option<String> {
        if let Some(o) = st.outputs.get(&f.value) {
            return Some(o.file().to_string());
        }
        let v = f.value.as_str();
        let plain = !v.is_empty()
            && !v.starts_with('/')
            && v.split('/').all(|c| !c.is_empty() && c != "." && c != "..");
        if !plain {
            self.push(
                loc(f),
                format!("metric `{name}`: `{v}` is neither an output role of the stage nor a file name in its scratch folder"),
                "name an output role, or a relative path without `..` (e.g. scf.log or out/scf.log)",
            );
            return None;
        }
        Some(v.to_string())
    }

    /// `unit:`; `Some(None)` when absent, `None` when unknown.
    fn unit(&mut self, name: &str, spec: &MetricSourceSpec) -> Option<Option<EnergyUnit>> {
        let Some(u) = &spec.unit else {
            return Some(None);
        };
        match EnergyUnit::parse(&u.value) {
            Some(unit) => Some(Some(unit)),
            None => {
                self.push(
                    loc(u),
                    format!("metric `{name}`: unknown unit `{}`", u.value),
                    format!(
                        "units (converted to eV): {}",
                        EnergyUnit::NAMES.map(|(n, _)| n).join(", ")
                    ),
                );
                None
            }
        }
    }

    /// Report keys of `spec` that belong to another kind of source.
    fn foreign_keys(&mut self, name: &str, at: (u64, u64), spec: &MetricSourceSpec, kind: &str) {
        let text = kind == "text";
        let present = [
            ("pattern", spec.pattern.is_some() && !text),
            ("match", spec.match_.is_some() && !text),
            ("pointer", spec.pointer.is_some() && kind != "JSON"),
            ("dataset", spec.dataset.is_some() && kind != "HDF5"),
            ("index", spec.index.is_some() && kind != "HDF5"),
            ("attribute", spec.attribute.is_some() && kind != "HDF5"),
        ];
        for (key, bad) in present {
            if bad {
                self.push(
                    at,
                    format!("metric `{name}`: `{key}` does not apply to a {kind} source"),
                    "text sources take pattern and match, JSON sources pointer, HDF5 sources dataset, index or attribute",
                );
            }
        }
    }

    /// A text source: the pattern compiles and has exactly one capture group.
    fn text(&mut self, name: &str, at: (u64, u64), spec: &MetricSourceSpec) -> Option<SourceKind> {
        self.foreign_keys(name, at, spec, "text");
        let Some(p) = &spec.pattern else {
            self.push(
                at,
                format!("metric `{name}`: a text source needs `pattern`"),
                "add pattern: 'total energy *= *(\\S+)' (one capture group: the number)",
            );
            return None;
        };
        let regex = match regex::Regex::new(&p.value) {
            Ok(r) => r,
            Err(e) => {
                let e = e.to_string().replace('\n', " ");
                self.push(
                    loc(p),
                    format!("metric `{name}`: the pattern does not compile: {e}"),
                    "write a regular expression of the Rust regex syntax (escape `(`, `.`, `+` meant literally)",
                );
                return None;
            }
        };
        let groups = regex.captures_len() - 1;
        if groups != 1 {
            self.push(
                loc(p),
                format!("metric `{name}`: the pattern has {groups} capture groups; it needs exactly one"),
                "capture only the number, e.g. 'energy = ([-+0-9.eE]+)'; write other groups as (?:...)",
            );
            return None;
        }
        let first = spec
            .match_
            .as_ref()
            .is_some_and(|m| m.value == MatchWhich::First);
        Some(SourceKind::Text { regex, first })
    }

    /// A JSON source: an RFC 6901 pointer.
    fn json(&mut self, name: &str, at: (u64, u64), spec: &MetricSourceSpec) -> Option<SourceKind> {
        self.foreign_keys(name, at, spec, "JSON");
        let Some(p) = &spec.pointer else {
            self.push(
                at,
                format!("metric `{name}`: a JSON source needs `pointer`"),
                "add pointer: /scf/energy (RFC 6901: keys separated by `/`, array elements by index)",
            );
            return None;
        };
        if !is_json_pointer(&p.value) {
            self.push(
                loc(p),
                format!("metric `{name}`: `{}` is not a JSON pointer", p.value),
                "a JSON pointer (RFC 6901) is empty or starts with `/`; write `~` as ~0 and `/` inside a key as ~1",
            );
            return None;
        }
        Some(SourceKind::Json {
            pointer: p.value.clone(),
        })
    }

    /// An HDF5 source: exactly one of an absolute dataset path and `OBJECT@NAME`.
    fn hdf5(&mut self, name: &str, at: (u64, u64), spec: &MetricSourceSpec) -> Option<SourceKind> {
        self.foreign_keys(name, at, spec, "HDF5");
        match (&spec.dataset, &spec.attribute) {
            (Some(d), None) => {
                self.absolute(name, &d.value, loc(d))?;
                Some(SourceKind::Hdf5Dataset {
                    path: d.value.clone(),
                    index: spec.index.clone(),
                })
            }
            (None, Some(a)) => {
                if spec.index.is_some() {
                    self.push(
                        at,
                        format!(
                            "metric `{name}`: `index` applies to a dataset, not to an attribute"
                        ),
                        "an attribute metric reads a scalar attribute; remove `index`",
                    );
                }
                let Some((object, attr)) = a.value.rsplit_once('@').filter(|(_, n)| !n.is_empty())
                else {
                    self.push(
                        loc(a),
                        format!("metric `{name}`: attribute `{}` must be written OBJECT@NAME", a.value),
                        "e.g. /impurity@mu (group /impurity, attribute mu) or /@version for the root group",
                    );
                    return None;
                };
                self.absolute(name, object, loc(a))?;
                Some(SourceKind::Hdf5Attribute {
                    object: object.to_string(),
                    name: attr.to_string(),
                })
            }
            _ => {
                self.push(
                    at,
                    format!("metric `{name}`: an HDF5 source needs exactly one of `dataset` and `attribute`"),
                    "e.g. dataset: /impurity/n_f, or attribute: /impurity@mu",
                );
                None
            }
        }
    }

    /// An HDF5 path of a metric must be absolute.
    fn absolute(&mut self, name: &str, p: &str, at: (u64, u64)) -> Option<()> {
        if is_absolute_h5(p) {
            return Some(());
        }
        self.push(
            at,
            format!("metric `{name}`: the HDF5 path `{p}` is not absolute"),
            "start it at the file's root group, e.g. /impurity/n_f",
        );
        None
    }

    /// The `hdf5:` dataset lists of the stage's outputs, role → paths.
    pub(super) fn hdf5_outputs(&mut self, st: &StageSpec) -> Vec<(String, Vec<String>)> {
        let mut out = Vec::new();
        for (role, o) in &st.outputs.0 {
            let OutputSpec::Hdf5(h) = o else { continue };
            for p in &h.hdf5 {
                if !is_absolute_h5(p) {
                    self.push(
                        loc(role),
                        format!(
                            "output `{}`: the HDF5 dataset path `{p}` is not absolute",
                            role.value
                        ),
                        "start it at the file's root group, e.g. /impurity/sigma",
                    );
                }
            }
            out.push((role.value.clone(), h.hdf5.clone()));
        }
        out
    }
}

/// `/a/b`: starts with `/`, no empty, `.` or `..` component (the root `/` alone too).
pub(super) fn is_absolute_h5(p: &str) -> bool {
    p == "/"
        || (p.starts_with('/')
            && p[1..]
                .split('/')
                .all(|c| !c.is_empty() && c != "." && c != ".."))
}

/// RFC 6901: empty, or `/`-separated reference tokens in which `~` is always `~0` or `~1`.
fn is_json_pointer(p: &str) -> bool {
    if p.is_empty() {
        return true;
    }
    if !p.starts_with('/') {
        return false;
    }
    let b = p.as_bytes();
    b.iter()
        .enumerate()
        .all(|(i, &c)| c != b'~' || matches!(b.get(i + 1), Some(b'0') | Some(b'1')))
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn json_pointers_follow_rfc_6901() {
        for ok in ["", "/", "/scf/energy", "/a~1b", "/m~0n", "/bands/0"] {
            assert!(is_json_pointer(ok), "{ok}");
        }
        for bad in ["scf/energy", "/a~2", "/a~", "#/a"] {
            assert!(!is_json_pointer(bad), "{bad}");
        }
    }

    #[test]
    fn hdf5_paths_are_absolute() {
        for ok in ["/", "/impurity", "/impurity/sigma"] {
            assert!(is_absolute_h5(ok), "{ok}");
        }
        for bad in [
            "",
            "impurity/sigma",
            "/impurity//sigma",
            "/impurity/",
            "/a/../b",
        ] {
            assert!(!is_absolute_h5(bad), "{bad}");
        }
    }
}
