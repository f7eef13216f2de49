//! Checks of the equation-of-state kernels against closed forms and reference fits.
//!
//! Spot values: Birch, Phys. Rev. 71, 809 (1947) (BM3) and Vinet et al., J. Geophys. Res.
//! 92, 9319 (1987), evaluated in mpmath; fits: scipy curve_fit and an mpmath Gauss–Newton
//! polish of the exact least-squares minimum. Reference values computed with mpmath/scipy,
//! see reference/eos.py and reference/output/eos.txt.

#![allow(clippy::excessive_precision, clippy::needless_range_loop)] // reference values are quoted as printed by the scripts

use rondo_numerics::eos::{energy, fit, pressure, EosError, EosModel, EosParams, Side};
use rondo_numerics::units::EV_PER_A3_IN_GPA;

const TRUE: EosParams = EosParams {
    e0: -10.0,
    v0: 30.0,
    b0: 1.0,
    b0_prime: 4.5,
};

fn volumes() -> Vec<f64> {
    (0..9).map(|i| 27.0 + 0.75 * i as f64).collect()
}

// reference/eos.py: numpy default_rng(42).normal(0, 1e-4, 9) added to the f64 BM3 energies.
const E_NOISY: [f64; 9] = [
    -9.818016183908444,
    -9.902767433924248,
    -9.958727886992829,
    -9.990085565072782,
    -10.000195103518866,
    -9.991170185132354,
    -9.96569629094545,
    -9.926135726596408,
    -9.874055593486625,
];

fn rel(a: f64, b: f64) -> f64 {
    ((a - b) / b).abs()
}

#[test]
fn spot_values_of_energy_and_pressure() {
    // mpmath (reference/output/eos.txt).
    let cases = [
        (
            EosModel::BirchMurnaghan3,
            27.0,
            -9.81804665561641927,
            0.133651561946240075,
        ),
        (
            EosModel::BirchMurnaghan3,
            33.0,
            -9.87405391337087653,
            -0.0769632083222386294,
        ),
        (
            EosModel::Vinet,
            27.0,
            -9.81841115917624151,
            0.133126570364654808,
        ),
        (
            EosModel::Vinet,
            33.0,
            -9.87425630550349961,
            -0.0767116036233555432,
        ),
    ];
    for (m, v, e, p) in cases {
        assert!(rel(energy(m, &TRUE, v), e) < 1e-14, "{m:?} E({v})");
        assert!(rel(pressure(m, &TRUE, v), p) < 1e-13, "{m:?} P({v})");
        assert_eq!(energy(m, &TRUE, 30.0), -10.0);
        assert_eq!(pressure(m, &TRUE, 30.0), 0.0);
        // P = −dE/dV by a central difference.
        let h = 1e-4;
        let dedv = (energy(m, &TRUE, v + h) - energy(m, &TRUE, v - h)) / (2.0 * h);
        assert!((pressure(m, &TRUE, v) + dedv).abs() < 1e-8);
    }
}

#[test]
fn noise_free_fit_recovers_the_parameters() {
    // Synthetic data from BM3 with (−10, 30, 1, 4.5); scipy reaches them to 1.4e-14.
    let v = volumes();
    let e: Vec<f64> = v
        .iter()
        .map(|&v| energy(EosModel::BirchMurnaghan3, &TRUE, v))
        .collect();
    let f = fit(EosModel::BirchMurnaghan3, &v, &e, None).expect("fit");
    // Parabola starting values (reference/eos.py, numpy polyfit).
    let start = [
        -10.001166938711048,
        30.200593884788493,
        1.0338963836804151,
        4.0,
    ];
    for k in 0..4 {
        assert!(
            rel(f.start[k], start[k]) < 1e-10,
            "start {k}: {} vs {}",
            f.start[k],
            start[k]
        );
    }
    assert!(rel(f.e0, -10.0) < 1e-10);
    assert!(rel(f.v0, 30.0) < 1e-10);
    assert!(rel(f.b0, 1.0) < 1e-10);
    assert!(rel(f.b0_prime, 4.5) < 1e-10);
    assert!(rel(f.b0_gpa, 160.2176634) < 1e-10);
    assert!(f.rss < 1e-25);

    // Vinet model on Vinet data.
    let ev: Vec<f64> = v
        .iter()
        .map(|&v| energy(EosModel::Vinet, &TRUE, v))
        .collect();
    let fv = fit(EosModel::Vinet, &v, &ev, None).expect("fit");
    for (a, b) in [
        (fv.e0, -10.0),
        (fv.v0, 30.0),
        (fv.b0, 1.0),
        (fv.b0_prime, 4.5),
    ] {
        assert!(rel(a, b) < 1e-10, "{a} vs {b}");
    }
}

