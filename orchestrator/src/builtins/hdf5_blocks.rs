//! HDF5 inputs of the built-in `mix`: the float64 datasets a stage names (`settings:
//! datasets: { ROLE: [/group/dataset, ...] }`) read as one block of the mixer's vector, and
//! the mixed file written as a byte copy of the input with only those datasets' values
//! replaced in place, so every other group, dataset and attribute is unchanged.
//!
//! Owns HDF5 reading and writing for `mix`; the layout record is `layout`'s, the step
//! `mix`'s. No store, no scheduler.

use std::path::Path;

use h5::types::{FloatSize, TypeDescriptor};
use hdf5_metno as h5;
use serde::{Deserialize, Serialize};

/// One mixed dataset of an HDF5 block: its path and shape.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub(super) struct Hdf5Dataset {
    pub(super) path: String,
    pub(super) shape: Vec<usize>,
}

/// Read the named float64 datasets of `path`, in order: their layout and values, all
/// finite and at least one.
pub(super) fn read(
    role: &str,
    path: &Path,
    datasets: &[String],
) -> Result<(Vec<Hdf5Dataset>, Vec<f64>), String> {
    let shown = path.display();
    if datasets.is_empty() {
        return Err(format!("{shown}: `{role}` names no dataset to mix"));
    }
    let file = h5::File::open(path)
        .map_err(|e| format!("{shown}: `{role}` does not open as HDF5: {e}"))?;
    let mut layout = Vec::with_capacity(datasets.len());
    let mut values = Vec::new();
    for d in datasets {
        let ds = file
            .dataset(d)
            .map_err(|_| format!("{shown}: `{role}` has no dataset `{d}` to mix"))?;
        let t = ds
            .dtype()
            .and_then(|t| t.to_descriptor())
            .map_err(|e| format!("{shown}: `{d}` of `{role}`: unreadable type: {e}"))?;
        if t != TypeDescriptor::Float(FloatSize::U8) {
            return Err(format!(
                "{shown}: `{d}` of `{role}` holds {t}; the mixer takes float64 datasets (so the mixed file keeps every bit of its type)"
            ));
        }
        let v: Vec<f64> = ds
            .read_raw()
            .map_err(|e| format!("{shown}: cannot read `{d}` of `{role}`: {e}"))?;
        if v.is_empty() {
            return Err(format!("{shown}: `{d}` of `{role}` is empty"));
        }
        if v.iter().any(|x| !x.is_finite()) {
            return Err(format!(
                "{shown}: `{d}` of `{role}` contains NaN or infinite values"
            ));
        }
        layout.push(Hdf5Dataset {
            path: d.clone(),
            shape: ds.shape(),
        });
        values.extend(v);
    }
    Ok((layout, values))
}

/// Write `out`: a copy of `input` with the datasets of `layout` holding `values` (in
/// order), through a temporary file beside `out` renamed into place.
pub(super) fn write(
    input: &Path,
    out: &Path,
    layout: &[Hdf5Dataset],
    values: &[f64],
) -> Result<(), String> {
    let shown = out.display();
    let tmp = out.with_extension("h5.part");
    std::fs::copy(input, &tmp)
        .map_err(|e| format!("{shown}: cannot copy {}: {e}", input.display()))?;
    let written = (|| -> Result<(), String> {
        // The copy keeps the input's mode, and an input from the store is read-only: the
        // copy is ours to write.
        use std::os::unix::fs::PermissionsExt;
        let mode = std::fs::metadata(&tmp)
            .map_err(|e| format!("{shown}: {e}"))?
            .permissions()
            .mode();
        std::fs::set_permissions(&tmp, std::fs::Permissions::from_mode(mode | 0o200))
            .map_err(|e| format!("{shown}: cannot make the copy writable: {e}"))?;
        let file = h5::File::open_rw(&tmp).map_err(|e| format!("{shown}: cannot open: {e}"))?;
        let mut at = 0;
        for d in layout {
            let n: usize = d.shape.iter().product();
            let part = values
                .get(at..at + n)
                .ok_or_else(|| format!("internal: mixed `{}` does not fit its shape", d.path))?;
            at += n;
            file.dataset(&d.path)
                .and_then(|ds| ds.write_raw(part))
                .map_err(|e| format!("{shown}: cannot write `{}`: {e}", d.path))?;
        }
        file.close()
            .map_err(|e| format!("{shown}: cannot close: {e}"))
    })();
    if let Err(e) = written {
        let _ = std::fs::remove_file(&tmp);
        return Err(e);
    }
    std::fs::rename(&tmp, out).map_err(|e| format!("{shown}: cannot rename into place: {e}"))
}

#[cfg(test)]
mod tests {
    use std::collections::BTreeMap;
    use std::path::PathBuf;

    use rondo_numerics::npy;

    use super::*;
    use crate::spec::{MixMethod, MixSettings};

    fn settings(datasets: Option<BTreeMap<String, Vec<String>>>) -> MixSettings {
        MixSettings {
            method: MixMethod::Anderson,
            alpha: 0.3,
            history: Some(4),
            w0: None,
            restart_after_growth: None,
            weights: None,
            datasets,
        }
    }

