//! The linear blend `a + t·(b − a)` of two files in the formats the mixer reads (a `.npy`
//! array, real or complex; a JSON object's numeric top-level fields; named float64 datasets
//! of an HDF5 file), written in the form of the first: the start of a point warm-started
//! between two converged neighbours (`warm-start: { estimate: linear }`).
//!
//! Owns the checks that make a blend meaningful (same layout, same non-numeric content,
//! integers equal, `t` inside [0, 1]) and the writing; file reading is `layout`'s, encoding
//! `mix`'s. No store, no scheduler.

use std::path::Path;

use super::layout::{read_input, Block, BlockKind, Loaded};
use super::mix::{encode_block, write_all, Payload};

/// Write `a + t·(b − a)` of the files `a` and `b` (role `role`; `datasets`: the HDF5
/// datasets to blend, as the mix stage's `settings: datasets` names them) to `out`, in the
/// form of `a`. Where `a` and `b` hold the same value the blend is that value bit for bit.
///
/// An interpolation (`t` in [0, 1]) is a convex combination: it keeps what both files
/// share that is linear in them (an electron count, the sign of Im Σ(iωₙ)). Refused, with
/// the reason, when the two files are not the same kind of content: a different shape,
/// other JSON keys or other non-numeric values, an integer field that differs (a count or
/// an index is not interpolated), or HDF5 datasets of other shapes.
pub fn blend(
    role: &str,
    a: &Path,
    b: &Path,
    t: f64,
    datasets: Option<&[String]>,
    out: &Path,
) -> Result<(), String> {
    if !(0.0..=1.0).contains(&t) {
        return Err(format!("internal: blend weight {t} is outside [0, 1]"));
    }
    let la = read_input(role, a, datasets)?;
    let lb = read_input(role, b, datasets)?;
    if la.kind != lb.kind {
        return Err(format!(
            "`{role}` is a {} in {} but a {} in {}",
            la.kind.describe(),
            a.display(),
            lb.kind.describe(),
            b.display()
        ));
    }
    same_other_content(role, &la, &lb)?;
    let values: Vec<f64> = la
        .values
        .iter()
        .zip(&lb.values)
        .map(|(x, y)| if x == y { *x } else { x + t * (y - x) })
        .collect();
    let block = Block {
        role: role.to_string(),
        kind: la.kind.clone(),
        len: values.len(),
        weight: 1.0,
    };
    let payload = match &la.kind {
        BlockKind::Hdf5 { datasets } => Payload::Hdf5 {
            input: a.to_path_buf(),
            datasets: datasets.clone(),
            values,
        },
        BlockKind::Json { keys } => json_payload(role, la.json, keys, values)?,
        _ => encode_block(&block, la, role, values)?,
    };
    write_all(&[(out, payload)])
}

/// The first object with its floating-point fields replaced by the blended values (every
/// other field, integers included, as it was).
fn json_payload(
    role: &str,
    obj: Option<serde_json::Map<String, serde_json::Value>>,
    keys: &[String],
    values: Vec<f64>,
) -> Result<Payload, String> {
    let mut obj = obj.ok_or_else(|| format!("internal: `{role}` lost its JSON object"))?;
    for (k, x) in keys.iter().zip(values) {
        if obj.get(k).is_some_and(serde_json::Value::is_f64) {
            obj.insert(k.clone(), serde_json::Value::from(x));
        }
    }
    let mut text = serde_json::to_string_pretty(&serde_json::Value::Object(obj))
        .map_err(|e| format!("cannot encode the blended `{role}`: {e}"))?;
    text.push('\n');
    Ok(Payload::Bytes(text.into_bytes()))
}

/// Two JSON objects must agree on everything that is not blended: every non-numeric field,
/// and every integer field (a count, an index, a mesh size).
fn same_other_content(role: &str, a: &Loaded, b: &Loaded) -> Result<(), String> {
    let (Some(ja), Some(jb)) = (&a.json, &b.json) else {
        return Ok(());
    };
    if ja.len() != jb.len() || ja.keys().any(|k| !jb.contains_key(k)) {
        return Err(format!("the two `{role}` objects have different fields"));
    }
    for (k, va) in ja {
        let vb = &jb[k];
        let blended = va.is_f64() && vb.is_f64();
        if !blended && va != vb {
            return Err(format!(
                "field `{k}` of `{role}` is {va} in one and {vb} in the other: only \
                 floating-point fields are interpolated"
            ));
        }
    }
    Ok(())
}

#[cfg(test)]
mod tests {
    use super::*;
    use rondo_numerics::npy;

