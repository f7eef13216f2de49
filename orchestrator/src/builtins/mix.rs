//! The built-in `mix` stage: one mixing step over one or more input roles (each a `.npy`
//! array, real or complex, a `.json` object whose numeric top-level fields are mixed, or
//! the float64 datasets `settings: datasets` names in an HDF5 file),
//! concatenated in the stage's role order into one vector, mixed with the history kept as
//! an artifact of the previous iteration (absent at iteration 1, where the inputs pass
//! through exactly), split back into one output per role (same shape, type or key set),
//! and the new state. Optional per-role weights scale each role's block of the vector the
//! mixer sees.
//!
//! Owns the step's sequence (read, check against the history, weight, mix, unweight,
//! encode everything, then write); the layout and file reading are `layout`'s, the
//! numerics `rondo_numerics::mixing`'s. Knows no store and no scheduler: a state read back
//! after a restart continues the same sequence bit for bit.

use std::path::{Path, PathBuf};

use rondo_numerics::mixing::{self, Method, MixOutcome, MixerConfig, MixerState};
use rondo_numerics::npy::{self, NpyArray};

use super::layout::{
    check_layout, read_input, read_state, Block, BlockKind, Loaded, StateFile, LAYOUT_VERSION,
};
use super::{metric, Builtin, MixReport, StageFiles};
use crate::spec::{MixMethod, MixSettings, LEGACY_ROLE};
use crate::validate::Metric;

/// File name of the mixer state in the attempt's scratch directory.
pub const STATE_FILE: &str = "mixer-state.json";

/// The mix stage with its settings and where its history comes from and goes: a
/// [`Builtin`] whose inputs are the roles to mix, in vector order, and whose outputs are
/// the same roles.
#[derive(Debug, Clone)]
pub struct Mix {
    /// The `settings:` of the stage.
    pub settings: MixSettings,
    /// The state the previous step wrote (none at the first step).
    pub state: Option<PathBuf>,
    /// Where the new state goes.
    pub state_out: PathBuf,
}

impl Builtin for Mix {
    fn name(&self) -> &'static str {
        "mix"
    }

    fn run(&self, files: &StageFiles) -> Result<MixReport, String> {
        let roles: Vec<String> = files.inputs.iter().map(|(r, _)| r.clone()).collect();
        let pairs = mix_pairs(&roles, &files.outputs)?;
        let roles: Vec<(String, PathBuf, PathBuf)> = pairs
            .into_iter()
            .zip(&files.inputs)
            .map(|((role, out), (_, new))| (role, new.clone(), out))
            .collect();
        mix(
            &self.settings,
            &roles,
            self.state.as_deref(),
            &self.state_out,
        )
    }
}

/// The mixer configuration of a stage.
pub fn config(with: &MixSettings) -> MixerConfig {
    let d = MixerConfig::default();
    MixerConfig {
        method: match with.method {
            MixMethod::Linear => Method::Linear,
            MixMethod::Anderson => Method::Anderson,
            MixMethod::Broyden => Method::Broyden,
        },
        alpha: with.alpha,
        history: with.history.unwrap_or(d.history),
        w0: with.w0.unwrap_or(d.w0),
        restart_after_growth: with.restart_after_growth.unwrap_or(d.restart_after_growth),
    }
}

/// Pair each input role with its output file. The stage's outputs list exactly its input
/// roles; the one-array form (`new`) has a single output of any role name.
pub fn mix_pairs<F: Clone>(
    input_roles: &[String],
    outputs: &[(String, F)],
) -> Result<Vec<(String, F)>, String> {
    if input_roles.len() == 1 && input_roles[0] == LEGACY_ROLE && outputs.len() == 1 {
        return Ok(vec![(LEGACY_ROLE.to_string(), outputs[0].1.clone())]);
    }
    let mut pairs = Vec::new();
    for r in input_roles {
        let Some((_, f)) = outputs.iter().find(|(o, _)| o == r) else {
            return Err(format!("the mix stage has no output for its input `{r}`"));
        };
        pairs.push((r.clone(), f.clone()));
    }
    if let Some((o, _)) = outputs.iter().find(|(o, _)| !input_roles.contains(o)) {
        return Err(format!(
            "the output `{o}` has no input `{o}` to mix; the mix stage's outputs must be exactly its input roles"
        ));
    }
    Ok(pairs)
}

