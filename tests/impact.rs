//! The impact view on the demo: every correction estimated side by side, the page and its
//! twin agree, and balancing on the indicators moves the pooled estimate toward the
//! documented truth (demo-data/truth.json).

mod common;
use common::*;

use serde_json::Value;

#[test]
fn corrections_move_the_pooled_estimate_toward_the_truth() {
    let addr = start_server(&demo_dir());
    let truth: Value =
        serde_json::from_str(&std::fs::read_to_string(demo_dir().join("truth.json")).unwrap())
            .unwrap();
    for wave in [2, 4] {
        let r = get(addr, &format!("/api/impact?wave={wave}&outcome=trust_parliament&predictor=age&predictor=education&bootstrap=99"));
        assert_eq!(r.status, 200, "{}", r.body);
        let v: Value = serde_json::from_str(&r.body).unwrap();
        let variants = v["variants"].as_array().unwrap();
        assert_eq!(
            variants.len(),
            8,
            "seven corrections and the multilevel projection"
        );
        let pooled = |key: &str| {
            variants.iter().find(|x| x["key"] == key).unwrap()["pooled"]["estimate"]
                .as_f64()
                .unwrap()
        };
        let target = truth["waves"][wave - 1]["trust_universe_mean"]
            .as_f64()
            .unwrap();
        let unweighted = pooled("unweighted");
        let entropy = pooled("entropy");
        // The generator's truth is the mean over eligible countries of each country's mean.
        assert!(
            (entropy - target).abs() < (unweighted - target).abs(),
            "wave {wave}: entropy {entropy}, unweighted {unweighted}, truth {target}"
        );
        let mills = variants.iter().find(|x| x["key"] == "mills-ratio").unwrap();
        assert_eq!(
            mills["coef"].as_array().unwrap().len(),
            4,
            "intercept, two predictors and the ratio"
        );
        // The two-step variant has no bootstrap (its first step would need refitting).
        assert!(mills["p_bootstrap"].is_null());
        for x in variants.iter().filter(|x| {
            x["error"].is_null() && x["key"] != "mills-ratio" && x["key"] != "multilevel-projection"
        }) {
            assert_eq!(
                x["p_bootstrap"].as_array().unwrap().len(),
                x["coef"].as_array().unwrap().len()
            );
        }
    }
    // Population-proportional country shares (log population taken as a logarithm).
    let pop: Value = get_json(addr, "/api/impact?wave=4&outcome=trust_parliament&predictor=age&bootstrap=0&shares=population:log_population");
    assert_eq!(pop["impact"]["shares"]["population"], "log_population");
    assert!(pop["notes"]
        .to_string()
        .contains("proportional to population"));
    let page = get(addr, "/impact?bootstrap=49");
    assert_eq!(page.status, 200);
    assert!(page.body.matches("<svg").count() >= 2);
    for item in ["pooled.svg", "coefficients.svg", "table.csv"] {
        assert_eq!(
            get(addr, &format!("/impact/{item}?bootstrap=0")).status,
            200,
            "{item}"
        );
    }
    let bad = get(addr, "/impact?outcome=shoe_size");
    assert_eq!(bad.status, 400);
    assert!(bad.body.contains("not a survey variable"));
}

fn variant<'a>(r: &'a Value, key: &str) -> &'a Value {
    r["variants"]
        .as_array()
        .unwrap()
        .iter()
        .find(|v| v["key"] == key)
        .unwrap()
}

#[test]
fn impact_command_prints_what_the_api_serves() {
    let addr = start_server(&demo_dir());
    let api: Value = get_json(addr, "/api/impact?wave=4&outcome=trust_parliament&predictor=age&predictor=education&country_indicator=log_gdp_pc&bootstrap=19");
    let cli = demo_json(
        "impact",
        &[
            "--wave",
            "4",
            "--outcome",
            "trust_parliament",
            "--predictors",
            "age,education",
            "--country-indicators",
            "log_gdp_pc",
            "--bootstrap",
            "19",
            "--json",
        ],
    );
    assert_eq!(cli["variants"], api["variants"]);
    assert_eq!(cli["impact"], api["impact"]);
    assert_eq!(cli["terms"], api["terms"]);
    assert_eq!(cli["df"], api["df"]);
    assert_eq!(cli["notes"], api["notes"]);
}