    /// An archive with the mixed Σ (4 × 2), an unmixed Δ, a string dataset and attributes.
    fn archive(p: &Path, sigma: &[f64]) -> h5::Result<()> {
        let f = h5::File::create(p)?;
        let g = f.create_group("impurity")?;
        g.new_dataset::<f64>()
            .shape([4, 2])
            .create("sigma")?
            .write_raw(sigma)?;
        let delta = g.new_dataset::<f64>().shape([3]).create("delta")?;
        delta.write_raw(&[0.125, -0.25, 0.5])?;
        delta
            .new_attr::<f64>()
            .shape(())
            .create("beta")?
            .write_scalar(&40.0)?;
        g.new_attr::<i64>()
            .shape(())
            .create("iteration")?
            .write_scalar(&7)?;
        f.create_group("input")?
            .new_dataset::<u8>()
            .shape([5])
            .create("text")?
            .write_raw(b"U=4.0")?;
        Ok(())
    }

    /// An invented Σ of step `k`, different at every step.
    fn sigma(k: usize) -> Vec<f64> {
        (0..8)
            .map(|i| ((i + 1) as f64 * 0.37 + k as f64 * 1.1).sin() / (k + 1) as f64)
            .collect()
    }

    #[test]
    fn an_hdf5_dataset_mixes_as_the_same_array_as_npy_and_the_rest_is_copied(
    ) -> Result<(), Box<dyn std::error::Error>> {
        let d = tempfile::tempdir()?;
        let p = |n: &str| d.path().join(n);
        let ds = BTreeMap::from([("sigma".to_string(), vec!["/impurity/sigma".to_string()])]);
        let (mut h5_state, mut npy_state): (Option<PathBuf>, Option<PathBuf>) = (None, None);
        for k in 0..4 {
            archive(&p(&format!("in{k}.h5")), &sigma(k))?;
            npy::write_real(p(&format!("in{k}.npy")), &[4, 2], &sigma(k))?;
            let h5_roles = [(
                "sigma".to_string(),
                p(&format!("in{k}.h5")),
                p(&format!("out{k}.h5")),
            )];
            let npy_roles = [(
                "sigma".to_string(),
                p(&format!("in{k}.npy")),
                p(&format!("out{k}.npy")),
            )];
            let (hs, ns) = (
                p(&format!("h5state{k}.json")),
                p(&format!("npystate{k}.json")),
            );
            super::super::mix::mix(
                &settings(Some(ds.clone())),
                &h5_roles,
                h5_state.as_deref(),
                &hs,
            )?;
            super::super::mix::mix(&settings(None), &npy_roles, npy_state.as_deref(), &ns)?;
            // the same numbers, bit for bit, at every step
            let f = h5::File::open(p(&format!("out{k}.h5")))?;
            let mixed: Vec<f64> = f.dataset("/impurity/sigma")?.read_raw()?;
            let arr = npy::read_any(p(&format!("out{k}.npy")))?;
            let want = arr.to_flat_f64();
            assert_eq!(
                mixed.iter().map(|x| x.to_bits()).collect::<Vec<_>>(),
                want.iter().map(|x| x.to_bits()).collect::<Vec<_>>(),
                "step {k}"
            );
            if k > 0 {
                assert_ne!(mixed, sigma(k), "step {k} mixed nothing");
            }
            // everything else unchanged
            let delta: Vec<f64> = f.dataset("/impurity/delta")?.read_raw()?;
            assert_eq!(delta, [0.125, -0.25, 0.5]);
            let beta: f64 = f.dataset("/impurity/delta")?.attr("beta")?.read_scalar()?;
            assert_eq!(beta, 40.0);
            let it: i64 = f.group("/impurity")?.attr("iteration")?.read_scalar()?;
            assert_eq!(it, 7);
            let text: Vec<u8> = f.dataset("/input/text")?.read_raw()?;
            assert_eq!(text, b"U=4.0");
            // the two histories are the same mixer state
            let mixer = |s: &Path| -> Result<serde_json::Value, Box<dyn std::error::Error>> {
                let v: serde_json::Value = serde_json::from_str(&std::fs::read_to_string(s)?)?;
                Ok(v["mixer"].clone())
            };
            assert_eq!(mixer(&hs)?, mixer(&ns)?, "step {k}");
            h5_state = Some(hs);
            npy_state = Some(ns);
        }
        // a restart from the stored state repeats the last step bit for bit
        let again = [("sigma".to_string(), p("in3.h5"), p("again3.h5"))];
        super::super::mix::mix(
            &settings(Some(ds.clone())),
            &again,
            Some(&p("h5state2.json")),
            &p("again.json"),
        )?;
        assert_eq!(std::fs::read(p("again3.h5"))?, std::fs::read(p("out3.h5"))?);
        assert_eq!(
            std::fs::read(p("again.json"))?,
            std::fs::read(p("h5state3.json"))?
        );
        // a missing dataset and a file that is not HDF5 are refused, nothing written
        let bad = settings(Some(BTreeMap::from([(
            "sigma".to_string(),
            vec!["/impurity/gone".to_string()],
        )])));
        let roles = [("sigma".to_string(), p("in3.h5"), p("bad.h5"))];
        let e = super::super::mix::mix(&bad, &roles, None, &p("bad.json"));
        assert!(e.is_err_and(|m| m.contains("no dataset `/impurity/gone`")));
        std::fs::write(p("text.h5"), "sigma\n")?;
        let roles = [("sigma".to_string(), p("text.h5"), p("bad.h5"))];
        let e = super::super::mix::mix(&settings(Some(ds)), &roles, None, &p("bad.json"));
        assert!(e.is_err_and(|m| m.contains("does not open as HDF5")));
        assert!(!p("bad.h5").exists() && !p("bad.json").exists());
        Ok(())
    }
}