#[test]
fn vinet_fit_to_bm3_data_shows_the_model_effect() {
    // scipy curve_fit (reference/eos.py): (−10.0000318178, 29.9996359221, 1.0018370452,
    // 4.5133976741), rms residual 2.727e-5 eV.
    let v = volumes();
    let e: Vec<f64> = v
        .iter()
        .map(|&v| energy(EosModel::BirchMurnaghan3, &TRUE, v))
        .collect();
    let f = fit(EosModel::Vinet, &v, &e, None).expect("fit");
    for (a, b) in [
        (f.e0, -10.0000318178),
        (f.v0, 29.9996359221),
        (f.b0, 1.0018370452),
        (f.b0_prime, 4.5133976741),
    ] {
        assert!(rel(a, b) < 1e-8, "{a} vs {b}");
    }
    assert!(rel((f.rss / 9.0).sqrt(), 2.7270767052156324e-05) < 1e-6);
}

#[test]
fn noisy_fit_matches_the_exact_least_squares_minimum() {
    let v = volumes();
    // Exact minimum: mpmath Gauss–Newton (reference/eos.py).
    let exact = [
        -10.00005759157558,
        30.0009233265822,
        1.000470169781711,
        4.477275501869775,
    ];
    let se_scaled = [
        5.838188951e-5,
        1.514465178e-3,
        7.259398531e-4,
        3.81527687e-2,
    ];
    let se_abs = [
        5.095333516e-5,
        1.32176352e-3,
        6.335707349e-4,
        3.329818249e-2,
    ];

    let f = fit(EosModel::BirchMurnaghan3, &v, &E_NOISY, None).expect("fit");
    let got = [f.e0, f.v0, f.b0, f.b0_prime];
    for k in 0..4 {
        assert!(
            rel(got[k], exact[k]) < 1e-6,
            "param {k}: {} vs {}",
            got[k],
            exact[k]
        );
        assert!(
            rel(f.stderr[k], se_scaled[k]) < 1e-3,
            "se {k}: {} vs {}",
            f.stderr[k],
            se_scaled[k]
        );
    }
    assert!(rel(f.rss, 6.56418882522e-8) < 1e-6);
    assert!(f.stderr_absolute_sigma.is_none());
    assert!(f.chi2_per_dof.is_none());
    // B0 = 160.29299 ± 0.116 GPa.
    assert!(rel(f.b0_gpa, 1.000470169781711 * EV_PER_A3_IN_GPA) < 1e-6);
    assert!(rel(f.b0_gpa_stderr, 0.116308475118181) < 1e-3);
    let sum: f64 = f.residuals.iter().map(|r| r * r).sum();
    assert!(rel(sum, f.rss) < 1e-12);

    let sigma = [1e-4; 9];
    let g = fit(EosModel::BirchMurnaghan3, &v, &E_NOISY, Some(&sigma)).expect("fit");
    let abs = g.stderr_absolute_sigma.expect("absolute sigma errors");
    for k in 0..4 {
        assert!(
            rel(abs[k], se_abs[k]) < 1e-3,
            "abs se {k}: {} vs {}",
            abs[k],
            se_abs[k]
        );
        assert!(rel(g.stderr[k], se_scaled[k]) < 1e-3);
    }
    assert!(rel(g.chi2_per_dof.expect("chi2"), 1.31283776504) < 1e-6);
}

