//! Multiple imputation: Rubin's rules against R's mice, a simulation on a real-indicator
//! frame with values removed at random, reproducibility, predictive mean matching filling
//! only observed values, and a category with a missing value and a sparse level.

use std::path::Path;

use gapwise::analysis::imputed;
use gapwise::analysis::settings::{MissingRule, Settings};
use gapwise::project::{Project, WaveView};
use gapwise::stats::combine;
use gapwise::stats::random::Rng;
use serde_json::Value;

fn fixture(name: &str) -> std::path::PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR"))
        .join("tests/fixtures")
        .join(name)
}

fn numbers(v: &Value) -> Vec<f64> {
    v.as_array()
        .expect("an array")
        .iter()
        .map(|x| x.as_f64().expect("a number"))
        .collect()
}

fn close(a: f64, b: f64, tol: f64) -> bool {
    (a - b).abs() <= tol * b.abs().max(1.0)
}

/// Rubin's rules on the same completed-data estimates and variances as R's mice::pool()
/// (tests/fixtures/make_mice_fixture.R: mice 3.15 on its nhanes data, 20 imputations, a
/// linear and a logistic model, complete-data df 22 and infinite), to 1e-8.
#[test]
fn rubins_rules_match_mice_pool() {
    let text = std::fs::read_to_string(fixture("mice_pool.json")).unwrap();
    let fx: Value = serde_json::from_str(&text).unwrap();
    let cases = fx["cases"].as_array().unwrap();
    assert_eq!(cases.len(), 3);
    for case in cases {
        let name = case["name"].as_str().unwrap();
        let dfcom = match &case["dfcom"] {
            Value::String(s) if s == "Inf" => f64::INFINITY,
            v => v.as_f64().unwrap(),
        };
        let terms = case["terms"].as_array().unwrap();
        let estimates = case["estimates"].as_array().unwrap();
        let variances = case["variances"].as_array().unwrap();
        assert_eq!(estimates.len(), terms.len());
        assert_eq!(variances.len(), terms.len());
        for j in 0..terms.len() {
            let q = numbers(&estimates[j]);
            let u = numbers(&variances[j]);
            assert_eq!(q.len(), 20, "{name}");
            let p = combine::pool(&q, &u, dfcom).unwrap();
            let want = |k: &str| numbers(&case[k])[j];
            for (ours, key) in [
                (p.estimate, "qbar"),
                (p.within, "ubar"),
                (p.between, "b"),
                (p.total, "t"),
                (p.df, "df"),
                (p.riv, "riv"),
                (p.lambda, "lambda"),
                (p.fmi, "fmi"),
            ] {
                assert!(
                    close(ours, want(key), 1e-8),
                    "{name}, {}: {key} ours {ours} mice {}",
                    terms[j],
                    want(key)
                );
            }
            // The variance exceeds the within-imputation variance (common practice).
            assert!(p.total > p.within);
        }
    }
}

fn real_project() -> Project {
    Project::load(&fixture("real_frame")).expect("the real frame loads")
}

/// The complete real frame's wave 2007 with values removed completely at random.
fn with_holes(view: &WaveView, share: f64, rng: &mut Rng) -> WaveView {
    let mut v = view.clone();
    for ind in v.numeric.iter_mut().take(2) {
        for x in ind.values.iter_mut() {
            if rng.uniform() < share {
                *x = None;
            }
        }
    }
    v
}

