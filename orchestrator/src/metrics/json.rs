//! A metric from a JSON file by JSON pointer (RFC 6901, `serde_json::Value::pointer`).

use std::path::Path;

use super::{malformed, missing, read_bytes};
use crate::validate::Invalid;

/// The number at `pointer` in the JSON document at `path`.
pub(super) fn read(path: &Path, metric: &str, pointer: &str) -> Result<f64, Invalid> {
    let shown = path.display();
    let bytes = read_bytes(path, metric)?;
    let doc: serde_json::Value = serde_json::from_slice(&bytes).map_err(|e| {
        malformed(format!(
            "{shown}: not valid JSON at line {}, column {} (read for metric `{metric}`): {e}",
            e.line(),
            e.column()
        ))
    })?;
    let Some(v) = doc.pointer(pointer) else {
        return Err(missing(format!(
            "{shown}: no value at the JSON pointer `{pointer}` (metric `{metric}`)"
        )));
    };
    v.as_f64().ok_or_else(|| {
        malformed(format!(
            "{shown}: the value at `{pointer}` (metric `{metric}`) is {v}, not a number"
        ))
    })
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn pointers_find_nested_numbers() -> Result<(), Box<dyn std::error::Error>> {
        let d = tempfile::tempdir()?;
        let p = d.path().join("out.json");
        std::fs::write(
            &p,
            r#"{"scf": {"energy": -3.25, "bands": [0.5, 0.125]}, "a/b": 7, "s": "x"}"#,
        )?;
        assert_eq!(read(&p, "e", "/scf/energy"), Ok(-3.25));
        assert_eq!(read(&p, "b", "/scf/bands/1"), Ok(0.125));
        assert_eq!(read(&p, "ab", "/a~1b"), Ok(7.0));
        let e = read(&p, "m", "/scf/missing").err().ok_or("no error")?;
        assert_eq!(e.kind, "missing-output");
        assert!(
            e.message.contains("out.json") && e.message.contains("/scf/missing"),
            "{}",
            e.message
        );
        assert_eq!(
            read(&p, "s", "/s").map_err(|e| e.kind),
            Err("malformed-output")
        );
        std::fs::write(&p, "{")?;
        assert_eq!(
            read(&p, "e", "/scf/energy").map_err(|e| e.kind),
            Err("malformed-output")
        );
        Ok(())
    }
}
