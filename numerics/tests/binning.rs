//! Tests of the binning analysis: exact toy values, a bit-level regression on the portable
//! AR(1) realisation, and statistical consistency with the exact finite-N expectation of the
//! blocking estimator for a stationary AR(1) process.
//!
//! Sources: the estimator and its error are those of H. Flyvbjerg and H. G. Petersen,
//! J. Chem. Phys. 91, 461 (1989). Reference numbers come from `reference/binning.py`
//! (numpy/mpmath), kept in `reference/output/binning.txt`. SplitMix64 is from Steele, Lea
//! and Flood, OOPSLA 2014; Box–Muller from Box and Muller, Ann. Math. Stat. 29, 610 (1958).

use rondo_numerics::binning::{
    ar1_series, binning_analysis, blocking_levels, plateau_level, window_average, BinningError,
    WindowMethod, MIN_BLOCKS,
};
use rondo_numerics::rng::SplitMix64;

const PHI: f64 = 0.8;
const N: usize = 1 << 16;

fn rel(a: f64, b: f64) -> f64 {
    (a - b).abs() / b.abs()
}

/// Variance of the mean of `b` consecutive values of the stationary AR(1) process with unit
/// innovations: (σ²/B)[1 + 2 Σ_{t<B} (1 − t/B) φ^t], σ² = 1/(1 − φ²) (standard result for a
/// stationary process with autocorrelation φ^t).
fn var_block_mean(b: usize, phi: f64) -> f64 {
    let sig2 = 1.0 / (1.0 - phi * phi);
    let mut s = 0.0;
    let mut p = 1.0;
    for t in 1..b {
        p *= phi;
        s += (1.0 - t as f64 / b as f64) * p;
    }
    sig2 / b as f64 * (1.0 + 2.0 * s)
}

/// Exact expectation of the squared level-l estimator for a series of `n` values:
/// E[SE_l²] = (Var(block mean, B = 2^l) − Var(x̄)) / (n_l − 1).
fn expected_se2(level: usize, n: usize, phi: f64) -> f64 {
    let b = 1usize << level;
    (var_block_mean(b, phi) - var_block_mean(n, phi)) / ((n / b) as f64 - 1.0)
}

fn portable_ar1(seed: u64) -> Vec<f64> {
    ar1_series(N, PHI, &mut SplitMix64::new(seed)).expect("φ = 0.8 is stationary")
}

#[test]
fn toy_one_to_eight_is_exact() {
    // x = 1..8, by hand: c0 = 21/4, 5, 4 at levels 0, 1, 2, so SE = √(c0/(n−1)) = √3/2,
    // √(5/3), 2 (Flyvbjerg–Petersen estimator; also reference/output/binning.txt, "toy").
    let x: Vec<f64> = (1..=8).map(f64::from).collect();
    let levels = blocking_levels(&x).unwrap();
    let want = [3f64.sqrt() / 2.0, (5.0f64 / 3.0).sqrt(), 2.0];
    assert_eq!(levels.len(), 3);
    for (lv, (w, nb)) in levels.iter().zip(want.iter().zip([8, 4, 2])) {
        assert!(
            rel(lv.std_error, *w) < 1e-15,
            "level {}: {}",
            lv.level,
            lv.std_error
        );
        assert_eq!(lv.n_blocks, nb);
        assert_eq!(lv.block_size, 1 << lv.level);
        let e = lv.std_error / (2.0 * (nb - 1) as f64).sqrt();
        assert!(rel(lv.std_error_err, e) < 1e-15);
    }
    assert!(rel(levels[0].std_error, 0.8660254037844386) < 1e-15);
    assert!(rel(levels[1].std_error, 1.2909944487358056) < 1e-15);
    let b = binning_analysis(&x).unwrap();
    assert_eq!(b.mean, 4.5);
    // Eight values: no level has 32 blocks, so the rule falls back to level 0.
    assert_eq!((b.level, b.plateau_found), (0, false));
}

