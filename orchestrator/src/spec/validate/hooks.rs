//! `hooks:` (programs run on events, their time limit and the disk-low threshold),
//! `budget:` (core-hours) and `warm-start:` (its axes). A hook's program is not looked for
//! here: one that is missing when its event comes is logged (`hook-failed`) and never stops
//! the campaign.

use std::collections::BTreeMap;
use std::path::Path;

use serde_saphyr::Spanned;

use super::{loc, parse_duration, Validator};
use crate::spec::model::{DiskFree, Hooks, PointSpec, WarmStart, HOOK_EVENTS};
use crate::spec::raw::{CampaignFile, HookCommand, Scalar, WarmStartSpec};

impl Validator<'_> {
    /// `hooks:` → the hooks model (relative program paths made absolute from `base`).
    pub(super) fn hooks(&mut self, raw: &CampaignFile, base: &Path) -> Hooks {
        let h = &raw.hooks;
        // In the order of HOOK_EVENTS.
        let fields: [&HookCommand; 5] = [
            &h.point_failed,
            &h.point_converged,
            &h.point_capped,
            &h.campaign_done,
            &h.disk_low,
        ];
        let mut commands = BTreeMap::new();
        for (name, cmd) in HOOK_EVENTS.into_iter().zip(fields) {
            let Some(cmd) = cmd else { continue };
            if let Some(argv) = self.hook_command(name, cmd, base) {
                commands.insert(name.to_string(), argv);
            }
        }
        let mut hooks = Hooks {
            commands,
            ..Hooks::default()
        };
        if let Some(t) = &h.time_limit {
            match parse_duration(&t.value).filter(|d| !d.is_zero()) {
                Some(d) => hooks.time_limit = d,
                None => self.push(
                    loc(t),
                    format!("hooks: time limit `{}` is not a duration", t.value),
                    "write [days-]hh:mm:ss, mm:ss or a number of minutes, e.g. 0:30 for 30 seconds",
                ),
            }
        }
        if let Some(t) = &h.disk_free_below {
            match disk_free(&t.value) {
                Some(d) => hooks.disk_free_below = d,
                None => self.push(
                    loc(t),
                    format!(
                        "hooks: `disk-free-below: {}` is neither a percentage nor a size",
                        t.value
                    ),
                    "write a percentage of the file system (5%) or a size (10GiB, 500MB)",
                ),
            }
        }
        hooks
    }

    /// One hook's argument list, or `None` (reported) when it is empty or has placeholders.
    fn hook_command(
        &mut self,
        name: &str,
        cmd: &Spanned<Vec<Spanned<String>>>,
        base: &Path,
    ) -> Option<Vec<String>> {
        let Some(first) = cmd.value.first() else {
            self.push(
                loc(cmd),
                format!("hook `{name}`: the command is empty"),
                "write [program, args...]; the event comes on the program's stdin as JSON",
            );
            return None;
        };
        let mut ok = true;
        for arg in &cmd.value {
            if arg.value.contains("{{") {
                self.push(
                    loc(arg),
                    format!("hook `{name}`: `{}` has a placeholder; hooks take none", arg.value),
                    "read the event from stdin (JSON) or from the RONDO_HOOK_* environment variables",
                );
                ok = false;
            }
        }
        if !ok {
            return None;
        }
        let mut argv: Vec<String> = cmd.value.iter().map(|a| a.value.clone()).collect();
        if first.value.contains('/') && !Path::new(&first.value).is_absolute() {
            let p = base.join(&first.value);
            argv[0] = std::path::absolute(&p).unwrap_or(p).display().to_string();
        }
        Some(argv)
    }

    /// `budget: { core-hours: N }` → N, positive.
    pub(super) fn budget(&mut self, raw: &CampaignFile) -> Option<f64> {
        let b = raw.budget.as_ref()?;
        let v = &b.core_hours;
        let hours = match &v.value {
            Scalar::Int(i) => Some(*i as f64),
            Scalar::Real(x) => Some(*x),
            Scalar::Text(t) => t
                .trim()
                .strip_suffix("core-hours")
                .and_then(|n| n.trim().parse::<f64>().ok()),
            Scalar::Bool(_) => None,
        };
        match hours.filter(|h| h.is_finite() && *h > 0.0) {
            Some(h) => Some(h),
            None => {
                self.push(
                    loc(v),
                    format!("budget `{}` is not a positive number of core-hours", v.value),
                    "write `core-hours: 5000` (wall time × CPUs of every attempt); node-hours or money are not understood",
                );
                None
            }
        }
    }
}

