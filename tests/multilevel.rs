//! The random-intercept models checked against R's lme4 (1.1-31, Debian's r-cran-lme4) and
//! statsmodels' MixedLM (0.15): fixtures written offline by tests/fixtures/
//! make_lme4_fixtures.R and tests/fixtures/make_mixedlm_fixture.py. Data: lme4's
//! `sleepstudy` (reaction ~ days + (1 | subject)) and `cbpp` expanded to one row per animal
//! (incidence ~ period + (1 | herd)).

mod common;
use common::*;

use serde_json::Value;

fn load(name: &str) -> Value {
    serde_json::from_str(&std::fs::read_to_string(fixtures().join(name)).unwrap()).unwrap()
}

fn floats(v: &Value) -> Vec<f64> {
    v.as_array()
        .unwrap_or_else(|| panic!("not an array: {v}"))
        .iter()
        .map(|x| x.as_f64().unwrap_or(f64::NAN))
        .collect()
}

fn run(args: &[&str]) -> Value {
    let out = gapwise(args);
    assert_eq!(out.code, 0, "{}", out.stderr);
    serde_json::from_str(&out.stdout).unwrap()
}

fn sleepstudy(extra: &[&str]) -> Value {
    let file = fixtures().join("sleepstudy.csv");
    let mut args = vec![
        "multilevel",
        file.to_str().unwrap(),
        "--outcome",
        "reaction",
        "--predictors",
        "days",
        "--country",
        "subject",
        "--json",
    ];
    args.extend_from_slice(extra);
    run(&args)
}

fn cbpp(extra: &[&str]) -> Value {
    let file = fixtures().join("cbpp_animals.csv");
    let mut args = vec![
        "multilevel",
        file.to_str().unwrap(),
        "--outcome",
        "incidence",
        "--predictors",
        "period2,period3,period4",
        "--country",
        "herd",
        "--kind",
        "logistic",
        "--json",
    ];
    args.extend_from_slice(extra);
    run(&args)
}

fn close_abs(what: &str, got: &[f64], want: &[f64], tol: f64) {
    assert_eq!(got.len(), want.len(), "{what}: lengths");
    for (k, (g, w)) in got.iter().zip(want).enumerate() {
        assert!((g - w).abs() <= tol, "{what}[{k}]: {g} vs {w} (tol {tol})");
    }
}

fn close_rel(what: &str, got: &[f64], want: &[f64], tol: f64) {
    assert_eq!(got.len(), want.len(), "{what}: lengths");
    for (k, (g, w)) in got.iter().zip(want).enumerate() {
        assert!(
            (g - w).abs() <= tol * w.abs(),
            "{what}[{k}]: {g} vs {w} (relative tol {tol})"
        );
    }
}

fn f(v: &Value) -> f64 {
    v.as_f64().unwrap_or(f64::NAN)
}

/// How near a fitted figure must be to its reference.
#[derive(Clone, Copy)]
enum Tol {
    Abs(f64),
    Rel(f64),
}
use Tol::{Abs, Rel};

/// A number, or an array of numbers, as a list.
fn numbers(v: &Value) -> Vec<f64> {
    if v.is_array() {
        floats(v)
    } else {
        vec![f(v)]
    }
}

/// Checks a fit against a reference, one row a figure: the field of `got`, the field of
/// `want` it must match and the tolerance; a failure names `label`, the field and the index.
fn check_fields(label: &str, got: &Value, want: &Value, rows: &[(&str, &str, Tol)]) {
    for &(field, reference, tol) in rows {
        let what = if field == reference {
            format!("{label}: {field}")
        } else {
            format!("{label}: {field} vs {reference}")
        };
        let (g, w) = (numbers(&got[field]), numbers(&want[reference]));
        match tol {
            Abs(t) => close_abs(&what, &g, &w, t),
            Rel(t) => close_rel(&what, &g, &w, t),
        }
    }
}

fn check_linear(got: &Value, want: &Value, tol_abs: f64, tol_se: f64) {
    check_fields(
        "linear",
        got,
        want,
        &[
            ("coef", "coef", Abs(tol_abs)),
            ("se", "se", Rel(tol_se)),
            ("country_sd", "country_sd", Abs(tol_abs)),
            ("residual_sd", "residual_sd", Abs(tol_abs)),
            ("log_likelihood", "log_likelihood", Abs(1e-4)),
        ],
    );
}

