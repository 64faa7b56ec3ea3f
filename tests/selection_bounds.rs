//! The marginal sensitivity model's bounds (issue 15, section 2) against an offline
//! reference (tests/fixtures/make_bounds_fixture.py: statsmodels' logit and scipy's
//! linprog on the Charnes-Cooper form, a numpy percentile bootstrap) on the real-indicator
//! frame; the command line's `--sensitivity`; the impact page's section; the sensitivity
//! page's draws of the participation model (section 3).

mod common;
use common::*;

use gapwise::analysis::impact::Shares;
use gapwise::analysis::selection_bounds::{selection_bounds, BoundsSettings, Reference};
use gapwise::analysis::sensitivity::model_uncertainty;
use gapwise::analysis::Settings;
use gapwise::project::{Project, WaveView};
use gapwise::stats::selection_bounds::{breakdown_lambda, msm_bounds};
use serde_json::Value;

fn fixture() -> Value {
    let path = std::path::Path::new(env!("CARGO_MANIFEST_DIR"))
        .join("tests/fixtures/bounds_reference.json");
    serde_json::from_str(&std::fs::read_to_string(path).expect("fixture")).expect("json")
}

fn numbers(v: &Value) -> Vec<f64> {
    v.as_array()
        .expect("array")
        .iter()
        .map(|x| x.as_f64().expect("number, not null"))
        .collect()
}

fn real_frame() -> std::path::PathBuf {
    std::path::Path::new(env!("CARGO_MANIFEST_DIR")).join("tests/fixtures/real_frame")
}

/// The fixture's design: the three numeric indicators, no continent.
fn settings() -> Settings {
    Settings::from_pairs([
        ("covariates", "log_gdp_pc,life_expectancy,log_population"),
        ("factors", ""),
        ("wave", "2007"),
    ])
    .expect("settings")
}

fn lambdas(f: &Value) -> Vec<f64> {
    numbers(&f["lambdas"])
}

/// Participants with a value: (values, propensities, base weights) from the fixture.
fn participants(f: &Value, outcome: &str) -> (Vec<f64>, Vec<f64>, Vec<f64>) {
    let o = &f["outcomes"][outcome];
    let took = f["took_part"].as_array().unwrap();
    let e = numbers(&f["propensity"]);
    let base = numbers(&o["base"]);
    let values = o["values"].as_array().unwrap();
    assert_eq!(took.len(), 142);
    assert_eq!(e.len(), 142);
    assert_eq!(values.len(), 142);
    let mut out = (Vec::new(), Vec::new(), Vec::new());
    for i in 0..142 {
        if took[i].as_i64() == Some(1) {
            if let Some(v) = values[i].as_f64() {
                out.0.push(v);
                out.1.push(e[i]);
                out.2.push(base[i]);
            }
        }
    }
    out
}

#[test]
fn bounds_equal_the_linear_programme() {
    let f = fixture();
    let grid = lambdas(&f);
    assert_eq!(grid, [1.0, 1.1, 1.25, 1.5, 2.0, 3.0]);
    for outcome in ["life_expectancy", "trust", "trust_by_population"] {
        let (y, e, base) = participants(&f, outcome);
        assert_eq!(y.len(), 83, "{outcome}");
        let o = &f["outcomes"][outcome];
        let (lower, upper) = (numbers(&o["lower"]), numbers(&o["upper"]));
        assert_eq!(lower.len(), grid.len());
        assert_eq!(upper.len(), grid.len());
        let mut last = (f64::INFINITY, f64::NEG_INFINITY);
        for (j, &lambda) in grid.iter().enumerate() {
            let (lo, hi) = msm_bounds(&y, &e, &base, lambda).unwrap();
            // scipy.optimize.linprog (HiGHS) on the Charnes-Cooper form.
            assert!(
                (lo - lower[j]).abs() < 1e-8,
                "{outcome} Λ={lambda}: {lo} vs {}",
                lower[j]
            );
            assert!(
                (hi - upper[j]).abs() < 1e-8,
                "{outcome} Λ={lambda}: {hi} vs {}",
                upper[j]
            );
            // Widening with Λ (nested boxes).
            assert!(lo <= last.0 + 1e-12 && hi >= last.1 - 1e-12);
            last = (lo, hi);
        }
        // Λ = 1: the normalised inverse-probability mean (numpy in the script).
        let point = o["weighted_mean"].as_f64().unwrap();
        let (lo, hi) = msm_bounds(&y, &e, &base, 1.0).unwrap();
        assert!((lo - point).abs() < 1e-10 && (hi - point).abs() < 1e-10);
        // Breakdown Λ for the unweighted mean: Brent's method on the LP bounds.
        let reference = o["unweighted_mean"].as_f64().unwrap();
        let lambda = breakdown_lambda(&y, &e, &base, reference).unwrap().unwrap();
        let offline = o["breakdown_unweighted"].as_f64().unwrap();
        assert!(
            (lambda - offline).abs() < 1e-6 * offline,
            "{outcome}: {lambda} vs {offline}"
        );
    }
}