/// One mixing step over `roles` = (role, new file, output file), in vector order. Errors are
/// messages naming the file and what is wrong; nothing is written on error.
pub fn mix(
    with: &MixSettings,
    roles: &[(String, PathBuf, PathBuf)],
    state: Option<&Path>,
    state_out: &Path,
) -> Result<MixReport, String> {
    let cfg = config(with);
    cfg.validate().map_err(|e| e.to_string())?;
    if roles.is_empty() {
        return Err("the mix stage has no input".into());
    }
    let (loaded, layout) = read_inputs(with, roles)?;
    let prev = match state {
        None => None,
        Some(p) => {
            let s = read_state(p)?;
            check_layout(p, &s.layout, &layout, roles)?;
            Some(s)
        }
    };
    // The mixer works on y = (w_1 x_1, …, w_n x_n).
    let weighted: Vec<f64> = layout
        .iter()
        .zip(&loaded)
        .flat_map(|(b, l)| l.values.iter().map(move |x| x * b.weight))
        .collect();
    let step = mixing::mix(&cfg, prev.as_ref().map(|s| &s.mixer), &weighted)
        .map_err(|e| format!("mixing {}: {e}", roles_list(roles)))?;
    let next = if prev.is_none() {
        // Iteration 1 passes the inputs through exactly.
        loaded
            .iter()
            .flat_map(|l| l.values.iter().copied())
            .collect()
    } else {
        unweight(&layout, &step.next)
    };
    if next.iter().any(|x| !x.is_finite()) {
        return Err(format!(
            "mixing {}: the mixed vector is not finite",
            roles_list(roles)
        ));
    }
    // Encode everything before writing anything.
    let mut files = encode_outputs(&layout, loaded, roles, &next)?;
    files.push((state_out, encode_state(&layout, &step.state)?));
    write_all(&files)?;
    Ok(MixReport {
        metrics: step_metrics(&step, prev.as_ref(), &layout, &weighted),
        event: step.event,
    })
}

/// Read every role's new file and lay out the vector: one block per role, in order, with
/// its weight (1 unless `settings: weights` gives one; it must be positive).
fn read_inputs(
    with: &MixSettings,
    roles: &[(String, PathBuf, PathBuf)],
) -> Result<(Vec<Loaded>, Vec<Block>), String> {
    let mut loaded = Vec::with_capacity(roles.len());
    let mut layout = Vec::with_capacity(roles.len());
    for (role, path, _) in roles {
        let names = with.datasets.as_ref().and_then(|d| d.get(role));
        let l = read_input(role, path, names.map(Vec::as_slice))?;
        let weight = with
            .weights
            .as_ref()
            .and_then(|w| w.get(role))
            .copied()
            .unwrap_or(1.0);
        if !(weight.is_finite() && weight > 0.0) {
            return Err(format!(
                "weight {weight} of `{role}` must be a positive number"
            ));
        }
        layout.push(Block {
            role: role.clone(),
            kind: l.kind.clone(),
            len: l.values.len(),
            weight,
        });
        loaded.push(l);
    }
    Ok((loaded, layout))
}

/// The mixed vector with each block's weight divided out.
fn unweight(layout: &[Block], mixed: &[f64]) -> Vec<f64> {
    let mut out = Vec::with_capacity(mixed.len());
    let mut at = 0;
    for b in layout {
        out.extend(mixed[at..at + b.len].iter().map(|y| y / b.weight));
        at += b.len;
    }
    out
}