#[test]
fn sleepstudy_reml_matches_lme4() {
    // lme4 1.1-31: lmer(Reaction ~ Days + (1 | Subject), REML = TRUE).
    let reference = load("lme4_reference.json");
    let want = &reference["sleepstudy_reml"];
    let got = sleepstudy(&[]);
    assert_eq!(got["method"], "REML");
    assert_eq!(got["n"], 180);
    assert_eq!(got["countries"], 18);
    assert_eq!(got["converged"], true);
    assert_eq!(got["terms"], serde_json::json!(["intercept", "days"]));
    check_linear(&got, want, 1e-4, 1e-3);
    // Conditional modes and variances (lme4's ranef with condVar), subjects in file order.
    assert_eq!(got["country_codes"], reference["sleepstudy_subjects"]);
    check_fields(
        "sleepstudy REML",
        &got,
        want,
        &[
            ("modes", "modes", Abs(1e-4)),
            ("mode_variance", "mode_variance", Rel(1e-4)),
        ],
    );
    // Intraclass correlation from the same fit (definition: tau^2 / (tau^2 + sigma^2)).
    let (tau, sigma) = (f(&want["country_sd"]), f(&want["residual_sd"]));
    let icc = tau * tau / (tau * tau + sigma * sigma);
    assert!((f(&got["icc"]) - icc).abs() < 1e-6);
}

#[test]
fn sleepstudy_ml_matches_lme4() {
    // lme4 1.1-31: lmer(..., REML = FALSE).
    let reference = load("lme4_reference.json");
    let want = &reference["sleepstudy_ml"];
    let got = sleepstudy(&["--ml"]);
    assert_eq!(got["method"], "ML");
    check_linear(&got, want, 1e-4, 1e-3);
    check_fields(
        "sleepstudy ML",
        &got,
        want,
        &[("modes", "modes", Abs(1e-4))],
    );
}

#[test]
fn sleepstudy_matches_statsmodels_mixedlm() {
    // statsmodels 0.15 MixedLM (lbfgs): its optimiser stops a little earlier than lme4's,
    // so the variance components agree to about 2e-5 relative; checked to 1e-4 relative.
    let reference = load("mixedlm_reference.json");
    for (name, extra) in [("reml", vec![]), ("ml", vec!["--ml"])] {
        check_fields(
            &format!("MixedLM {name}"),
            &sleepstudy(&extra),
            &reference[name],
            &[
                ("coef", "coef", Rel(1e-6)),
                ("se", "se", Rel(1e-3)),
                ("country_sd", "country_sd", Rel(1e-4)),
                ("residual_sd", "residual_sd", Rel(1e-4)),
                ("log_likelihood", "log_likelihood", Abs(1e-4)),
            ],
        );
    }
}

#[test]
fn cbpp_laplace_matches_lme4_and_the_exact_laplace_optimum() {
    // lme4 1.1-31: glmer(incidence ~ period + (1 | herd), binomial), nAGQ = 1. lme4's
    // penalised IRLS stops with its deviance about 3e-4 short of the exact Laplace
    // approximation (see the R script), so against lme4 the fixed effects agree to about
    // 6e-4 and are checked to 1e-3; against the exact Laplace optimum computed directly in
    // R (each herd's mode by optimize and Newton, optim over the parameters, optimHess for
    // the standard errors) to 1e-4, standard errors to 1e-3 relative.
    let reference = load("lme4_reference.json");
    let want = &reference["cbpp_laplace"];
    let exact = &reference["cbpp_exact_laplace"];
    let got = cbpp(&[]);
    assert_eq!(got["method"], "Laplace");
    assert_eq!(got["n"], 842);
    assert_eq!(got["countries"], 15);
    assert_eq!(got["converged"], true);
    assert!(got["residual_sd"].is_null());
    assert!(got["icc"].is_null());
    check_fields(
        "exact Laplace",
        &got,
        exact,
        &[
            ("coef", "coef", Abs(1e-4)),
            ("country_sd", "country_sd", Abs(1e-4)),
            ("log_likelihood", "log_likelihood", Abs(1e-6)),
            // Standard errors: inverse Hessian over (beta, tau), as lme4's
            // vcov(use.hessian = TRUE).
            ("se", "se", Rel(1e-3)),
        ],
    );
    check_fields(
        "lme4",
        &got,
        want,
        &[
            ("coef", "coef", Abs(1e-3)),
            ("country_sd", "country_sd", Abs(1e-3)),
            // lme4 differentiates its IRLS-based deviance numerically, about 1.2% off here.
            ("se", "se", Rel(2e-2)),
        ],
    );
    assert_eq!(got["country_codes"], reference["cbpp_herds"]);
    check_fields(
        "lme4",
        &got,
        want,
        &[
            ("modes", "modes", Abs(2e-3)),
            ("mode_variance", "mode_variance", Rel(1e-2)),
        ],
    );
}

