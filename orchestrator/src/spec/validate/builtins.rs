//! The built-in stages' `settings`, inputs and outputs: `mix` (one output per input role,
//! `.npy` or `.json`, positive weights of input roles) and `filter` (a G(τ) in; some of
//! G(τ), G(iω_n), Σ(iω_n), G_l out).

use super::stages::StageAt;
use super::{loc, Validator};
use crate::spec::model::{StageKind, LEGACY_ROLE};
use crate::spec::raw::{BuiltinSettings, MixSettings};

impl Validator<'_> {
    /// The built-in `mix`.
    pub(super) fn mix(&mut self, s: &StageAt) -> Option<StageKind> {
        let (sname, st, at) = (s.name, s.spec, s.at);
        let Some(BuiltinSettings::Mix(with)) = st.settings.clone() else {
            self.push(
                at,
                format!(
                    "built-in stage `{sname}` needs `settings: {{ method: linear, alpha: 0.5 }}`"
                ),
                "add `settings:` with the mixer settings",
            );
            return None;
        };
        if !(with.alpha > 0.0 && with.alpha <= 1.0) {
            self.push(
                at,
                format!("stage `{sname}`: alpha must be in (0, 1]"),
                "e.g. alpha: 0.5",
            );
        }
        self.mix_inputs(s);
        self.mix_outputs(s, &with);
        self.mix_weights(s, &with);
        self.mix_datasets(s, &with);
        if st.outputs.get("state").is_some() {
            self.push(
                at,
                "the mixer's `state` output is implicit",
                "rename the output",
            );
        }
        if let Some(h) = with.history {
            if h == 0 {
                self.push(
                    at,
                    format!("stage `{sname}`: history must be at least 1"),
                    "e.g. history: 8 (use method linear for no history)",
                );
            }
        }
        Some(StageKind::Mix(with))
    }

    /// A mix stage has inputs, none of them named `state`.
    fn mix_inputs(&mut self, s: &StageAt) {
        let (sname, at, inputs) = (s.name, s.at, s.inputs);
        if inputs.is_empty() {
            self.push(
                at,
                format!("built-in stage `{sname}` has no inputs to mix"),
                "write inputs: { sigma: solve.sigma, density: update.density }",
            );
        }
        if inputs.iter().any(|(r, _)| r == "state") {
            self.push(
                at,
                format!("built-in stage `{sname}`: the input role `state` is reserved for the mixer's history"),
                "rename the input",
            );
        }
    }

    /// A mix stage's outputs are `.npy` or `.json` files, one per input role with the same
    /// role name (the one-array form with the input `new`: exactly one output).
    fn mix_outputs(&mut self, s: &StageAt, with: &MixSettings) {
        let (sname, st, at, inputs) = (s.name, s.spec, s.at, s.inputs);
        let legacy = inputs.len() == 1 && inputs[0].0 == LEGACY_ROLE;
        for (ok, ov) in &st.outputs.0 {
            let ov = ov.file();
            let hdf5 = with
                .datasets
                .as_ref()
                .is_some_and(|d| d.contains_key(&ok.value));
            let fits = if hdf5 {
                ov.ends_with(".h5") || ov.ends_with(".hdf5")
            } else {
                ov.ends_with(".npy") || ov.ends_with(".json")
            };
            if !fits {
                self.push(
                    loc(ok),
                    format!("mix output `{}` = `{ov}` does not end as its input's type needs", ok.value),
                    "the mixed file has the type of its input: NAME.npy for arrays, NAME.json for JSON objects, NAME.h5 for the HDF5 files of `settings: datasets`",
                );
            }
        }
        if legacy {
            if st.outputs.len() != 1 {
                self.push(
                    at,
                    format!("built-in stage `{sname}` with the single input `new` has exactly one output (the mixed array)"),
                    "write outputs: { NAME: NAME.npy }",
                );
            }
        } else if !inputs.is_empty() {
            let in_roles: Vec<&str> = inputs.iter().map(|(r, _)| r.as_str()).collect();
            for (ok, _) in &st.outputs.0 {
                if !in_roles.contains(&ok.value.as_str()) {
                    self.push(
                        loc(ok),
                        format!(
                            "mix output `{}` is not one of the stage's input roles ({})",
                            ok.value,
                            in_roles.join(", ")
                        ),
                        "a mix stage writes one output per input role, with the same role name",
                    );
                }
            }
            for r in &in_roles {
                if st.outputs.get(r).is_none() {
                    self.push(
                        at,
                        format!("built-in stage `{sname}` mixes input `{r}` but declares no output `{r}`"),
                        format!("add `{r}: {r}.npy` (or .json) to its outputs"),
                    );
                }
            }
        }
    }

    /// Weights name input roles and are positive numbers.
    fn mix_weights(&mut self, s: &StageAt, with: &MixSettings) {
        let (sname, at, inputs) = (s.name, s.at, s.inputs);
        for (role, w) in with.weights.iter().flatten() {
            if !inputs.iter().any(|(r, _)| r == role) {
                self.push(
                    at,
                    format!("stage `{sname}`: weight for `{role}`, which is not an input role"),
                    "weights name input roles of the mix stage",
                );
            }
            if !(w.is_finite() && *w > 0.0) {
                self.push(
                    at,
                    format!("stage `{sname}`: weight of `{role}` is {w}, not a positive number"),
                    "e.g. weights: { density: 10 }",
                );
            }
        }
    }

    /// `datasets` of a mix stage name input roles and absolute HDF5 paths.
    fn mix_datasets(&mut self, s: &StageAt, with: &MixSettings) {
        let (sname, at, inputs) = (s.name, s.at, s.inputs);
        for (role, paths) in with.datasets.iter().flatten() {
            if !inputs.iter().any(|(r, _)| r == role) {
                self.push(
                    at,
                    format!("stage `{sname}`: `datasets` names `{role}`, which is not an input role"),
                    "datasets: { ROLE: [/group/dataset] } names an HDF5 input role of the mix stage",
                );
            }
            for p in paths {
                if !super::metric_sources::is_absolute_h5(p) {
                    self.push(
                        at,
                        format!(
                            "stage `{sname}`: the dataset path `{p}` of `{role}` is not absolute"
                        ),
                        "start it at the file's root group, e.g. /impurity/sigma",
                    );
                }
            }
            if paths.is_empty() {
                self.push(
                    at,
                    format!("stage `{sname}`: `datasets` of `{role}` is empty"),
                    "name the float64 datasets to mix, e.g. [/impurity/sigma]",
                );
            }
        }
    }

    /// The built-in `filter`.
    pub(super) fn filter(&mut self, s: &StageAt) -> Option<StageKind> {
        let (sname, st, at, inputs) = (s.name, s.spec, s.at, s.inputs);
        let Some(BuiltinSettings::Filter(with)) = st.settings.clone() else {
            self.push(
                at,
                format!(
                    "built-in stage `{sname}` needs `settings: {{ legendre: 40, matsubara: 512 }}`"
                ),
                "add `settings:` with the filter settings",
            );
            return None;
        };
        if with.legendre == 0 || with.matsubara == 0 {
            self.push(
                at,
                format!("stage `{sname}`: legendre and matsubara must be at least 1"),
                "e.g. legendre: 40, matsubara: 512",
            );
        }
        let roles: Vec<&str> = inputs.iter().map(|(r, _)| r.as_str()).collect();
        if !roles.contains(&"gtau")
            || roles
                .iter()
                .any(|r| !["gtau", "delta", "levels"].contains(r))
        {
            self.push(
                at,
                format!(
                    "built-in stage `{sname}` takes inputs `gtau` (and `delta`, `levels` for Σ)"
                ),
                "write inputs: { gtau: solve.gtau }",
            );
        }
        let outs: Vec<&str> = st.outputs.keys().collect();
        if outs.is_empty()
            || outs
                .iter()
                .any(|r| !["gtau", "giw", "sigma", "gl"].contains(r))
        {
            self.push(
                at,
                format!("built-in stage `{sname}` writes some of the outputs gtau, giw, sigma, gl"),
                "write outputs: { giw: giw.npy, sigma: sigma.npy }",
            );
        }
        if outs.contains(&"sigma") && !(roles.contains(&"delta") && roles.contains(&"levels")) {
            self.push(
                at,
                format!(
                    "stage `{sname}`: the output `sigma` needs the inputs `delta` and `levels`"
                ),
                "add them or drop `sigma`",
            );
        }
        Some(StageKind::Filter(with))
    }
}

