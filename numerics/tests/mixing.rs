//! Checks of the mixing kernels against published results and reference iteration counts.
//!
//! Problems: (A) the seeded 10×10 linear map in `reference/mixing_seeded_problem.json`,
//! (B) the closed-form tridiagonal map (A_{i,i±1} = 0.45/cos(π/11), b_i = i).
//! Counts K = smallest k with ‖f_k‖₂ < 1e-10 from x0 = 0; reference values computed with
//! numpy/scipy, see reference/mixing.py and reference/output/mixing.txt.

#![allow(clippy::excessive_precision)] // reference values are quoted as printed by the scripts

use rondo_numerics::mixing::{
    iterate_fixed_point, mix, FixedPointRun, Method, MixError, MixerConfig, MixerState,
};

const N: usize = 10;
const TOL: f64 = 1e-10;

struct Linear {
    a: Vec<Vec<f64>>,
    b: Vec<f64>,
}

impl Linear {
    fn g(&self, x: &[f64]) -> Vec<f64> {
        self.a
            .iter()
            .zip(&self.b)
            .map(|(row, b)| row.iter().zip(x).map(|(a, x)| a * x).sum::<f64>() + b)
            .collect()
    }
}

fn problem_a() -> Linear {
    let text = include_str!("../../reference/mixing_seeded_problem.json");
    let v: serde_json::Value = serde_json::from_str(text).expect("reference JSON parses");
    let a = v["A"]
        .as_array()
        .expect("A")
        .iter()
        .map(|row| {
            row.as_array()
                .expect("row")
                .iter()
                .map(|e| e.as_f64().expect("num"))
                .collect()
        })
        .collect();
    let b = v["b"]
        .as_array()
        .expect("b")
        .iter()
        .map(|e| e.as_f64().expect("num"))
        .collect();
    Linear { a, b }
}

fn problem_b() -> Linear {
    let c = 0.45 / (std::f64::consts::PI / 11.0).cos();
    let mut a = vec![vec![0.0; N]; N];
    for i in 0..N - 1 {
        a[i][i + 1] = c;
        a[i + 1][i] = c;
    }
    Linear {
        a,
        b: (1..=N).map(|i| i as f64).collect(),
    }
}

fn cfg(method: Method, alpha: f64, history: usize, w0: f64) -> MixerConfig {
    MixerConfig {
        method,
        alpha,
        history,
        w0,
        restart_after_growth: 0,
    }
}

fn run(p: &Linear, c: &MixerConfig) -> FixedPointRun {
    let r = iterate_fixed_point(c, &[0.0; N], |x| p.g(x), TOL, 5000, Ok).expect("run");
    assert!(r.converged, "{c:?} did not converge");
    assert!(r.events.is_empty(), "unexpected events {:?}", r.events);
    r
}

fn json_round_trip(s: MixerState) -> Result<MixerState, MixError> {
    let text = serde_json::to_string(&s).map_err(|e| MixError::InvalidState(e.to_string()))?;
    serde_json::from_str(&text).map_err(|e| MixError::InvalidState(e.to_string()))
}

#[test]
fn linear_mixing_counts() {
    // Reference values (reference/mixing.py, numpy): K = 161 (A), 504 (B) at α = 0.5.
    let c = cfg(Method::Linear, 0.5, 1, 0.0);
    assert_eq!(run(&problem_a(), &c).updates, 161);
    assert_eq!(run(&problem_b(), &c).updates, 504);
}

#[test]
fn anderson_full_history_terminates_in_n_plus_one() {
    // Walker & Ni, SIAM J. Numer. Anal. 49, 1715 (2011), Thm 2.2: untruncated Anderson on a
    // linear map of dimension n reaches x* at iteration ≤ n + 1. Reference: K = 11 on both.
    for p in [problem_a(), problem_b()] {
        for alpha in [1.0, 0.5] {
            let r = run(&p, &cfg(Method::Anderson, alpha, N, 0.0));
            assert_eq!(r.updates, N + 1, "alpha {alpha}");
        }
    }
}

#[test]
fn anderson_truncated_history_counts() {
    // Reference counts (reference/mixing.py, numpy lstsq), ±2 since margins can be tiny.
    let table = [
        (9, 14, 36),
        (5, 30, 80),
        (3, 68, 114),
        (2, 90, 120),
        (1, 196, 210),
    ];
    let (pa, pb) = (problem_a(), problem_b());
    for (m, ka, kb) in table {
        let c = cfg(Method::Anderson, 1.0, m, 0.0);
        let (ga, gb) = (run(&pa, &c).updates, run(&pb, &c).updates);
        assert!(ga.abs_diff(ka) <= 2, "m = {m}: A took {ga}, reference {ka}");
        assert!(gb.abs_diff(kb) <= 2, "m = {m}: B took {gb}, reference {kb}");
    }
}