/// A file's content, encoded, waiting to be written.
pub(super) enum Payload {
    Npy(NpyArray),
    Bytes(Vec<u8>),
    /// A copy of the HDF5 input file with these datasets holding these values.
    Hdf5 {
        input: PathBuf,
        datasets: Vec<super::hdf5_blocks::Hdf5Dataset>,
        values: Vec<f64>,
    },
}

/// Each role's part of the mixed vector `next`, encoded as its output file: an array of
/// the input's shape and type, or the input's JSON object with its mixed fields replaced.
fn encode_outputs<'a>(
    layout: &[Block],
    loaded: Vec<Loaded>,
    roles: &'a [(String, PathBuf, PathBuf)],
    next: &[f64],
) -> Result<Vec<(&'a Path, Payload)>, String> {
    let mut files: Vec<(&Path, Payload)> = Vec::with_capacity(roles.len() + 1);
    let mut at = 0;
    for ((b, l), (role, input, out)) in layout.iter().zip(loaded).zip(roles) {
        let part = next[at..at + b.len].to_vec();
        at += b.len;
        let bytes = match &b.kind {
            BlockKind::Hdf5 { datasets } => Payload::Hdf5 {
                input: input.clone(),
                datasets: datasets.clone(),
                values: part,
            },
            _ => encode_block(b, l, role, part)?,
        };
        check_extension(b, role, out)?;
        files.push((out.as_path(), bytes));
    }
    Ok(files)
}

/// One role's mixed values in the form of its input.
pub(super) fn encode_block(
    b: &Block,
    l: Loaded,
    role: &str,
    part: Vec<f64>,
) -> Result<Payload, String> {
    match (&b.kind, l.json) {
        (BlockKind::NpyReal { shape }, _) | (BlockKind::NpyComplex { shape }, _) => {
            let complex = matches!(b.kind, BlockKind::NpyComplex { .. });
            let arr = NpyArray::from_flat_f64(shape.clone(), complex, part)
                .ok_or_else(|| format!("internal: mixed `{role}` does not fit its shape"))?;
            Ok(Payload::Npy(arr))
        }
        (BlockKind::Json { keys }, Some(mut obj)) => {
            for (k, x) in keys.iter().zip(part) {
                obj.insert(k.clone(), serde_json::Value::from(x));
            }
            let mut text = serde_json::to_string_pretty(&serde_json::Value::Object(obj))
                .map_err(|e| format!("cannot encode mixed `{role}`: {e}"))?;
            text.push('\n');
            Ok(Payload::Bytes(text.into_bytes()))
        }
        (BlockKind::Json { .. }, None) => Err(format!("internal: `{role}` lost its JSON object")),
        (BlockKind::Hdf5 { .. }, _) => Err(format!("internal: `{role}` is an HDF5 block")),
    }
}

/// An output file's name must say what it holds: `.json` for a JSON object, `.npy` for an
/// array.
fn check_extension(b: &Block, role: &str, out: &Path) -> Result<(), String> {
    if matches!(b.kind, BlockKind::Hdf5 { .. }) {
        if out.extension().is_some_and(|e| e == "h5" || e == "hdf5") {
            return Ok(());
        }
        return Err(format!(
            "output {} of `{role}` must end in .h5 or .hdf5 for a {}",
            out.display(),
            b.kind.describe()
        ));
    }
    let json = matches!(b.kind, BlockKind::Json { .. });
    let ext_ok = out
        .extension()
        .is_some_and(|e| e == if json { "json" } else { "npy" });
    if ext_ok {
        return Ok(());
    }
    Err(format!(
        "output {} of `{role}` must end in {} for a {}",
        out.display(),
        if json { ".json" } else { ".npy" },
        b.kind.describe()
    ))
}

/// The state file of this step: the layout and the mixer's own state.
fn encode_state(layout: &[Block], mixer: &MixerState) -> Result<Payload, String> {
    let state_text = serde_json::to_string(&StateFile {
        layout_version: LAYOUT_VERSION,
        layout: layout.to_vec(),
        mixer: mixer.clone(),
    })
    .map_err(|e| format!("cannot encode the mixer state: {e}"))?;
    Ok(Payload::Bytes(state_text.into_bytes()))
}

