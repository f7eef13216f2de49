//! `analysis:`: the campaign-level equation-of-state fit, on a sweep axis holding the
//! volume and an energy metric a stage reports.

use super::{loc, split_ref, Validator};
use crate::spec::model::{EosAnalysis, PointSpec};
use crate::spec::raw::{CampaignFile, EosModelName};

impl Validator<'_> {
    /// `analysis.eos`, checked against the sweep axes of `points`.
    pub(super) fn eos(&mut self, raw: &CampaignFile, points: &[PointSpec]) -> Option<EosAnalysis> {
        let e = raw.analysis.eos.as_ref()?;
        let at = loc(&e.energy);
        let volume = e.volume.clone().unwrap_or_else(|| "volume".into());
        let axes: Vec<&str> = points
            .first()
            .map(|p| p.values.iter().map(|(k, _)| k.as_str()).collect())
            .unwrap_or_default();
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
