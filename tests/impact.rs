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
        let r = http(addr, "GET", &format!("/api/impact?wave={wave}&outcome=trust_parliament&predictor=age&predictor=education&bootstrap=99"), &[]);
        assert_eq!(r.status, 200, "{}", r.body);
        let v: Value = serde_json::from_str(&r.body).unwrap();
        let variants = v["variants"].as_array().unwrap();
        assert_eq!(variants.len(), 7);
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
        for x in variants.iter().filter(|x| x["error"].is_null()) {
            assert_eq!(
                x["p_bootstrap"].as_array().unwrap().len(),
                x["coef"].as_array().unwrap().len()
            );
        }
    }
    // Population-proportional country shares (log population taken as a logarithm).
    let pop: Value = serde_json::from_str(&http(addr, "GET", "/api/impact?wave=4&outcome=trust_parliament&predictor=age&bootstrap=0&shares=population:log_population", &[]).body).unwrap();
    assert_eq!(pop["impact"]["shares"]["population"], "log_population");
    assert!(pop["notes"]
        .to_string()
        .contains("proportional to population"));
    let page = http(addr, "GET", "/impact?bootstrap=49", &[]);
    assert_eq!(page.status, 200);
    assert!(page.body.matches("<svg").count() >= 2);
    for item in ["pooled.svg", "coefficients.svg", "table.csv"] {
        assert_eq!(
            http(addr, "GET", &format!("/impact/{item}?bootstrap=0"), &[]).status,
            200,
            "{item}"
        );
    }
    let bad = http(addr, "GET", "/impact?outcome=shoe_size", &[]);
    assert_eq!(bad.status, 400);
    assert!(bad.body.contains("not a survey variable"));
}