/// Simulation (common practice, van Buuren 2018 section 2.5): on the complete Gapminder
/// frame (tests/fixtures/real_frame, wave 2007), 25% of two indicators are removed at
/// random 40 times; each time the participation model is fitted on 10 imputations. The
/// combined 95% intervals must cover the complete-data estimate at least at the nominal
/// rate less simulation error (they are centred near it and also carry the sampling
/// variance, so they cover it more often than 95%: measured 1.000); the interval of the
/// missing-data part alone, q̄ ± t(M−1)√((1+1/M)B), must cover it near the nominal rate
/// (measured 0.925 over 160 intervals); and the total variance must exceed the
/// complete-data variance on average (missing values lose information).
#[test]
fn combined_intervals_cover_the_complete_data_estimate() {
    let project = real_project();
    let view = project.wave(2007).unwrap();
    // The three numeric indicators only: a continent with separation has no estimate
    // under the plain logit, so there would be nothing to cover.
    let settings = Settings {
        weighting: gapwise::analysis::settings::WeightingKind::InverseProbability,
        factors: Some(Vec::new()),
        ..Settings::default()
    };
    let complete = gapwise::analysis::participation::fit(&view, &settings).unwrap();
    let k = complete.model.terms.len();
    assert!(complete.model.coef.iter().all(Option::is_some));
    let mut rng = Rng::stream(2026, 18);
    let (mut covered, mut total, mut covered_missing_part) = (0usize, 0usize, 0usize);
    let mut ratio = vec![0.0; k];
    let reps = 40;
    for r in 0..reps {
        let holed = with_holes(&view, 0.25, &mut rng);
        let s = Settings {
            missing: MissingRule::Impute,
            imputations: 10,
            seed: 100 + r as u64,
            ..settings.clone()
        };
        let fit = imputed::fit(None, &holed, &s).unwrap();
        assert_eq!(fit.imputations.len(), 10);
        assert_eq!(fit.report.model.terms, complete.model.terms);
        #[allow(clippy::needless_range_loop)] // j indexes four parallel vectors
        for j in 0..k {
            let c = &fit.report.model.coefficients[j];
            let truth = complete.model.coef[j].unwrap();
            let (lo, hi) = (c.ci95_low.unwrap(), c.ci95_high.unwrap());
            covered += usize::from(lo <= truth && truth <= hi);
            total += 1;
            // The missing-data part alone: q̄ ± t(M−1) √((1 + 1/M) B) should cover the
            // complete-data estimate near the nominal rate when the imputations are proper.
            let q: Vec<f64> = fit.imputations.iter().map(|i| i.coef[j].unwrap()).collect();
            let m = q.len() as f64;
            let qbar = q.iter().sum::<f64>() / m;
            let b = q.iter().map(|x| (x - qbar).powi(2)).sum::<f64>() / (m - 1.0);
            let half = gapwise::stats::regression::student::upper_quantile(0.975, m - 1.0)
                * ((1.0 + 1.0 / m) * b).sqrt();
            covered_missing_part += usize::from((qbar - truth).abs() <= half);
            ratio[j] += (fit.se[j].unwrap() / complete.model.se[j].unwrap()).powi(2) / reps as f64;
        }
    }
    let rate = covered as f64 / total as f64;
    let rate_missing_part = covered_missing_part as f64 / total as f64;
    assert!(
        (0.85..=1.0).contains(&rate_missing_part),
        "missing-data part coverage {rate_missing_part}"
    );
    // Nominal 0.95 less about three binomial standard errors at this many intervals.
    assert!(
        rate >= 0.95 - 3.0 * (0.95f64 * 0.05 / total as f64).sqrt(),
        "coverage {rate}"
    );
    // The coefficients of the two indicators with holes (terms 1 and 2), and the terms on
    // average, lose information.
    assert_eq!(complete.model.terms[1], "log_gdp_pc");
    assert_eq!(complete.model.terms[2], "life_expectancy");
    for (j, r) in ratio.iter().enumerate().skip(1).take(2) {
        assert!(*r > 1.0, "term {j}: mean T / complete-data variance {r}");
    }
    let mean_ratio = ratio.iter().sum::<f64>() / k as f64;
    assert!(mean_ratio > 1.0, "{ratio:?}");
    eprintln!("coverage of the complete-data estimate {rate:.3} (by the missing-data part alone {rate_missing_part:.3}); variance ratios {ratio:?}");
}