#[test]
fn cbpp_adaptive_quadrature_matches_lme4() {
    // lme4 1.1-31: glmer(..., nAGQ = 9).
    let reference = load("lme4_reference.json");
    let want = &reference["cbpp_agq9"];
    let got = cbpp(&["--nodes", "9"]);
    assert_eq!(got["converged"], true);
    check_fields(
        "lme4 nAGQ 9",
        &got,
        want,
        &[
            ("coef", "coef", Abs(1e-4)),
            ("country_sd", "country_sd", Abs(1e-4)),
            ("se", "se", Rel(1e-3)),
            ("log_likelihood", "log_likelihood", Abs(1e-4)),
            ("modes", "modes", Abs(1e-4)),
        ],
    );
}

/// `gapwise multilevel` on the sleepstudy file with days as predictor and subject as
/// country, the given outcome and extra options.
fn sleepstudy_multilevel(outcome: &str, extra: &[&str]) -> Output {
    let file = fixtures().join("sleepstudy.csv");
    let path = file.to_str().unwrap();
    let mut args = vec![
        "multilevel",
        path,
        "--outcome",
        outcome,
        "--predictors",
        "days",
        "--country",
        "subject",
    ];
    args.extend_from_slice(extra);
    gapwise(&args)
}

#[test]
fn bad_requests_get_a_message_not_a_panic() {
    let out = sleepstudy_multilevel("reaction", &["--kind", "probit"]);
    assert_eq!(out.code, 2);
    assert!(out.stderr.contains("--kind"), "{}", out.stderr);
    let out = sleepstudy_multilevel("reaction", &["--kind", "logistic"]);
    assert_eq!(out.code, 1);
    assert!(out.stderr.contains("0 or 1"), "{}", out.stderr);
    let out = sleepstudy_multilevel("nothing", &[]);
    assert_eq!(out.code, 1);
    assert!(out.stderr.contains("nothing"), "{}", out.stderr);
}

/// One simulated universe for the known-universe checks: 80 countries with indicator
/// z ~ N(0, 1), a true country value `truth_of(z)` (drawing its own country effect),
/// participation more likely for high z (logit 1.2 z), a pure-noise indicator, and 60
/// respondents per participant whose answers `answer(value)` gives as text. Writes the
/// project into `dir`, projects it with `seed` and returns the projection, the universe's
/// true mean and the participants' own means. The draws keep one fixed order per country.
fn project_simulated_universe(
    dir: &TempDir,
    rng: &mut gapwise::stats::random::Rng,
    seed: u64,
    truth_of: &dyn Fn(&mut gapwise::stats::random::Rng, f64) -> f64,
    answer: &dyn Fn(&mut gapwise::stats::random::Rng, f64) -> (f64, String),
) -> (
    gapwise::analysis::projection::ProjectionReport,
    f64,
    Vec<f64>,
) {
    use gapwise::analysis::projection::{projection, ProjectionSettings};
    use gapwise::analysis::Settings;
    use gapwise::project::{Project, WaveView};
    use std::fmt::Write as _;

    let mut frame = String::from("iso,name,wave,took_part,z,noise\n");
    let mut micro = String::from("iso,wave,dweight,y\n");
    let mut truth = 0.0;
    let mut own_means = Vec::new();
    for j in 0..80 {
        let z = rng.normal();
        let value = truth_of(rng, z);
        truth += value / 80.0;
        let took_part = rng.bernoulli(1.0 / (1.0 + (-1.2 * z).exp()));
        let code = format!(
            "X{}{}",
            (b'A' + (j / 26) as u8) as char,
            (b'A' + (j % 26) as u8) as char
        );
        let _ = writeln!(
            frame,
            "{code},Country {j},1,{},{z:.6},{:.6}",
            u8::from(took_part),
            rng.normal()
        );
        if took_part {
            let mut sum = 0.0;
            for _ in 0..60 {
                let (y, text) = answer(rng, value);
                sum += y;
                let _ = writeln!(micro, "{code},1,1.0,{text}");
            }
            own_means.push(sum / 60.0);
        }
    }
    dir.write("frame.csv", &frame);
    dir.write("microdata.csv", &micro);
    let project = Project::load(dir.path()).unwrap_or_else(|p| panic!("{p:?}"));
    let view = WaveView::new(&project, 1).unwrap();
    let settings = Settings {
        wave: Some(1),
        seed,
        ..Settings::default()
    };
    let report = projection(
        &project,
        &view,
        &settings,
        &ProjectionSettings {
            outcome: "y".into(),
            predictors: vec![],
        },
    )
    .unwrap();
    (report, truth, own_means)
}

/// The manifest of the simulated universes.
fn simulated_manifest(title: &str) -> String {
    manifest_with(
        title,
        r#"[indicators]
numeric = ["z", "noise"]
[microdata]
country = "iso"
wave = "wave"
design_weight = "dweight"
variables = ["y"]
"#,
    )
}

