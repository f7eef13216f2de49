//! `analysis:`: the campaign-level equation-of-state fit, on a sweep axis holding the
//! volume and an energy metric a stage reports.

use super::stages::{Cycle, StageAt};
use super::{loc, split_ref, Validator};
use crate::spec::model::{EosAnalysis, PointSpec, Section, Stage, StageKind, EOS_STAGE};
use crate::spec::raw::BuiltinSettings;
use crate::spec::raw::{CampaignFile, EosModelName, EosSpec};

impl Validator<'_> {
    /// `builtin: eos` of an `after-campaign:` stage: its `settings:` are an equation-of-state
    /// section; it takes no inputs or outputs of its own (it writes `analysis/eos.json`).
    pub(super) fn eos_builtin(&mut self, cx: &Cycle, s: &StageAt) -> Option<StageKind> {
        let Some(BuiltinSettings::Eos(e)) = &s.spec.settings else {
            self.push(
                s.at,
                format!("stage `{}`: the built-in eos needs `settings: {{ energy: stage.metric, volume: AXIS }}`", s.name),
                "e.g. settings: { energy: update.energy, volume: volume, models: [vinet] }",
            );
            return None;
        };
        if !s.spec.inputs.is_empty() || !s.spec.outputs.is_empty() {
            self.push(
                s.at,
                format!("stage `{}`: the built-in eos reads the final energies itself and writes analysis/eos.json", s.name),
                "remove its `inputs:` and `outputs:`",
            );
        }
        let axes = super::sweep::axis_names(cx.raw);
        let axes: Vec<&str> = axes.iter().map(String::as_str).collect();
        self.eos_spec(cx.raw, e, &axes).map(StageKind::Eos)
    }

    /// `analysis: eos:` is the shipped campaign-level stage `eos`: added to the
    /// `after-campaign:` stages unless one of them is a built-in eos already.
    pub(super) fn eos_as_stage(
        &mut self,
        raw: &CampaignFile,
        eos: &EosAnalysis,
        after_campaign: &mut Vec<Stage>,
    ) {
        if after_campaign
            .iter()
            .any(|s| matches!(s.kind, StageKind::Eos(_)))
        {
            if let Some(e) = &raw.analysis.eos {
                self.push(
                    loc(&e.energy),
                    "both `analysis: eos:` and an after-campaign stage with `builtin: eos`",
                    "keep one of them",
                );
            }
            return;
        }
        if let Some((k, _)) = raw
            .after_campaign
            .0
            .iter()
            .find(|(k, _)| k.value == EOS_STAGE)
        {
            self.push(
                loc(k),
                format!("stage `{EOS_STAGE}` is the name of the shipped equation-of-state stage of `analysis: eos:`"),
                "rename this stage",
            );
            return;
        }
        after_campaign.push(Stage {
            name: EOS_STAGE.into(),
            section: Section::AfterCampaign,
            group_by: Vec::new(),
            kind: StageKind::Eos(eos.clone()),
            inputs: Vec::new(),
            outputs: Vec::new(),
            required_metrics: Default::default(),
            resources: Default::default(),
            time_limit: None,
            retries: 0,
            timeout_factor: 1.0,
            outlive_rondo: true,
            resident: false,
            allow_nonfinite: false,
            writable_inputs: Default::default(),
            placement: Default::default(),
            keep: Vec::new(),
            case_folder: None,
            metric_sources: Vec::new(),
            hdf5_outputs: Vec::new(),
            env: Vec::new(),
            also_runs: Vec::new(),
        });
    }

    /// `analysis.eos`, checked against the sweep axes of `points`.
    pub(super) fn eos(&mut self, raw: &CampaignFile, points: &[PointSpec]) -> Option<EosAnalysis> {
        let e = raw.analysis.eos.as_ref()?;
        let axes: Vec<&str> = points
            .first()
            .map(|p| p.values.iter().map(|(k, _)| k.as_str()).collect())
            .unwrap_or_default();
        self.eos_spec(raw, e, &axes)
    }

    /// An equation-of-state section (`analysis: eos:` or the settings of an
    /// `after-campaign:` stage with `builtin: eos`), checked against the sweep axes.
    pub(super) fn eos_spec(
        &mut self,
        raw: &CampaignFile,
        e: &EosSpec,
        axes: &[&str],
    ) -> Option<EosAnalysis> {
        let at = loc(&e.energy);
        let volume = e.volume.clone().unwrap_or_else(|| "volume".into());
        if !axes.contains(&volume.as_str()) {
            self.push(
                at,
                format!("the eos analysis needs the sweep axis `{volume}`"),
                format!(
                    "sweep axes: {}; set `volume:` to the axis holding the volume",
                    axes.join(", ")
                ),
            );
            return None;
        }
        let Some((st, m)) = split_ref(&e.energy.value) else {
            self.push(
                at,
                "eos `energy` must be written stage.metric",
                "e.g. energy: update.energy",
            );
            return None;
        };
        match raw.cycle.get(st) {
            None => {
                self.push(
                    at,
                    format!("eos energy names unknown stage `{st}`"),
                    "use stage.metric",
                );
                return None;
            }
            Some(sp) if sp.builtin.is_none() && !sp.metrics.iter().any(|x| x == m) => {
                self.push(
                    at,
                    format!("stage `{st}` does not list metric `{m}`"),
                    format!("add `{m}` to the stage's `metrics:`"),
                );
                return None;
            }
            Some(_) => {}
        }
        Some(EosAnalysis {
            energy: e.energy.value.clone(),
            volume,
            models: e
                .models
                .clone()
                .unwrap_or_else(|| vec![EosModelName::BirchMurnaghan, EosModelName::Vinet]),
        })
    }
}

