//! Respondent-level regressions checked against outside sources: NIST's certified Longley
//! values, statsmodels' cluster-robust standard errors, a reference wild cluster bootstrap
//! and the Heckman two-step of Wooldridge's Example 17.5. Fixtures: tests/fixtures/
//! make_fixtures.py (statsmodels 0.15, numpy 2.4, run offline).

mod common;
use common::*;

use gapwise::stats::regression;
use ndarray::Array2;
use serde_json::Value;

fn fixtures() -> std::path::PathBuf {
    std::path::Path::new(env!("CARGO_MANIFEST_DIR")).join("tests/fixtures")
}

fn reference() -> Value {
    serde_json::from_str(&std::fs::read_to_string(fixtures().join("reference.json")).unwrap())
        .unwrap()
}

fn floats(v: &Value) -> Vec<f64> {
    v.as_array()
        .unwrap()
        .iter()
        .map(|x| x.as_f64().unwrap())
        .collect()
}

/// Reads a numeric CSV fixture (header, then numbers; empty cells as NaN).
fn read_csv(name: &str) -> (Vec<String>, Vec<Vec<f64>>) {
    let text = std::fs::read_to_string(fixtures().join(name)).unwrap();
    let mut lines = text.lines();
    let header: Vec<String> = lines
        .next()
        .unwrap()
        .split(',')
        .map(str::to_string)
        .collect();
    let rows = lines
        .map(|l| {
            l.split(',')
                .map(|v| v.parse().unwrap_or(f64::NAN))
                .collect()
        })
        .collect();
    (header, rows)
}

fn columns(header: &[String], rows: &[Vec<f64>], names: &[&str], intercept: bool) -> Array2<f64> {
    let idx: Vec<usize> = names
        .iter()
        .map(|n| header.iter().position(|h| h == n).unwrap())
        .collect();
    let k = idx.len() + usize::from(intercept);
    Array2::from_shape_fn((rows.len(), k), |(i, j)| {
        if intercept && j == 0 {
            1.0
        } else {
            rows[i][idx[j - usize::from(intercept)]]
        }
    })
}

#[test]
fn longley_matches_nist_certified_values() {
    // NIST StRD, Longley (1967): certified regression coefficients (from memory; numpy's
    // lstsq agrees, see reference.json "longley_numpy").
    let certified = [
        -3482258.63459582,
        15.0618722713733,
        -0.358191792925910e-1,
        -2.02022980381683,
        -1.03322686717359,
        -0.511041056535807e-1,
        1829.15146461355,
    ];
    let (header, rows) = read_csv("longley.csv");
    let x = columns(
        &header,
        &rows,
        &["GNPDEFL", "GNP", "UNEMP", "ARMED", "POP", "YEAR"],
        true,
    );
    let y: Vec<f64> = rows
        .iter()
        .map(|r| r[header.iter().position(|h| h == "TOTEMP").unwrap()])
        .collect();
    let (beta, _) = regression::weighted_least_squares(x.view(), &y, None).unwrap();
    for (b, c) in beta.iter().zip(certified) {
        // At least 7 significant digits.
        assert!(((b - c) / c).abs() < 5e-8, "{b} vs certified {c}");
    }
}

fn regress(args: &[&str]) -> Value {
    let path = fixtures().join("wagepan.csv");
    let mut all = vec!["regress", path.to_str().unwrap(), "--outcome"];
    all.extend_from_slice(args);
    all.push("--json");
    let out = gapwise(&all);
    assert_eq!(out.code, 0, "{}", out.stderr);
    serde_json::from_str(&out.stdout).unwrap()
}

fn assert_close(a: &[f64], e: &[f64], rel: f64, what: &str) {
    for (x, y) in a.iter().zip(e) {
        assert!(
            (x - y).abs() <= rel * y.abs().max(1e-8),
            "{what}: {x} vs {y}"
        );
    }
}