/// The same seed gives the same imputations and the same combined fit; another seed
/// other ones; filled values are values observed in the frame (PMM); `imputations` and
/// the seed are shown.
#[test]
fn imputations_are_reproducible_and_fill_observed_values() {
    let project = real_project();
    let view = project.wave(2002).unwrap();
    let mut rng = Rng::stream(7, 1);
    let holed = with_holes(&view, 0.2, &mut rng);
    let others = imputed::other_waves(&project, 2002);
    let s = Settings {
        missing: MissingRule::Impute,
        imputations: 5,
        seed: 99,
        ..Settings::default()
    };
    let a = imputed::complete(&holed, &others, &s).unwrap();
    let b = imputed::complete(&holed, &others, &s).unwrap();
    let c = imputed::complete(
        &holed,
        &others,
        &Settings {
            seed: 100,
            ..s.clone()
        },
    )
    .unwrap();
    assert_eq!(a.views.len(), 5);
    assert_eq!(a.summary.seed, 99);
    assert_eq!(a.summary.waves_used, vec![1992, 1997, 2002, 2007]);
    let values = |v: &gapwise::analysis::imputed::CompletedViews| {
        v.views
            .iter()
            .map(|w| w.numeric[0].values.clone())
            .collect::<Vec<_>>()
    };
    assert_eq!(values(&a), values(&b));
    assert_ne!(values(&a), values(&c));
    // Every donor value comes from the frame's observed values (this wave or another).
    for j in 0..2 {
        let mut pool: Vec<f64> = holed.numeric[j].values.iter().flatten().copied().collect();
        for o in &others {
            pool.extend(o.numeric[j].values.iter().flatten());
        }
        for v in &a.views {
            for (i, x) in v.numeric[j].values.iter().enumerate() {
                let x = x.expect("completed");
                match holed.numeric[j].values[i] {
                    Some(obs) => assert_eq!(x, obs),
                    None => assert!(pool.contains(&x), "{x} was never observed"),
                }
            }
        }
    }
    // The filled cells are listed with their M values.
    let holes = holed.numeric[..2]
        .iter()
        .map(|c| c.values.iter().filter(|x| x.is_none()).count())
        .sum::<usize>();
    assert_eq!(a.summary.cells.len(), holes);
    assert!(a
        .summary
        .cells
        .iter()
        .all(|c| c.values.as_ref().unwrap().len() == 5));
    assert_eq!(a.summary.traces.len(), 2);
    assert!(a.summary.traces[0]
        .means
        .iter()
        .all(|m| m.len() == imputed::CYCLES));
    // The same completed frames give the same combined fit.
    let fit1 = imputed::fit_completed(&a, &s).unwrap();
    let fit2 = imputed::fit_completed(&b, &s).unwrap();
    assert_eq!(
        serde_json::to_string(&fit1.coef).unwrap(),
        serde_json::to_string(&fit2.coef).unwrap()
    );
}

/// A category with missing values, one level held by a single country and one level that
/// no participant has: the imputation fills only existing levels, and the analysis runs
/// (the level no participant has is what the model reports as not estimable, not a
/// crash).
#[test]
fn a_category_with_missing_values_and_a_sparse_level() {
    let project = real_project();
    let mut view = project.wave(2007).unwrap();
    let cont = &mut view.categorical[0];
    let levels = cont.levels.len();
    // Remove every 6th country's continent.
    for (i, v) in cont.values.iter_mut().enumerate() {
        if i % 6 == 3 {
            *v = None;
        }
    }
    // Oceania (a small level) keeps a single observed country.
    if let Some(o) = cont.levels.iter().position(|l| l == "Oceania") {
        let mut seen = false;
        for v in cont.values.iter_mut() {
            if *v == Some(o) {
                if seen {
                    *v = None;
                }
                seen = true;
            }
        }
    }
    let s = Settings {
        missing: MissingRule::Impute,
        imputations: 6,
        seed: 5,
        weighting: gapwise::analysis::settings::WeightingKind::InverseProbability,
        model: gapwise::analysis::settings::ModelKind::Firth,
        ..Settings::default()
    };
    let done = imputed::complete(&view, &[], &s).unwrap();
    for v in &done.views {
        assert!(v.categorical[0]
            .values
            .iter()
            .all(|x| x.is_some_and(|l| l < levels)));
    }
    assert!(done
        .summary
        .cells
        .iter()
        .all(|c| c.levels.as_ref().is_some_and(|l| l.len() == 6)));
    assert!(
        done.summary.fallbacks.is_empty(),
        "{:?}",
        done.summary.fallbacks
    );
    let fit = imputed::fit_completed(&done, &s).unwrap();
    assert_eq!(fit.imputations.len(), 6);
    assert_eq!(fit.coef.len(), fit.report.model.terms.len());
    // Numbers the combination cannot give are null, with a reason.
    for (j, c) in fit.report.model.coefficients.iter().enumerate() {
        assert_eq!(c.coef.is_none(), c.not_estimable.is_some(), "{j}");
    }
}