/// Write every encoded file, each atomically.
pub(super) fn write_all(files: &[(&Path, Payload)]) -> Result<(), String> {
    for (path, payload) in files {
        match payload {
            Payload::Npy(arr) => arr.write(path),
            Payload::Bytes(b) => npy::write_atomic(path, b),
            Payload::Hdf5 {
                input,
                datasets,
                values,
            } => {
                super::hdf5_blocks::write(input, path, datasets, values)?;
                continue;
            }
        }
        .map_err(|e| format!("{}: {e}", path.display()))?;
    }
    Ok(())
}

/// The step's metrics: `history`, `resets`, and from the second step on `residual_norm`,
/// with several roles also `residual_norm_ROLE` per role (unweighted, from the residual the
/// mixer stored last).
fn step_metrics(
    step: &MixOutcome,
    prev: Option<&StateFile>,
    layout: &[Block],
    weighted: &[f64],
) -> Vec<Metric> {
    let mut metrics = vec![
        metric("history", step.state.history_len() as f64),
        metric("resets", step.state.resets() as f64),
    ];
    if !step.residual_norm.is_finite() {
        return metrics;
    }
    metrics.push(metric("residual_norm", step.residual_norm));
    if let (Some(p), true) = (prev, layout.len() > 1) {
        let x = p.mixer.x();
        let mut at = 0;
        for b in layout {
            let r2: f64 = (at..at + b.len)
                .map(|i| ((weighted[i] - x[i]) / b.weight).powi(2))
                .sum();
            metrics.push(metric(&format!("residual_norm_{}", b.role), r2.sqrt()));
            at += b.len;
        }
    }
    metrics
}

/// The roles and their files, for messages.
fn roles_list(roles: &[(String, PathBuf, PathBuf)]) -> String {
    roles
        .iter()
        .map(|(r, p, _)| format!("`{r}` ({})", p.display()))
        .collect::<Vec<_>>()
        .join(", ")
}

#[cfg(test)]
mod tests {
    use super::*;
    use num_complex::Complex64;
    use std::collections::BTreeMap;

    fn with(alpha: f64) -> MixSettings {
        MixSettings {
            method: MixMethod::Linear,
            alpha,
            history: None,
            w0: None,
            restart_after_growth: None,
            weights: None,
            datasets: None,
        }
    }

    /// One role's (role, new file, output file) in `d`.
    fn role(d: &Path, role: &str, new: &str, out: &str) -> (String, PathBuf, PathBuf) {
        (role.to_string(), d.join(new), d.join(out))
    }

    /// A free level ε at inverse temperature β: G(τ) = −e^{−ετ}/(1+e^{−βε}) and
    /// G(iω_n) = 1/(iω_n − ε) (fact of the trade). The filter must give back G(iω_n), Σ = 0