#[cfg(test)]
mod tests {
    use std::path::Path;

    use super::super::stages::with_stage;
    use super::super::testing::*;
    use super::*;

    /// Built-in stage `b` (written by the test) after a stage `solve` with outputs `sigma`,
    /// `density`, `gtau`, `delta`, `levels`.
    fn builtin(b: &str) -> crate::spec::raw::CampaignFile {
        raw(&format!(
            "campaign: t
cycle:
  solve:
    run: [/bin/true]
    outputs: {{ sigma: s.npy, density: d.json, gtau: g.npy, delta: h.npy, levels: l.json }}
  b: {b}
stop: {{ max-iterations: 1 }}
"
        ))
    }

    fn mix_of(b: &str) -> (Option<StageKind>, Vec<(u64, u64, String)>) {
        with_stage(&builtin(b), "b", |v, _, s| v.mix(s))
    }

    fn filter_of(b: &str) -> (Option<StageKind>, Vec<(u64, u64, String)>) {
        with_stage(&builtin(b), "b", |v, _, s| v.filter(s))
    }

    const MIX: &str = "builtin: mix, inputs: { sigma: solve.sigma, density: solve.density }";

    #[test]
    fn a_mix_of_two_roles_with_weights_is_kept_with_its_settings() {
        let (k, d) = mix_of(&format!(
            "{{ {MIX}, outputs: {{ sigma: s.npy, density: d.json }}, settings: {{ method: anderson, alpha: 0.4, history: 8, weights: {{ density: 10 }} }} }}"
        ));
        assert!(d.is_empty(), "{d:?}");
        let Some(StageKind::Mix(with)) = k else {
            panic!("{k:?}")
        };
        assert_eq!((with.alpha, with.history), (0.4, Some(8)));
        // the one-array form: input `new`, one output of any name
        let (k, d) = mix_of(
            "{ builtin: mix, inputs: { new: solve.sigma }, outputs: { sigma: s.npy }, settings: { method: linear, alpha: 0.5 } }",
        );
        assert!(k.is_some() && d.is_empty(), "{d:?}");
    }