/// `--missing impute` on a frame without missing values: every completed frame is the
/// observed one, the between-imputation variance is zero, and the combined estimate is
/// the complete-data one (common practice).
#[test]
fn nothing_missing_gives_the_complete_data_fit() {
    let project = real_project();
    let view = project.wave(1997).unwrap();
    let base = Settings {
        weighting: gapwise::analysis::settings::WeightingKind::InverseProbability,
        ..Settings::default()
    };
    let complete = gapwise::analysis::participation::fit(&view, &base).unwrap();
    let s = Settings {
        missing: MissingRule::Impute,
        imputations: 3,
        ..base
    };
    let fit = imputed::fit(Some(&project), &view, &s).unwrap();
    assert!(fit.imputation.cells.is_empty());
    assert_eq!(fit.coef.len(), complete.model.coef.len());
    for j in 0..fit.coef.len() {
        // A term the complete-data logit cannot estimate stays null, with its reason.
        if complete.model.coef[j].is_none() {
            assert!(fit.coef[j].is_none());
            assert!(fit.report.model.coefficients[j].not_estimable.is_some());
            continue;
        }
        assert!(close(
            fit.coef[j].unwrap(),
            complete.model.coef[j].unwrap(),
            1e-10
        ));
        assert!(close(
            fit.se[j].unwrap(),
            complete.model.se[j].unwrap(),
            1e-10
        ));
    }
}

mod common;

/// The pages accept `missing=impute`: the overview lists what is filled with its two
/// charts and the caution, the balance page shows means over the imputations, the JSON
/// twins carry the combination, and pages that use one completed frame say so (common
/// practice for the pages' shape, as in tests/analysis_pages.rs).
#[test]
fn pages_accept_imputation() {
    let addr = common::start_server(&common::demo_dir());
    let q = "missing=impute&imputations=5&wave=4";
    let r = common::get(addr, &format!("/?{q}"));
    assert_eq!(r.status, 200, "{}", r.body);
    assert!(
        r.body.contains("id=\"imputation\""),
        "no imputation section"
    );
    assert!(r.body.contains("id=\"filled-cells\""));
    assert!(r.body.contains("missing at random"));
    assert!(r.body.matches("<svg").count() >= 3);
    let j = common::get(addr, &format!("/api/imputation?{q}"));
    assert_eq!(j.status, 200, "{}", j.body);
    let v: Value = serde_json::from_str(&j.body).unwrap();
    assert_eq!(v["imputations"], 5);
    assert!(!v["cells"].as_array().unwrap().is_empty());
    assert_eq!(v["traces"][0]["means"].as_array().unwrap().len(), 5);

    let b = common::get(addr, &format!("/api/balance?{q}"));
    assert_eq!(b.status, 200, "{}", b.body);
    let v: Value = serde_json::from_str(&b.body).unwrap();
    assert!(v["missing_note"]
        .as_str()
        .unwrap()
        .starts_with("Multiple imputation"));
    assert_eq!(
        v["effective_n_spread"].as_array().unwrap().len(),
        v["methods"].as_array().unwrap().len()
    );
    for page in ["/balance", "/model", "/coverage", "/sensitivity"] {
        let r = common::get(addr, &format!("{page}?{q}"));
        assert_eq!(r.status, 200, "{page}: {}", r.body);
        assert!(r.body.contains("imputation"), "{page} does not say it");
    }
    let c = common::get(addr, &format!("/coverage?{q}"));
    assert!(c.body.contains("single completed frame"));
    assert!(c.body.contains("Has filled (imputed) values"));
}