#[test]
fn cluster_robust_errors_match_statsmodels() {
    let reference = reference();
    let fx = &reference["wagepan_cluster"];
    let predictors = "educ,black,hisp,exper,married";
    // statsmodels OLS(...).fit(cov_type="cluster"), Wooldridge's wagepan, clusters = men.
    let ols = regress(&["lwage", "--predictors", predictors, "--cluster", "nr"]);
    assert_close(
        &floats(&ols["coef"]),
        &floats(&fx["ols_coef"]),
        1e-9,
        "OLS coef",
    );
    assert_close(&floats(&ols["se"]), &floats(&fx["ols_se"]), 1e-6, "OLS se");
    assert_eq!(ols["clusters"], fx["clusters"]);
    assert_eq!(ols["n"], fx["n"]);
    // statsmodels WLS(weights=w) with cluster errors.
    let wls = regress(&[
        "lwage",
        "--predictors",
        predictors,
        "--cluster",
        "nr",
        "--weight",
        "w",
    ]);
    assert_close(
        &floats(&wls["coef"]),
        &floats(&fx["wls_coef"]),
        1e-9,
        "WLS coef",
    );
    assert_close(&floats(&wls["se"]), &floats(&fx["wls_se"]), 1e-6, "WLS se");
    // statsmodels Logit(...).fit(cov_type="cluster").
    let logit = regress(&[
        "union",
        "--predictors",
        predictors,
        "--cluster",
        "nr",
        "--family",
        "binomial",
    ]);
    assert_close(
        &floats(&logit["coef"]),
        &floats(&fx["logit_coef"]),
        1e-6,
        "Logit coef",
    );
    assert_close(
        &floats(&logit["se"]),
        &floats(&fx["logit_se"]),
        1e-6,
        "Logit se",
    );
}

/// The first `g` men of wagepan: design (intercept, educ, exper, married), the outcome,
/// and each row's cluster index.
fn wagepan_first_men(g: usize, outcome: &str) -> (Array2<f64>, Vec<f64>, Vec<usize>) {
    let (header, rows) = read_csv("wagepan.csv");
    let nr = header.iter().position(|h| h == "nr").unwrap();
    let y_col = header.iter().position(|h| h == outcome).unwrap();
    let mut men: Vec<i64> = rows.iter().map(|r| r[nr] as i64).collect();
    men.dedup();
    let chosen = &men[..g];
    let sub: Vec<Vec<f64>> = rows
        .iter()
        .filter(|r| chosen.contains(&(r[nr] as i64)))
        .cloned()
        .collect();
    let x = columns(&header, &sub, &["educ", "exper", "married"], true);
    let y = sub.iter().map(|r| r[y_col]).collect();
    let cluster = sub
        .iter()
        .map(|r| chosen.iter().position(|m| *m == r[nr] as i64).unwrap())
        .collect();
    (x, y, cluster)
}

/// Two independent Monte Carlo estimates of B = 9999 draws each: their difference has sd
/// sqrt(2 p (1 - p) / B); allow four of them (common practice).
fn assert_within_monte_carlo(p: f64, reference_p: f64, what: &str) {
    let tolerance = 4.0
        * (2.0 * reference_p * (1.0 - reference_p) / 9999.0)
            .sqrt()
            .max(0.002);
    assert!(
        (p - reference_p).abs() < tolerance,
        "{what}: {p} vs reference {reference_p} (tolerance {tolerance})"
    );
}

#[test]
fn wild_cluster_bootstrap_agrees_with_reference_within_monte_carlo_error() {
    // Reference: numpy refits with the null imposed (tests/fixtures/make_fixtures.py).
    for case in reference()["wild_bootstrap"].as_array().unwrap() {
        let g = case["clusters"].as_u64().unwrap() as usize;
        let j = case["term"].as_u64().unwrap() as usize;
        let (x, y, cluster) = wagepan_first_men(g, "lwage");
        let p =
            regression::wild_cluster_bootstrap(x.view(), &y, None, &cluster, j, 9999, 7).unwrap();
        assert_within_monte_carlo(p, case["p"].as_f64().unwrap(), &format!("G = {g}"));
    }
}

