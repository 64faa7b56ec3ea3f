//! Respondent-level regressions checked against outside sources: NIST's certified Longley
//! values, statsmodels' cluster-robust standard errors, a reference wild cluster bootstrap
//! and the Heckman two-step of Wooldridge's Example 17.5. Fixtures: tests/fixtures/
//! make_fixtures.py (statsmodels 0.15, numpy 2.4, run offline).

mod common;
use common::*;

use gapwise::stats::regression;
use ndarray::Array2;
use serde_json::Value;

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

/// `OUTCOME --predictors PREDICTORS --country nr EXTRA...`: a pooled model on wagepan
/// clustered by man.
fn by_man<'a>(outcome: &'a str, predictors: &'a str, extra: &[&'a str]) -> Vec<&'a str> {
    let mut args = vec![outcome, "--predictors", predictors, "--country", "nr"];
    args.extend_from_slice(extra);
    args
}

fn pooled(args: &[&str]) -> Value {
    let path = fixtures().join("wagepan.csv");
    let mut all = vec!["pooled", path.to_str().unwrap(), "--outcome"];
    all.extend_from_slice(args);
    all.push("--json");
    let out = gapwise(&all);
    assert_eq!(out.code, 0, "{}", out.stderr);
    serde_json::from_str(&out.stdout).unwrap()
}

/// Checks JSON arrays of figures against their references, one row a figure: the label
/// a failure names, the figures, the reference and the relative tolerance.
fn assert_fields_close(rows: &[(&str, &Value, &Value, f64)]) {
    for &(what, got, want, rel) in rows {
        assert_close(&floats(got), &floats(want), rel, what);
    }
}

fn assert_close(a: &[f64], e: &[f64], rel: f64, what: &str) {
    assert_eq!(
        a.len(),
        e.len(),
        "{what}: {} values, expected {}",
        a.len(),
        e.len()
    );
    assert!(!e.is_empty(), "{what}: nothing to compare");
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
    let ols = pooled(&by_man("lwage", predictors, &[]));
    assert_fields_close(&[
        ("OLS coef", &ols["coef"], &fx["ols_coef"], 1e-9),
        ("OLS se", &ols["se"], &fx["ols_se"], 1e-6),
    ]);
    assert_eq!(ols["clusters"], fx["clusters"]);
    assert_eq!(ols["n"], fx["n"]);
    // statsmodels WLS(weights=w) with cluster errors.
    let wls = pooled(&by_man("lwage", predictors, &["--design-weight", "w"]));
    assert_fields_close(&[
        ("WLS coef", &wls["coef"], &fx["wls_coef"], 1e-9),
        ("WLS se", &wls["se"], &fx["wls_se"], 1e-6),
    ]);
    // statsmodels Logit(...).fit(cov_type="cluster").
    let logit = pooled(&by_man("union", predictors, &["--kind", "logistic"]));
    assert_fields_close(&[
        ("Logit coef", &logit["coef"], &fx["logit_coef"], 1e-6),
        ("Logit se", &logit["se"], &fx["logit_se"], 1e-6),
    ]);
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

/// A bootstrap p-value of [`regression`] for one term's test.
type BootstrapP = fn(&regression::TermTest) -> Result<f64, regression::RegressionError>;

/// Each case of `key` in reference.json (clusters G, term j, reference p): `bootstrap`
/// (unweighted, B = 9999, `seed`) on the first G men of wagepan with `outcome` agrees
/// within Monte Carlo error.
fn agrees_with_reference_cases(key: &str, outcome: &str, bootstrap: BootstrapP, seed: u64) {
    let cases = reference()[key].as_array().unwrap().clone();
    assert!(!cases.is_empty(), "{key}: no cases");
    for case in cases {
        let g = case["clusters"].as_u64().unwrap() as usize;
        let j = case["term"].as_u64().unwrap() as usize;
        let (x, y, cluster) = wagepan_first_men(g, outcome);
        let data = regression::ClusteredData::new(x.view(), &y, None, &cluster).unwrap();
        let p = bootstrap(&regression::TermTest::new(data, j, 9999, seed).unwrap()).unwrap();
        let name = format!("{key}: G = {g}, term {j}");
        assert_within_monte_carlo(p, case["p"].as_f64().unwrap(), &name);
    }
}

#[test]
fn wild_cluster_bootstrap_agrees_with_reference_within_monte_carlo_error() {
    // Reference: numpy refits with the null imposed (tests/fixtures/make_fixtures.py).
    agrees_with_reference_cases(
        "wild_bootstrap",
        "lwage",
        regression::wild_cluster_bootstrap,
        7,
    );
}

fn twostep_reference() -> Value {
    serde_json::from_str(&std::fs::read_to_string(fixtures().join("twostep.json")).unwrap())
        .unwrap()
}

const MROZ_SELECTION: &str = "nwifeinc,educ,exper,expersq,age,kidslt6,kidsge6";

/// `gapwise two-step PATH` of lwage on `predictors`, with `selected` as the selection
/// flag and `selection` as the selection predictors.
fn two_step_args<'a>(
    path: &'a str,
    predictors: &'a str,
    selected: &'a str,
    selection: &'a str,
) -> Vec<&'a str> {
    vec![
        "two-step",
        path,
        "--outcome",
        "lwage",
        "--predictors",
        predictors,
        "--selected",
        selected,
        "--selection-predictors",
        selection,
    ]
}