#[test]
fn broyden_counts() {
    // Johnson, PRB 38, 12807 (1988), modified Broyden with unit weights and unlimited
    // history (here 100 > K): reference K = 11 (w0 = 0) and 13 (w0 = 0.01) on both problems.
    for p in [problem_a(), problem_b()] {
        assert_eq!(run(&p, &cfg(Method::Broyden, 1.0, 100, 0.0)).updates, 11);
        assert_eq!(run(&p, &cfg(Method::Broyden, 1.0, 100, 0.01)).updates, 13);
    }
}

#[test]
fn anderson_regularised_matches_broyden_count() {
    // With w0 on normalised differences, Anderson and Johnson's Broyden are the same method
    // (Eyert, J. Comput. Phys. 124, 271 (1996), from memory); reference Broyden K = 13.
    for p in [problem_a(), problem_b()] {
        assert_eq!(run(&p, &cfg(Method::Anderson, 1.0, 100, 0.01)).updates, 13);
    }
}

#[test]
fn json_round_trip_reproduces_the_sequence_bit_for_bit() {
    let p = problem_a();
    for method in [Method::Linear, Method::Anderson, Method::Broyden] {
        let c = MixerConfig {
            method,
            alpha: 0.7,
            history: 4,
            w0: 0.001,
            restart_after_growth: 3,
        };
        let mem = iterate_fixed_point(&c, &[0.0; N], |x| p.g(x), TOL, 400, Ok).expect("memory");
        let disk = iterate_fixed_point(&c, &[0.0; N], |x| p.g(x), TOL, 400, json_round_trip)
            .expect("json");
        assert_eq!(mem.updates, disk.updates);
        let bits = |v: &[f64]| v.iter().map(|e| e.to_bits()).collect::<Vec<_>>();
        assert_eq!(
            bits(&mem.residual_norms),
            bits(&disk.residual_norms),
            "{method:?}"
        );
        assert_eq!(bits(&mem.x), bits(&disk.x), "{method:?}");
        assert_eq!(mem.events, disk.events);
    }
}

#[test]
fn first_call_without_state_returns_new_unchanged() {
    let c = MixerConfig::default();
    let out = mix(&c, None, &[1.0, 2.0]).expect("mix");
    assert_eq!(out.next, vec![1.0, 2.0]);
    assert!(out.residual_norm.is_nan());
    assert_eq!(out.state.x(), &[1.0, 2.0]);
    // Second call: residual is new − x.
    let out2 = mix(&c, Some(&out.state), &[4.0, 6.0]).expect("mix");
    assert_eq!(out2.residual_norm, 5.0);
    assert_eq!(out2.next, vec![2.5, 4.0]);
}

#[test]
fn bad_input_is_refused() {
    let good = MixerConfig::default();
    let s = mix(&good, None, &[1.0, 2.0]).expect("mix").state;
    assert_eq!(
        mix(&good, Some(&s), &[1.0]),
        Err(MixError::LengthMismatch {
            expected: 2,
            found: 1
        })
    );
    assert!(matches!(
        mix(&good, Some(&s), &[1.0, f64::NAN]),
        Err(MixError::NonFinite { index: 1, .. })
    ));
    assert!(matches!(
        mix(&good, Some(&s), &[f64::INFINITY, 0.0]),
        Err(MixError::NonFinite { index: 0, .. })
    ));
    assert_eq!(mix(&good, None, &[]), Err(MixError::EmptyInput));
    for alpha in [0.0, -0.1, 1.5, f64::NAN] {
        let c = MixerConfig {
            alpha,
            ..good.clone()
        };
        assert!(matches!(
            mix(&c, Some(&s), &[1.0, 2.0]),
            Err(MixError::AlphaOutOfRange(_))
        ));
    }
    assert_eq!(
        MixerConfig {
            alpha: 1.0,
            ..good.clone()
        }
        .validate(),
        Ok(())
    );
    assert_eq!(
        MixerConfig {
            history: 0,
            ..good.clone()
        }
        .validate(),
        Err(MixError::HistoryZero)
    );
    assert!(MixerConfig {
        w0: -1.0,
        ..good.clone()
    }
    .validate()
    .is_err());
    assert!(MixerConfig {
        w0: f64::INFINITY,
        ..good.clone()
    }
    .validate()
    .is_err());
    // Empty / corrupt state files.
    assert!(serde_json::from_str::<MixerState>("").is_err());
    assert!(serde_json::from_str::<MixerState>("{}").is_err());
    let mut v: serde_json::Value = serde_json::to_value(&s).expect("to value");
    v["x"] = serde_json::json!([]);
    let empty: MixerState = serde_json::from_value(v.clone()).expect("parses");
    assert!(matches!(
        mix(&good, Some(&empty), &[1.0, 2.0]),
        Err(MixError::InvalidState(_))
    ));
    v["x"] = serde_json::json!(["7ff8000000000000", "0000000000000000"]); // NaN bits
    let nan: MixerState = serde_json::from_value(v.clone()).expect("parses");
    assert!(matches!(
        mix(&good, Some(&nan), &[1.0, 2.0]),
        Err(MixError::InvalidState(_))
    ));
    v["x"] = serde_json::json!(["zz", "0000000000000000"]);
    assert!(serde_json::from_value::<MixerState>(v.clone()).is_err());
    v["version"] = serde_json::json!(99);
    v["x"] = serde_json::json!(["0000000000000000", "0000000000000000"]);
    let old: MixerState = serde_json::from_value(v).expect("parses");
    assert!(matches!(
        mix(&good, Some(&old), &[1.0, 2.0]),
        Err(MixError::InvalidState(_))
    ));
}