/// A known universe: 80 countries, true country means 5 + 0.8 z_j + u_j (u_j ~ N(0, 0.3^2)),
/// participation more likely for high z (logit 1.2 z), 60 respondents per participant with
/// unit-variance noise. The target is the mean of the 80 true country means. Over 200
/// universes (seeded) the projection's 95% interval should cover it at close to 95%
/// (binomial SD 1.5 points; accepted 90-99%, about three SDs), and its mean absolute error should be below
/// that of the participants' unweighted mean (common practice for a simulation check).
#[test]
fn projection_recovers_a_known_universe() {
    use gapwise::stats::random::Rng;

    let replicates = 200;
    let mut covered = 0;
    let mut error_projection = 0.0;
    let mut error_participants = 0.0;
    let dir = TempDir::new("known-universe");
    dir.write("project.toml", simulated_manifest("Simulated universe"));
    for rep in 0..replicates {
        let mut rng = Rng::stream(17, rep);
        let (r, truth, part_means) = project_simulated_universe(
            &dir,
            &mut rng,
            1000 + rep,
            &|rng, z| 5.0 + 0.8 * z + 0.3 * rng.normal(),
            &|rng, mu| {
                let y = mu + rng.normal();
                (y, format!("{y:.6}"))
            },
        );
        assert_eq!(r.countries.len(), 80);
        assert_eq!(r.n_participants, part_means.len());
        if r.universe_low <= truth && truth <= r.universe_high {
            covered += 1;
        }
        error_projection += (r.universe_estimate - truth).abs();
        let naive = part_means.iter().sum::<f64>() / part_means.len() as f64;
        assert!((naive - r.participants_mean).abs() < 1e-5);
        error_participants += (naive - truth).abs();
    }
    let rate = covered as f64 / replicates as f64;
    assert!((0.90..=0.99).contains(&rate), "coverage {rate}");
    assert!(
        error_projection < 0.7 * error_participants,
        "mean abs error {} vs participants' {}",
        error_projection / replicates as f64,
        error_participants / replicates as f64
    );
    println!(
        "coverage {rate}; mean absolute error {:.4} (projection) vs {:.4} (participants)",
        error_projection / replicates as f64,
        error_participants / replicates as f64
    );
}

#[test]
fn projection_page_twin_and_download_agree() {
    // Common practice: the page, its JSON twin and the CSV render one result.
    let addr = start_server(&demo_dir());
    let query = "outcome=trust_parliament&predictor=age";
    let page = get(addr, &format!("/projection?{query}"));
    assert_eq!(page.status, 200, "{}", page.body);
    assert!(page
        .body
        .contains("What would the whole eligible universe say?"));
    let twin = get(addr, &format!("/api/projection?{query}"));
    assert_eq!(twin.status, 200);
    let r: Value = serde_json::from_str(&twin.body).unwrap();
    let estimate = f(&r["universe_estimate"]);
    let (low, high) = (f(&r["universe_low"]), f(&r["universe_high"]));
    assert!(low < estimate && estimate < high, "{low} {estimate} {high}");
    assert!(page.body.contains(&format!("{estimate:.3}")));
    assert!(page.body.contains(&format!("seed {}", r["seed"])));
    let countries = r["countries"].as_array().unwrap();
    let csv = get(addr, &format!("/projection/table.csv?{query}"));
    assert_eq!(csv.status, 200);
    assert_eq!(csv.body.lines().count(), countries.len() + 1);
    assert!(!r["regions"].as_array().unwrap().is_empty());
    // The map: on the page and as a download.
    assert!(page.body.contains("Did not take part (projected)"));
    assert!(page.body.contains("/projection/map.svg?"));
    let map = get(addr, &format!("/projection/map.svg?{query}"));
    assert_eq!(map.status, 200);
    assert!(
        map.body.contains("<svg"),
        "{}",
        &map.body[..map.body.len().min(200)]
    );
    // Counting countries by population (the demo declares log_population): a different
    // universe estimate, said on the page.
    let by_pop = get(addr, &format!("/api/projection?{query}&shares=population"));
    assert_eq!(by_pop.status, 200, "{}", by_pop.body);
    let p: Value = serde_json::from_str(&by_pop.body).unwrap();
    assert_eq!(p["shares"], "population");
    assert!((f(&p["universe_estimate"]) - estimate).abs() > 1e-9);
    let page_pop = get(addr, &format!("/projection?{query}&shares=population"));
    assert!(page_pop.body.contains("Countries count by population"));
    let bad = get(addr, &format!("/api/projection?{query}&shares=people"));
    assert_eq!(bad.status, 400);
    // Countries with a missing indicator are not estimable: null, never 0.
    for c in countries {
        if c["prediction"].is_null() {
            assert!(c["low"].is_null() && c["high"].is_null());
        }
    }
}