#[test]
fn two_step_variant_reports_the_universe_mean_with_first_step_errors() {
    // Common practice (Heckman 1979; Wooldridge 2010, ch. 19): the pooled mean of the
    // two-step variant is the outcome equation's prediction without the selection term,
    // averaged over the eligible universe; with no country indicator that is the
    // intercept of y = a + theta lambda. The check: it is not the unweighted mean, its
    // standard error differs from the uncorrected one, and p-values use t(G - 1).
    let addr = start_server(&demo_dir());
    let r: Value = get_json(
        addr,
        "/api/impact?wave=4&outcome=trust_parliament&predictor=age&bootstrap=0",
    );
    let mills = variant(&r, "mills-ratio");
    assert!(mills["error"].is_null(), "{}", mills["error"]);
    let unweighted = variant(&r, "unweighted");
    let pm = mills["pooled"]["estimate"].as_f64().unwrap();
    let um = unweighted["pooled"]["estimate"].as_f64().unwrap();
    assert!((pm - um).abs() > 1e-3, "{pm} vs {um}");
    assert!(mills["se_kind"].as_str().unwrap().contains("Murphy-Topel"));
    assert_eq!(
        r["df"].as_u64().unwrap() + 1,
        r["n_countries"].as_u64().unwrap()
    );
    // Every participation indicator in the outcome equation: the warning appears.
    let all = "country_indicator=log_gdp_pc&country_indicator=years_since_transition&country_indicator=democracy_index&country_indicator=log_population&country_indicator=literacy&country_indicator=internet_use&country_indicator=urban_share";
    let r: Value = serde_json::from_str(
        &http(
            addr,
            "GET",
            &format!("/api/impact?wave=4&outcome=trust_parliament&predictor=age&bootstrap=0&factors=&{all}&covariates=log_gdp_pc,years_since_transition,democracy_index,log_population,literacy,internet_use,urban_share"),
            &[],
        )
        .body,
    )
    .unwrap();
    assert!(
        r["notes"].to_string().contains("functional form"),
        "{}",
        r["notes"]
    );
}

#[test]
fn population_entropy_balances_to_the_population_weighted_universe() {
    // Hainmueller (2012), base weights q_i = population: the weighted participant means
    // equal the population-weighted universe's, so every SMD against that universe is 0
    // (the demo's wave 4, every indicator; tests/fixtures/make_twostep_fixtures.py checks
    // with scipy's linprog that an exact balance exists).
    let addr = start_server(&demo_dir());
    let r: Value = get_json(addr, "/api/impact?wave=4&outcome=trust_parliament&predictor=age&bootstrap=0&shares=population:log_population");
    assert!(r["balance_reference"]
        .as_str()
        .unwrap()
        .contains("weighted by population"));
    let entropy = variant(&r, "entropy");
    assert!(entropy["error"].is_null(), "{}", entropy["error"]);
    let smd: Vec<f64> = entropy["smd"]
        .as_array()
        .unwrap()
        .iter()
        .map(|v| v.as_f64().unwrap())
        .collect();
    assert_eq!(smd.len(), r["balance_terms"].as_array().unwrap().len());
    assert!(!smd.is_empty());
    for s in smd {
        assert!(s.abs() < 1e-8, "{s}");
    }
    // The first row says what it shows.
    assert_eq!(
        variant(&r, "unweighted")["label"],
        "Each participating country counts by its population"
    );
    // Multiplying other weights by population afterwards leaves imbalance (shown, not 0).
    let ipw = variant(&r, "inverse-probability");
    let worst = ipw["smd"]
        .as_array()
        .unwrap()
        .iter()
        .map(|v| v.as_f64().unwrap().abs())
        .fold(0.0, f64::max);
    assert!(worst > 0.01, "{worst}");
}

/// A weighting that leaves the largest |SMD| worse than no weighting is flagged in the
/// impact result (inverse probability on the demo's latest wave: about 1.12 against 0.49
/// unweighted, as the balance page reports too); the others are not.
#[test]
fn weighting_worse_than_none_is_flagged_on_the_impact_view() {
    let r = demo_json(
        "impact",
        &[
            "--outcome",
            "trust_parliament",
            "--bootstrap",
            "0",
            "--json",
        ],
    );
    let before = variant(&r, "unweighted")["max_abs_smd"]
        .as_f64()
        .expect("unweighted |SMD|");
    let ipw = variant(&r, "inverse-probability");
    assert!(ipw["max_abs_smd"].as_f64().expect("ipw |SMD|") > before);
    assert_eq!(ipw["worse_than_none"], true);
    assert_eq!(variant(&r, "entropy")["worse_than_none"], false);
    assert_eq!(variant(&r, "unweighted")["worse_than_none"], false);
}
