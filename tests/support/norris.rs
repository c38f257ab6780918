//! NIST StRD Norris (tests/fixtures/nist/norris.csv, certified values in
//! norris.certified.json), as the tests that deliver it in files read it.

/// The 36 (x, y) pairs as written in the fixture.
pub fn points() -> Vec<(String, String)> {
    let path = concat!(
        env!("CARGO_MANIFEST_DIR"),
        "/tests/fixtures/nist/norris.csv"
    );
    std::fs::read_to_string(path)
        .unwrap()
        .lines()
        .skip(1)
        .map(|l| {
            let (x, y) = l.split_once(',').unwrap();
            (x.trim().to_string(), y.trim().to_string())
        })
        .collect()
}

/// A certified parameter estimate (`B0`, `B1`).
#[allow(dead_code)]
pub fn certified(name: &str) -> f64 {
    let path = concat!(
        env!("CARGO_MANIFEST_DIR"),
        "/tests/fixtures/nist/norris.certified.json"
    );
    let v: serde_json::Value =
        serde_json::from_str(&std::fs::read_to_string(path).unwrap()).unwrap();
    v["parameters"][name]["estimate"].as_f64().unwrap()
}