    #[test]
    fn linear_steps_and_shape_checks() -> Result<(), Box<dyn std::error::Error>> {
        let d = tempfile::tempdir()?;
        let dp = d.path();
        let p = |n: &str| dp.join(n);
        npy::write_complex(
            p("new1.npy"),
            &[2],
            &[Complex64::new(1.0, 2.0), Complex64::new(3.0, 4.0)],
        )?;
        let one = |new: &str, out: &str| vec![role(dp, "new", new, out)];
        mix(
            &with(0.5),
            &one("new1.npy", "out1.npy"),
            None,
            &p("s1.json"),
        )?;
        // iteration 1 passes the array through unchanged
        assert_eq!(std::fs::read(p("out1.npy"))?, std::fs::read(p("new1.npy"))?);
        npy::write_complex(
            p("new2.npy"),
            &[2],
            &[Complex64::new(3.0, 2.0), Complex64::new(3.0, 0.0)],
        )?;
        let r = mix(
            &with(0.5),
            &one("new2.npy", "out2.npy"),
            Some(&p("s1.json")),
            &p("s2.json"),
        )?;
        let out = npy::read_any(p("out2.npy"))?;
        let z = out.as_complex().ok_or("complex")?;
        // prev + α (new − prev)
        assert_eq!(z, &[Complex64::new(2.0, 2.0), Complex64::new(3.0, 2.0)]);
        assert!(r.metrics.iter().any(|m| m.name == "residual_norm"));
        // a different shape against the history is refused, nothing written
        npy::write_complex(p("bad.npy"), &[1], &[Complex64::new(1.0, 0.0)])?;
        let e = mix(
            &with(0.5),
            &one("bad.npy", "out3.npy"),
            Some(&p("s2.json")),
            &p("s3.json"),
        );
        assert!(e.is_err_and(|m| m.contains("differs") || m.contains("changed its output")));
        assert!(!p("out3.npy").exists() && !p("s3.json").exists());
        // alpha outside (0, 1]
        let e = mix(
            &with(1.5),
            &one("new2.npy", "out4.npy"),
            None,
            &p("s4.json"),
        );
        assert!(e.is_err_and(|m| m.contains("alpha")));
        // empty state file
        std::fs::write(p("empty.json"), "")?;
        let e = mix(
            &with(0.5),
            &one("new2.npy", "o.npy"),
            Some(&p("empty.json")),
            &p("s.json"),
        );
        assert!(e.is_err_and(|m| m.contains("empty")));
        // a state of the older one-array layout is still read
        let old = serde_json::json!({
            "shape": [2],
            "complex": true,
            "mixer": serde_json::to_value(mixing::MixerState::start(
                Method::Linear,
                &[1.0, 2.0, 3.0, 4.0]
            )?)?,
        });
        std::fs::write(p("old.json"), old.to_string())?;
        mix(
            &with(0.5),
            &one("new2.npy", "o5.npy"),
            Some(&p("old.json")),
            &p("s5.json"),
        )?;
        assert_eq!(std::fs::read(p("o5.npy"))?, std::fs::read(p("out2.npy"))?);
        Ok(())
    }

    /// Writes a density-like JSON file.
    fn density(path: &Path, n_f: f64, mu: f64) -> std::io::Result<()> {
        std::fs::write(
            path,
            format!("{{\"n_f\": {n_f}, \"mu\": {mu}, \"label\": \"it\"}}"),
        )
    }