/// `gapwise COMMAND <demo> --wave 4 --missing impute --imputations M --seed SEED MORE...
/// --json`, which must succeed: its JSON.
fn imputed_demo_json(command: &str, m: usize, seed: u64, more: &[&str]) -> Value {
    let (m, seed) = (m.to_string(), seed.to_string());
    let mut options = vec![
        "--wave",
        "4",
        "--missing",
        "impute",
        "--imputations",
        &m,
        "--seed",
        &seed,
        "--json",
    ];
    options.extend_from_slice(more);
    common::demo_json(command, &options)
}

/// `gapwise fit --missing impute --json` prints each imputation's coefficients and
/// standard errors beside the combined ones, and recombining them by Rubin's rules gives
/// the printed combination (the check anyone can make; common practice).
#[test]
fn fit_json_carries_the_imputations() {
    let v = imputed_demo_json("fit", 6, 11, &[]);
    let imps = v["imputations"].as_array().unwrap();
    assert_eq!(imps.len(), 6);
    let k = v["coef"].as_array().unwrap().len();
    assert_eq!(v["se"].as_array().unwrap().len(), k);
    assert_eq!(v["df"].as_array().unwrap().len(), k);
    assert_eq!(
        v["fraction_missing_information"].as_array().unwrap().len(),
        k
    );
    let dfcom = v["df_complete"].as_f64().unwrap();
    for j in 0..k {
        let q: Vec<f64> = imps
            .iter()
            .map(|i| i["coef"][j].as_f64().unwrap())
            .collect();
        let u: Vec<f64> = imps
            .iter()
            .map(|i| i["se"][j].as_f64().unwrap().powi(2))
            .collect();
        let p = combine::pool(&q, &u, dfcom).unwrap();
        assert!(close(p.estimate, v["coef"][j].as_f64().unwrap(), 1e-12));
        assert!(close(p.se, v["se"][j].as_f64().unwrap(), 1e-12));
        assert!(close(p.df, v["df"][j].as_f64().unwrap(), 1e-12));
    }
    assert_eq!(v["imputation"]["seed"], 11);
    // Nobody is left out under imputation.
    assert!(v["dropped"].as_array().unwrap().is_empty());
    let bad = common::gapwise(&[
        "fit",
        common::demo_dir().to_str().unwrap(),
        "--imputations",
        "6",
    ]);
    assert_ne!(bad.code, 0);
    assert!(bad.stderr.contains("--missing impute"), "{}", bad.stderr);
}

/// Recombines one estimate's per-imputation (estimate, se) pairs by Rubin's rules and
/// checks the printed combination (estimate, se, df, fraction of missing information).
fn check_recombined(what: &str, each: &[(f64, f64)], dfcom: f64, combined: &Value) {
    let q: Vec<f64> = each.iter().map(|e| e.0).collect();
    let u: Vec<f64> = each.iter().map(|e| e.1 * e.1).collect();
    let p = combine::pool(&q, &u, dfcom).unwrap();
    for (ours, key) in [
        (p.estimate, "estimate"),
        (p.se, "se"),
        (p.df, "df"),
        (p.fmi, "fmi"),
    ] {
        let printed = combined[key]
            .as_f64()
            .unwrap_or_else(|| panic!("{what}: no {key}"));
        assert!(
            close(ours, printed, 1e-10),
            "{what}, {key}: recombined {ours}, printed {printed}"
        );
    }
}