/// The logistic projection against R (tests/fixtures/make_projection_logit.R, run offline:
/// lme4 1.1-31 glmer by Laplace, and integrate() over the absent countries' effect
/// u ~ N(0, tau^2)): fixed effects and country SD to 1e-4, standard errors to 1e-3
/// relative, every country's projection and the universe means (equal and by population)
/// to 1e-4; absent countries with cells in composition.csv use them.
#[test]
fn logistic_projection_matches_glmer_and_numerical_integration() {
    use gapwise::analysis::projection::{
        projection_with, CountryShares, ProjectionOptions, ProjectionSettings,
    };
    use gapwise::analysis::Settings;
    use gapwise::project::{Project, WaveView};

    let want = load("projection_logit.json");
    let project =
        Project::load(&fixtures().join("projection_logit")).unwrap_or_else(|p| panic!("{p:?}"));
    assert!(project.composition.is_some());
    let view = WaveView::new(&project, 1).unwrap();
    let settings = Settings {
        wave: Some(1),
        ..Settings::default()
    };
    let ps = ProjectionSettings {
        outcome: "y".into(),
        predictors: vec!["x".into(), "female".into()],
    };
    let codes: Vec<String> = want["codes"]
        .as_array()
        .unwrap()
        .iter()
        .map(|c| c.as_str().unwrap().to_string())
        .collect();
    let with_file: Vec<&str> = want["with_composition"]
        .as_array()
        .unwrap()
        .iter()
        .map(|c| c.as_str().unwrap())
        .collect();
    let predictions = floats(&want["prediction"]);
    assert_eq!(codes.len(), predictions.len());
    for (shares, key) in [
        (CountryShares::Equal, "universe_equal"),
        (CountryShares::Population, "universe_population"),
    ] {
        let r = projection_with(
            &project,
            &view,
            &settings,
            &ps,
            &ProjectionOptions { shares },
        )
        .unwrap();
        assert_eq!(r.fit.kind, "logistic");
        assert_eq!(r.method, "Laplace");
        assert!(r.converged);
        close_abs("coef", &r.fit.coef, &floats(&want["coef"]), 1e-4);
        close_rel("se", &r.fit.se, &floats(&want["se"]), 1e-3);
        assert!(
            (r.fit.country_sd - f(&want["country_sd"])).abs() < 1e-4,
            "country SD {} vs {}",
            r.fit.country_sd,
            want["country_sd"]
        );
        assert_eq!(r.countries.len(), codes.len());
        for (code, p) in codes.iter().zip(&predictions) {
            let c = r.countries.iter().find(|c| &c.code == code).unwrap();
            let got = c.prediction.unwrap();
            assert!((got - p).abs() < 1e-4, "{code}: {got} vs {p}");
            let (lo, hi) = (c.low.unwrap(), c.high.unwrap());
            assert!(lo < got && got < hi, "{code}: {lo} {got} {hi}");
            if !c.participated {
                let source = if with_file.contains(&code.as_str()) {
                    "file"
                } else {
                    "pooled"
                };
                assert_eq!(c.composition, Some(source), "{code}");
            }
        }
        let universe = f(&want[key]);
        assert!(
            (r.universe_estimate - universe).abs() < 1e-4,
            "{key}: {} vs {universe}",
            r.universe_estimate
        );
        assert!(r.universe_low < r.universe_estimate && r.universe_estimate < r.universe_high);
        assert!(r.projection_method.contains("logistic"));
        assert!(r.composition.contains("composition file"));
    }
}

/// A composition file with a bad cell stops the load with the file, line and column
/// (common practice).
#[test]
fn a_bad_composition_file_is_named_by_line_and_column() {
    use gapwise::project::Project;
    let dir = TempDir::new("bad-composition");
    for name in ["project.toml", "frame.csv", "microdata.csv"] {
        dir.write(
            name,
            std::fs::read(fixtures().join("projection_logit").join(name)).unwrap(),
        );
    }
    dir.write(
        "composition.csv",
        "iso,wave,x,female,share\nXAF,1,0,0,0.5\nXAF,1,one,1,0.5\nXQQ,1,0,0,0.2\n",
    );
    let problems = Project::load(dir.path()).unwrap_err();
    let text: Vec<String> = problems.iter().map(|p| p.to_string()).collect();
    assert!(
        text.iter().any(|t| t.starts_with("composition.csv:3:x:")),
        "{text:?}"
    );
    assert!(
        text.iter().any(|t| t.starts_with("composition.csv:4:iso:")),
        "{text:?}"
    );
    std::fs::remove_file(dir.path().join("composition.csv")).unwrap();
    let problems = Project::load(dir.path()).unwrap_err();
    assert!(
        problems[0].to_string().contains("composition.csv"),
        "{problems:?}"
    );
}