    /// A complex array and a JSON object mixed as one vector: each block follows
    /// x + α (g − x), non-numeric fields are copied, the layout is recorded, and a changed
    /// layout, a NaN in one role or an empty state fails with nothing written.
    #[test]
    fn several_arrays_mix_as_one_vector() -> Result<(), Box<dyn std::error::Error>> {
        let d = tempfile::tempdir()?;
        let dp = d.path();
        let p = |n: &str| dp.join(n);
        let c = |re: f64, im: f64| Complex64::new(re, im);
        let two = |it: u32| {
            vec![
                role(
                    dp,
                    "sigma",
                    &format!("sig{it}.npy"),
                    &format!("osig{it}.npy"),
                ),
                role(
                    dp,
                    "density",
                    &format!("den{it}.json"),
                    &format!("oden{it}.json"),
                ),
            ]
        };
        npy::write_complex(p("sig1.npy"), &[2], &[c(1.0, 2.0), c(3.0, 4.0)])?;
        density(&p("den1.json"), 1.0, 0.5)?;
        mix(&with(0.5), &two(1), None, &p("s1.json"))?;
        assert_eq!(
            std::fs::read(p("osig1.npy"))?,
            std::fs::read(p("sig1.npy"))?
        );
        let v: serde_json::Value = serde_json::from_slice(&std::fs::read(p("oden1.json"))?)?;
        assert_eq!(v["n_f"], 1.0);
        assert_eq!(v["label"], "it");
        let st: serde_json::Value = serde_json::from_slice(&std::fs::read(p("s1.json"))?)?;
        assert_eq!(st["layout"][0]["role"], "sigma");
        assert_eq!(st["layout"][0]["kind"], "npy-complex");
        assert_eq!(st["layout"][1]["kind"], "json");
        assert_eq!(st["layout"][1]["keys"], serde_json::json!(["mu", "n_f"]));

        npy::write_complex(p("sig2.npy"), &[2], &[c(3.0, 2.0), c(3.0, 0.0)])?;
        std::fs::write(
            p("den2.json"),
            r#"{"n_f": 2.0, "mu": 1.5, "label": "second"}"#,
        )?;
        let r = mix(&with(0.5), &two(2), Some(&p("s1.json")), &p("s2.json"))?;
        let z = npy::read_any(p("osig2.npy"))?;
        assert_eq!(
            z.as_complex().ok_or("complex")?,
            &[c(2.0, 2.0), c(3.0, 2.0)]
        );
        let v: serde_json::Value = serde_json::from_slice(&std::fs::read(p("oden2.json"))?)?;
        assert_eq!(v["n_f"], 1.5);
        assert_eq!(v["mu"], 1.0);
        assert_eq!(v["label"], "second");
        let get = |n: &str| r.metrics.iter().find(|m| m.name == n).map(|m| m.value);
        // residuals: Σ block (2, 0, 0, −4) → 2√5; density block (mu 1, n_f 1) → √2
        assert_eq!(get("residual_norm_sigma"), Some(20f64.sqrt()));
        assert_eq!(get("residual_norm_density"), Some(2f64.sqrt()));
        assert_eq!(get("residual_norm"), Some(22f64.sqrt()));

        // each failure below writes nothing
        let refused = |files: &[(String, PathBuf, PathBuf)], state: &Path, what: &str| {
            let e = mix(&with(0.5), files, Some(state), &p("s3.json"));
            let nothing = files.iter().all(|(_, _, o)| !o.exists()) && !p("s3.json").exists();
            match e {
                Err(m) if m.contains(what) && nothing => Ok(()),
                other => Err(format!("expected an error with `{what}`, got {other:?}")),
            }
        };
        // shape change in one role
        npy::write_complex(p("sig3.npy"), &[3], &[c(1.0, 0.0); 3])?;
        density(&p("den3.json"), 1.2, 0.9)?;
        refused(&two(3), &p("s2.json"), "complex array of shape [2]")?;
        // key-set change
        npy::write_complex(p("sig3.npy"), &[2], &[c(1.0, 0.0); 2])?;
        std::fs::write(p("den3.json"), r#"{"n_f": 1.0, "mu": 0.2, "n_c": 0.8}"#)?;
        refused(&two(3), &p("s2.json"), "numeric fields")?;
        // NaN in one role
        density(&p("den3.json"), 1.2, 0.9)?;
        npy::write_complex(p("sig3.npy"), &[2], &[c(f64::NAN, 0.0), c(1.0, 0.0)])?;
        refused(&two(3), &p("s2.json"), "NaN")?;
        // empty state file
        npy::write_complex(p("sig3.npy"), &[2], &[c(1.0, 0.0); 2])?;
        std::fs::write(p("empty.json"), "")?;
        refused(&two(3), &p("empty.json"), "empty")?;
        // roles swapped against the history
        let mut swapped = two(3);
        swapped.reverse();
        refused(&swapped, &p("s2.json"), "roles")?;
        // changed weights
        let mut w = with(0.5);
        w.weights = Some(BTreeMap::from([("density".to_string(), 4.0)]));
        let e = mix(&w, &two(3), Some(&p("s2.json")), &p("s3.json"));
        assert!(e.is_err_and(|m| m.contains("weight")));
        assert!(!p("s3.json").exists());
        Ok(())
    }

    /// Weights change the metric the mixer measures residuals in, not linear mixing: a
    /// linear step x + α (g − x) is the same in any diagonal scaling (exact here, the values
    /// are binary fractions), and the state records the weight of each block.
    #[test]
    fn weights_scale_the_residual_metric() -> Result<(), Box<dyn std::error::Error>> {
        let d = tempfile::tempdir()?;
        let dp = d.path();
        let p = |n: &str| dp.join(n);
        let files = |tag: &str, it: u32| {
            vec![
                role(dp, "a", &format!("a{it}.npy"), &format!("{tag}oa{it}.npy")),
                role(
                    dp,
                    "b",
                    &format!("b{it}.json"),
                    &format!("{tag}ob{it}.json"),
                ),
            ]
        };
        npy::write_real(p("a1.npy"), &[2], &[1.0, 2.0])?;
        std::fs::write(p("b1.json"), r#"{"x": 0.25}"#)?;
        npy::write_real(p("a2.npy"), &[2], &[2.0, 2.5])?;
        std::fs::write(p("b2.json"), r#"{"x": 0.75}"#)?;
        let mut wl = with(0.5);
        wl.weights = Some(BTreeMap::from([("b".to_string(), 8.0)]));
        for (tag, w) in [("u", with(0.5)), ("w", wl)] {
            mix(&w, &files(tag, 1), None, &p(&format!("{tag}s1.json")))?;
            mix(
                &w,
                &files(tag, 2),
                Some(&p(&format!("{tag}s1.json"))),
                &p(&format!("{tag}s2.json")),
            )?;
        }
        let b: serde_json::Value = serde_json::from_slice(&std::fs::read(p("wob2.json"))?)?;
        assert_eq!(b["x"], 0.5);
        assert_eq!(std::fs::read(p("uoa2.npy"))?, std::fs::read(p("woa2.npy"))?);
        // the weighted state holds the weighted vector: b's block is 8 × 0.5
        let st: serde_json::Value = serde_json::from_slice(&std::fs::read(p("ws2.json"))?)?;
        assert_eq!(st["layout"][1]["weight"], 8.0);
        Ok(())
    }

    /// The engine around a failing multi-array mix: a stage feeds the mixer a complex
    /// array and a JSON object; at iteration 3 one role goes bad (shape change, NaN,
    /// changed JSON field set; the producer allows non-finite output, so the NaN reaches
    /// the mixer). The point fails at that mix attempt with the reason
    /// recorded, and that attempt stores no output artifact.
    #[tokio::test(flavor = "multi_thread", worker_threads = 2)]
    async fn a_bad_role_fails_the_point_and_stores_nothing(
    ) -> Result<(), Box<dyn std::error::Error>> {
        use crate::engine::{self, ExecutorChoice, RunOptions};
        use sqlx::Row;
        let script = "#!/bin/sh\n\
            # $1 b input, $2 bad b, $3 b output, $4 a output, $5 same|keys\n\
            if [ \"$RONDO_ITERATION\" -ge 3 ]; then cp \"$2\" \"$3\"; else cp \"$1\" \"$3\"; fi\n\
            if [ \"$RONDO_ITERATION\" -ge 3 ] && [ \"$5\" = keys ]; then\n\
              printf '{\"x\": 0.5, \"y\": 1.0, \"label\": \"k\"}\\n' > \"$4\"\n\
            else\n\
              printf '{\"x\": 0.%s, \"label\": \"k\"}\\n' \"$RONDO_ITERATION\" > \"$4\"\n\
            fi\n";
        let c = |re: f64| Complex64::new(re, 0.5);
        for (case, bad, flag, needle) in [
            (
                "shape",
                vec![c(1.0); 3],
                "same",
                "complex array of shape [2]",
            ),
            ("nan", vec![c(f64::NAN), c(1.0)], "same", "NaN"),
            ("keys", vec![c(1.0); 2], "keys", "numeric fields"),
        ] {
            let d = tempfile::tempdir()?;
            let p = |n: &str| d.path().join(n);
            std::fs::write(p("step.sh"), script)?;
            npy::write_complex(p("b0.npy"), &[2], &[c(2.0), c(3.0)])?;
            npy::write_complex(p("bad.npy"), &[bad.len()], &bad)?;
            let yaml = format!(
                "campaign: mixfail-{case}\n\
                 start: {{ b: b0.npy, bad: bad.npy }}\n\
                 cycle:\n\
                 \x20 step:\n\
                 \x20   run: [/bin/sh, \"{script}\", \"{{{{input:b}}}}\", \"{{{{input:bad}}}}\", \"{{{{output:b}}}}\", \"{{{{output:a}}}}\", {flag}]\n\
                 \x20   inputs: {{ b: {{ previous: mix.b, initially: start.b }}, bad: start.bad }}\n\
                 \x20   outputs: {{ b: b.npy, a: a.json }}\n\
                 \x20   allow-nonfinite: true\n\
                 \x20 mix:\n\
                 \x20   builtin: mix\n\
                 \x20   inputs: {{ b: step.b, a: step.a }}\n\
                 \x20   outputs: {{ b: b.npy, a: a.json }}\n\
                 \x20   settings: {{ method: anderson, alpha: 0.5 }}\n\
                 stop: {{ max-iterations: 5 }}\n",
                script = p("step.sh").display()
            );
            std::fs::write(p("c.yaml"), yaml)?;
            let campaign = crate::spec::load(&p("c.yaml")).map_err(|e| e.to_string())?;
            let opts = RunOptions {
                workspace: engine::default_workspace(&p("c.yaml")),
                executor: ExecutorChoice::Local,
                jobs: 1,
                retry_failed: false,
                keep_scratch: false,
                grace: std::time::Duration::from_secs(1),
                allocation: None,
                accept_revision: false,
            };
            let summary = engine::run(
                &campaign,
                &opts,
                crate::progress::Progress::for_stderr(true),
            )
            .await?;
            assert_eq!(
                summary.states.get(&crate::store::PointState::Failed),
                Some(&1),
                "{case}: {summary:?}"
            );
            let db = opts.workspace.join("rondo.db");
            let pool =
                sqlx::SqlitePool::connect(&format!("sqlite://{}?mode=ro", db.display())).await?;
            let rows = sqlx::query(
                "SELECT a.id, a.failure_message, \
                 (SELECT count(*) FROM attempt_outputs o WHERE o.attempt_id = a.id) \
                 FROM attempts a WHERE a.stage = 'mix' AND a.iteration = 3",
            )
            .fetch_all(&pool)
            .await?;
            if rows.is_empty() {
                let all =
                    sqlx::query("SELECT stage, iteration, state, failure_message FROM attempts")
                        .fetch_all(&pool)
                        .await?;
                let all: Vec<(String, i64, String, Option<String>)> = all
                    .iter()
                    .map(|r| (r.get(0), r.get(1), r.get(2), r.get(3)))
                    .collect();
                panic!("{case}: no mix attempt at iteration 3: {all:?}");
            }
            for r in &rows {
                let msg: Option<String> = r.get(1);
                let outputs: i64 = r.get(2);
                assert!(
                    msg.as_deref().is_some_and(|m| m.contains(needle)),
                    "{case}: {msg:?}"
                );
                assert_eq!(outputs, 0, "{case}: a failed mix stored outputs");
            }
            // iterations 1 and 2 mixed both roles and stored them with the state
            let ok: i64 = sqlx::query_scalar(
                "SELECT count(*) FROM attempt_outputs o JOIN attempts a ON a.id = o.attempt_id \
                 WHERE a.stage = 'mix' AND a.state = 'succeeded' AND o.role IN ('a', 'b', 'state')",
            )
            .fetch_one(&pool)
            .await?;
            assert_eq!(ok, 6, "{case}");
            pool.close().await;
        }
        Ok(())
    }
}