#[cfg(test)]
mod tests {
    use super::super::testing::*;
    use super::*;

    fn eos_of(eos: &str) -> (Option<EosAnalysis>, Vec<(u64, u64, String)>) {
        let raw = raw(&format!(
            "campaign: t
sweep: {{ product: {{ volume: [26.0, 27.0], temperature: [300] }} }}
cycle:
  u: {{ run: [/bin/true], metrics: [energy] }}
  m: {{ builtin: mix, inputs: {{ y: u.y }} }}
stop: {{ max-iterations: 1 }}
analysis:
  eos: {eos}
"
        ));
        let mut v = validator();
        let points = v.points(&raw);
        let e = v.eos(&raw, &points);
        (e, found(&v))
    }

    #[test]
    fn an_eos_on_the_volume_axis_and_a_listed_energy_fits_both_models_by_default() {
        let (e, d) = eos_of("{ energy: u.energy }");
        assert!(d.is_empty(), "{d:?}");
        let Some(e) = e else { panic!("no eos") };
        assert_eq!(
            (e.energy.as_str(), e.volume.as_str()),
            ("u.energy", "volume")
        );
        assert_eq!(
            e.models,
            [EosModelName::BirchMurnaghan, EosModelName::Vinet]
        );
        let (e, d) = eos_of("{ energy: u.energy, models: [vinet] }");
        assert!(d.is_empty(), "{d:?}");
        assert_eq!(e.map(|e| e.models), Some(vec![EosModelName::Vinet]));
    }

    #[test]
    fn an_eos_without_its_axis_or_with_an_unknown_energy_is_reported_at_the_energy() {
        let cases = [
            (
                "{ energy: u.energy, volume: v }",
                "the eos analysis needs the sweep axis `v`",
            ),
            (
                "{ energy: energy }",
                "eos `energy` must be written stage.metric",
            ),
            ("{ energy: w.energy }", "eos energy names unknown stage `w`"),
            ("{ energy: u.e0 }", "stage `u` does not list metric `e0`"),
        ];
        for (eos, want) in cases {
            let (e, d) = eos_of(eos);
            assert!(e.is_none(), "{eos}");
            assert_eq!(d, vec![(8, 18, want.to_string())], "{eos}");
        }
    }
}
