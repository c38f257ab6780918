//! Theil-Sen and Mann-Kendall against scipy 1.10.1 (Debian python3-scipy):
//! `stats.theilslopes(y, x, 0.95, method='separate')` and
//! `stats.kendalltau(x, y, method='asymptotic')`, on R's and statsmodels'
//! datasets and on the worked examples of METHODS.md §10
//! (tests/fixtures/reference/scipy/, provenance in tests/fixtures/README.md).
#![allow(clippy::unwrap_used)]

use std::path::PathBuf;

use serde_json::Value;
use slopewarden::stats::dist::normal_two_sided_p;
use slopewarden::stats::robust::{mann_kendall, theil_sen};

fn fixtures() -> Vec<(String, Value)> {
    let dir = PathBuf::from(env!("CARGO_MANIFEST_DIR")).join("tests/fixtures/reference/scipy");
    let mut files: Vec<PathBuf> = std::fs::read_dir(dir)
        .unwrap()
        .map(|e| e.unwrap().path())
        .collect();
    files.sort();
    files
        .into_iter()
        .filter(|p| p.extension().is_some_and(|e| e == "json"))
        .map(|p| {
            let name = p.file_name().unwrap().to_string_lossy().to_string();
            (
                name,
                serde_json::from_str(&std::fs::read_to_string(&p).unwrap()).unwrap(),
            )
        })
        .collect()
}

fn floats(v: &Value) -> Vec<f64> {
    v.as_array()
        .unwrap()
        .iter()
        .map(|x| x.as_f64().unwrap())
        .collect()
}

fn close(a: f64, b: f64) -> bool {
    (a - b).abs() <= 1e-12 * a.abs().max(b.abs()) + 1e-15
}

#[test]
fn theil_sen_matches_scipy_theilslopes() {
    let all = fixtures();
    assert!(all.len() >= 10);
    for (name, f) in all {
        let (x, y) = (floats(&f["x"]), floats(&f["y"]));
        let want = &f["theil_sen"];
        let got = theil_sen(&x, &y, want["level"].as_f64().unwrap()).unwrap();
        for (what, g, w) in [
            ("slope", got.slope, &want["slope"]),
            ("intercept", got.intercept, &want["intercept"]),
            ("ci_low", got.ci_low, &want["ci_low"]),
            ("ci_high", got.ci_high, &want["ci_high"]),
        ] {
            let w = w.as_f64().unwrap();
            assert!(close(g, w), "{name}: Theil-Sen {what}: got {g}, scipy {w}");
        }
    }
}

/// scipy reports Kendall's tau-b and its asymptotic p without continuity
/// correction; both follow from S and the tie-corrected Var(S):
/// tau_b = S / sqrt((n0 − n1)(n0 − n2)) and p = 2·P(Z > |S|/sqrt(Var S)).
#[test]
fn mann_kendall_s_and_variance_match_scipy_kendalltau() {
    for (name, f) in fixtures() {
        let (x, y) = (floats(&f["x"]), floats(&f["y"]));
        let mk = mann_kendall(&x, &y).unwrap();
        let n = x.len();
        let n0 = (n * (n - 1) / 2) as f64;
        let tie_pairs = |v: &[f64]| -> f64 {
            let mut s = v.to_vec();
            s.sort_by(f64::total_cmp);
            let mut total = 0.0;
            let mut i = 0;
            while i < s.len() {
                let mut j = i;
                while j < s.len() && s[j] == s[i] {
                    j += 1;
                }
                let t = (j - i) as f64;
                total += t * (t - 1.0) / 2.0;
                i = j;
            }
            total
        };
        let tau_b = mk.s as f64 / ((n0 - tie_pairs(&x)) * (n0 - tie_pairs(&y))).sqrt();
        let want_tau = f["kendall"]["tau_b"].as_f64().unwrap();
        assert!(
            close(tau_b, want_tau),
            "{name}: tau_b {tau_b} vs scipy {want_tau}"
        );
        let p = normal_two_sided_p(mk.s as f64 / mk.var_s.sqrt());
        let want_p = f["kendall"]["p"].as_f64().unwrap();
        assert!(
            (p - want_p).abs() <= 1e-10 * want_p,
            "{name}: p {p} vs scipy {want_p}"
        );
    }
}