/// A frame whose true country-level variance is 0 (tests/fixtures/boundary_logit.csv: 40
/// countries of 50 respondents, no country effect; written by make_lme4_fixtures.R). lme4
/// 1.1-31's glmer reports a singular fit there (country SD 0; isSingular TRUE) with the
/// fixed effects of glm, and the score for tau^2 at 0 is negative. The fit must stop at
/// the boundary within a few Newton steps (before the boundary was recognised it ran to
/// its limit of 100), say so, and agree with glmer: fixed effects to 1e-6, standard errors
/// to 1e-4 relative (glmer differentiates its deviance numerically), and with glm's exact
/// ones to 1e-6 relative.
#[test]
fn logistic_fit_at_the_boundary_stops_there_and_matches_glmer() {
    let reference = load("lme4_reference.json");
    let want = &reference["boundary_laplace"];
    assert!(f(&want["tau2_score_at_0"]) < 0.0);
    let file = fixtures().join("boundary_logit.csv");
    for nodes in ["1", "9"] {
        let got = run(&[
            "multilevel",
            file.to_str().unwrap(),
            "--outcome",
            "y",
            "--predictors",
            "x,z",
            "--country",
            "country",
            "--kind",
            "logistic",
            "--nodes",
            nodes,
            "--json",
        ]);
        assert_eq!(got["n"], 2000);
        assert_eq!(got["countries"], 40);
        assert_eq!(got["converged"], true, "nodes {nodes}");
        assert_eq!(got["at_boundary"], true, "nodes {nodes}");
        assert_eq!(f(&got["country_sd"]), 0.0);
        let iterations = got["iterations"].as_u64().unwrap();
        assert!(iterations <= 3, "{iterations} Newton steps at the boundary");
        assert!(
            got["note"].as_str().unwrap().contains("at its boundary, 0"),
            "{}",
            got["note"]
        );
        check_fields(
            &format!("boundary, nodes {nodes}"),
            &got,
            want,
            &[
                ("coef", "coef", Abs(1e-6)),
                ("coef", "glm_coef", Abs(1e-6)),
                ("se", "se", Rel(1e-4)),
                ("se", "glm_se", Rel(1e-4)),
                ("log_likelihood", "log_likelihood", Abs(1e-6)),
            ],
        );
        let modes = floats(&got["modes"]);
        assert_eq!(modes.len(), 40);
        assert!(modes.iter().all(|m| *m == 0.0));
    }
    // An interior optimum is not taken for the boundary (lme4's cbpp fit, SD 0.64).
    let interior = cbpp(&[]);
    assert_eq!(interior["at_boundary"], false);
    assert!(interior["note"].is_null());
    assert!(interior["iterations"].as_u64().unwrap() >= 2);
}

/// The text a reader sees in an HTML page: everything outside tags, leaving out style
/// sheets and scripts (SVG titles, shown on hover, count as seen).
fn visible_text(html: &str) -> String {
    let mut out = String::new();
    let mut rest = html;
    while let Some(open) = rest.find('<') {
        out.push_str(&rest[..open]);
        out.push(' ');
        let tail = &rest[open..];
        let skip_to = ["<style", "<script"]
            .iter()
            .find(|t| tail.starts_with(**t))
            .map(|t| format!("</{}>", &t[1..]));
        let end = match skip_to {
            Some(close) => tail.find(&close).map(|e| e + close.len()),
            None => tail.find('>').map(|e| e + 1),
        };
        match end {
            Some(e) => rest = &tail[e..],
            None => return out,
        }
    }
    out.push_str(rest);
    out
}

/// The demo's column names that have readable labels (issue 19): none may reach what a
/// reader of the projection page sees (links and form values keep them).
const RAW_NAMES: [&str; 9] = [
    "trust_parliament",
    "income_decile",
    "left_right",
    "log_gdp_pc",
    "years_since_transition",
    "democracy_index",
    "log_population",
    "internet_use",
    "urban_share",
];

