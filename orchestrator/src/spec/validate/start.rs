//! `start:`: the initial files, relative to the campaign file's folder, must exist.

use std::collections::BTreeMap;
use std::path::{Path, PathBuf};

use super::{loc, Validator};
use crate::spec::raw::CampaignFile;

impl Validator<'_> {
    /// `start:` name → absolute path of each file found under `base`.
    pub(super) fn start_files(
        &mut self,
        raw: &CampaignFile,
        base: &Path,
    ) -> BTreeMap<String, PathBuf> {
        let mut start = BTreeMap::new();
        for (k, v) in &raw.start.0 {
            let p = base.join(v);
            if p.is_file() || p.is_dir() {
                start.insert(k.value.clone(), std::path::absolute(&p).unwrap_or(p));
            } else {
                self.push(
                    loc(k),
                    format!("start file `{v}` not found (looked for {})", p.display()),
                    "paths in `start:` are relative to the campaign file's folder",
                );
            }
        }
        start
    }
}

#[cfg(test)]
mod tests {
    use super::super::testing::*;

    const TEXT: &str = "campaign: t
start:
  x: x.json
  y: sub/y.json
cycle:
  s: { run: [/bin/true] }
stop: { max-iterations: 1 }
";

    #[test]
    fn start_files_that_exist_resolve_to_absolute_paths() {
        let d = tempfile::tempdir().unwrap_or_else(|e| panic!("{e}"));
        std::fs::create_dir(d.path().join("sub")).unwrap_or_else(|e| panic!("{e}"));
        for f in ["x.json", "sub/y.json"] {
            std::fs::write(d.path().join(f), "{}").unwrap_or_else(|e| panic!("{e}"));
        }
        let mut v = validator();
        let s = v.start_files(&raw(TEXT), d.path());
        assert!(v.diags.is_empty(), "{:?}", found(&v));
        assert_eq!(s.get("y"), Some(&d.path().join("sub/y.json")));
        assert!(s.values().all(|p| p.is_absolute()));
    }

    #[test]
    fn a_missing_start_file_is_reported_at_its_key_with_the_path_looked_for() {
        let d = tempfile::tempdir().unwrap_or_else(|e| panic!("{e}"));
        std::fs::write(d.path().join("x.json"), "{}").unwrap_or_else(|e| panic!("{e}"));
        let mut v = validator();
        let s = v.start_files(&raw(TEXT), d.path());
        assert_eq!(s.keys().collect::<Vec<_>>(), ["x"]);
        let want = format!(
            "start file `sub/y.json` not found (looked for {})",
            d.path().join("sub/y.json").display()
        );
        assert_eq!(found(&v), vec![(4, 3, want)]);
    }
}
