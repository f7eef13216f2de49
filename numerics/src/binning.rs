//! Standard error of the mean of correlated data by binning (blocking).
//!
//! Owns the Flyvbjerg–Petersen blocking analysis (H. Flyvbjerg and H. G. Petersen,
//! J. Chem. Phys. 91, 461 (1989)), the plateau rule that picks one level of it, the
//! integrated autocorrelation time implied by that level, the average of a final window of
//! noisy per-iteration metric values, and a portable AR(1) series used to validate all of it.
//!
//! # Blocking
//!
//! At each level l the current series y_1..y_n (n = n_l, the level-0 series is the data) gives
//! c0 = (1/n) Σ (y_i − ȳ)², the estimate SE_l = √(c0/(n−1)) of the standard error of the
//! mean, and its own error SE_l/√(2(n−1)). The next level averages neighbouring pairs,
//! y'_i = (y_{2i−1} + y_{2i})/2, dropping an odd last element. Levels are produced while at
//! least two blocks remain. For correlated data SE_l rises with l and levels off at the true
//! standard error once the block size 2^l is large compared with the correlation time.
//!
//! # Plateau rule
//!
//! The chosen level is the **first** level l whose next level has at least
//! [`MIN_BLOCKS`] blocks and agrees with it within the error of level l:
//! |SE_{l+1} − SE_l| < err_l. If no level qualifies (the estimate keeps rising, or the series
//! is short), the fallback is the **largest** SE_l among the levels with at least
//! [`MIN_BLOCKS`] blocks (level 0 if none has), and [`BinningAnalysis::plateau_found`] is
//! false. The first-agreement rule can stop a level or two early and is biased low by a few
//! per cent when the block size is only ~10 correlation times; the largest-estimate fallback
//! is conservative. A constant series has SE = 0 at every level; it reports level 0, error 0.
//!
//! The integrated autocorrelation time is τ_int = ½ (SE_chosen / SE_0)² (τ_int = ½ for
//! uncorrelated data, and for a constant series by convention).

use crate::rng::SplitMix64;

/// Fewest blocks a level needs to take part in the plateau rule or its fallback.
pub const MIN_BLOCKS: usize = 32;

/// Fewest values for which [`window_average`] uses the binning analysis.
pub const WINDOW_MIN_FOR_BINNING: usize = 64;

/// Errors of the binning analysis. Nothing is computed when one is returned.
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
pub enum BinningError {
    /// The series has no values.
    #[error("the series is empty: binning needs at least {needed} values")]
    Empty {
        /// Fewest values accepted.
        needed: usize,
    },
    /// The series is too short.
    #[error("the series has {n} value(s): binning needs at least {needed}")]
    TooFew {
        /// Values given.
        n: usize,
        /// Fewest values accepted.
        needed: usize,
    },
    /// A value is NaN or infinite.
    #[error("value {index} of the series is not finite ({value}); remove or repair it")]
    NonFinite {
        /// Zero-based position in the series.
        index: usize,
        /// The offending value.
        value: f64,
    },
    /// A per-iteration error is negative, NaN or infinite.
    #[error("error bar {index} is {value}: error bars must be finite and non-negative")]
    InvalidErrorBar {
        /// Zero-based position.
        index: usize,
        /// The offending error bar.
        value: f64,
    },
    /// Values and error bars differ in length.
    #[error("{values} values but {errors} error bars: give one error bar per value")]
    LengthMismatch {
        /// Number of values.
        values: usize,
        /// Number of error bars.
        errors: usize,
    },
    /// An AR(1) coefficient outside the stationary range.
    #[error("AR(1) coefficient {0} is not in (−1, 1): the stationary start needs |φ| < 1")]
    NonStationary(f64),
}

/// One blocking level.
#[derive(Debug, Clone, Copy, PartialEq, serde::Serialize, serde::Deserialize)]
pub struct BinningLevel {
    /// Level l (block size 2^l).
    pub level: usize,
    /// Block size 2^l in original samples.
    pub block_size: usize,
    /// Number of blocks n_l at this level.
    pub n_blocks: usize,
    /// SE_l = √(c0/(n_l − 1)).
    pub std_error: f64,
    /// Error of SE_l: SE_l/√(2(n_l − 1)).
    pub std_error_err: f64,
}

/// Result of [`binning_analysis`].
#[derive(Debug, Clone, PartialEq, serde::Serialize, serde::Deserialize)]
pub struct BinningAnalysis {
    /// Number of values.
    pub n: usize,
    /// Arithmetic mean of all values (including an odd tail that blocking drops).
    pub mean: f64,
    /// Standard error of the mean at the chosen level.
    pub std_error: f64,
    /// Error of that standard error.
    pub std_error_err: f64,
    /// Chosen level (index into `levels`).
    pub level: usize,
    /// Whether the plateau rule found agreement; false means the fallback was used.
    pub plateau_found: bool,
    /// Integrated autocorrelation time ½ (SE_chosen/SE_0)², in samples.
    pub tau_int: f64,
    /// Every level with at least two blocks.
    pub levels: Vec<BinningLevel>,
}