#[test]
fn toy_one_to_nine_drops_the_odd_tail() {
    // x = 1..9: √(5/6) at level 0, then the 9 is dropped and the levels equal those of 1..8.
    let x: Vec<f64> = (1..=9).map(f64::from).collect();
    let levels = blocking_levels(&x).unwrap();
    assert!(rel(levels[0].std_error, (5.0f64 / 6.0).sqrt()) < 1e-15);
    assert!(rel(levels[0].std_error, 0.9128709291752769) < 1e-15);
    assert!(rel(levels[1].std_error, (5.0f64 / 3.0).sqrt()) < 1e-15);
    assert!(rel(levels[2].std_error, 2.0) < 1e-15);
    assert_eq!(
        levels.iter().map(|l| l.n_blocks).collect::<Vec<_>>(),
        [9, 4, 2]
    );
    // The mean still includes the dropped value.
    assert_eq!(binning_analysis(&x).unwrap().mean, 5.0);
}

#[test]
fn portable_generator_is_bit_exact() {
    // reference/output/binning.txt: SplitMix64(seed 1) outputs, first normals, and the bit
    // patterns of the noise and of the AR(1) series (same C libm on both sides).
    let mut g = SplitMix64::new(1);
    assert_eq!(g.next_u64(), 0x910a_2dec_8902_5cc1);
    assert_eq!(g.next_u64(), 0xbeeb_8da1_658e_ec67);
    let mut g = SplitMix64::new(1);
    let first: Vec<f64> = (0..4).map(|_| g.normal()).collect();
    assert_eq!(
        first,
        [
            -0.028249746095854695,
            -1.065617648414326,
            -0.22791952286763517,
            0.08309416847150097
        ]
    );
    let mut g = SplitMix64::new(1);
    let noise: Vec<f64> = (0..N).map(|_| g.normal()).collect();
    let noise_bits = [
        0xbf9ced805e687295,
        0xbff10cc5175fade7,
        0xbfcd2c77886b0fb8,
        0x3fbaf2b230416969,
    ];
    let x = portable_ar1(1);
    let x_bits = [
        0xbfa81b404eac5f7e,
        0xbff1a70d1957304a,
        0xbff1c4cc9eecbbcc,
        0xbfbae4fc03390fff,
    ];
    for (k, i) in [0, 1, 2, N - 1].into_iter().enumerate() {
        assert_eq!(noise[i].to_bits(), noise_bits[k], "noise[{i}]");
        assert_eq!(x[i].to_bits(), x_bits[k], "x[{i}]");
    }
}

#[test]
fn portable_realisation_regression() {
    // reference/output/binning.txt, "portable AR(1), seed 1, full precision" (numpy blocking
    // of the same series; numpy sums pairwise, hence 1e-9 rather than bitwise).
    let want = [
        0.006569341336502088,
        0.008822245936416576,
        0.011571170152130819,
        0.014421787534824452,
        0.01687369035134349,
        0.018317567494987304,
        0.018784475863227294,
        0.019077440790247157,
        0.019138041388521945,
        0.020546013664448387,
        0.020397737735550786,
        0.019864363727761087,
        0.021842563449792282,
        0.027194023319353007,
        0.007823214342523324,
        0.008551958379604168,
    ];
    let b = binning_analysis(&portable_ar1(1)).unwrap();
    assert_eq!(b.levels.len(), want.len());
    for (lv, w) in b.levels.iter().zip(want) {
        assert!(
            rel(lv.std_error, w) < 1e-9,
            "level {}: {} vs {w}",
            lv.level,
            lv.std_error
        );
    }
    assert!(rel(b.mean, -0.0027722715863005756) < 1e-9);
    // Same script, plateau rule with a 32-block floor: level 6, SE 0.018784…, τ 4.0881….
    assert_eq!((b.level, b.plateau_found), (6, true));
    assert!(rel(b.std_error, 0.018784475863227294) < 1e-9);
    assert!(
        rel(
            b.std_error_err,
            0.018784475863227294 / (2.0f64 * 1023.0).sqrt()
        ) < 1e-9
    );
    assert!(rel(b.tau_int, 4.08812824873216) < 1e-9);
}