#[test]
fn projection_page_shows_readable_labels_not_column_names() {
    // Common practice (issue 19): the model line, the method text, the model table and
    // the map's title and hover texts use the manifest's labels or ones derived from the
    // column names.
    let addr = start_server(&demo_dir());
    let page = get(addr, "/projection?outcome=trust_parliament&predictor=age&predictor=income_decile&shares=population");
    assert_eq!(page.status, 200, "{}", page.body);
    // The raw names are there, but only in links and form values.
    assert!(page.body.contains("value=\"trust_parliament\""));
    let seen = visible_text(&page.body);
    for raw in RAW_NAMES {
        assert!(!seen.contains(raw), "the page shows the column name {raw}");
    }
    assert!(page
        .body
        .contains("<span class=\"what\">Model:</span> Trust parliament on 2"));
    assert!(page.body.contains(
        "model of <strong>Trust parliament</strong> (respondent predictors Age, Income decile)"
    ));
    assert!(page
        .body
        .contains("Countries count by population (Population (log))"));
    assert!(seen.contains("Projected Trust parliament on the map of the eligible universe"));
    assert!(seen.contains("GDP per head (log US$) (standardised)"));
    // The JSON twin keeps the column names and carries the labels beside them.
    let twin: Value = get_json(
        addr,
        "/api/projection?outcome=trust_parliament&predictor=age&predictor=income_decile",
    );
    assert_eq!(twin["outcome"], "trust_parliament");
    assert_eq!(twin["outcome_label"], "Trust parliament");
    assert_eq!(
        twin["terms"].as_array().unwrap().len(),
        twin["term_labels"].as_array().unwrap().len()
    );
}

/// The demo's turnout has no country effect beyond the indicators (demo-data/SCENARIO.md:
/// its linear predictor has none), so the logistic projection's country SD is estimated
/// at its boundary, 0: the fit stops there, counts as converged and the page says so.
#[test]
fn logistic_projection_of_the_demo_reports_the_boundary() {
    let addr = start_server(&demo_dir());
    let query = "outcome=turnout&predictor=age&predictor=female";
    let twin = get(addr, &format!("/api/projection?{query}"));
    assert_eq!(twin.status, 200, "{}", twin.body);
    let r: Value = serde_json::from_str(&twin.body).unwrap();
    assert_eq!(r["kind"], "logistic");
    assert_eq!(r["converged"], true);
    assert_eq!(r["at_boundary"], true);
    assert_eq!(f(&r["country_sd"]), 0.0);
    let notes: Vec<&str> = r["notes"]
        .as_array()
        .unwrap()
        .iter()
        .map(|n| n.as_str().unwrap())
        .collect();
    assert!(
        notes.iter().any(|n| n.contains("at its boundary, 0")),
        "{notes:?}"
    );
    assert!(!notes.iter().any(|n| n.contains("did not converge")));
    let page = get(addr, &format!("/projection?{query}"));
    assert_eq!(page.status, 200);
    assert!(page
        .body
        .contains("the country-level variance is estimated at its boundary, 0"));
    assert!(page.body.contains("(at its boundary)"));
    assert!(!page.body.contains("did not converge"));
    let (low, high) = (f(&r["universe_low"]), f(&r["universe_high"]));
    let estimate = f(&r["universe_estimate"]);
    assert!(0.0 < low && low < estimate && estimate < high && high < 1.0);
    // The impact view's projection variant says it too.
    let impact = get(
        addr,
        &format!("/api/impact?{query}&kind=logistic&replicates=0&wild_replicates=0"),
    );
    assert_eq!(impact.status, 200, "{}", impact.body);
    let i: Value = serde_json::from_str(&impact.body).unwrap();
    let variant = i["variants"]
        .as_array()
        .unwrap()
        .iter()
        .find(|v| v["key"] == "multilevel-projection")
        .expect("the projection variant");
    assert!((f(&variant["pooled"]["estimate"]) - estimate).abs() < 1e-12);
    assert!(
        variant["se_kind"]
            .as_str()
            .unwrap()
            .contains("estimated at its boundary, 0"),
        "{}",
        variant["se_kind"]
    );
}