/// METHODS.md §10 worked examples, as published.
#[test]
fn mann_kendall_reproduces_published_examples() {
    let cases: [(&str, &[f64], i64, f64); 4] = [
        // Holy Cross note, "by hand": S = 54, Var = 332.67, Z = 2.9058.
        (
            "by hand",
            &[
                12.9, 14.8, 13.2, 15.7, 13.8, 15.6, 12.9, 11.0, 17.3, 15.9, 19.0, 18.3, 20.1, 21.7,
            ],
            54,
            332.67,
        ),
        // US EPA QA/G-9S (2006) p. 109 as quoted: S = 22, Var(S) = 155.33.
        (
            "EPA QA/G-9S",
            &[
                10.0, 10.0, 10.0, 5.0, 10.0, 20.0, 18.0, 17.0, 15.0, 24.0, 15.0,
            ],
            22,
            155.33,
        ),
        // Wisconsin Administrative Code, Table A: S = −5 (Var without ties: 5·4·15/18).
        (
            "Wisconsin Table A",
            &[100.0, 50.0, 85.0, 75.0, 50.0],
            -5,
            f64::NAN,
        ),
        ("ascending", &[1.0, 2.0, 3.0, 4.0], 6, 8.666666666666666),
    ];
    for (name, y, s, var) in cases {
        let x: Vec<f64> = (1..=y.len()).map(|i| i as f64).collect();
        let mk = mann_kendall(&x, y).unwrap();
        assert_eq!(mk.s, s, "{name}");
        if var.is_finite() {
            assert!(
                (mk.var_s - var).abs() < 0.005,
                "{name}: Var(S) {}",
                mk.var_s
            );
        }
    }
    let by_hand = mann_kendall(
        &(1..=14).map(f64::from).collect::<Vec<_>>(),
        &[
            12.9, 14.8, 13.2, 15.7, 13.8, 15.6, 12.9, 11.0, 17.3, 15.9, 19.0, 18.3, 20.1, 21.7,
        ],
    )
    .unwrap();
    assert!((by_hand.z - 2.9058).abs() < 5e-5, "Z = {}", by_hand.z);
    // Kendall, Rank Correlation Methods, Ex. 4.3: ties in both; S = 34, Var = 203.30.
    let x = [1.5, 1.5, 3.0, 4.0, 6.0, 6.0, 6.0, 8.0, 9.5, 9.5, 11.0, 12.0];
    let y = [
        2.5, 2.5, 7.0, 4.5, 1.0, 4.5, 6.0, 11.5, 11.5, 8.5, 8.5, 10.0,
    ];
    let mk = mann_kendall(&x, &y).unwrap();
    assert_eq!(mk.s, 34);
    assert!((mk.var_s - 203.30).abs() < 0.005, "{}", mk.var_s);
}

/// Hollander & Wolfe (1999) example as given in public R documentation
/// (METHODS.md §10 item 6): slope 0.5, 95 % CI [0.3243, 0.75].
#[test]
fn theil_sen_reproduces_published_interval() {
    let y = [
        21.0, 4.0, 9.0, 12.0, 35.0, 18.0, 10.0, 22.0, 24.0, 1.0, 6.0, 8.0, 13.0, 16.0, 19.0,
    ];
    let x = [
        67.0, 28.0, 30.0, 28.0, 52.0, 40.0, 25.0, 37.0, 44.0, 10.0, 14.0, 20.0, 28.0, 40.0, 51.0,
    ];
    let ts = theil_sen(&x, &y, 0.95).unwrap();
    assert_eq!(format!("{:.4}", ts.slope), "0.5000");
    assert_eq!(format!("{:.4}", ts.ci_low), "0.3243");
    assert_eq!(format!("{:.4}", ts.ci_high), "0.7500");
}