#[test]
fn exact_expectation_formula_reproduces_reference_table() {
    // mpmath, 30 digits, printed to 17 and written here as the nearest f64
    // (reference/output/binning.txt): √E[SE_l²] for N = 2^16, l = 0..13,
    // and the exact finite-N standard error of the mean 0.0195305877149405.
    let want = [
        0.00651001931449587,
        0.008734107429614323,
        0.011454707019128318,
        0.01432047928618817,
        0.016687222300021412,
        0.01812467784875977,
        0.018840194263923384,
        0.01918849602950254,
        0.01936029747143897,
        0.019445629003372315,
        0.01948815465645449,
        0.019509382722229726,
        0.01951998809801659,
        0.019525288625750096,
    ];
    for (l, w) in want.iter().enumerate() {
        let got = expected_se2(l, N, PHI).sqrt();
        assert!(rel(got, *w) < 1e-12, "level {l}: {got} vs {w}");
    }
    assert!(rel(var_block_mean(N, PHI).sqrt(), 0.0195305877149405) < 1e-14);
}

#[test]
fn portable_realisation_is_statistically_consistent() {
    // Asymptotic SE = √(2 τ_int σ²/N) = 5/256 with τ_int = (1+φ)/(2(1−φ)) = 4.5 for φ = 0.8;
    // bounds of about 3σ for one realisation (reference/binning.py).
    let b = binning_analysis(&portable_ar1(1)).unwrap();
    let se_true = 5.0 / 256.0;
    assert!(
        (b.std_error / se_true - 1.0).abs() < 0.15,
        "SE {}",
        b.std_error
    );
    assert!((3.3..=5.5).contains(&b.tau_int), "tau {}", b.tau_int);
}

#[test]
fn mean_squared_estimator_over_seeds_matches_exact_expectation() {
    // Unbiased by construction: the average of SE_l² over R independent series must agree
    // with E[SE_l²] (formula above) within the statistical error of that average, estimated
    // from the spread over the runs (4σ bound).
    const R: usize = 200;
    let checked = [0usize, 2, 4, 6, 8];
    let mut seeds = SplitMix64::new(20_261_202);
    let mut ratios = vec![Vec::with_capacity(R); checked.len()];
    let mut plateau_ok = 0;
    let mut plateau_ratio_sum = 0.0;
    let se_true = var_block_mean(N, PHI).sqrt();
    for _ in 0..R {
        let x = portable_ar1(seeds.next_u64());
        let b = binning_analysis(&x).unwrap();
        for (k, &l) in checked.iter().enumerate() {
            ratios[k].push(b.levels[l].std_error.powi(2) / expected_se2(l, N, PHI));
        }
        let r = b.std_error / se_true;
        plateau_ratio_sum += r;
        if (r - 1.0).abs() < 0.15 && (3.3..=5.5).contains(&b.tau_int) {
            plateau_ok += 1;
        }
    }
    for (k, &l) in checked.iter().enumerate() {
        let m = ratios[k].iter().sum::<f64>() / R as f64;
        let var = ratios[k].iter().map(|r| (r - m) * (r - m)).sum::<f64>() / (R - 1) as f64;
        let sem = (var / R as f64).sqrt();
        assert!(sem < 0.02, "level {l}: the check is too weak (σ = {sem})");
        assert!(
            (m - 1.0).abs() < 4.0 * sem,
            "level {l}: mean ratio {m} ± {sem}"
        );
    }
    // The plateau rule stops early (level 5–7, where E[SE_l]/SE_true ≈ 0.93–0.98), so its
    // average is biased low by a few per cent but must stay within the 15% band.
    let mean_ratio = plateau_ratio_sum / R as f64;
    assert!(
        (0.90..=1.02).contains(&mean_ratio),
        "mean plateau ratio {mean_ratio}"
    );
    assert!(
        plateau_ok >= R * 9 / 10,
        "{plateau_ok} of {R} runs within the ~3σ band"
    );
}

#[test]
fn plateau_rule_falls_back_to_the_largest_estimate() {
    // A linear ramp: SE keeps rising with the level, so no two levels agree.
    let x: Vec<f64> = (0..4096).map(f64::from).collect();
    let levels = blocking_levels(&x).unwrap();
    let (l, found) = plateau_level(&levels);
    assert!(!found);
    let best = levels
        .iter()
        .filter(|lv| lv.n_blocks >= MIN_BLOCKS)
        .map(|lv| lv.std_error)
        .fold(0.0, f64::max);
    assert_eq!(levels[l].std_error, best);
    assert!(levels[l].n_blocks >= MIN_BLOCKS);
}