/// The meeting report carries the projection's map as inline SVG: one hover-titled marker
/// per country on the map, projected ones as many as the countries the report says it
/// projected (common practice: the chart the page shows).
#[test]
fn report_carries_the_projection_map() {
    let dir = TempDir::new("report-projection-map");
    let out = dir.path().join("r.html");
    let run = gapwise(&[
        "report",
        demo_dir().to_str().unwrap(),
        "--wave",
        "3",
        "--bootstrap",
        "0",
        "--replicates",
        "0",
        "--out",
        out.to_str().unwrap(),
    ]);
    assert_eq!(run.code, 0, "{}", run.stderr);
    let html = std::fs::read_to_string(&out).unwrap();
    let start = html
        .find("<section id=\"projection-3\">")
        .expect("projection section");
    let section = &html[start..];
    let section = &section[..section.find("</section>").unwrap()];
    let svg_at = section.find("<svg").expect("the projection map inline");
    let svg = &section[svg_at..section.find("</svg>").unwrap()];
    assert!(svg.contains("Projected Trust parliament on the map of the eligible universe"));
    let number_after = |text: &str, before: &str| -> usize {
        let at = text.find(before).unwrap_or_else(|| panic!("no '{before}'")) + before.len();
        text[at..]
            .split(|c: char| !c.is_ascii_digit())
            .next()
            .unwrap()
            .parse()
            .unwrap()
    };
    let absent = number_after(section, "projected to the ");
    let participants = number_after(section, "respondents in ");
    assert!(absent > 10 && participants > 10, "{absent} {participants}");
    let projected = svg.matches(": did not take part, projected").count();
    let took_part = svg.matches(": took part; predicted").count();
    assert_eq!(projected, absent, "projected markers");
    assert_eq!(took_part, participants, "participants' markers");
    // Diamonds of the projected countries (and the legend's one).
    assert!(svg.matches("<polygon").count() > absent);
    // Labelled countries: up to 12 "CODE value" labels, codes of the demo's XAA-XZZ.
    let labels = svg
        .split("<text")
        .filter(|t| {
            let inner = t.split('>').nth(1).unwrap_or("").trim();
            inner.len() > 4 && inner.starts_with('X') && inner.as_bytes()[3] == b' '
        })
        .count();
    assert!((1..=12).contains(&labels), "{labels} country labels");
}

/// The logistic projection in a known universe: 80 countries, each with a true share
/// p_j = 1 / (1 + exp(-(-0.3 + 0.9 z_j + u_j))), u_j ~ N(0, 0.5^2), of respondents giving
/// a 1; participation more likely for high z (logit 1.2 z), so the participants' share
/// overstates the universe's. 60 respondents per participant. The target is the mean of
/// the 80 true shares. Over 400 seeded universes the projection's 95% interval should
/// cover it at close to 95% (binomial SD 1.1 points; accepted 91.5-98.5%, about three
/// SDs), every fit should converge, and the projection's mean absolute error should be
/// below that of the participants' unweighted share (common practice for a simulation
/// check). Measured: 94.25%, errors 0.013 against 0.086.
#[test]
fn logistic_projection_recovers_a_known_universe() {
    use gapwise::stats::random::Rng;

    let replicates = 400;
    let mut covered = 0;
    let mut boundary = 0;
    let mut error_projection = 0.0;
    let mut error_participants = 0.0;
    let dir = TempDir::new("known-universe-logistic");
    dir.write(
        "project.toml",
        simulated_manifest("Simulated universe, binary outcome"),
    );
    for rep in 0..replicates {
        let mut rng = Rng::stream(29, rep);
        let (r, truth, part_shares) = project_simulated_universe(
            &dir,
            &mut rng,
            5000 + rep,
            &|rng, z| {
                let eta: f64 = -0.3 + 0.9 * z + 0.5 * rng.normal();
                1.0 / (1.0 + (-eta).exp())
            },
            &|rng, p| {
                let y = u8::from(rng.bernoulli(p));
                (f64::from(y), y.to_string())
            },
        );
        assert_eq!(r.fit.kind, "logistic");
        if !r.converged {
            println!(
                "rep {rep}: sd {} boundary {} coef {:?}",
                r.fit.country_sd, r.at_boundary, r.fit.coef
            );
        }
        assert_eq!(r.countries.len(), 80);
        assert_eq!(r.n_participants, part_shares.len());
        boundary += usize::from(r.at_boundary);
        if std::env::var("ML_DIAG").is_ok() {
            println!(
                "diag {} {} {} {} {}",
                r.universe_estimate - truth,
                r.universe_high - r.universe_low,
                r.fit.country_sd,
                r.fit.coef[0],
                r.fit.coef[1]
            );
        }
        if r.universe_low <= truth && truth <= r.universe_high {
            covered += 1;
        }
        error_projection += (r.universe_estimate - truth).abs();
        let naive = part_shares.iter().sum::<f64>() / part_shares.len() as f64;
        assert!((naive - r.participants_mean).abs() < 1e-9);
        error_participants += (naive - truth).abs();
    }
    let rate = covered as f64 / replicates as f64;
    println!(
        "logistic: coverage {rate} over {replicates} universes ({boundary} fits at the boundary); mean absolute error {:.4} (projection) vs {:.4} (participants)",
        error_projection / replicates as f64,
        error_participants / replicates as f64
    );
    assert!((0.915..=0.985).contains(&rate), "coverage {rate}");
    assert!(
        error_projection < 0.7 * error_participants,
        "mean abs error {} vs participants' {}",
        error_projection / replicates as f64,
        error_participants / replicates as f64
    );
}