fn two_step(file: &str, extra: &[&str]) -> Value {
    let path = fixtures().join(file);
    let path = path.to_str().unwrap();
    let mut args = two_step_args(path, "educ,exper,expersq", "inlf", MROZ_SELECTION);
    args.push("--json");
    args.extend_from_slice(extra);
    let out = gapwise(&args);
    assert_eq!(out.code, 0, "{}", out.stderr);
    serde_json::from_str(&out.stdout).unwrap()
}

#[test]
fn heckman_two_step_matches_wooldridge_example() {
    let r = two_step("mroz.csv", &[]);
    let fx = &twostep_reference()["mroz_two_step"];
    let terms: Vec<&str> = r["outcome"]["terms"]
        .as_array()
        .unwrap()
        .iter()
        .map(|t| t.as_str().unwrap())
        .collect();
    assert_eq!(terms, ["intercept", "educ", "exper", "expersq", "lambda"]);
    // The coefficients also agree with the older statsmodels fixture (Probit + OLS).
    assert_fields_close(&[(
        "Heckman coef (reference.json)",
        &r["outcome"]["coef"],
        &reference()["mroz_heckman"]["coef"],
        1e-6,
    )]);
    // Offline numpy/statsmodels reference (tests/fixtures/make_twostep_fixtures.py):
    // Heckman's (1979) covariance as Greene writes it.
    for (key, rel) in [("coef", 1e-6), ("se", 1e-6), ("se_uncorrected", 1e-6)] {
        assert_close(
            &floats(&r["outcome"][key]),
            &floats(&fx[key]),
            rel,
            &format!("outcome {key}"),
        );
    }
    assert_fields_close(&[
        (
            "probit coef",
            &r["selection"]["coef"],
            &fx["selection_coef"],
            1e-6,
        ),
        (
            "probit se",
            &r["selection"]["se"],
            &fx["selection_se"],
            1e-6,
        ),
    ]);
    for key in ["rho", "sigma"] {
        let (a, e) = (r[key].as_f64().unwrap(), fx[key].as_f64().unwrap());
        assert!((a - e).abs() < 1e-6 * e.abs(), "{key}: {a} vs {e}");
    }
    assert_eq!(r["n"], 753);
    assert_eq!(r["n_selected"], 428);
    // Wooldridge, Introductory Econometrics, Example 17.5 (from memory): educ .109 (.016),
    // exper .044 (.016), expersq -.00086 (.00044), lambda .032 (.134), as printed.
    let printed: [(usize, f64, f64); 4] = [
        (1, 0.109, 0.016),
        (2, 0.044, 0.016),
        (3, -0.00086, 0.00044),
        (4, 0.032, 0.134),
    ];
    let coef = floats(&r["outcome"]["coef"]);
    let se = floats(&r["outcome"]["se"]);
    let rounds_to = |a: f64, e: f64| {
        let decimals = if e.abs() < 0.01 { 5 } else { 3 };
        let f = 10f64.powi(decimals);
        ((a * f).round() / f - e).abs() < 1e-9
    };
    for (j, b, s) in printed {
        assert!(
            rounds_to(coef[j], b),
            "term {j}: {} vs printed {b}",
            coef[j]
        );
        assert!(rounds_to(se[j], s), "term {j}: se {} vs printed {s}", se[j]);
    }
}

#[test]
fn clustered_two_step_matches_murphy_topel_reference() {
    // Offline reference (make_twostep_fixtures.py): Murphy-Topel by stacked estimating
    // equations, clusters = age in years (an arbitrary grouping for the check); its probit
    // and uncorrected parts were checked there against statsmodels' clustered fits.
    let r = two_step("mroz_by_age.csv", &["--country", "age_group"]);
    let fx = &twostep_reference()["mroz_two_step_by_age"];
    assert_eq!(r["clusters"], fx["clusters"]);
    assert_eq!(r["standard_errors"], "murphy-topel-cluster");
    assert_fields_close(&[
        ("M-T se", &r["outcome"]["se"], &fx["se"], 1e-6),
        (
            "clustered OLS se",
            &r["outcome"]["se_uncorrected"],
            &fx["se_uncorrected"],
            1e-6,
        ),
        (
            "clustered probit se",
            &r["selection"]["se"],
            &fx["selection_se"],
            1e-6,
        ),
    ]);
}