    #[test]
    fn a_mix_without_settings_or_with_alpha_out_of_range_is_reported_at_the_stage() {
        let (k, d) = mix_of(&format!(
            "{{ {MIX}, outputs: {{ sigma: s.npy, density: d.json }} }}"
        ));
        assert!(k.is_none());
        assert_eq!(
            d,
            vec![(
                6,
                3,
                "built-in stage `b` needs `settings: { method: linear, alpha: 0.5 }`".to_string()
            )]
        );
        let (_, d) = mix_of(&format!(
            "{{ {MIX}, outputs: {{ sigma: s.npy, density: d.json, state: x.json }}, settings: {{ method: linear, alpha: 1.5 }} }}"
        ));
        assert_eq!(
            d,
            vec![
                (6, 3, "stage `b`: alpha must be in (0, 1]".to_string()),
                (
                    6,
                    120,
                    "mix output `state` is not one of the stage's input roles (sigma, density)"
                        .to_string()
                ),
                (6, 3, "the mixer's `state` output is implicit".to_string()),
            ]
        );
    }

    #[test]
    fn a_mix_without_inputs_or_with_two_outputs_of_one_array_is_reported() {
        let (_, d) = mix_of(
            "{ builtin: mix, outputs: { sigma: s.npy }, settings: { method: linear, alpha: 0.5 } }",
        );
        assert_eq!(
            d,
            vec![(6, 3, "built-in stage `b` has no inputs to mix".to_string())]
        );
        let (_, d) = mix_of(
            "{ builtin: mix, inputs: { new: solve.sigma }, outputs: { a: a.npy, b: b.npy }, settings: { method: linear, alpha: 0.5 } }",
        );
        assert_eq!(
            d,
            vec![(
                6,
                3,
                "built-in stage `b` with the single input `new` has exactly one output (the mixed array)"
                    .to_string()
            )]
        );
    }

    const FILTER: &str = "builtin: filter, settings: { legendre: 40, matsubara: 512 }";

    #[test]
    fn a_filter_of_a_gtau_to_giw_and_sigma_is_kept_with_its_settings() {
        let (k, d) = filter_of(&format!(
            "{{ {FILTER}, inputs: {{ gtau: solve.gtau, delta: solve.delta, levels: solve.levels }}, outputs: {{ giw: giw.npy, sigma: sigma.npy }} }}"
        ));
        assert!(d.is_empty(), "{d:?}");
        assert!(matches!(k, Some(StageKind::Filter(w)) if (w.legendre, w.matsubara) == (40, 512)));
    }