#[test]
fn the_analysis_uses_its_own_propensities_and_agrees() {
    let f = fixture();
    let project = Project::load(&real_frame()).expect("real frame");
    let view = WaveView::new(&project, 2007).expect("wave");
    let s = settings();
    let fit = gapwise::analysis::participation::fit(&view, &s).expect("fit");
    let e = numbers(&f["propensity"]);
    assert_eq!(fit.units.len(), e.len());
    let codes = f["codes"].as_array().unwrap();
    for (u, (p, code)) in fit.units.iter().zip(e.iter().zip(codes)) {
        assert_eq!(Some(u.id.as_str()), code.as_str());
        // statsmodels' Logit (Newton, tolerance 1e-10).
        assert!(
            (u.propensity - p).abs() < 1e-7,
            "{}: {} vs {p}",
            u.id,
            u.propensity
        );
    }
    let grid = lambdas(&f);
    for (outcome, shares, key) in [
        ("life_expectancy", Shares::Equal, "life_expectancy"),
        ("trust", Shares::Equal, "trust"),
        (
            "trust",
            Shares::Population("log_population".to_string()),
            "trust_by_population",
        ),
    ] {
        let bs = BoundsSettings {
            outcome: outcome.to_string(),
            shares,
            lambdas: grid.clone(),
            reference: Reference::Unweighted,
            replicates: 0,
            level: 0.95,
        };
        let r = selection_bounds(Some(&project), &view, &s, &bs).expect("bounds");
        let o = &f["outcomes"][key];
        assert_eq!(r.n_countries, 83);
        assert_eq!(r.rows.len(), grid.len());
        assert!(r.bootstrap.is_none());
        assert!((r.weighted_mean - o["weighted_mean"].as_f64().unwrap()).abs() < 1e-6);
        assert!((r.unweighted_mean - o["unweighted_mean"].as_f64().unwrap()).abs() < 1e-9);
        for (j, row) in r.rows.iter().enumerate() {
            assert!(
                (row.lower - o["lower"][j].as_f64().unwrap()).abs() < 1e-6,
                "{key}"
            );
            assert!(
                (row.upper - o["upper"][j].as_f64().unwrap()).abs() < 1e-6,
                "{key}"
            );
            assert!(row.interval_low.is_none() && row.interval_high.is_none());
        }
        let offline = o["breakdown_unweighted"].as_f64().unwrap();
        let lambda = r.breakdown.expect("a breakdown Λ");
        assert!((lambda - offline).abs() < 1e-4 * offline, "{key}");
        assert!(
            r.conclusion.contains(&format!("{lambda:.2} times")),
            "{}",
            r.conclusion
        );
        assert!(r
            .notes
            .iter()
            .any(|n| n.contains("odds ratio on taking part, not on the outcome")));
        assert!(r
            .notes
            .iter()
            .any(|n| n.contains("inverse-probability-type weights")));
    }
    // Zero lies below every country's trust: no Λ reaches it.
    let bs = BoundsSettings {
        outcome: "trust".to_string(),
        shares: Shares::Equal,
        lambdas: grid,
        reference: Reference::Zero,
        replicates: 0,
        level: 0.95,
    };
    let r = selection_bounds(Some(&project), &view, &s, &bs).expect("bounds");
    assert_eq!(r.breakdown, None);
    assert!(r.conclusion.contains("holds for every Λ"));
}

/// Standard error of a p-quantile estimated from B draws of a roughly normal variable
/// with standard deviation sd (the asymptotic variance p(1-p) / (B f(q)^2); common
/// practice).
fn quantile_se(sd: f64, p: f64, b: f64) -> f64 {
    let z: f64 = 1.959_963_984_540_054;
    let density = (-0.5 * z * z).exp() / (2.0 * std::f64::consts::PI).sqrt() / sd;
    (p * (1.0 - p) / b).sqrt() / density
}