fn check_finite(x: &[f64]) -> Result<(), BinningError> {
    match x.iter().enumerate().find(|(_, v)| !v.is_finite()) {
        Some((index, &value)) => Err(BinningError::NonFinite { index, value }),
        None => Ok(()),
    }
}

fn mean_of(x: &[f64]) -> f64 {
    x.iter().sum::<f64>() / x.len() as f64
}

/// The blocking table: SE_l and its error for every level with at least two blocks.
///
/// Errors: fewer than two values, or a non-finite value.
pub fn blocking_levels(x: &[f64]) -> Result<Vec<BinningLevel>, BinningError> {
    if x.is_empty() {
        return Err(BinningError::Empty { needed: 2 });
    }
    if x.len() < 2 {
        return Err(BinningError::TooFew {
            n: x.len(),
            needed: 2,
        });
    }
    check_finite(x)?;
    let mut y = x.to_vec();
    let mut out = Vec::new();
    let mut level = 0;
    while y.len() >= 2 {
        let n = y.len();
        let m = mean_of(&y);
        let c0 = y.iter().map(|v| (v - m) * (v - m)).sum::<f64>() / n as f64;
        let se = (c0 / (n - 1) as f64).sqrt();
        out.push(BinningLevel {
            level,
            block_size: 1 << level,
            n_blocks: n,
            std_error: se,
            std_error_err: se / (2.0 * (n - 1) as f64).sqrt(),
        });
        y = y.chunks_exact(2).map(|p| 0.5 * (p[0] + p[1])).collect();
        level += 1;
    }
    Ok(out)
}

/// Index of the level chosen by the plateau rule (see the module docs) and whether the rule
/// (rather than the fallback) chose it. `levels` must be non-empty.
pub fn plateau_level(levels: &[BinningLevel]) -> (usize, bool) {
    if levels.first().is_some_and(|l| l.std_error == 0.0) {
        return (0, true);
    }
    for (l, pair) in levels.windows(2).enumerate() {
        if pair[1].n_blocks >= MIN_BLOCKS
            && (pair[1].std_error - pair[0].std_error).abs() < pair[0].std_error_err
        {
            return (l, true);
        }
    }
    let best = levels
        .iter()
        .enumerate()
        .filter(|(_, l)| l.n_blocks >= MIN_BLOCKS)
        .max_by(|a, b| a.1.std_error.total_cmp(&b.1.std_error))
        .map_or(0, |(i, _)| i);
    (best, false)
}

/// Full binning analysis of a series: mean, per-level table, chosen level, its standard
/// error and the integrated autocorrelation time.
///
/// Errors: fewer than two values, or a non-finite value.
pub fn binning_analysis(x: &[f64]) -> Result<BinningAnalysis, BinningError> {
    let levels = blocking_levels(x)?;
    let (level, plateau_found) = plateau_level(&levels);
    let chosen = levels[level];
    let se0 = levels[0].std_error;
    let tau_int = if se0 > 0.0 {
        0.5 * (chosen.std_error / se0).powi(2)
    } else {
        0.5
    };
    Ok(BinningAnalysis {
        n: x.len(),
        mean: mean_of(x),
        std_error: chosen.std_error,
        std_error_err: chosen.std_error_err,
        level,
        plateau_found,
        tau_int,
        levels,
    })
}

/// How [`window_average`] obtained its standard error.
#[derive(Debug, Clone, Copy, PartialEq, Eq, serde::Serialize, serde::Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum WindowMethod {
    /// At least [`WINDOW_MIN_FOR_BINNING`] values: binning of the values.
    Binning {
        /// Chosen blocking level.
        level: usize,
        /// Whether the plateau rule (not its fallback) chose the level.
        plateau_found: bool,
    },
    /// 2 ≤ n < [`WINDOW_MIN_FOR_BINNING`]: scatter of the values, no correlation correction.
    FewValues,
    /// One value: its own error bar.
    SingleValue,
}

/// Average of a final window of per-iteration values.
#[derive(Debug, Clone, Copy, PartialEq, serde::Serialize, serde::Deserialize)]
pub struct WindowAverage {
    /// Number of values in the window.
    pub n: usize,
    /// Arithmetic mean of the values.
    pub mean: f64,
    /// Reported standard error of the mean: max(`spread_error`, `propagated_error`).
    pub std_error: f64,
    /// Error from the spread of the values (binning, or s/√n for few values; 0 for one value).
    pub spread_error: f64,
    /// √(Σ σ_i²)/n from the per-iteration error bars (exact for independent values).
    pub propagated_error: f64,
    /// How `spread_error` was obtained.
    pub method: WindowMethod,
}