    #[test]
    fn a_filter_with_wrong_settings_inputs_or_outputs_is_reported_at_the_stage() {
        let cases = [
            (
                "{ builtin: filter, inputs: { gtau: solve.gtau }, outputs: { giw: g.npy } }",
                "built-in stage `b` needs `settings: { legendre: 40, matsubara: 512 }`",
            ),
            (
                "{ builtin: filter, settings: { legendre: 0, matsubara: 512 }, inputs: { gtau: solve.gtau }, outputs: { giw: g.npy } }",
                "stage `b`: legendre and matsubara must be at least 1",
            ),
            (
                "{ builtin: filter, settings: { legendre: 4, matsubara: 8 }, inputs: { sigma: solve.sigma }, outputs: { giw: g.npy } }",
                "built-in stage `b` takes inputs `gtau` (and `delta`, `levels` for Σ)",
            ),
            (
                "{ builtin: filter, settings: { legendre: 4, matsubara: 8 }, inputs: { gtau: solve.gtau }, outputs: { density: g.npy } }",
                "built-in stage `b` writes some of the outputs gtau, giw, sigma, gl",
            ),
            (
                "{ builtin: filter, settings: { legendre: 4, matsubara: 8 }, inputs: { gtau: solve.gtau }, outputs: { sigma: s.npy } }",
                "stage `b`: the output `sigma` needs the inputs `delta` and `levels`",
            ),
        ];
        for (b, want) in cases {
            let (_, d) = filter_of(b);
            assert_eq!(d, vec![(6, 3, want.to_string())], "{b}");
        }
    }

    /// The demo campaign with one replacement, and the diagnostics of parsing it.
    fn demo_with(from: &str, to: &str) -> String {
        let file = Path::new(env!("CARGO_MANIFEST_DIR")).join("../examples/model-sweep.yaml");
        let text = std::fs::read_to_string(&file).unwrap_or_default();
        assert!(text.contains(from), "the demo has no `{from}`");
        match crate::spec::parse(&file, &text.replacen(from, to, 1)) {
            Ok(_) => String::new(),
            Err(e) => e.to_string(),
        }
    }

    /// The multi-array mix stage: outputs are exactly its input roles, files are .npy or
    /// .json, weights name input roles and are positive, stop rules name its metrics; each
    /// refusal is a `file:line:col` diagnostic.
    #[test]
    fn mix_stage_roles_weights_and_metrics() {
        let outs = "outputs: { sigma: sigma.npy, density: density.json }";
        let with = "settings: { method: anderson, alpha: 0.4, history: 8 }";
        // a diagnostic whose message (after file:line:col) is about the mixer
        let mixes = |d: &str| {
            d.lines()
                .any(|l| l.splitn(4, ':').nth(3).is_some_and(|m| m.contains("mix")))
        };
        assert!(!mixes(&demo_with(outs, outs)), "{}", demo_with(outs, outs));
        let cases = [
            (
                outs,
                "outputs: { sigma: sigma.npy, rho: density.json }",
                "mix output `rho` is not one of the stage's input roles",
            ),
            (
                outs,
                "outputs: { sigma: sigma.npy }",
                "mixes input `density` but declares no output `density`",
            ),
            (
                outs,
                "outputs: { sigma: sigma.npy, density: density.txt }",
                "does not end as its input's type needs",
            ),
            (
                with,
                "settings: { method: anderson, alpha: 0.4, weights: { rho: 2 } }",
                "weight for `rho`, which is not an input role",
            ),
            (
                with,
                "settings: { method: anderson, alpha: 0.4, weights: { density: -1 } }",
                "not a positive number",
            ),
            (
                with,
                "settings: { method: anderson, alpha: 0.4, history: 0 }",
                "history must be at least 1",
            ),
            (
                "metric: update.energy,",
                "metric: mix.residual,",
                "reports residual_norm, residual_norm_ROLE",
            ),
            (
                "inputs: { sigma: solve.sigma, density: update.density }",
                "inputs: { sigma: solve.sigma, state: update.density }",
                "reserved",
            ),
        ];
        for (from, to, needle) in cases {
            let e = demo_with(from, to);
            let line = e.lines().find(|l| l.contains(needle));
            let Some(line) = line else {
                panic!("`{to}`: no diagnostic `{needle}` in:\n{e}");
            };
            // file:line:col: message
            let mut it = line.splitn(4, ':');
            let (_, l, c) = (it.next(), it.next(), it.next());
            assert!(
                l.is_some_and(|l| l.parse::<u64>().is_ok_and(|n| n > 0))
                    && c.is_some_and(|c| c.parse::<u64>().is_ok()),
                "{line}"
            );
        }
        // the mixer's metrics, per role too, are valid stop-rule metrics
        let e = demo_with(
            "metric: update.energy,",
            "metric: mix.residual_norm_density,",
        );
        assert!(!mixes(&e), "{e}");
    }
}