#[test]
fn two_step_warns_when_identified_by_functional_form_only() {
    // Common practice (Wooldridge 2010, section 19.6): with no excluded selection
    // predictor, identification rests on the probit's non-linearity alone.
    let path = fixtures().join("mroz.csv");
    let path = path.to_str().unwrap();
    let mut args = two_step_args(path, "educ,exper,expersq", "inlf", "educ,exper");
    args.push("--json");
    let out = gapwise(&args);
    assert_eq!(out.code, 0, "{}", out.stderr);
    let r: Value = serde_json::from_str(&out.stdout).unwrap();
    let notes = r["notes"].as_array().unwrap();
    assert!(
        notes
            .iter()
            .any(|n| n.as_str().unwrap().contains("functional form")),
        "{notes:?}"
    );
    // A flag that is not 0/1 is reported with its row and column.
    let out = gapwise(&two_step_args(path, "educ", "kidsge6", "age"));
    assert_eq!(out.code, 1);
    assert!(out.stderr.contains("mroz.csv:"), "{}", out.stderr);
    assert!(out.stderr.contains("0 or 1"), "{}", out.stderr);
}

#[test]
fn few_country_inference_uses_t_with_g_minus_one_df() {
    // statsmodels OLS(...).fit(cov_type="cluster", use_t=True), offline fixture.
    for case in twostep_reference()["t_inference"].as_array().unwrap() {
        let g = case["clusters"].as_u64().unwrap() as usize;
        let (x, y, cluster) = wagepan_first_men(g, "lwage");
        let fit = regression::fit(x.view(), &y, None, &cluster, regression::Kind::Linear).unwrap();
        assert_close(&fit.se, &floats(&case["se"]), 1e-6, "se");
        let t = regression::t_inference(&fit.coef, &fit.se, fit.clusters);
        assert_eq!(t.df as u64, case["df"].as_u64().unwrap());
        let some = |v: &[Option<f64>]| v.iter().map(|x| x.unwrap()).collect::<Vec<_>>();
        assert_close(&some(&t.p), &floats(&case["p"]), 1e-6, "p");
        assert_close(&some(&t.ci95_low), &floats(&case["ci95_low"]), 1e-6, "low");
        assert_close(
            &some(&t.ci95_high),
            &floats(&case["ci95_high"]),
            1e-6,
            "high",
        );
    }
    // The command's JSON carries the same for the whole panel.
    let r = pooled(&by_man("lwage", "educ,exper,married", &[]));
    let case = &twostep_reference()["t_inference"][1];
    assert_eq!(r["df"], case["df"]);
    assert_fields_close(&[
        ("command p", &r["p"], &case["p"], 1e-6),
        ("command low", &r["ci95_low"], &case["ci95_low"], 1e-6),
    ]);
}

#[test]
fn bootstrap_p_values_are_never_zero() {
    // Davison & Hinkley (1997, eq. 4.11): (1 + #{|t*| >= |t|}) / (B + 1).
    assert_eq!(regression::bootstrap_p(0, 99), 0.01);
    assert_eq!(regression::bootstrap_p(99, 99), 1.0);
    let (x, y, cluster) = wagepan_first_men(10, "lwage");
    let data = regression::ClusteredData::new(x.view(), &y, None, &cluster).unwrap();
    let test = regression::TermTest::new(data, 1, 9, 1).unwrap();
    let p = regression::wild_cluster_bootstrap(&test).unwrap();
    assert!(p >= 0.1 - 1e-12, "{p}");
}

#[test]
fn pooled_reports_bad_input_clearly() {
    let path = fixtures().join("wagepan.csv");
    let p = path.to_str().unwrap();
    fn pooled<'a>(p: &'a str, predictors: &'a str, more: &[&'a str]) -> Vec<&'a str> {
        let mut args = vec!["pooled", p, "--outcome"];
        args.extend(by_man("lwage", predictors, more));
        args
    }
    let outs = assert_refused(&[
        (pooled(p, "educ,nothing", &[]), "wagepan.csv:1:nothing:"),
        (
            pooled(p, "educ", &["--kind", "poisson"]),
            "linear or logistic",
        ),
        (pooled(p, "educ", &["--kind", "logistic"]), "must be 0 or 1"),
    ]);
    // An unknown column: exit code 1, as for every problem with the input files.
    assert_eq!(outs[0].code, 1);
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
    let data = regression::ClusteredData::new(x.view(), &y, None, &cluster).unwrap();
    let p_value = |term: usize| {
        regression::score_cluster_bootstrap(&regression::TermTest::new(data, term, 999, 3).unwrap())
            .unwrap()
    };
    let (signal, noise) = (p_value(1), p_value(2));
    assert!(signal < 0.01, "signal p = {signal}");
    assert!(noise > 0.05, "noise p = {noise}");
    assert_eq!(noise, p_value(2));
}

#[test]
fn score_bootstrap_agrees_with_reference_within_monte_carlo_error() {
    // Reference: the same statistic computed in numpy on a statsmodels restricted logit
    // (tests/fixtures/make_fixtures.py), first 40 men of wagepan, B = 9999 each.
    agrees_with_reference_cases(
        "score_bootstrap",
        "union",
        regression::score_cluster_bootstrap,
        11,
    );
}