#[test]
fn the_bootstrap_repeats_with_its_seed_and_agrees_with_numpy() {
    let f = fixture();
    let project = Project::load(&real_frame()).expect("real frame");
    let view = WaveView::new(&project, 2007).expect("wave");
    let grid = lambdas(&f);
    let bs = BoundsSettings {
        outcome: "trust".to_string(),
        shares: Shares::Equal,
        lambdas: grid.clone(),
        reference: Reference::Unweighted,
        replicates: 2000,
        level: 0.95,
    };
    let s = settings();
    let a = selection_bounds(Some(&project), &view, &s, &bs).expect("bounds");
    let b = selection_bounds(Some(&project), &view, &s, &bs).expect("bounds");
    let boot = a.bootstrap.as_ref().expect("bootstrap");
    assert_eq!(boot, b.bootstrap.as_ref().unwrap());
    assert_eq!(boot.seed, s.seed);
    assert_eq!(boot.replicates, 2000);
    assert_eq!(boot.low.len(), grid.len());
    assert_eq!(boot.high.len(), grid.len());
    let reference = &f["bootstrap"];
    assert_eq!(reference["failed"].as_u64(), Some(0));
    assert_eq!(boot.failed, 0);
    let b_py = reference["replicates"].as_f64().unwrap();
    let (low, high) = (numbers(&reference["low"]), numbers(&reference["high"]));
    let (sd_l, sd_u) = (
        numbers(&reference["sd_lower"]),
        numbers(&reference["sd_upper"]),
    );
    for j in 0..grid.len() {
        let (ours_low, ours_high) = (boot.low[j].unwrap(), boot.high[j].unwrap());
        // Within 4 standard errors of the difference of two independent Monte Carlo
        // estimates of the same quantile (numpy with 4000 replicates, ours with 2000).
        let tol_low = 4.0
            * (quantile_se(sd_l[j], 0.025, b_py).powi(2)
                + quantile_se(sd_l[j], 0.025, 2000.0).powi(2))
            .sqrt();
        let tol_high = 4.0
            * (quantile_se(sd_u[j], 0.975, b_py).powi(2)
                + quantile_se(sd_u[j], 0.975, 2000.0).powi(2))
            .sqrt();
        assert!(
            (ours_low - low[j]).abs() < tol_low,
            "Λ={}: {ours_low} vs {} (±{tol_low})",
            grid[j],
            low[j]
        );
        assert!(
            (ours_high - high[j]).abs() < tol_high,
            "Λ={}: {ours_high} vs {} (±{tol_high})",
            grid[j],
            high[j]
        );
        assert!(ours_low <= a.rows[j].lower && ours_high >= a.rows[j].upper);
        assert_eq!(a.rows[j].interval_low, boot.low[j]);
    }
    // The grid's first Λ whose interval reaches the unweighted mean, and its sentence.
    let first = (0..grid.len()).find(|&j| {
        let r = a.reference_value;
        boot.low[j].unwrap() <= r && r <= boot.high[j].unwrap()
    });
    assert_eq!(a.breakdown_with_sampling, first.map(|j| grid[j]));
    assert!(
        a.conclusion.contains("Allowing for sampling error"),
        "{}",
        a.conclusion
    );
    // Another seed gives other replicates.
    let other = Settings {
        seed: s.seed + 1,
        ..s.clone()
    };
    let c = selection_bounds(
        Some(&project),
        &view,
        &other,
        &BoundsSettings {
            replicates: 200,
            ..bs
        },
    )
    .expect("bounds");
    assert_ne!(c.bootstrap.unwrap().low, boot.low);
}