/// Mean and standard error of a window of noisy metric values `values[i] ± errors[i]`
/// (for example the last iterations of a self-consistency loop).
///
/// The mean is the plain arithmetic mean (not inverse-variance weighted: per-iteration error
/// bars of Monte Carlo data correlate with the values, and weighting would bias the mean).
/// The standard error is the larger of two estimates:
/// - the spread of the values: for n ≥ [`WINDOW_MIN_FOR_BINNING`], the binning analysis
///   (which accounts for iteration-to-iteration correlation); for 2 ≤ n below that (the
///   fallback), s/√n with the n−1 sample standard deviation s, which ignores correlation;
///   for n = 1, zero;
/// - the propagated error bars √(Σσ_i²)/n, which ignores correlation of the noise but stays
///   meaningful when the values happen to scatter little.
///
/// Errors: empty window, lengths differ, non-finite value, negative or non-finite error bar.
pub fn window_average(values: &[f64], errors: &[f64]) -> Result<WindowAverage, BinningError> {
    if values.is_empty() {
        return Err(BinningError::Empty { needed: 1 });
    }
    if values.len() != errors.len() {
        return Err(BinningError::LengthMismatch {
            values: values.len(),
            errors: errors.len(),
        });
    }
    check_finite(values)?;
    if let Some((index, &value)) = errors
        .iter()
        .enumerate()
        .find(|(_, e)| !(e.is_finite() && **e >= 0.0))
    {
        return Err(BinningError::InvalidErrorBar { index, value });
    }
    let n = values.len();
    let mean = mean_of(values);
    let propagated_error = errors.iter().map(|e| e * e).sum::<f64>().sqrt() / n as f64;
    let (spread_error, method) = if n >= WINDOW_MIN_FOR_BINNING {
        let b = binning_analysis(values)?;
        (
            b.std_error,
            WindowMethod::Binning {
                level: b.level,
                plateau_found: b.plateau_found,
            },
        )
    } else if n >= 2 {
        let s2 = values.iter().map(|v| (v - mean) * (v - mean)).sum::<f64>() / (n - 1) as f64;
        ((s2 / n as f64).sqrt(), WindowMethod::FewValues)
    } else {
        (0.0, WindowMethod::SingleValue)
    };
    Ok(WindowAverage {
        n,
        mean,
        std_error: spread_error.max(propagated_error),
        spread_error,
        propagated_error,
        method,
    })
}

/// A stationary AR(1) series x_t = φ x_{t−1} + e_t with e_t standard normal from `rng`
/// (Box–Muller normals of [`SplitMix64`]), started at x_0 = e_0/√(1−φ²).
///
/// Its integrated autocorrelation time is (1+φ)/(2(1−φ)) and its variance 1/(1−φ²).
/// Errors: |φ| ≥ 1 or φ not finite.
pub fn ar1_series(n: usize, phi: f64, rng: &mut SplitMix64) -> Result<Vec<f64>, BinningError> {
    if !(phi.is_finite() && phi.abs() < 1.0) {
        return Err(BinningError::NonStationary(phi));
    }
    let mut out = Vec::with_capacity(n);
    if n == 0 {
        return Ok(out);
    }
    let mut x = rng.normal() / (1.0 - phi * phi).sqrt();
    out.push(x);
    for _ in 1..n {
        x = phi * x + rng.normal();
        out.push(x);
    }
    Ok(out)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn rejects_bad_input_without_panicking() {
        assert_eq!(
            binning_analysis(&[]),
            Err(BinningError::Empty { needed: 2 })
        );
        assert_eq!(
            binning_analysis(&[1.0]),
            Err(BinningError::TooFew { n: 1, needed: 2 })
        );
        assert!(matches!(
            binning_analysis(&[1.0, f64::NAN, 2.0]),
            Err(BinningError::NonFinite { index: 1, .. })
        ));
        assert!(matches!(
            window_average(&[1.0, 2.0], &[0.1, -0.1]),
            Err(BinningError::InvalidErrorBar { index: 1, .. })
        ));
        assert_eq!(
            window_average(&[1.0, 2.0], &[0.1]),
            Err(BinningError::LengthMismatch {
                values: 2,
                errors: 1
            })
        );
        assert!(ar1_series(4, 1.0, &mut SplitMix64::new(1)).is_err());
    }

    #[test]
    fn constant_series_has_zero_error() {
        let b = binning_analysis(&[2.5; 100]).unwrap();
        assert_eq!(
            (b.mean, b.std_error, b.level, b.tau_int),
            (2.5, 0.0, 0, 0.5)
        );
    }
}