/// `gapwise impact --missing impute --json` prints, per correction, the pooled mean and
/// the coefficients of each imputation beside the combined ones with their df and
/// fraction of missing information; recombining them by Rubin's rules gives the printed
/// combination (the check anyone can make; common practice), and the report's own
/// numbers are the combined ones.
#[test]
fn impact_json_carries_the_imputations() {
    let m = 4;
    let v = imputed_demo_json(
        "impact",
        m,
        21,
        &[
            "--outcome",
            "trust_parliament",
            "--predictors",
            "age,education",
            "--replicates",
            "0",
            "--wild-replicates",
            "0",
        ],
    );
    assert_eq!(v["imputation"]["imputations"], m);
    let variants = v["variants"].as_array().unwrap();
    let combination = v["combination"].as_array().unwrap();
    assert_eq!(combination.len(), variants.len());
    assert!(variants.len() >= 3, "{}", variants.len());
    let n_terms = v["terms"].as_array().unwrap().len();
    let mut checked = 0;
    for (variant, c) in variants.iter().zip(combination) {
        let key = c["key"].as_str().unwrap();
        assert_eq!(variant["key"], c["key"]);
        let imps = c["imputations"].as_array().unwrap();
        assert_eq!(imps.len(), m, "{key}");
        if c["pooled"].is_null() {
            // Not combined: the correction says why.
            assert!(variant["error"].is_string(), "{key}");
            assert!(variant["pooled"].is_null(), "{key}");
        } else {
            let each: Vec<(f64, f64)> = imps
                .iter()
                .map(|i| {
                    (
                        i["pooled"]["estimate"].as_f64().unwrap(),
                        i["pooled"]["se"].as_f64().unwrap(),
                    )
                })
                .collect();
            let dfcom = c["df_complete_pooled"].as_f64().unwrap();
            check_recombined(&format!("{key} pooled mean"), &each, dfcom, &c["pooled"]);
            // The report's pooled mean is the combined one.
            assert!(close(
                variant["pooled"]["estimate"].as_f64().unwrap(),
                c["pooled"]["estimate"].as_f64().unwrap(),
                1e-12
            ));
            checked += 1;
        }
        let coefs = c["coef"].as_array().unwrap();
        for (j, combined) in coefs.iter().enumerate() {
            assert!(j < n_terms.max(coefs.len()));
            let each: Option<Vec<(f64, f64)>> = imps
                .iter()
                .map(|i| Some((i["coef"][j].as_f64()?, i["se"][j].as_f64()?)))
                .collect();
            match each {
                Some(each) => {
                    let dfcom = c["df_complete_coef"].as_f64().unwrap();
                    check_recombined(&format!("{key} term {j}"), &each, dfcom, combined);
                    assert!(close(
                        variant["coef"][j].as_f64().unwrap(),
                        combined["estimate"].as_f64().unwrap(),
                        1e-12
                    ));
                    checked += 1;
                }
                // Not estimated on some frame: nothing is combined.
                None => assert!(combined.is_null(), "{key} term {j}"),
            }
        }
    }
    assert!(
        checked > 2 * variants.len(),
        "only {checked} estimates checked"
    );
}

/// `gapwise plan --missing impute --json` prints the plan's expected objective on each
/// completed frame (the first is the plan's own value) and their combination by Rubin's
/// rules with infinite complete-data df (recombined here; common practice).
#[test]
fn plan_json_carries_the_imputations() {
    let m = 3;
    let v = imputed_demo_json("plan", m, 8, &["--replicates", "0"]);
    let by = v["objective_by_imputation"].as_array().unwrap();
    assert_eq!(by.len(), m);
    assert!(close(
        by[0]["estimate"].as_f64().unwrap(),
        v["optimality"]["plan_value"].as_f64().unwrap(),
        1e-12
    ));
    let each: Vec<(f64, f64)> = by
        .iter()
        .map(|b| (b["estimate"].as_f64().unwrap(), b["se"].as_f64().unwrap()))
        .collect();
    // The demo's five invitations are enumerated exactly: no Monte Carlo variance.
    assert_eq!(v["expectation"], "exact");
    assert!(each.iter().all(|e| e.1 == 0.0));
    check_recombined(
        "plan objective",
        &each,
        f64::INFINITY,
        &v["objective_combined"],
    );
    assert_eq!(
        v["pick_agreement"].as_array().unwrap().len(),
        v["steps"].as_array().unwrap().len()
    );
    assert!(v["objective_note"]
        .as_str()
        .unwrap()
        .contains("not included"));
    // The readable form prints the same combined figure (common practice: text and JSON
    // render one result).
    let text = common::gapwise(&[
        "plan",
        common::demo_dir().to_str().unwrap(),
        "--wave",
        "4",
        "--missing",
        "impute",
        "--imputations",
        &m.to_string(),
        "--seed",
        "8",
        "--replicates",
        "0",
    ]);
    assert_eq!(text.code, 0, "{}", text.stderr);
    let combined = format!(
        "combined over the {m} frames by Rubin's rules: {:.3}",
        v["objective_combined"]["estimate"].as_f64().unwrap()
    );
    assert!(text.stdout.contains(&combined), "{}", text.stdout);
}

