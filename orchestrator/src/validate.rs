//! Output validation: what an attempt must leave behind before it may count as succeeded.
//!
//! Every declared output must exist as a regular file; `.npy` files must parse as NumPy
//! arrays and `.json` files as JSON; numeric content must be finite unless the stage allows
//! otherwise. `metrics.json`, when present (or required), must be a flat object whose values
//! are numbers or `{"value": x, "error": e}`.

use std::collections::BTreeSet;
use std::path::Path;

use rondo_numerics::npy;

/// Name of the metrics file a stage may write in its scratch directory.
pub const METRICS_FILE: &str = "metrics.json";

/// Why the outputs of an attempt are not acceptable.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct Invalid {
    /// Failure kind recorded with the attempt: `missing-output`, `malformed-output`,
    /// `nonfinite-output`.
    pub kind: &'static str,
    /// What is wrong, naming the file.
    pub message: String,
}

impl Invalid {
    fn missing(message: String) -> Self {
        Invalid {
            kind: "missing-output",
            message,
        }
    }
    fn malformed(message: String) -> Self {
        Invalid {
            kind: "malformed-output",
            message,
        }
    }
    fn nonfinite(message: String) -> Self {
        Invalid {
            kind: "nonfinite-output",
            message,
        }
    }
}

/// One reported metric.
#[derive(Debug, Clone, PartialEq)]
pub struct Metric {
    /// Name as the stage wrote it (without the stage prefix).
    pub name: String,
    /// Value.
    pub value: f64,
    /// Standard error, for noisy estimates.
    pub error: Option<f64>,
}

/// Check one declared output file.
pub fn check_output(path: &Path, role: &str, allow_nonfinite: bool) -> Result<(), Invalid> {
    let shown = path.display();
    // `symlink_metadata`: a symbolic link is refused as it is, never followed (its target
    // may be outside the scratch folder, or a FIFO whose opening would block); nothing that
    // is not a regular file is ever opened.
    match std::fs::symlink_metadata(path) {
        Ok(m) if m.is_file() => {}
        Ok(m) => {
            let ft = m.file_type();
            use std::os::unix::fs::FileTypeExt;
            let what = if ft.is_symlink() {
                "a symbolic link"
            } else if ft.is_fifo() {
                "a FIFO (named pipe)"
            } else if ft.is_char_device() || ft.is_block_device() {
                "a device file"
            } else if ft.is_socket() {
                "a socket"
            } else if ft.is_dir() {
                "a folder"
            } else {
                "not a regular file"
            };
            return Err(Invalid::malformed(format!(
                "output `{role}` ({shown}) is {what}, not a regular file: rondo stores only \
                 regular files and does not open or follow anything else; make the stage write \
                 the file itself (copy it rather than link it)"
            )));
        }
        Err(_) => {
            return Err(Invalid::missing(format!(
                "declared output `{role}` was not written ({shown} is missing)"
            )))
        }
    }
    let ext = path.extension().and_then(|e| e.to_str()).unwrap_or("");
    match ext {
        "npy" => {
            let arr = npy::read_any(path).map_err(|e| {
                Invalid::malformed(format!("output `{role}` is not a valid .npy file: {e}"))
            })?;
            if !allow_nonfinite && arr.has_nonfinite() {
                return Err(Invalid::nonfinite(format!(
                    "output `{role}` ({shown}) contains NaN or infinite values"
                )));
            }
        }
        "json" => {
            let text = std::fs::read_to_string(path).map_err(|e| {
                Invalid::malformed(format!("output `{role}` ({shown}) is unreadable: {e}"))
            })?;
            if let Err(e) = serde_json::from_str::<serde_json::Value>(&text) {
                let hint = if text.contains("NaN") || text.contains("Infinity") {
                    " (NaN and Infinity are not JSON: the program produced non-finite numbers)"
                } else {
                    ""
                };
                let kind = if hint.is_empty() {
                    Invalid::malformed
                } else {
                    Invalid::nonfinite
                };
                return Err(kind(format!(
                    "output `{role}` ({shown}) is not valid JSON at line {}, column {}: {e}{hint}",
                    e.line(),
                    e.column()
                )));
            }
        }
        _ => {}
    }
    Ok(())
}