    /// Halfway between two complex arrays is their mean, element by element; the file keeps
    /// the first one's shape and type.
    #[test]
    fn a_complex_array_is_blended_element_by_element() -> Result<(), Box<dyn std::error::Error>> {
        let d = tempfile::tempdir()?;
        let p = |n: &str| d.path().join(n);
        let x = [
            num_complex::Complex64::new(1.0, -2.0),
            num_complex::Complex64::new(0.5, -0.25),
        ];
        let y = [
            num_complex::Complex64::new(3.0, -4.0),
            num_complex::Complex64::new(0.5, -0.75),
        ];
        npy::write_complex(p("a.npy"), &[2], &x)?;
        npy::write_complex(p("b.npy"), &[2], &y)?;
        blend("sigma", &p("a.npy"), &p("b.npy"), 0.25, None, &p("out.npy"))?;
        let got = npy::read_any(p("out.npy"))?;
        assert_eq!(got.shape, vec![2]);
        let z = got.as_complex().ok_or("not complex")?;
        // 1 + 0.25·2 = 1.5, −2 + 0.25·(−2) = −2.5; equal real parts stay exactly 0.5.
        assert_eq!(z[0], num_complex::Complex64::new(1.5, -2.5));
        assert_eq!(z[1], num_complex::Complex64::new(0.5, -0.375));
        Ok(())
    }

    /// The named HDF5 datasets are blended and everything else is the first file's; read-only
    /// inputs (as the store holds them) give a written, owner-writable output.
    #[test]
    fn hdf5_datasets_blend_from_read_only_inputs() -> Result<(), Box<dyn std::error::Error>> {
        use hdf5_metno as h5;
        use std::os::unix::fs::PermissionsExt;
        let d = tempfile::tempdir()?;
        let p = |n: &str| d.path().join(n);
        for (name, x, label) in [("a.h5", [1.0, 2.0], b"a"), ("b.h5", [3.0, 2.0], b"b")] {
            let f = h5::File::create(p(name))?;
            f.new_dataset::<f64>()
                .shape([2])
                .create("sigma")?
                .write_raw(&x)?;
            f.new_dataset::<u8>()
                .shape([1])
                .create("label")?
                .write_raw(label)?;
            f.close()?;
            std::fs::set_permissions(p(name), std::fs::Permissions::from_mode(0o444))?;
        }
        let names = ["/sigma".to_string()];
        blend(
            "sigma",
            &p("a.h5"),
            &p("b.h5"),
            0.5,
            Some(&names),
            &p("o.h5"),
        )?;
        let f = h5::File::open(p("o.h5"))?;
        assert_eq!(f.dataset("sigma")?.read_raw::<f64>()?, [2.0, 2.0]);
        assert_eq!(f.dataset("label")?.read_raw::<u8>()?, b"a");
        let mode = std::fs::metadata(p("o.h5"))?.permissions().mode();
        assert_eq!(mode & 0o200, 0o200, "mode {mode:o}");
        Ok(())
    }

    /// A JSON object's floating-point fields are blended, its other fields kept; an integer
    /// that differs is refused (a count is not interpolated), as are arrays of other shapes.
    #[test]
    fn json_fields_blend_and_mismatches_are_refused() -> Result<(), Box<dyn std::error::Error>> {
        let d = tempfile::tempdir()?;
        let p = |n: &str| d.path().join(n);
        std::fs::write(
            p("a.json"),
            r#"{"n_f": 0.9, "mu": -0.5, "label": "x", "nk": 12}"#,
        )?;
        std::fs::write(
            p("b.json"),
            r#"{"n_f": 1.0, "mu": -0.25, "label": "x", "nk": 12}"#,
        )?;
        blend(
            "density",
            &p("a.json"),
            &p("b.json"),
            0.5,
            None,
            &p("o.json"),
        )?;
        let o: serde_json::Value = serde_json::from_slice(&std::fs::read(p("o.json"))?)?;
        assert_eq!(o["n_f"].as_f64(), Some(0.9 + 0.5 * (1.0 - 0.9)));
        assert_eq!(o["mu"].as_f64(), Some(-0.375));
        assert_eq!(o["label"], "x");
        assert_eq!(o["nk"], 12);
        std::fs::write(
            p("c.json"),
            r#"{"n_f": 1.0, "mu": -0.25, "label": "x", "nk": 16}"#,
        )?;
        let e = blend(
            "density",
            &p("a.json"),
            &p("c.json"),
            0.5,
            None,
            &p("o2.json"),
        )
        .err()
        .ok_or("an integer that differs was blended")?;
        assert!(
            e.contains("`nk`") && e.contains("12") && e.contains("16"),
            "{e}"
        );
        npy::write_real(p("r2.npy"), &[2], &[1.0, 2.0])?;
        npy::write_real(p("r3.npy"), &[3], &[1.0, 2.0, 3.0])?;
        let e = blend("x", &p("r2.npy"), &p("r3.npy"), 0.5, None, &p("o.npy"))
            .err()
            .ok_or("arrays of two shapes were blended")?;
        assert!(e.contains("[2]") && e.contains("[3]"), "{e}");
        assert!(
            !p("o2.json").exists() && !p("o.npy").exists(),
            "nothing written on refusal"
        );
        Ok(())
    }
}
