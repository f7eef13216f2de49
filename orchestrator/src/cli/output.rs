//! How the commands write what they were asked for: text and `--json` documents on stdout
//! (a closed pipe ends the output quietly), and the number format people read.
//!
//! Owns stdout and number formatting only; messages about what was done go to stderr from
//! the commands themselves. No SQL, no engine.

use anyhow::Result;
use serde::Serialize;

/// Write to stdout; a closed pipe (`rondo trace ... | head`) ends the output quietly.
pub fn emit(text: &str) {
    use std::io::Write;
    let mut out = std::io::stdout().lock();
    if out
        .write_all(text.as_bytes())
        .and_then(|()| out.flush())
        .is_err()
    {
        // The reader went away; nothing more to say.
    }
}

/// Write a `--json` document to stdout: pretty-printed, with a final newline.
pub fn emit_json<T: Serialize + ?Sized>(doc: &T) -> Result<()> {
    emit(&format!("{}\n", serde_json::to_string_pretty(doc)?));
    Ok(())
}

/// A value for people (`0.92603 ± 0.00025`): the read side's formatter.
pub use crate::query::format_measurement;

#[cfg(test)]
mod tests {
    use super::format_measurement;

    #[test]
    fn measurements_are_shown_to_the_precision_of_their_errors() {
        assert_eq!(
            format_measurement(0.926026511, Some(2.544e-4)),
            "0.92603 ± 0.00025"
        );
        assert_eq!(
            format_measurement(-1.7122489, Some(0.0138)),
            "-1.712 ± 0.014"
        );
        assert_eq!(format_measurement(27.89, Some(0.3)), "27.89 ± 0.30");
        assert_eq!(format_measurement(1234.5, Some(25.0)), "1234 ± 25");
        assert_eq!(format_measurement(0.4, Some(0.0)), "0.400000");
        assert_eq!(format_measurement(-1.719533505, None), "-1.719534");
        assert_eq!(format_measurement(3.2e-7, None), "3.200e-7");
        assert_eq!(format_measurement(0.0, None), "0");
        assert_eq!(format_measurement(f64::NAN, None), "NaN");
    }

    /// Numbers that serde_json's default (fast, inexact) float parser reads one unit in the
    /// last place off: found by a search over the doubles next to a Birch–Murnaghan curve
    /// with serde_json 1.0.154 without `float_roundtrip` (the same values drive the end-to-end
    /// test `published_numbers_come_out_bit_for_bit_...`). Each is the shortest text of its
    /// double, so Rust's own correctly rounded parser gives the reference.
    #[test]
    fn json_numbers_are_read_exactly() {
        for text in [
            "-11.959089291369073",
            "-11.990455887023707",
            "-12.000000000000005",
            "-11.991627802281503",
            "-11.968529824472133",
        ] {
            let exact: f64 = text.parse().unwrap_or(f64::NAN);
            let read: f64 = serde_json::from_str(text).unwrap_or(f64::NAN);
            assert_eq!(read.to_bits(), exact.to_bits(), "{text} read as {read:?}");
            let value: serde_json::Value = serde_json::from_str(text).unwrap_or_default();
            assert_eq!(value.as_f64().map(f64::to_bits), Some(exact.to_bits()));
            assert_eq!(serde_json::to_string(&exact).unwrap_or_default(), text);
        }
    }
}