#[test]
fn uncorrelated_data_plateau_at_low_level_with_tau_near_half() {
    // Independent normals: every level estimates σ/√N; τ_int = ½.
    let mut g = SplitMix64::new(7);
    let x: Vec<f64> = (0..N).map(|_| g.normal()).collect();
    let b = binning_analysis(&x).unwrap();
    assert!(b.plateau_found && b.level <= 3, "level {}", b.level);
    assert!((b.std_error * (N as f64).sqrt() - 1.0).abs() < 0.05);
    assert!((0.4..=0.6).contains(&b.tau_int), "tau {}", b.tau_int);
}

#[test]
fn window_average_few_values_uses_the_scatter() {
    // 1..8: mean 4.5, s² = 6, s/√8 = √3/2; propagated √(8·0.01)/8 is smaller.
    let v: Vec<f64> = (1..=8).map(f64::from).collect();
    let w = window_average(&v, &[0.1; 8]).unwrap();
    assert_eq!(w.method, WindowMethod::FewValues);
    assert_eq!(w.mean, 4.5);
    assert!(rel(w.spread_error, 3f64.sqrt() / 2.0) < 1e-15);
    assert!(rel(w.propagated_error, 0.08f64.sqrt() / 8.0) < 1e-15);
    assert_eq!(w.std_error, w.spread_error);
}

#[test]
fn window_average_keeps_error_bars_when_values_agree() {
    // Identical values: the scatter is zero, the error bars propagate as √(Σσ²)/n = 0.1.
    let w = window_average(&[3.0; 4], &[0.2; 4]).unwrap();
    assert_eq!((w.mean, w.spread_error), (3.0, 0.0));
    assert!(rel(w.std_error, 0.1) < 1e-15);
    let one = window_average(&[1.25], &[0.5]).unwrap();
    assert_eq!(one.method, WindowMethod::SingleValue);
    assert_eq!((one.mean, one.std_error), (1.25, 0.5));
}

#[test]
fn window_average_with_many_values_uses_binning() {
    let x = portable_ar1(1);
    let b = binning_analysis(&x).unwrap();
    let w = window_average(&x, &vec![0.0; x.len()]).unwrap();
    assert_eq!(
        w.method,
        WindowMethod::Binning {
            level: b.level,
            plateau_found: true
        }
    );
    assert_eq!((w.mean, w.std_error), (b.mean, b.std_error));
    // Exactly at the threshold, binning is used.
    let w64 = window_average(&x[..64], &[0.0; 64]).unwrap();
    assert!(matches!(w64.method, WindowMethod::Binning { .. }));
    let w63 = window_average(&x[..63], &[0.0; 63]).unwrap();
    assert_eq!(w63.method, WindowMethod::FewValues);
}

#[test]
fn bad_input_is_an_error_naming_what_is_wrong() {
    let e = binning_analysis(&[1.0, 2.0, f64::INFINITY]).unwrap_err();
    assert_eq!(
        e,
        BinningError::NonFinite {
            index: 2,
            value: f64::INFINITY
        }
    );
    assert!(e.to_string().contains("value 2"), "{e}");
    assert!(matches!(
        window_average(&[], &[]),
        Err(BinningError::Empty { .. })
    ));
    let e = window_average(&[1.0, 2.0], &[0.1, f64::NAN]).unwrap_err();
    assert!(
        matches!(e, BinningError::InvalidErrorBar { index: 1, .. }),
        "{e}"
    );
    let e = window_average(&[1.0, 2.0, 3.0], &[0.1, 0.1]).unwrap_err();
    assert!(e.to_string().contains("3 values but 2 error bars"), "{e}");
    assert!(matches!(
        ar1_series(10, f64::NAN, &mut SplitMix64::new(1)),
        Err(BinningError::NonStationary(_))
    ));
}