/// A frame built so that some resamples fail: one level of `kind` has a single
/// participant and a single non-participant, so a resample that draws only one of them
/// (or neither's partner) separates the logit.
#[test]
fn failed_replicates_are_counted() {
    let dir = TempDir::new("bounds-fail");
    let mut csv = String::from("id,took,x,kind,y\n");
    for i in 0..30 {
        let kind = if i < 2 {
            "rare"
        } else if i % 2 == 0 {
            "a"
        } else {
            "b"
        };
        let took = if i == 0 || (i >= 2 && (i * 7) % 5 < 3) {
            1
        } else {
            0
        };
        let x = ((i * 37) % 11) as f64 / 3.0;
        let _ = std::fmt::Write::write_fmt(
            &mut csv,
            format_args!(
                "U{i},{took},{x},{kind},{}\n",
                1.0 + x * 0.5 + (i % 3) as f64
            ),
        );
    }
    dir.write("frame.csv", csv);
    let view = WaveView::from_file(
        &dir.path().join("frame.csv"),
        "id",
        "took",
        &["x".to_string(), "y".to_string()],
        &["kind".to_string()],
        &Default::default(),
    )
    .expect("frame");
    let s = Settings::from_pairs([("covariates", "x"), ("factors", "kind")]).expect("settings");
    let bs = BoundsSettings {
        outcome: "y".to_string(),
        shares: Shares::Equal,
        lambdas: vec![1.0, 2.0],
        reference: Reference::Zero,
        replicates: 300,
        level: 0.9,
    };
    let r = selection_bounds(None, &view, &s, &bs).expect("bounds");
    let boot = r.bootstrap.expect("bootstrap");
    // P(a resample misses unit 0 or unit 1) = 1 - P(draws both) ~ 0.25 + 0.25 - 0.06 ~
    // 0.44 for n = 30 (common practice: inclusion-exclusion).
    assert!(boot.failed > 60 && boot.failed < 220, "{}", boot.failed);
    assert!(r
        .notes
        .iter()
        .any(|n| n.contains(&format!("{} replicates failed", boot.failed))));
    assert!(boot.low[0].is_some());
}

#[test]
fn fit_command_prints_the_outcome_bounds() {
    let f = fixture();
    let dir = real_frame();
    let out = gapwise(&[
        "fit",
        dir.to_str().unwrap(),
        "--wave",
        "2007",
        "--covariates",
        "log_gdp_pc,life_expectancy,log_population",
        "--categorical=",
        "--outcome",
        "life_expectancy",
        "--sensitivity",
        "1.25,1.5,2",
        "--json",
    ]);
    assert_eq!(out.code, 0, "{}", out.stderr);
    let v: Value = serde_json::from_str(&out.stdout).expect("json");
    assert!(
        v["model"].is_object() && v["units"].is_array(),
        "the fit is still there"
    );
    let o = &v["outcome"];
    assert_eq!(o["column"], "life_expectancy");
    let reference = &f["outcomes"]["life_expectancy"];
    assert!(
        (o["weighted_mean"].as_f64().unwrap() - reference["weighted_mean"].as_f64().unwrap()).abs()
            < 1e-6
    );
    let bounds = o["bounds"].as_array().expect("bounds");
    assert_eq!(bounds.len(), 3);
    for (b, (lambda, j)) in bounds.iter().zip([(1.25, 2), (1.5, 3), (2.0, 4)]) {
        assert_eq!(b.as_object().unwrap().len(), 3);
        assert_eq!(b["lambda"].as_f64(), Some(lambda));
        assert!(
            (b["lower"].as_f64().unwrap() - reference["lower"][j].as_f64().unwrap()).abs() < 1e-6
        );
        assert!(
            (b["upper"].as_f64().unwrap() - reference["upper"][j].as_f64().unwrap()).abs() < 1e-6
        );
    }
    // Text output and bad input.
    let text = gapwise(&[
        "fit",
        dir.to_str().unwrap(),
        "--outcome",
        "trust",
        "--sensitivity",
        "2",
    ]);
    assert_eq!(text.code, 0, "{}", text.stderr);
    assert!(text.stdout.contains("inverse-probability mean"));
    let bad = gapwise(&[
        "fit",
        dir.to_str().unwrap(),
        "--outcome",
        "trust",
        "--sensitivity",
        "0.5",
    ]);
    assert_eq!(bad.code, 1);
    assert!(bad.stderr.contains("at least 1"), "{}", bad.stderr);
    let missing = gapwise(&[
        "fit",
        dir.to_str().unwrap(),
        "--outcome",
        "nothing",
        "--json",
    ]);
    assert_eq!(missing.code, 1);
    assert!(missing.stderr.contains("'nothing'"), "{}", missing.stderr);
    let no_outcome = gapwise(&["fit", dir.to_str().unwrap(), "--sensitivity", "2"]);
    assert_ne!(no_outcome.code, 0);
}