/// The plan and impact pages and their twins under `missing=impute` show and carry the
/// same per-imputation figures as the command line (common practice for the pages'
/// shape, as in tests/analysis_pages.rs).
#[test]
fn plan_and_impact_pages_carry_the_imputations() {
    let addr = common::start_server(&common::demo_dir());
    let q = "missing=impute&imputations=3&wave=4&seed=8";
    let j = common::get(addr, &format!("/api/plan?{q}&replicates=0"));
    assert_eq!(j.status, 200, "{}", j.body);
    let v: Value = serde_json::from_str(&j.body).unwrap();
    assert_eq!(v["objective_by_imputation"].as_array().unwrap().len(), 3);
    assert!(v["objective_combined"]["estimate"].is_number());
    assert!(v["steps"].as_array().is_some_and(|s| !s.is_empty()));
    let page = common::get(addr, &format!("/plan?{q}&replicates=0"));
    assert_eq!(page.status, 200, "{}", page.body);
    assert!(page.body.contains("id=\"plan-imputations\""));
    // The map is the completed frame's, with the filled countries crossed.
    assert!(page.body.contains("Has filled (imputed) values"));
    assert!(page.body.contains("Rubin's rules"));
    // Without imputation the twin is the plain plan.
    let plain = common::get(addr, "/api/plan?wave=4&replicates=0");
    let v: Value = serde_json::from_str(&plain.body).unwrap();
    assert!(v.get("objective_by_imputation").is_none());

    let iq = format!("{q}&replicates=0&wild_replicates=0");
    let j = common::get(addr, &format!("/api/impact?{iq}"));
    assert_eq!(j.status, 200, "{}", j.body);
    let v: Value = serde_json::from_str(&j.body).unwrap();
    let combination = v["combination"].as_array().unwrap();
    assert_eq!(combination.len(), v["variants"].as_array().unwrap().len());
    assert!(combination
        .iter()
        .all(|c| c["imputations"].as_array().unwrap().len() == 3));
    let page = common::get(addr, &format!("/impact?{iq}"));
    assert_eq!(page.status, 200, "{}", page.body);
    assert!(page.body.contains("id=\"imputations\""));
    assert!(page.body.contains("id=\"imputation-pooled\""));
    // One column per imputation in the pooled-mean table.
    let table = &page.body[page.body.find("id=\"imputation-pooled\"").unwrap()..];
    let head = &table[..table.find("</thead>").unwrap()];
    assert_eq!(head.matches("Imputation ").count(), 3);
    let plain = common::get(addr, "/api/impact?wave=4&replicates=0&wild_replicates=0");
    let v: Value = serde_json::from_str(&plain.body).unwrap();
    assert!(v.get("combination").is_none());
}

