//! `slopewarden fit` as a user runs it: the real binary on real files.
#![allow(clippy::unwrap_used)]

use std::path::Path;
use std::process::Command;

use serde_json::Value;

fn run(args: &[&str]) -> (i32, String, String) {
    let out = Command::new(env!("CARGO_BIN_EXE_slopewarden"))
        .args(args)
        .output()
        .unwrap();
    (
        out.status.code().unwrap_or(-1),
        String::from_utf8(out.stdout).unwrap(),
        String::from_utf8(out.stderr).unwrap(),
    )
}

fn write(dir: &Path, name: &str, text: &str) -> String {
    let p = dir.join(name);
    std::fs::write(&p, text).unwrap();
    p.to_string_lossy().into_owned()
}

fn keys(v: &Value) -> Vec<String> {
    let mut k: Vec<String> = v.as_object().unwrap().keys().cloned().collect();
    k.sort();
    k
}

fn sorted(names: &[&str]) -> Vec<String> {
    let mut v: Vec<String> = names.iter().map(|s| s.to_string()).collect();
    v.sort();
    v
}

/// Anscombe (1973) set IV (R's datasets::anscombe): the JSON contract, with
/// null for the leave-one-out measures of the point at x = 19 (leverage 1).
#[test]
fn json_has_the_contract_fields_and_null_where_undefined() {
    let dir = tempfile::tempdir().unwrap();
    let x = [8, 8, 8, 8, 8, 8, 8, 19, 8, 8, 8];
    let y = [
        6.58, 5.76, 7.71, 8.84, 8.47, 7.04, 5.25, 12.50, 5.56, 7.91, 6.89,
    ];
    let mut csv = String::from("site,x,y\n");
    for (a, b) in x.iter().zip(y) {
        csv.push_str(&format!("W1,{a},{b}\n"));
    }
    let file = write(dir.path(), "anscombe4.csv", &csv);
    let (code, out, err) = run(&["fit", &file, "--json"]);
    assert_eq!(code, 0, "{err}");
    let v: Value = serde_json::from_str(&out).unwrap();
    assert_eq!(keys(&v), sorted(&["fit", "points", "robust"]));
    assert_eq!(
        keys(&v["fit"]),
        sorted(&[
            "n",
            "intercept",
            "slope",
            "intercept_se",
            "slope_se",
            "slope_t",
            "slope_p",
            "slope_ci_low",
            "slope_ci_high",
            "r_squared",
            "residual_sd",
            "df"
        ])
    );
    let points = v["points"].as_array().unwrap();
    assert_eq!(points.len(), 11);
    assert_eq!(
        keys(&points[0]),
        sorted(&[
            "x",
            "y",
            "leverage",
            "standardized_residual",
            "studentized_residual",
            "cooks_distance",
            "dffits",
            "dfbetas_intercept",
            "dfbetas_slope",
            "covariance_ratio"
        ])
    );
    assert_eq!(
        keys(&v["robust"]),
        sorted(&[
            "theil_sen_slope",
            "theil_sen_ci_low",
            "theil_sen_ci_high",
            "mann_kendall_s",
            "mann_kendall_z",
            "mann_kendall_p"
        ])
    );
    // Published: slope 0.500, intercept 3.00 (Anscombe 1973).
    assert_eq!(
        format!("{:.3}", v["fit"]["slope"].as_f64().unwrap()),
        "0.500"
    );
    assert_eq!(points[7]["leverage"].as_f64(), Some(1.0));
    for field in [
        "studentized_residual",
        "cooks_distance",
        "dffits",
        "dfbetas_slope",
        "covariance_ratio",
    ] {
        assert!(
            points[7][field].is_null(),
            "{field} should be null at leverage 1"
        );
    }
    assert!(points[0]["studentized_residual"].is_number());
}

#[test]
fn bad_value_names_file_line_and_column_and_exits_2() {
    let dir = tempfile::tempdir().unwrap();
    let file = write(
        dir.path(),
        "well 3 (copy).csv",
        "x,y\n2020.1,4.2\n2020.4,4.1\n2020.6,1e400\n",
    );
    let (code, out, err) = run(&["fit", &file]);
    assert_eq!(code, 2);
    assert!(out.is_empty());
    assert!(
        err.contains("well 3 (copy).csv:4:2: column `y` holds `1e400`"),
        "{err}"
    );
}

#[test]
fn log_transform_of_zero_names_the_record() {
    let dir = tempfile::tempdir().unwrap();
    let file = write(dir.path(), "t.csv", "d,c\n10,5\n20,0\n30,2\n40,1\n");
    let (code, _, err) = run(&["fit", &file, "--x", "d", "--y", "c", "--transform", "log-y"]);
    assert_eq!(code, 2);
    assert!(err.contains("t.csv:3:2: y = 0 is not positive"), "{err}");
}

#[test]
fn too_few_points_is_explained() {
    let dir = tempfile::tempdir().unwrap();
    let file = write(dir.path(), "two.csv", "x,y\n1,2\n2,3\n");
    let (code, _, err) = run(&["fit", &file]);
    assert_eq!(code, 2);
    assert!(err.contains("at least 3 are needed"), "{err}");
}

/// The bundled example: the summary names the planted records and the cutoffs
/// they cross, with sources, and carries the caution.
#[test]
fn summary_lists_the_planted_problems_of_the_demo_transect() {
    let file = concat!(
        env!("CARGO_MANIFEST_DIR"),
        "/demo-data/alder-brook-north-transect.csv"
    );
    let (code, out, err) = run(&[
        "fit",
        file,
        "--x",
        "distance_m",
        "--y",
        "lead_mg_kg",
        "--transform",
        "log-y",
    ]);
    assert_eq!(code, 0, "{err}");
    let far = out
        .lines()
        .find(|l| l.trim_start().starts_with("26 "))
        .unwrap();
    assert!(far.contains("1850") && far.contains("h>3p/n"), "{far}");
    let slip = out
        .lines()
        .find(|l| l.trim_start().starts_with("11 "))
        .unwrap();
    assert!(slip.contains("5180") && slip.contains("t>Bonf"), "{slip}");
    assert!(out.contains("Hoaglin & Welsch") || out.contains("Velleman & Welsch"));
    assert!(out.contains("Theil-Sen slope"));
    assert!(out.contains("not a finding about the site or a compliance determination"));
}