#[test]
fn refusals_are_clear() {
    let v = volumes();
    let e: Vec<f64> = v
        .iter()
        .map(|&v| energy(EosModel::BirchMurnaghan3, &TRUE, v))
        .collect();
    let err = fit(EosModel::Vinet, &v[..4], &e[..4], None).expect_err("four volumes");
    assert_eq!(err, EosError::TooFewVolumes { found: 4 });
    assert!(err.to_string().contains("at least 5"));
    // Repeated volumes do not count twice.
    let vv = [27.0, 27.0, 28.0, 29.0, 30.0];
    assert_eq!(
        fit(EosModel::Vinet, &vv, &[0.0; 5], None),
        Err(EosError::TooFewVolumes { found: 4 })
    );
    // Minimum above the largest volume: keep only V ≤ 29.25.
    let err = fit(EosModel::BirchMurnaghan3, &v[..5], &e[..5], None).expect_err("edge");
    // V = 30 (the minimum) is the largest here, lowest energy at the end point.
    assert!(
        matches!(
            err,
            EosError::MinimumOutsideRange {
                side: Side::AboveLargest,
                ..
            }
        ),
        "{err}"
    );
    assert!(
        err.to_string().contains("above the largest volume"),
        "{err}"
    );
    let err = fit(
        EosModel::BirchMurnaghan3,
        &v[..4].iter().chain(&[29.5]).copied().collect::<Vec<_>>(),
        &[-9.8, -9.9, -9.95, -9.99, -9.995],
        None,
    )
    .expect_err("monotone");
    assert!(matches!(
        err,
        EosError::MinimumOutsideRange {
            side: Side::AboveLargest,
            ..
        }
    ));
    let shifted: Vec<f64> = v.iter().map(|x| x + 4.0).collect();
    let es: Vec<f64> = shifted
        .iter()
        .map(|&v| energy(EosModel::BirchMurnaghan3, &TRUE, v))
        .collect();
    let err = fit(EosModel::BirchMurnaghan3, &shifted, &es, None).expect_err("below");
    assert!(
        matches!(
            err,
            EosError::MinimumOutsideRange {
                side: Side::BelowSmallest,
                ..
            }
        ),
        "{err}"
    );
    assert!(err.to_string().contains("below the smallest volume"));
    // Non-finite and mismatched input.
    let mut bad = e.clone();
    bad[3] = f64::NAN;
    assert!(matches!(
        fit(EosModel::Vinet, &v, &bad, None),
        Err(EosError::BadValue {
            what: "energy",
            index: 3,
            ..
        })
    ));
    let mut badv = v.clone();
    badv[0] = -1.0;
    assert!(matches!(
        fit(EosModel::Vinet, &badv, &e, None),
        Err(EosError::BadValue {
            what: "volume",
            index: 0,
            ..
        })
    ));
    assert!(matches!(
        fit(EosModel::Vinet, &v, &e[..8], None),
        Err(EosError::LengthMismatch { .. })
    ));
    let s = [0.0; 9];
    assert!(matches!(
        fit(EosModel::Vinet, &v, &e, Some(&s)),
        Err(EosError::BadValue { what: "sigma", .. })
    ));
    // A maximum instead of a minimum.
    let neg: Vec<f64> = e.iter().map(|x| -x).collect();
    let err = fit(EosModel::Vinet, &v, &neg, None).expect_err("maximum");
    assert!(
        matches!(
            err,
            EosError::MinimumOutsideRange { .. } | EosError::NoMinimum(_)
        ),
        "{err}"
    );
}
