//! How a measured value reads for people (`0.92603 ± 0.00025`), as the read side and the
//! command line print it.

/// A value for people: with an error bar, the value to the error's second significant digit
/// and the error to two digits (`0.92603 ± 0.00025`); without, six decimals, in scientific
/// notation when it is very small or very large.
pub fn format_measurement(value: f64, error: Option<f64>) -> String {
    fn plain(v: f64) -> String {
        if v == 0.0 {
            "0".into()
        } else if (1e-3..1e6).contains(&v.abs()) {
            format!("{v:.6}")
        } else if v.is_finite() {
            format!("{v:.3e}")
        } else {
            format!("{v}")
        }
    }
    match error {
        Some(e) if e.is_finite() && e > 0.0 && value.is_finite() => {
            let decimals = (1 - e.log10().floor() as i32).max(0) as usize;
            if decimals > 10 || value.abs() >= 1e6 {
                format!("{value:.5e} ± {e:.1e}")
            } else {
                format!("{value:.decimals$} ± {e:.decimals$}")
            }
        }
        _ => plain(value),
    }
}

#[cfg(test)]
mod tests {
    use super::format_measurement;

    #[test]
    fn values_read_to_their_error_bar() {
        assert_eq!(format_measurement(27.89, Some(0.3)), "27.89 ± 0.30");
        assert_eq!(format_measurement(1234.5, Some(25.0)), "1234 ± 25");
        assert_eq!(format_measurement(0.4, Some(0.0)), "0.400000");
        assert_eq!(format_measurement(3.2e-7, None), "3.200e-7");
        assert_eq!(format_measurement(0.0, None), "0");
    }
}
