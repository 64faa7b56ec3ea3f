//! The analysis pages: each answers with its tables and charts, its JSON twin and its
//! downloads; the numbers equal those of `gapwise fit`; the components agree with numpy.

mod common;
use common::*;

use serde_json::Value;

fn get_json(addr: std::net::SocketAddr, path: &str) -> Value {
    let r = get(addr, path);
    assert_eq!(r.status, 200, "{path}: {}", r.body);
    serde_json::from_str(&r.body).unwrap()
}

#[test]
fn every_page_answers_with_tables_charts_and_downloads() {
    let addr = start_server(&demo_dir());
    let pages: [(&str, &[&str]); 4] = [
        (
            "/coverage",
            &[
                "map.svg",
                "spreads.svg",
                "points.csv",
                "loadings.csv",
                "rates.csv",
            ],
        ),
        (
            "/model",
            &[
                "propensity.svg",
                "overlap.svg",
                "coefficients.csv",
                "weights.csv",
            ],
        ),
        ("/balance", &["smd.svg", "table.csv"]),
        ("/sensitivity", &["trimming.svg", "table.csv"]),
    ];
    for (page, items) in pages {
        for query in ["", "?wave=2&model=firth&weighting=raking&trim=0.95"] {
            let r = get(addr, &format!("{page}{query}"));
            assert_eq!(r.status, 200, "{page}{query}: {}", r.body);
            assert!(r.body.contains("<table"), "{page} has no table");
            assert!(r.body.contains("<svg"), "{page} has no chart");
            assert!(
                r.body
                    .contains("Weights correct only for what the indicators measure"),
                "{page} lacks the cautions"
            );
            assert!(!r.body.contains("NaN"), "{page}{query} shows NaN");
            get_json(addr, &format!("/api{page}{query}"));
            for item in items {
                let a = get(addr, &format!("{page}/{item}{query}"));
                assert_eq!(a.status, 200, "{page}/{item}");
                if item.ends_with(".svg") {
                    assert_eq!(a.header("content-type"), Some("image/svg+xml"));
                    assert!(
                        a.body.contains("<svg") && !a.body.contains("could not be drawn"),
                        "{page}/{item}"
                    );
                } else {
                    assert!(a
                        .header("content-type")
                        .unwrap_or("")
                        .starts_with("text/csv"));
                    assert!(a.body.lines().count() > 1, "{page}/{item} is empty");
                }
            }
        }
    }
    assert_eq!(get(addr, "/balance/nothing.txt").status, 404);
    let bad = get(addr, "/balance?weighting=magic");
    assert_eq!(bad.status, 400);
    assert!(bad.body.contains("weighting must be one of"));
    assert_eq!(get(addr, "/model?wave=17").status, 404);
    assert_eq!(get(addr, "/api/balance?wave=17").status, 404);
    // A submitted form with no indicator ticked: well-formed settings that the data cannot
    // answer (no participation model without indicators) are 422 (RFC 9110), on the page,
    // its twin and its downloads alike.
    for route in ["/model", "/api/model", "/balance/table.csv", "/sensitivity"] {
        let r = get(addr, &format!("{route}?form=1"));
        assert_eq!(r.status, 422, "{route}: {}", r.body);
        assert!(r.body.contains("choose at least one indicator"), "{route}");
    }
}

#[test]
fn page_numbers_equal_the_command_line() {
    let addr = start_server(&demo_dir());
    for (wave, model, weighting) in [
        ("4", "logit", "entropy"),
        ("2", "firth", "covariate-balancing-gmm"),
        ("3", "probit", "inverse-probability"),
    ] {
        let page = get_json(
            addr,
            &format!("/api/balance?wave={wave}&model={model}&weighting={weighting}"),
        );
        let cli = demo_json(
            "fit",
            &[
                "--wave",
                wave,
                "--model",
                model,
                "--weighting",
                weighting,
                "--json",
            ],
        );
        let page_rows = page["rows"].as_array().unwrap();
        let cli_rows = cli["balance"].as_array().unwrap();
        assert_eq!(page_rows.len(), cli_rows.len());
        for (p, c) in page_rows.iter().zip(cli_rows) {
            assert_eq!(p["covariate"], c["covariate"]);
            for key in [
                "smd_before",
                "smd_after",
                "variance_ratio_before",
                "variance_ratio_after",
            ] {
                assert_eq!(
                    p[key], c[key],
                    "{wave} {weighting} {} {key}",
                    p["covariate"]
                );
            }
        }
        let model_page = get_json(
            addr,
            &format!("/api/model?wave={wave}&model={model}&weighting={weighting}"),
        );
        assert_eq!(model_page["model"]["coef"], cli["model"]["coef"]);
        assert_eq!(
            model_page["weighting"]["effective_n"],
            cli["weighting"]["effective_n"]
        );
    }
}