/// Read `metrics.json` from `dir` (absent is fine unless metrics are required) and check that
/// every name in `required` is present.
pub fn read_metrics(
    dir: &Path,
    required: &BTreeSet<String>,
    allow_nonfinite: bool,
) -> Result<Vec<Metric>, Invalid> {
    let path = dir.join(METRICS_FILE);
    let shown = path.display();
    // Never open what is not a regular file (a FIFO would block the reader).
    if std::fs::symlink_metadata(&path).is_ok_and(|m| !m.is_file()) {
        return check_output(&path, METRICS_FILE, allow_nonfinite).map(|()| Vec::new());
    }
    let text = match std::fs::read_to_string(&path) {
        Ok(t) => t,
        Err(_) if required.is_empty() => return Ok(Vec::new()),
        Err(_) => {
            return Err(Invalid::missing(format!(
                "{shown} is missing; the stage must report: {}",
                required.iter().cloned().collect::<Vec<_>>().join(", ")
            )))
        }
    };
    let value: serde_json::Value = serde_json::from_str(&text).map_err(|e| {
        let nonfinite = text.contains("NaN") || text.contains("Infinity");
        let msg = format!(
            "{shown} is not valid JSON at line {}, column {}: {e}{}",
            e.line(),
            e.column(),
            if nonfinite {
                " (NaN and Infinity are not JSON: a metric is not finite)"
            } else {
                ""
            }
        );
        if nonfinite {
            Invalid::nonfinite(msg)
        } else {
            Invalid::malformed(msg)
        }
    })?;
    let Some(obj) = value.as_object() else {
        return Err(Invalid::malformed(format!(
            "{shown} must hold a JSON object of name → number"
        )));
    };
    let mut out = Vec::with_capacity(obj.len());
    for (name, v) in obj {
        let (value, error) = match v {
            serde_json::Value::Number(n) => (n.as_f64(), None),
            serde_json::Value::Object(o) => {
                let value = o.get("value").and_then(|x| x.as_f64());
                let error = o.get("error").and_then(|x| x.as_f64());
                let extra = o.keys().any(|k| k != "value" && k != "error");
                if value.is_none() || extra || (o.contains_key("error") && error.is_none()) {
                    return Err(Invalid::malformed(format!(
                        "{shown}: metric `{name}` must be a number or {{\"value\": x, \"error\": e}}"
                    )));
                }
                (value, error)
            }
            // Numbers only; other types (strings, lists) are ignored with no effect on rules.
            _ => continue,
        };
        let Some(value) = value else { continue };
        if !allow_nonfinite && (!value.is_finite() || error.is_some_and(|e| !e.is_finite())) {
            return Err(Invalid::nonfinite(format!(
                "{shown}: metric `{name}` is not finite"
            )));
        }
        if error.is_some_and(|e| e < 0.0) {
            return Err(Invalid::malformed(format!(
                "{shown}: metric `{name}` has a negative error"
            )));
        }
        out.push(Metric {
            name: name.clone(),
            value,
            error,
        });
    }
    let missing: Vec<&str> = required
        .iter()
        .filter(|r| !out.iter().any(|m| &m.name == *r))
        .map(String::as_str)
        .collect();
    if !missing.is_empty() {
        return Err(Invalid::missing(format!(
            "{shown} lacks required metrics: {}",
            missing.join(", ")
        )));
    }
    Ok(out)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn metrics_forms_and_failures() -> Result<(), Box<dyn std::error::Error>> {
        let d = tempfile::tempdir()?;
        let req: BTreeSet<String> = ["n_f".to_string()].into();
        assert_eq!(
            read_metrics(d.path(), &req, false).map_err(|e| e.kind),
            Err("missing-output")
        );
        std::fs::write(
            d.path().join(METRICS_FILE),
            r#"{"n_f": 0.9, "docc": {"value": 0.1, "error": 0.01}, "note": "x"}"#,
        )?;
        let m = read_metrics(d.path(), &req, false).map_err(|e| e.message)?;
        assert_eq!(m.len(), 2);
        assert_eq!(m[0].error, Some(0.01));
        std::fs::write(d.path().join(METRICS_FILE), r#"{"n_f": NaN}"#)?;
        assert_eq!(
            read_metrics(d.path(), &req, false).map_err(|e| e.kind),
            Err("nonfinite-output")
        );
        Ok(())
    }

    #[test]
    fn npy_outputs_are_checked() -> Result<(), Box<dyn std::error::Error>> {
        let d = tempfile::tempdir()?;
        let p = d.path().join("a.npy");
        assert_eq!(
            check_output(&p, "a", false).map_err(|e| e.kind),
            Err("missing-output")
        );
        npy::write_real(&p, &[2], &[1.0, f64::NAN])?;
        assert_eq!(
            check_output(&p, "a", false).map_err(|e| e.kind),
            Err("nonfinite-output")
        );
        assert!(check_output(&p, "a", true).is_ok());
        std::fs::write(&p, b"not numpy")?;
        assert_eq!(
            check_output(&p, "a", true).map_err(|e| e.kind),
            Err("malformed-output")
        );
        Ok(())
    }
}
