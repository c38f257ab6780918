//! Student t and normal tails and quantiles against R 4.2.2 (`pt`, `qt`,
//! `pnorm`, `qnorm`; Debian r-base-core), fixture
//! tests/fixtures/reference/r/distributions.json.
#![allow(clippy::unwrap_used)]

use serde_json::Value;
use slopewarden::stats::dist::{normal_quantile, normal_two_sided_p, t_quantile, t_two_sided_p};

fn fixture() -> Value {
    let path = concat!(
        env!("CARGO_MANIFEST_DIR"),
        "/tests/fixtures/reference/r/distributions.json"
    );
    serde_json::from_str(&std::fs::read_to_string(path).unwrap()).unwrap()
}

fn rel(got: f64, want: f64) -> f64 {
    if got == want {
        0.0
    } else {
        ((got - want) / want).abs()
    }
}

#[test]
fn two_sided_t_tail_matches_r_pt() {
    let f = fixture();
    let mut worst: f64 = 0.0;
    for case in f["t_two_sided"].as_array().unwrap() {
        let (t, df, want) = (
            case["t"].as_f64().unwrap(),
            case["df"].as_f64().unwrap(),
            case["p_two_sided"].as_f64().unwrap(),
        );
        let got = t_two_sided_p(t, df);
        if want == 0.0 {
            // Below the smallest double in R too (e.g. t = 50, df = 1e5).
            assert!(got < 1e-300, "t={t} df={df}: got {got}");
            continue;
        }
        worst = worst.max(rel(got, want));
        assert!(rel(got, want) < 1e-9, "t={t} df={df}: got {got}, R {want}");
    }
    eprintln!("worst relative error of the t tail against R: {worst:e}");
}

#[test]
fn t_quantile_matches_r_qt() {
    let f = fixture();
    let mut worst = 0.0f64;
    for case in f["t_quantile"].as_array().unwrap() {
        let (p, df, want) = (
            case["prob"].as_f64().unwrap(),
            case["df"].as_f64().unwrap(),
            case["quantile"].as_f64().unwrap(),
        );
        let got = t_quantile(p, df);
        worst = worst.max(rel(got, want));
        assert!(
            rel(got, want) < 1e-9,
            "prob={p} df={df}: got {got}, R {want}"
        );
    }
    eprintln!("worst relative error of the t quantile against R: {worst:e}");
}

#[test]
fn normal_tail_and_quantile_match_r() {
    let f = fixture();
    for case in f["normal_quantile"].as_array().unwrap() {
        let (p, want) = (case["prob"].as_f64().unwrap(), case["z"].as_f64().unwrap());
        assert!(rel(normal_quantile(p), want) < 1e-12, "prob={p}");
    }
    for case in f["normal_two_sided"].as_array().unwrap() {
        let (z, want) = (
            case["z"].as_f64().unwrap(),
            case["p_two_sided"].as_f64().unwrap(),
        );
        let got = normal_two_sided_p(z);
        if want == 0.0 {
            assert!(got < 1e-300, "z={z}: got {got}");
        } else {
            assert!(rel(got, want) < 1e-12, "z={z}: got {got}, R {want}");
        }
    }
}
