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