#[test]
fn the_impact_page_shows_the_bounds() {
    let addr = start_server(&demo_dir());
    let r = get(addr, "/impact?bootstrap=0&bounds_bootstrap=49");
    assert_eq!(r.status, 200, "{}", r.body);
    assert!(r.body.contains("id=\"selection-bounds\""));
    assert!(r
        .body
        .contains("odds ratio on taking part, not on the outcome"));
    assert!(r.body.contains("inverse-probability-type weights"));
    assert!(r.body.contains("id=\"breakdown\""));
    assert!(r.body.contains("How far the weighted mean of"), "the chart");
    assert!(!r.body.contains("NaN"));
    let section = &r.body[r.body.find("id=\"selection-bounds\"").unwrap()..];
    assert_eq!(
        section.matches("<tr><th scope=\"row\">").count(),
        6,
        "one row per Λ"
    );
    let twin = get(
        addr,
        "/api/impact/bounds?bootstrap=0&bounds_bootstrap=49&reference=zero",
    );
    assert_eq!(twin.status, 200, "{}", twin.body);
    let v: Value = serde_json::from_str(&twin.body).unwrap();
    assert_eq!(v["rows"].as_array().unwrap().len(), 6);
    assert_eq!(v["bootstrap"]["replicates"], 49);
    assert_eq!(v["reference_value"], 0.0);
    for row in v["rows"].as_array().unwrap() {
        assert!(row["lower"].is_f64() && row["upper"].is_f64());
    }
    for item in ["bounds.svg", "bounds.csv"] {
        let a = get(
            addr,
            &format!("/impact/bounds/{item}?bootstrap=0&bounds_bootstrap=49"),
        );
        assert_eq!(a.status, 200, "{item}");
        assert!(a.body.len() > 100);
    }
    let bad = get(addr, "/impact?bootstrap=0&reference=abc");
    assert_eq!(bad.status, 200, "the page still answers");
    assert!(bad
        .body
        .contains("the reference must be zero, unweighted or a number"));
    let number = get(
        addr,
        "/api/impact/bounds?bootstrap=0&bounds_bootstrap=0&reference=&reference=4.5",
    );
    let v: Value = serde_json::from_str(&number.body).unwrap();
    assert_eq!(v["reference_value"], 4.5);
    assert!(v["bootstrap"].is_null());
}

#[test]
fn the_sensitivity_page_shows_the_model_draws() {
    let addr = start_server(&demo_dir());
    let r = get(addr, "/sensitivity?weighting=inverse-probability");
    assert_eq!(r.status, 200, "{}", r.body);
    assert!(r.body.contains("id=\"model-uncertainty\""));
    assert!(r.body.contains("500 times (seed"));
    assert!(!r.body.contains("NaN"));
    let v: Value = get_json(addr, "/api/sensitivity?weighting=inverse-probability");
    let m = &v["model_uncertainty"];
    assert_eq!(m["draws"], 500);
    assert!(m["not_estimable"].is_null());
    for key in ["effective_n", "max_weight_share", "pooled_mean"] {
        let s = &m[key];
        let (low, median, high) = (
            s["low"].as_f64().unwrap(),
            s["median"].as_f64().unwrap(),
            s["high"].as_f64().unwrap(),
        );
        assert!(
            low <= median && median <= high && s["sd"].as_f64().unwrap() > 0.0,
            "{key}"
        );
    }
    for item in ["model-draws.svg", "model-draws.csv"] {
        let a = get(addr, &format!("/sensitivity/{item}"));
        assert_eq!(a.status, 200, "{item}");
    }
}

#[test]
fn model_draws_repeat_and_refuse_a_covariance_they_cannot_estimate() {
    let project = Project::load(&real_frame()).expect("real frame");
    let view = WaveView::new(&project, 2007).expect("wave");
    let s = settings();
    let a = model_uncertainty(Some(&project), &view, &s, Some("trust"), 300).expect("draws");
    let b = model_uncertainty(Some(&project), &view, &s, Some("trust"), 300).expect("draws");
    let (pa, pb) = (a.pooled_mean.unwrap(), b.pooled_mean.unwrap());
    assert_eq!(pa.low, pb.low);
    // At the estimate: the inverse-probability mean of the offline fixture.
    let f = fixture();
    assert!(
        (pa.at_estimate - f["outcomes"]["trust"]["weighted_mean"].as_f64().unwrap()).abs() < 1e-6
    );
    assert!(pa.low < pa.at_estimate && pa.at_estimate < pa.high);
    // All indicators: both Oceanian countries always take part, which separates the logit.
    let all = Settings::from_pairs([("wave", "2007")]).expect("settings");
    let m = model_uncertainty(Some(&project), &view, &all, Some("trust"), 300).expect("draws");
    assert!(
        m.not_estimable
            .as_deref()
            .unwrap_or("")
            .contains("not estimable"),
        "{:?}",
        m.not_estimable
    );
    assert!(m.effective_n.is_none() && m.pooled_mean.is_none());
}