#[test]
fn growing_residual_resets_history_and_takes_linear_step() {
    // g(x) = x + 1 + x² has no fixed point (f = 1 + x² > 0): from x0 = 0 the linear step
    // gives f = 1.25 > 1 and the secant step lands at x = −2 with f = 5, two growths.
    let c = MixerConfig {
        method: Method::Anderson,
        alpha: 0.5,
        history: 3,
        w0: 0.0,
        restart_after_growth: 2,
    };
    let g = |x: &[f64]| x.iter().map(|e| e + 1.0 + e * e).collect::<Vec<_>>();
    let mut state = MixerState::start(Method::Anderson, &[0.0]).expect("start");
    let mut x = vec![0.0];
    let mut saw_reset = false;
    for _ in 0..6 {
        let out = mix(&c, Some(&state), &g(&x)).expect("mix");
        if let Some(e) = &out.event {
            assert!(
                e.contains("history reset: residual grew 2 times; linear step"),
                "{e}"
            );
            // Linear step from x with f = g(x) − x.
            let f = g(&x)[0] - x[0];
            assert_eq!(out.next[0], x[0] + 0.5 * f);
            assert_eq!(
                out.state.history_len(),
                1,
                "history restarts from the current point"
            );
            saw_reset = true;
        }
        x = out.next.clone();
        state = out.state;
    }
    assert!(saw_reset);
    assert!(state.resets() >= 1);
}

#[test]
fn singular_history_falls_back_to_linear() {
    // Broyden with a repeated output: ΔF = 0 makes Johnson's normalisation impossible.
    let c = MixerConfig {
        method: Method::Broyden,
        alpha: 0.5,
        history: 3,
        w0: 0.0,
        restart_after_growth: 0,
    };
    let s0 = MixerState::start(Method::Broyden, &[1.0, 1.0]).expect("start");
    // x = (1,1), g = (1,1): f = 0; next = x.
    let o1 = mix(&c, Some(&s0), &[1.0, 1.0]).expect("mix");
    assert_eq!(o1.next, vec![1.0, 1.0]);
    let o2 = mix(&c, Some(&o1.state), &[1.0, 1.0]).expect("mix");
    assert!(
        o2.event.as_deref().unwrap_or("").contains("history reset"),
        "{:?}",
        o2.event
    );
    assert_eq!(o2.next, vec![1.0, 1.0]);
}

#[test]
fn method_change_resets_history() {
    let p = problem_b();
    let a = MixerConfig {
        method: Method::Anderson,
        alpha: 0.5,
        history: 4,
        w0: 0.0,
        restart_after_growth: 0,
    };
    let mut s = MixerState::start(Method::Anderson, &[0.0; N]).expect("start");
    let mut x = vec![0.0; N];
    for _ in 0..3 {
        let o = mix(&a, Some(&s), &p.g(&x)).expect("mix");
        x = o.next;
        s = o.state;
    }
    let b = MixerConfig {
        method: Method::Broyden,
        ..a
    };
    let o = mix(&b, Some(&s), &p.g(&x)).expect("mix");
    assert!(o
        .event
        .as_deref()
        .unwrap_or("")
        .contains("method changed from anderson to broyden"));
    assert_eq!(o.state.history_len(), 1);
}

#[test]
fn method_names_are_kebab_case() {
    assert_eq!(
        serde_json::to_string(&Method::Anderson).expect("json"),
        "\"anderson\""
    );
    let m: Method = serde_json::from_str("\"broyden\"").expect("json");
    assert_eq!(m, Method::Broyden);
}
