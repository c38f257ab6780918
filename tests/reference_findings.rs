//! Findings against outside references: the scores of candidate corrections
//! of a suspicious record (findings::causes) and the leverage of a
//! high-leverage record after more samples (findings::advice), checked
//! against R's stats package.
//!
//! The fixtures under tests/fixtures/findings/ are written by
//! tests/reference/findings_fixtures.R (`Rscript
//! tests/reference/findings_fixtures.R`). Their series are invented inputs;
//! every expected number (fitted value, standard errors, t, p, hat values,
//! the smallest number of added samples, the ranking) was computed by R.
#![allow(clippy::unwrap_used)]

use std::path::Path;

use serde_json::Value;
use slopewarden::findings::advice::{
    AdviceInput, Spread, advise, cutoff, fill_needed, replicates_needed,
};
use slopewarden::findings::causes::{
    CauseInput, CauseKind, Change, MAX_LEVERAGE_FACTOR, Ranked, Scored, XKind, rank_causes,
    score_candidates,
};
use slopewarden::stats::dist::t_quantile;
use slopewarden::stats::{LineFit, Transform, fit_line, transform_points};

fn load(name: &str) -> Value {
    let path = Path::new(env!("CARGO_MANIFEST_DIR"))
        .join("tests/fixtures/findings")
        .join(name);
    serde_json::from_str(&std::fs::read_to_string(path).unwrap()).unwrap()
}

fn floats(v: &Value) -> Vec<f64> {
    v.as_array()
        .unwrap()
        .iter()
        .map(|x| x.as_f64().unwrap())
        .collect()
}

fn num(v: &Value, key: &str) -> f64 {
    v[key]
        .as_f64()
        .unwrap_or_else(|| panic!("{key} missing in {v}"))
}

/// |got − want| ≤ rel·|want| + abs.
fn close(got: f64, want: f64, rel: f64, abs: f64) -> bool {
    (got - want).abs() <= rel * want.abs() + abs
}

#[track_caller]
fn assert_close(what: &str, got: f64, want: f64, rel: f64, abs: f64) {
    assert!(
        close(got, want, rel, abs),
        "{what}: got {got:e}, R gives {want:e} (rel {:e})",
        ((got - want) / want).abs()
    );
}

fn kind_name(k: CauseKind) -> &'static str {
    match k {
        CauseKind::DecimalSlip => "decimal_slip",
        CauseKind::UnitMixUp => "unit",
        CauseKind::Sign => "sign",
        CauseKind::SwappedDigitsY => "swap_y",
        CauseKind::SwappedDigitsX => "swap_x",
        CauseKind::DecimalSlipX => "decimal_slip_x",
        CauseKind::WrongYear => "wrong_year",
        CauseKind::OtherSeries => "other_series",
    }
}

fn series_name(c: &Change) -> Option<&str> {
    match c {
        Change::OtherSeries { series } => Some(series),
        _ => None,
    }
}

/// One case of causes.json, with its fits built by the crate from the
/// case's data on the fitted scale.
struct CauseCase {
    json: Value,
    transform: Transform,
    fit: LineFit,
    others: Vec<(String, LineFit)>,
}

impl CauseCase {
    fn all() -> Vec<CauseCase> {
        let fixture = load("causes.json");
        let cases = fixture["cases"].as_array().unwrap().clone();
        assert!(cases.len() >= 9, "fixture lost cases");
        cases.into_iter().map(CauseCase::new).collect()
    }

    fn named(name: &str) -> CauseCase {
        CauseCase::all()
            .into_iter()
            .find(|c| c.json["name"] == name)
            .unwrap_or_else(|| panic!("no case {name}"))
    }

    fn new(json: Value) -> CauseCase {
        let transform = Transform::from_name(json["transform"].as_str().unwrap()).unwrap();
        let level = num(&json, "level");
        let fit_of = |s: &Value| {
            let (x, y) = transform_points(&floats(&s["x"]), &floats(&s["y"]), transform).unwrap();
            fit_line(&x, &y, level).unwrap()
        };
        let fit = fit_of(&json["series"]);
        let others = json["others"]
            .as_array()
            .unwrap()
            .iter()
            .map(|o| (o["name"].as_str().unwrap().to_string(), fit_of(o)))
            .collect();
        CauseCase {
            json,
            transform,
            fit,
            others,
        }
    }