#[test]
fn components_agree_with_numpy_up_to_sign() {
    // Fixture: numpy.linalg.eigh of the correlation matrix of the demo's wave-4 eligible
    // universe (tests/fixtures/make_fixtures.py, eligibility recomputed independently).
    let reference: Value = serde_json::from_str(
        &std::fs::read_to_string(
            std::path::Path::new(env!("CARGO_MANIFEST_DIR")).join("tests/fixtures/reference.json"),
        )
        .unwrap(),
    )
    .unwrap();
    let fx = &reference["demo_pca_wave4"];
    let addr = start_server(&demo_dir());
    let c = get_json(addr, "/api/coverage?wave=4");
    assert_eq!(c["n_eligible"], fx["n_eligible"]);
    let eigen: Vec<f64> = c["components"]
        .as_array()
        .unwrap()
        .iter()
        .map(|k| k["eigenvalue"].as_f64().unwrap())
        .collect();
    for (a, e) in eigen.iter().zip(fx["eigenvalues"].as_array().unwrap()) {
        assert!((a - e.as_f64().unwrap()).abs() < 1e-9, "{a} vs {e}");
    }
    for k in 0..2 {
        let ours: Vec<f64> = c["loadings"]
            .as_array()
            .unwrap()
            .iter()
            .map(|l| l["values"][k].as_f64().unwrap())
            .collect();
        let theirs: Vec<f64> = fx["loadings"][k]
            .as_array()
            .unwrap()
            .iter()
            .map(|v| v.as_f64().unwrap())
            .collect();
        let sign = if ours.iter().zip(&theirs).map(|(a, b)| a * b).sum::<f64>() < 0.0 {
            -1.0
        } else {
            1.0
        };
        for (a, b) in ours.iter().zip(&theirs) {
            assert!((a - sign * b).abs() < 1e-8, "component {k}: {a} vs {b}");
        }
        let codes: Vec<&str> = fx["codes"]
            .as_array()
            .unwrap()
            .iter()
            .map(|v| v.as_str().unwrap())
            .collect();
        for p in c["points"].as_array().unwrap() {
            let i = codes
                .iter()
                .position(|code| *code == p["id"].as_str().unwrap())
                .expect("same countries");
            let ours = p[if k == 0 { "pc1" } else { "pc2" }].as_f64().unwrap();
            let theirs = fx["scores"][k][i].as_f64().unwrap();
            assert!(
                (ours - sign * theirs).abs() < 1e-8,
                "{} component {k}",
                p["id"]
            );
        }
    }
}

/// The model page names its terms by their labels (the manifest's, as on the real-indicator
/// frame, or derived from the column names), never by the raw names, while the JSON twin and
/// the CSV keep both (common practice: raw names for scripts, labels for people).
#[test]
fn model_terms_are_named_by_their_labels() {
    let dir = std::path::Path::new(env!("CARGO_MANIFEST_DIR")).join("tests/fixtures/real_frame");
    let addr = start_server(&dir);
    let page = get(addr, "/model");
    assert_eq!(page.status, 200, "{}", page.body);
    let rows: Vec<&str> = page
        .body
        .split("<th scope=\"row\">")
        .skip(1)
        .map(|s| s.split('<').next().unwrap_or(""))
        .collect();
    assert!(rows.len() >= 4, "coefficient rows: {rows:?}");
    assert!(
        rows.contains(&"GDP per head (log 2005 US$ PPP)"),
        "{rows:?}"
    );
    assert!(rows.contains(&"Continent: Oceania"), "{rows:?}");
    for raw in ["log_gdp_pc", "life_expectancy", "log_population"] {
        assert!(!rows.contains(&raw), "raw name {raw} in {rows:?}");
    }
    let json = get_json(addr, "/api/model");
    let coefficients = json["model"]["coefficients"].as_array().unwrap();
    assert_eq!(
        coefficients.len(),
        json["model"]["terms"].as_array().unwrap().len()
    );
    let gdp = coefficients
        .iter()
        .find(|c| c["term"] == "log_gdp_pc")
        .expect("log_gdp_pc term");
    assert_eq!(gdp["label"], "GDP per head (log 2005 US$ PPP)");
    let csv = get(addr, "/model/coefficients.csv");
    assert!(csv.body.starts_with("term,label,"), "{}", &csv.body[..60]);
    assert!(csv
        .body
        .contains("log_gdp_pc,GDP per head (log 2005 US$ PPP),"));
}