/// The meeting report's coverage section under `missing=impute` is the coverage page's:
/// the first completed frame, the filled countries crossed on the map and named; without
/// imputation it names none (common practice).
#[test]
fn report_coverage_uses_the_imputed_frame() {
    let project = Project::load(&common::demo_dir()).unwrap();
    let view = project.wave(4).unwrap();
    let settings = Settings {
        missing: MissingRule::Impute,
        imputations: 2,
        wave: Some(4),
        ..Settings::default()
    };
    let expected = imputed::coverage(Some(&project), &view, &settings).unwrap();
    assert!(!expected.filled.is_empty());
    let addr = common::start_server(&common::demo_dir());
    let r = common::get(
        addr,
        "/report?wave=4&missing=impute&imputations=2&replicates=0&bootstrap=0",
    );
    assert_eq!(r.status, 200, "{}", r.body);
    let section = &r.body[r.body.find("id=\"missing-4\"").unwrap()..];
    let section = &section[..section.find("</section>").unwrap()];
    assert!(
        section.contains("Has filled (imputed) values"),
        "no filled mark"
    );
    assert!(section.contains("single completed frame"));
    assert!(section.contains(&format!("the {} countr", expected.filled.len())));
    for code in &expected.filled {
        assert!(section.contains(code.as_str()), "{code} not named");
    }
    // The map's positions are those of the coverage page's completed frame.
    let c = common::get(addr, "/api/coverage?wave=4&missing=impute&imputations=2");
    let v: Value = serde_json::from_str(&c.body).unwrap();
    let filled: Vec<&str> = v["filled"]
        .as_array()
        .unwrap()
        .iter()
        .map(|x| x.as_str().unwrap())
        .collect();
    assert_eq!(filled, expected.filled);
    assert_eq!(
        v["points"].as_array().unwrap().len(),
        expected.coverage.points.len()
    );
    let plain = common::get(addr, "/report?wave=4&replicates=0&bootstrap=0");
    let section = &plain.body[plain.body.find("id=\"missing-4\"").unwrap()..];
    let section = &section[..section.find("</section>").unwrap()];
    assert!(!section.contains("Has filled (imputed) values"));
}

/// The categorical form of the observed-against-filled diagnostic: with continents
/// removed from the real frame, the level counts add up (observed countries; filled
/// values × imputations), and the chart draws one labelled pair of bars per level
/// (common practice for the chart's contents).
#[test]
fn filled_levels_are_compared_with_observed_ones() {
    let project = real_project();
    let mut view = project.wave(2007).unwrap();
    let cont = &mut view.categorical[0];
    for (i, v) in cont.values.iter_mut().enumerate() {
        if i % 5 == 2 {
            *v = None;
        }
    }
    let missing = cont.values.iter().filter(|x| x.is_none()).count();
    let observed = cont.values.len() - missing;
    let levels = cont.levels.clone();
    let m = 4;
    let s = Settings {
        missing: MissingRule::Impute,
        imputations: m,
        seed: 3,
        ..Settings::default()
    };
    let done = imputed::complete(&view, &[], &s).unwrap();
    let l = &done.summary.observed_vs_imputed_levels;
    assert_eq!(l.len(), 1);
    assert_eq!(l[0].levels, levels);
    assert_eq!(l[0].observed.len(), levels.len());
    assert_eq!(l[0].imputed.len(), levels.len());
    assert_eq!(l[0].observed.iter().sum::<usize>(), observed);
    assert_eq!(l[0].imputed.iter().sum::<usize>(), missing * m);
    let svg = gapwise::charts::imputation::observed_vs_imputed_levels(&done.summary);
    assert!(svg.starts_with("<svg"), "{}", &svg[..200.min(svg.len())]);
    let texts: Vec<&str> = svg
        .split("</text>")
        .filter_map(|t| t.rsplit_once('>').map(|(_, x)| x.trim()))
        .collect();
    for level in &levels {
        assert_eq!(
            texts.iter().filter(|t| *t == level).count(),
            1,
            "label {level} not drawn once"
        );
    }
    // Two bars per level plus the two legend swatches, in the two colours.
    let fills = |hex: &str| svg.matches(&format!("fill=\"{hex}\"")).count();
    assert_eq!(fills("#7A7A7A"), levels.len() + 1, "observed bars");
    assert_eq!(fills("#1B6F7A"), levels.len() + 1, "filled bars");
    // Numeric indicators only: the chart says there is nothing to compare.
    let numeric_only = imputed::complete(
        &with_holes(&project.wave(2007).unwrap(), 0.2, &mut Rng::stream(1, 1)),
        &[],
        &s,
    )
    .unwrap();
    assert!(numeric_only.summary.observed_vs_imputed_levels.is_empty());
    assert!(
        gapwise::charts::imputation::observed_vs_imputed_levels(&numeric_only.summary)
            .contains("No categorical indicator has filled values")
    );
}