#[test]
fn heckman_two_step_matches_wooldridge_example() {
    let reference = reference();
    let (header, rows) = read_csv("mroz.csv");
    let z = columns(
        &header,
        &rows,
        &[
            "nwifeinc", "educ", "exper", "expersq", "age", "kidslt6", "kidsge6",
        ],
        true,
    );
    let inlf = header.iter().position(|h| h == "inlf").unwrap();
    let selected: Vec<bool> = rows.iter().map(|r| r[inlf] == 1.0).collect();
    let x = columns(&header, &rows, &["educ", "exper", "expersq"], true);
    let y: Vec<f64> = rows
        .iter()
        .map(|r| r[header.iter().position(|h| h == "lwage").unwrap()])
        .collect();
    let fit = regression::heckman_two_step(z.view(), &selected, x.view(), &y).unwrap();
    // statsmodels Probit + OLS with the inverse Mills ratio, offline fixture.
    assert_close(
        &fit.outcome,
        &floats(&reference["mroz_heckman"]["coef"]),
        1e-6,
        "Heckman",
    );
    // Wooldridge, Introductory Econometrics, Example 17.5 (from memory): 3 decimals.
    let printed: [f64; 5] = [-0.578, 0.109, 0.044, -0.00086, 0.032];
    for (a, e) in fit.outcome.iter().zip(printed) {
        let decimals = if e.abs() < 0.01 { 5 } else { 3 };
        let f = 10f64.powi(decimals);
        assert!(((a * f).round() / f - e).abs() < 1e-9, "{a} vs {e}");
    }
}

#[test]
fn regress_reports_bad_input_clearly() {
    let path = fixtures().join("wagepan.csv");
    let p = path.to_str().unwrap();
    let out = gapwise(&[
        "regress",
        p,
        "--outcome",
        "lwage",
        "--predictors",
        "educ,nothing",
        "--cluster",
        "nr",
    ]);
    assert_eq!(out.code, 1);
    assert!(
        out.stderr.contains("wagepan.csv:1:nothing:"),
        "{}",
        out.stderr
    );
    let out = gapwise(&[
        "regress",
        p,
        "--outcome",
        "lwage",
        "--predictors",
        "educ",
        "--cluster",
        "nr",
        "--family",
        "poisson",
    ]);
    assert!(
        out.stderr.contains("gaussian or binomial"),
        "{}",
        out.stderr
    );
    let out = gapwise(&[
        "regress",
        p,
        "--outcome",
        "lwage",
        "--predictors",
        "educ",
        "--cluster",
        "nr",
        "--family",
        "binomial",
    ]);
    assert!(out.stderr.contains("must be 0 or 1"), "{}", out.stderr);
}

#[test]
fn score_bootstrap_for_logistic_models_separates_signal_from_noise() {
    // Common practice (a property, not a reference value): on simulated clustered data a
    // strong predictor gets a small wild score bootstrap p-value, a pure-noise predictor a
    // large one, and the same seed gives the same p-value.
    let mut rng = gapwise::stats::random::Rng::new(17);
    let (clusters, per) = (30, 60);
    let n = clusters * per;
    let mut x = Array2::<f64>::ones((n, 3));
    let mut y = Vec::with_capacity(n);
    let mut cluster = Vec::with_capacity(n);
    for g in 0..clusters {
        let effect = 0.5 * rng.normal();
        for r in 0..per {
            let i = g * per + r;
            x[[i, 1]] = rng.normal();
            x[[i, 2]] = rng.normal();
            let eta = -0.3 + 0.8 * x[[i, 1]] + effect;
            y.push(if rng.bernoulli(1.0 / (1.0 + (-eta).exp())) {
                1.0
            } else {
                0.0
            });
            cluster.push(g);
        }
    }
    let signal =
        regression::score_cluster_bootstrap(x.view(), &y, None, &cluster, 1, 999, 3).unwrap();
    let noise =
        regression::score_cluster_bootstrap(x.view(), &y, None, &cluster, 2, 999, 3).unwrap();
    assert!(signal < 0.01, "signal p = {signal}");
    assert!(noise > 0.05, "noise p = {noise}");
    assert_eq!(
        noise,
        regression::score_cluster_bootstrap(x.view(), &y, None, &cluster, 2, 999, 3).unwrap()
    );
}

#[test]
fn score_bootstrap_agrees_with_reference_within_monte_carlo_error() {
    // Reference: the same statistic computed in numpy on a statsmodels restricted logit
    // (tests/fixtures/make_fixtures.py), first 40 men of wagepan, B = 9999 each.
    for case in reference()["score_bootstrap"].as_array().unwrap() {
        let g = case["clusters"].as_u64().unwrap() as usize;
        let j = case["term"].as_u64().unwrap() as usize;
        let (x, y, cluster) = wagepan_first_men(g, "union");
        let p =
            regression::score_cluster_bootstrap(x.view(), &y, None, &cluster, j, 9999, 11).unwrap();
        assert_within_monte_carlo(p, case["p"].as_f64().unwrap(), &format!("term {j}"));
    }
}