impl Validator<'_> {
    /// `warm-start: { along: [AXIS, ...] }` → the axes: each a numeric sweep axis, once.
    pub(super) fn warm_start(
        &mut self,
        raw: &CampaignFile,
        points: &[PointSpec],
    ) -> Option<WarmStart> {
        let w = raw.warm_start.as_ref()?;
        let along = self.warm_axes(w, points);
        (!along.is_empty()).then_some(WarmStart {
            along,
            estimate: w.estimate,
        })
    }

    /// The checked axes of `warm-start: { along }`.
    fn warm_axes(&mut self, w: &WarmStartSpec, points: &[PointSpec]) -> Vec<String> {
        if w.along.value.is_empty() {
            self.push(
                loc(&w.along),
                "warm-start names no sweep axis",
                "name the axes to search along, e.g. `warm-start: { along: [volume] }`",
            );
            return Vec::new();
        }
        let mut out: Vec<String> = Vec::new();
        for a in &w.along.value {
            let axis = &a.value;
            let values: Vec<&Scalar> = points
                .iter()
                .filter_map(|p| p.values.iter().find(|(k, _)| k == axis).map(|(_, v)| v))
                .collect();
            if values.is_empty() {
                self.push(
                    loc(a),
                    format!("warm-start axis `{axis}` is not a sweep axis"),
                    "name an axis of `sweep:` (its values measure the distance between points)",
                );
            } else if values
                .iter()
                .any(|v| !matches!(v, Scalar::Int(_) | Scalar::Real(_)))
            {
                self.push(
                    loc(a),
                    format!("warm-start axis `{axis}` has values that are not numbers"),
                    "warm starts measure distance along numeric axes; leave the others out (points must then be equal on them)",
                );
            } else if out.contains(axis) {
                self.push(
                    loc(a),
                    format!("warm-start axis `{axis}` is named twice"),
                    "name each axis once",
                );
            } else {
                out.push(axis.clone());
            }
        }
        out
    }
}

/// `5%`, `10GiB`, `500MB`, `2TB`, `1048576` (bytes).
fn disk_free(text: &str) -> Option<DiskFree> {
    let t = text.trim();
    if let Some(p) = t.strip_suffix('%') {
        let p: f64 = p.trim().parse().ok()?;
        return (p > 0.0 && p <= 100.0).then_some(DiskFree::Percent(p));
    }
    let split = t
        .find(|c: char| !(c.is_ascii_digit() || c == '.'))
        .unwrap_or(t.len());
    let (num, unit) = t.split_at(split);
    let n: f64 = num.parse().ok()?;
    let scale: f64 = match unit.trim() {
        "" | "B" => 1.0,
        "kB" | "KB" => 1e3,
        "MB" => 1e6,
        "GB" => 1e9,
        "TB" => 1e12,
        "KiB" => 1024.0,
        "MiB" => 1024f64.powi(2),
        "GiB" => 1024f64.powi(3),
        "TiB" => 1024f64.powi(4),
        _ => return None,
    };
    let bytes = n * scale;
    (bytes.is_finite() && bytes > 0.0).then_some(DiskFree::Bytes(bytes as u64))
}

#[cfg(test)]
mod tests {
    use super::super::testing::*;
    use super::*;

    #[test]
    fn disk_thresholds_read_as_percent_or_size() {
        assert_eq!(disk_free("5%"), Some(DiskFree::Percent(5.0)));
        assert_eq!(disk_free("10GiB"), Some(DiskFree::Bytes(10 << 30)));
        assert_eq!(disk_free("500 MB"), Some(DiskFree::Bytes(500_000_000)));
        assert_eq!(disk_free("lots"), None);
        assert_eq!(disk_free("0%"), None);
        assert!(DiskFree::Default.is_low(9 << 30, 1 << 50));
        assert!(DiskFree::Default.is_low(40 << 30, 1000 << 30));
        assert!(!DiskFree::Default.is_low(60 << 30, 1000 << 30));
    }

    #[test]
    fn hooks_and_budget_are_read() {
        let text = "campaign: t
cycle:
  s: { run: [/bin/true] }
stop: { max-iterations: 1 }
hooks:
  point-failed: [./notify.sh, failed]
  time-limit: \"0:05\"
budget: { core-hours: 5000 core-hours }
";
        let mut v = validator();
        let r = raw(text);
        let h = v.hooks(&r, Path::new("/x"));
        assert_eq!(
            h.commands.get("point-failed"),
            Some(&vec!["/x/notify.sh".to_string(), "failed".to_string()])
        );
        assert_eq!(h.time_limit, std::time::Duration::from_secs(5));
        assert_eq!(v.budget(&r), Some(5000.0));
        assert!(found(&v).is_empty());
    }
}