    fn name(&self) -> &str {
        self.json["name"].as_str().unwrap()
    }

    fn with_input<R>(&self, f: impl FnOnce(&CauseInput<'_>) -> R) -> R {
        let rec = &self.json["record"];
        let others: Vec<(&str, &LineFit)> =
            self.others.iter().map(|(n, f)| (n.as_str(), f)).collect();
        let input = CauseInput {
            fit_without: &self.fit,
            transform: self.transform,
            x: num(rec, "x"),
            y: num(rec, "y"),
            x_raw: rec["x_raw"].as_str().unwrap(),
            y_raw: rec["y_raw"].as_str().unwrap(),
            x_kind: match self.json["x_kind"].as_str().unwrap() {
                "decimal-year" => XKind::DecimalYear,
                "distance" => XKind::Distance,
                other => panic!("x_kind {other}"),
            },
            unit: self.json["unit"].as_str(),
            x_unit: None,
            others: &others,
            max: self.json["max"].as_u64().unwrap() as usize,
        };
        f(&input)
    }

    fn scored(&self) -> Scored {
        self.with_input(score_candidates).unwrap()
    }

    fn ranked(&self) -> Ranked {
        self.with_input(rank_causes)
    }

    fn fit_for(&self, series: Option<&str>) -> &LineFit {
        match series {
            None => &self.fit,
            Some(name) => {
                &self
                    .others
                    .iter()
                    .find(|(n, _)| n == name)
                    .unwrap_or_else(|| panic!("no series {name}"))
                    .1
            }
        }
    }
}

/// The prediction of one candidate against R 4.x stats::predict.lm(...,
/// interval = "prediction", level = 0.95, se.fit = TRUE) and 2 * pt(-|t|, df).
#[track_caller]
fn check_prediction(
    what: &str,
    fit: &LineFit,
    transform: Transform,
    x: f64,
    y: f64,
    score: &slopewarden::findings::causes::Score,
    r: &Value,
) {
    let (tx, _) = transform.apply(0, x, y.abs().max(1.0)).unwrap();
    let df = r["df"].as_u64().unwrap() as usize;
    assert_eq!(score.df, df, "{what}: df (R pr$df)");
    // R: pr$fit[, "fit"]
    assert_close(
        &format!("{what}: fitted value"),
        fit.predict(tx),
        num(r, "fit"),
        1e-9,
        1e-12,
    );
    // R: sqrt(pr$se.fit^2 + pr$residual.scale^2)
    let se = fit.se_prediction_at(tx);
    assert_close(
        &format!("{what}: se_pred"),
        se,
        num(r, "se_pred"),
        1e-10,
        0.0,
    );
    // R: pr$residual.scale, pr$se.fit
    assert_close(
        &format!("{what}: residual scale"),
        fit.residual_sd,
        num(r, "residual_scale"),
        1e-10,
        0.0,
    );
    assert_close(
        &format!("{what}: se of the fit"),
        fit.se_mean_at(tx),
        num(r, "se_fit"),
        1e-10,
        0.0,
    );
    // R: pr$fit[, "lwr"], pr$fit[, "upr"] (95 % prediction interval)
    let half = t_quantile(0.975, df as f64) * se;
    let scale = num(r, "fit").abs() + half;
    assert_close(
        &format!("{what}: lower prediction limit"),
        fit.predict(tx) - half,
        num(r, "lwr"),
        0.0,
        1e-10 * scale,
    );
    assert_close(
        &format!("{what}: upper prediction limit"),
        fit.predict(tx) + half,
        num(r, "upr"),
        0.0,
        1e-10 * scale,
    );
    // R: (y' - fit) / se_pred
    assert_close(&format!("{what}: t"), score.t, num(r, "t"), 1e-9, 1e-12);
    // R: 2 * pt(-abs(t), df)
    assert_close(&format!("{what}: p"), score.p, num(r, "p"), 1e-9, 1e-300);
    // R: pr$se.fit^2 / pr$residual.scale^2
    assert_close(
        &format!("{what}: leverage factor"),
        score.leverage_factor,
        num(r, "leverage_factor"),
        1e-9,
        0.0,
    );
}

/// Every candidate tried, in order, against R: the same corrections (kind,
/// x, y, series) and the same prediction t and p.
#[test]
fn candidate_scores_match_r_predict_lm_and_pt() {
    let mut compared = 0;
    for case in CauseCase::all() {
        let name = case.name().to_string();
        let got = case.scored();
        let want = case.json["candidates"].as_array().unwrap();
        assert_eq!(
            got.candidates.len(),
            want.len(),
            "{name}: number of candidates scored; got {:#?}",
            got.candidates
                .iter()
                .map(|c| (kind_name(c.kind), c.x, c.y))
                .collect::<Vec<_>>()
        );
        assert_eq!(
            got.off_scale as u64,
            case.json["off_scale"].as_u64().unwrap(),
            "{name}: off-scale count"
        );
        match (&got.as_written, &case.json["as_written"]) {
            (Some(s), r) if r.is_object() => {
                let rec = &case.json["record"];
                check_prediction(
                    &format!("{name} as written"),
                    &case.fit,
                    case.transform,
                    num(rec, "x"),
                    num(rec, "y"),
                    s,
                    r,
                );
            }
            (g, r) => panic!("{name}: as written: got {g:?}, R {r}"),
        }
        for (i, (c, r)) in got.candidates.iter().zip(want).enumerate() {
            let what = format!("{name} #{i} {}", kind_name(c.kind));
            assert_eq!(kind_name(c.kind), r["kind"].as_str().unwrap(), "{what}");
            assert_eq!(series_name(&c.change), r["series"].as_str(), "{what}");
            assert_close(&format!("{what}: x"), c.x, num(r, "x"), 1e-15, 0.0);
            assert_close(&format!("{what}: y"), c.y, num(r, "y"), 1e-15, 0.0);
            let fit = case.fit_for(series_name(&c.change));
            check_prediction(
                &what,
                fit,
                case.transform,
                c.x,
                c.y,
                &c.score,
                &r["prediction"],
            );
            compared += 1;
        }
    }
    assert!(compared > 100, "only {compared} candidates compared");
}

/// The listed candidates, their order and the p-value needed, against the
/// ranking the R script derives from R's own p-values with the rule
/// documented in causes.rs.
#[test]
fn ranking_matches_the_rule_applied_to_r_p_values() {
    for case in CauseCase::all() {
        let name = case.name().to_string();
        let got = case.ranked();
        assert_eq!(got.unavailable, None, "{name}");
        assert_close(
            &format!("{name}: needed p"),
            got.needed_p,
            num(&case.json, "needed_p"),
            1e-9,
            0.0,
        );
        let want = case.json["ranked"].as_array().unwrap();
        let got_keys: Vec<_> = got
            .candidates
            .iter()
            .map(|c| (kind_name(c.kind), series_name(&c.change), c.x, c.y))
            .collect();
        assert_eq!(got_keys.len(), want.len(), "{name}: {got_keys:?}");
        for (g, r) in got_keys.iter().zip(want) {
            assert_eq!(g.0, r["kind"].as_str().unwrap(), "{name}");
            assert_eq!(g.1, r["series"].as_str(), "{name}");
            assert!(close(g.2, num(r, "x"), 1e-15, 0.0), "{name}");
            assert!(close(g.3, num(r, "y"), 1e-15, 0.0), "{name}");
        }
        match case.json["expect_first"].as_str() {
            Some(kind) => assert_eq!(got_keys.first().map(|k| k.0), Some(kind), "{name}"),
            None => assert!(got_keys.is_empty(), "{name}: {got_keys:?}"),
        }
    }
}

#[test]
fn value_entered_ten_times_too_large_ranks_the_decimal_slip_first() {
    let r = CauseCase::named("decimal_slip").ranked();
    let first = &r.candidates[0];
    assert_eq!(first.kind, CauseKind::DecimalSlip);
    assert_eq!(first.change, Change::ScaleY { power: -1 });
    assert!(
        first
            .label
            .starts_with("decimal point slipped 1 place: 4.73 mg/L instead of 47.3 mg/L"),
        "{}",
        first.label
    );
}

#[test]
fn transposed_digits_rank_the_swap_first() {
    let r = CauseCase::named("digit_swap").ranked();
    let first = &r.candidates[0];
    assert_eq!(first.kind, CauseKind::SwappedDigitsY);
    assert_eq!(
        first.change,
        Change::SwapY {
            written: "1.44".to_string(),
            proposed: "4.14".to_string()
        }
    );
    assert!(
        first
            .label
            .starts_with("adjacent digits transposed (\"4.14\" typed as \"1.44\"): 4.14 µg/L"),
        "{}",
        first.label
    );
    // The sign candidate (−1.44) cannot be logged: counted, not scored.
    assert_eq!(r.off_scale, 1);
}

#[test]
fn minus_typed_by_mistake_ranks_the_sign_first() {
    let r = CauseCase::named("sign").ranked();
    assert_eq!(r.candidates[0].kind, CauseKind::Sign);
    assert_eq!(r.candidates[0].y, 10.9);
}

#[test]
fn value_that_fits_another_series_ranks_that_series_first() {
    let r = CauseCase::named("other_series").ranked();
    let first = &r.candidates[0];
    assert_eq!(first.kind, CauseKind::OtherSeries);
    assert_eq!(series_name(&first.change), Some("MW-B"));
    assert!(first.label.contains("MW-B"), "{}", first.label);
}

#[test]
fn clean_record_yields_no_candidates() {
    let case = CauseCase::named("clean");
    let r = case.ranked();
    assert!(r.candidates.is_empty(), "{:#?}", r.candidates);
    assert!(r.as_written.unwrap().p > 0.05);
    assert!(r.scored > 10, "candidates were tried");
}

#[test]
fn micrograms_entered_for_milligrams_ranks_the_unit_mix_up_first() {
    let r = CauseCase::named("unit_mixup").ranked();
    let first = &r.candidates[0];
    assert_eq!(first.kind, CauseKind::UnitMixUp);
    assert_eq!(first.change, Change::ScaleY { power: -3 });
    assert!(
        first.label.starts_with("entered in µg/L instead of mg/L"),
        "{}",
        first.label
    );
}

#[test]
fn record_dated_a_year_early_ranks_the_wrong_year_first() {
    let r = CauseCase::named("wrong_year").ranked();
    let first = &r.candidates[0];
    assert_eq!(first.kind, CauseKind::WrongYear);
    assert_eq!(first.change, Change::ShiftYears { years: 1 });
    assert_eq!(first.x, 2019.5);
}

#[test]
fn same_corrected_value_from_two_causes_is_marked_as_a_tie() {
    let r = CauseCase::named("tie").ranked();
    assert_eq!(r.candidates.len(), 2);
    assert!(r.candidates.iter().all(|c| c.tied));
    assert_eq!(r.candidates[0].score.p, r.candidates[1].score.p);
}

/// A far-away x "fits" only because the prediction interval is wide there.
/// R's own numbers show such a candidate passing the p rule; it must still
/// not be listed.
#[test]
fn far_away_x_is_not_listed_however_wide_its_interval() {
    let case = CauseCase::named("far_x_guard");
    let needed = num(&case.json, "needed_p");
    let wide = case.json["candidates"]
        .as_array()
        .unwrap()
        .iter()
        .filter(|c| {
            let pr = &c["prediction"];
            num(pr, "p") >= needed && num(pr, "leverage_factor") > MAX_LEVERAGE_FACTOR
        })
        .count();
    assert!(wide >= 1, "the case no longer exercises the rule");
    let r = case.ranked();
    assert!(r.candidates.is_empty(), "{:#?}", r.candidates);
}

// ---- advice ----------------------------------------------------------------

fn advice_cases() -> Vec<Value> {
    let fixture = load("advice.json");
    let cases = fixture["cases"].as_array().unwrap().clone();
    assert!(cases.len() >= 4, "fixture lost cases");
    cases
}

fn fitted(transform: Transform, x: &[f64]) -> Vec<f64> {
    let ones = vec![1.0; x.len()];
    transform_points(x, &ones, transform).unwrap().0
}

/// Leverage after m replicates and after m gap-filling samples, closed
/// form, against R 4.x stats::hatvalues(lm(y ~ x)) on the augmented data.
#[test]
fn leverage_after_added_samples_matches_r_hatvalues() {
    let mut rows = 0;
    for case in advice_cases() {
        let name = case["name"].as_str().unwrap();
        let transform = Transform::from_name(case["transform"].as_str().unwrap()).unwrap();
        let x = fitted(transform, &floats(&case["x"]));
        let rec = case["record"].as_u64().unwrap() as usize;
        let edge = fitted(transform, &[num(&case, "edge")])[0];
        let s = Spread::of(&x).unwrap();
        // R: hatvalues(lm(y ~ x))[record]
        assert_close(
            &format!("{name}: leverage now"),
            s.leverage(x[rec]).unwrap(),
            num(&case, "leverage"),
            1e-10,
            0.0,
        );
        for row in case["table"].as_array().unwrap() {
            let m = row["m"].as_u64().unwrap() as usize;
            // R: hatvalues after rep(x0, m) appended
            assert_close(
                &format!("{name}: m = {m} replicates"),
                s.leverage_with_replicates(x[rec], m).unwrap(),
                num(row, "h_replicates"),
                1e-10,
                0.0,
            );
            // R: hatvalues after seq(edge, x0, length.out = m + 2) without its ends
            assert_close(
                &format!("{name}: m = {m} filling the gap"),
                s.leverage_with_fill(x[rec], edge, m).unwrap(),
                num(row, "h_fill"),
                1e-10,
                0.0,
            );
            assert_close(
                &format!("{name}: cutoff at n + {m}"),
                cutoff(num(&case, "multiplier"), x.len() + m),
                num(row, "cutoff"),
                1e-15,
                0.0,
            );
            rows += 1;
        }
    }
    assert!(rows > 40, "only {rows} rows compared");
}

/// The smallest number of added samples, against R's search over m with
/// hatvalues.
#[test]
fn sample_counts_match_a_search_over_r_hatvalues() {
    for case in advice_cases() {
        let name = case["name"].as_str().unwrap();
        let transform = Transform::from_name(case["transform"].as_str().unwrap()).unwrap();
        let raw = floats(&case["x"]);
        let record = case["record"].as_u64().unwrap() as usize;
        let multiplier = num(&case, "multiplier");
        let bound = case["bound"].as_u64().unwrap() as usize;
        let a = advise(&AdviceInput {
            x: &raw,
            record,
            transform,
            multiplier,
            bound,
        })
        .unwrap();
        let want = |key: &str| case[key].as_u64().map(|v| v as usize);
        assert_eq!(a.replicates, want("replicates"), "{name}: replicates");
        assert_eq!(a.fill_gap, want("fill_gap"), "{name}: fill_gap");
        assert_eq!(a.edge_x, Some(num(&case, "edge")), "{name}: edge");
        assert_close(
            &format!("{name}: leverage"),
            a.leverage,
            num(&case, "leverage"),
            1e-10,
            0.0,
        );
        assert_close(
            &format!("{name}: cutoff"),
            a.cutoff,
            num(&case, "cutoff"),
            1e-15,
            0.0,
        );
        // The pieces agree with the whole.
        let x = fitted(transform, &raw);
        let s = Spread::of(&x).unwrap();
        assert_eq!(
            replicates_needed(&s, x[record], multiplier, bound),
            a.replicates
        );
        let edge = fitted(transform, &[num(&case, "edge")])[0];
        assert_eq!(
            fill_needed(&s, x[record], edge, multiplier, bound),
            a.fill_gap
        );
        let sentence = a.sentence("");
        if let (Some(r), Some(f)) = (a.replicates, a.fill_gap) {
            assert!(sentence.contains(&format!("{r} more")), "{sentence}");
            assert!(
                sentence.contains(&format!("or {f} spread evenly")),
                "{sentence}"
            );
        }
        if transform == Transform::LogX {
            assert!(sentence.contains("on the log scale"), "{sentence}");
        }
    }
}

/// The stricter 3p/n rule needs fewer samples than 2p/n for the same record
/// (R's counts, both rules).
#[test]
fn stricter_multiplier_needs_fewer_samples() {
    let cases = advice_cases();
    let get = |name: &str| cases.iter().find(|c| c["name"] == name).unwrap();
    let (two, three) = (get("late_sample_2pn"), get("late_sample_3pn"));
    assert!(three["replicates"].as_u64() < two["replicates"].as_u64());
    assert!(three["fill_gap"].as_u64() < two["fill_gap"].as_u64());
    let raw = floats(&two["x"]);
    let a3 = advise(&AdviceInput {
        x: &raw,
        record: 16,
        transform: Transform::None,
        multiplier: 3.0,
        bound: 300,
    })
    .unwrap();
    assert!(
        a3.sentence("").contains("3p/n cutoff"),
        "{}",
        a3.sentence("")
    );
}
