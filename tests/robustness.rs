//! Robustness: the loaders never panic on mangled files (many generated variants, a
//! property test in place of a fuzzer), and every model and weighting method answers
//! awkward universes with finite numbers or a clear message.

mod common;
use common::*;

use gapwise::analysis::participation::fit;
use gapwise::analysis::planner::{plan, PlanSettings};
use gapwise::analysis::settings::Settings;
use gapwise::project::wave::ExtraColumns;
use gapwise::project::{Project, WaveView};
use gapwise::stats::random::Rng;

/// Mangles `text` in one of several ways chosen by the generator.
fn mangle(text: &[u8], rng: &mut Rng) -> Vec<u8> {
    let mut bytes = text.to_vec();
    let n = bytes.len().max(1);
    match rng.below(8) {
        0 => bytes.truncate(rng.below(n)),
        1 => {
            let i = rng.below(n).min(bytes.len().saturating_sub(1));
            if !bytes.is_empty() {
                bytes[i] = rng.below(256) as u8;
            }
        }
        2 => bytes.insert(rng.below(n), b'"'),
        3 => bytes.insert(rng.below(n), b','),
        4 => bytes.insert(rng.below(n), b'\n'),
        5 => {
            let i = rng.below(n).min(bytes.len());
            bytes.splice(i..i, [0xFF, 0xFE, 0x00]);
        }
        6 => {
            let i = rng.below(n);
            let j = (i + 1 + rng.below(20)).min(bytes.len());
            bytes.drain(i.min(j)..j);
        }
        _ => {
            for _ in 0..5 {
                let i = rng.below(bytes.len().max(1));
                if i < bytes.len() {
                    bytes[i] = b"0123456789.-eNA ,\"\r\n"[rng.below(19)];
                }
            }
        }
    }
    bytes
}

#[test]
fn loaders_never_panic_on_mangled_files() {
    let mut rng = Rng::new(99);
    let dir = TempDir::new("mangled");
    let mut problems_seen = 0;
    for round in 0..400 {
        dir.write("project.toml", MANIFEST);
        dir.write("frame.csv", FRAME);
        dir.write("microdata.csv", MICRODATA);
        let target = ["frame.csv", "microdata.csv", "project.toml"][round % 3];
        let original = match target {
            "frame.csv" => FRAME,
            "microdata.csv" => MICRODATA,
            _ => MANIFEST,
        };
        let mut bytes = original.as_bytes().to_vec();
        for _ in 0..(1 + rng.below(3)) {
            bytes = mangle(&bytes, &mut rng);
        }
        dir.write(target, &bytes);
        let path = dir.path().to_path_buf();
        let outcome = std::panic::catch_unwind(move || Project::load(&path).map(|_| ()));
        match outcome {
            Err(_) => panic!(
                "round {round}: loading a mangled {target} panicked; bytes: {:?}",
                String::from_utf8_lossy(&bytes)
            ),
            Ok(Err(problems)) => {
                problems_seen += 1;
                assert!(!problems.is_empty());
                for p in problems {
                    assert!(!p.message.is_empty(), "round {round}: empty message");
                }
            }
            Ok(Ok(())) => {}
        }
    }
    assert!(
        problems_seen > 100,
        "the mangling should produce many invalid files ({problems_seen})"
    );
}

fn universe(dir: &TempDir, csv: &str, covariates: &[&str], factors: &[&str]) -> WaveView {
    dir.write("u.csv", csv);
    let cov: Vec<String> = covariates.iter().map(|s| s.to_string()).collect();
    let fac: Vec<String> = factors.iter().map(|s| s.to_string()).collect();
    WaveView::from_file(
        &dir.path().join("u.csv"),
        "id",
        "t",
        &cov,
        &fac,
        &ExtraColumns::default(),
    )
    .expect("loads")
}

/// An integer number of thousandths written exactly as a decimal.
fn thousandths(v: i64) -> String {
    let sign = if v < 0 { "-" } else { "" };
    format!("{sign}{}.{:03}", v.abs() / 1000, v.abs() % 1000)
}

/// A participation flag unrelated to the indicators (every third unit, shifted).
fn rng_flag(i: usize) -> bool {
    (i * 7 + 3) % 5 < 2
}

/// Fields of the fit result that are `Option`s (null means "none" or "not estimable");
/// a null anywhere else is a non-finite number that serde wrote as null.
const MAY_BE_NULL: [&str; 24] = [
    "wave",
    "covariates",
    "factors",
    "trim",
    "coef",
    "se",
    "z",
    "ci95_low",
    "ci95_high",
    "odds_ratio",
    "odds_ratio_low",
    "odds_ratio_high",
    "not_estimable",
    "auc",
    "auc_loo",
    "smd_before",
    "smd_after",
    "variance_ratio_before",
    "variance_ratio_after",
    "incomplete",
    "fell_back_to",
    "missing_caveat",
    "cbps",
    "population",
];

fn assert_no_stray_nulls(v: &serde_json::Value, key: &str, what: &str) {
    match v {
        serde_json::Value::Null => {
            assert!(
                MAY_BE_NULL.contains(&key),
                "{what}: non-finite number at '{key}'"
            )
        }
        serde_json::Value::Array(items) => {
            for item in items {
                assert_no_stray_nulls(item, key, what);
            }
        }
        serde_json::Value::Object(map) => {
            for (k, item) in map {
                assert_no_stray_nulls(item, k, what);
            }
        }
        _ => {}
    }
}

/// Every coefficient is complete with a positive standard error and an interval of
/// positive width, or marked not estimable with a reason (never a 0 or an infinity).
fn assert_estimable_or_marked(r: &serde_json::Value, what: &str) {
    let coefficients = r["model"]["coefficients"].as_array().expect("coefficients");
    assert_eq!(
        coefficients.len(),
        r["model"]["terms"].as_array().unwrap().len()
    );
    for c in coefficients {
        match (
            c["se"].as_f64(),
            c["ci95_low"].as_f64(),
            c["ci95_high"].as_f64(),
            c["z"].as_f64(),
        ) {
            (Some(se), Some(lo), Some(hi), Some(z)) => {
                assert!(se > 0.0 && hi > lo && z.is_finite(), "{what}: {c}");
            }
            _ => assert!(
                c["coef"].is_null()
                    && c["se"].is_null()
                    && c["not_estimable"].as_str().is_some_and(|s| s.len() > 20),
                "{what}: {c}"
            ),
        }
    }
}

fn frame(rows: usize, f: impl Fn(usize) -> String) -> String {
    let mut s = String::from("id,t,a,b,g\n");
    for i in 0..rows {
        s.push_str(&format!("U{i:03},{}\n", f(i)));
    }
    s
}

#[test]
fn awkward_universes_get_finite_numbers_or_clear_messages() {
    let dir = TempDir::new("awkward");
    let mut rng = Rng::new(5);
    let noise: Vec<f64> = (0..60).map(|_| rng.normal()).collect();
    let cases: Vec<(&str, String)> = vec![
        (
            "constant indicator",
            frame(60, |i| {
                format!(
                    "{},{:.3},5,{}",
                    u8::from(i % 2 == 0),
                    noise[i],
                    ["x", "y"][i % 2]
                )
            }),
        ),
        (
            // b = 2a + 1 exactly: a in thousandths, b written from the same integer.
            "exactly collinear indicators",
            frame(60, |i| {
                let a = (noise[i] * 1000.0).round() as i64;
                format!(
                    "{},{},{},{}",
                    u8::from(rng_flag(i)),
                    thousandths(a),
                    thousandths(2 * a + 1000),
                    ["x", "y"][i % 2]
                )
            }),
        ),
        (
            "nearly collinear indicators",
            frame(60, |i| {
                format!(
                    "{},{:.3},{:.3},{}",
                    u8::from(noise[i] > 0.0),
                    noise[i],
                    2.0 * noise[i] + 1.0,
                    ["x", "y"][i % 2]
                )
            }),
        ),
        (
            "single participant",
            frame(60, |i| {
                format!(
                    "{},{:.3},{:.3},{}",
                    u8::from(i == 7),
                    noise[i],
                    noise[(i + 1) % 60],
                    ["x", "y"][i % 2]
                )
            }),
        ),
        (
            "everyone took part",
            frame(60, |i| {
                format!(
                    "1,{:.3},{:.3},{}",
                    noise[i],
                    noise[(i + 1) % 60],
                    ["x", "y"][i % 2]
                )
            }),
        ),
        (
            "nobody took part",
            frame(60, |i| {
                format!(
                    "0,{:.3},{:.3},{}",
                    noise[i],
                    noise[(i + 1) % 60],
                    ["x", "y"][i % 2]
                )
            }),
        ),
        (
            "extreme values",
            frame(60, |i| {
                format!(
                    "{},{:e},{:.3},{}",
                    u8::from(i % 3 == 0),
                    if i == 5 { 1e12 } else { noise[i] },
                    noise[(i + 1) % 60] * 1e-9,
                    ["x", "y"][i % 2]
                )
            }),
        ),
        (
            "perfect separation",
            frame(60, |i| {
                format!(
                    "{},{:.3},{:.3},{}",
                    u8::from(noise[i] > 0.0),
                    noise[i],
                    noise[(i + 1) % 60],
                    ["x", "y"][i % 2]
                )
            }),
        ),
        (
            "a level nobody takes part in",
            frame(60, |i| {
                format!(
                    "{},{:.3},{:.3},{}",
                    u8::from(i % 3 == 0),
                    noise[i],
                    noise[(i + 1) % 60],
                    ["x", "y", "z"][i % 3]
                )
            }),
        ),
    ];
    for (name, csv) in cases {
        let view = universe(&dir, &csv, &["a", "b"], &["g"]);
        for settings in every_model_and_weighting() {
            let (model, weighting) = (settings.model, settings.weighting);
            match fit(&view, &settings) {
                Ok(r) => {
                    // serde_json writes NaN and infinities as null: a null is only
                    // allowed where the result says "none" on purpose.
                    let json = serde_json::to_value(&r).unwrap();
                    let what = format!("{name} / {model:?} / {weighting:?}");
                    assert_no_stray_nulls(&json, "", &what);
                    assert_estimable_or_marked(&json, &what);
                    if name == "exactly collinear indicators" {
                        // b = 2a + 1: a, b and the intercept are not estimable.
                        for j in 0..3 {
                            assert!(
                                json["model"]["se"][j].is_null(),
                                "{what}: {}",
                                json["model"]["se"]
                            );
                        }
                    }
                    for u in &r.units {
                        assert!(
                            u.weight.is_finite() && u.propensity.is_finite(),
                            "{name}: non-finite unit values"
                        );
                    }
                }
                Err(e) => assert!(
                    e.to_string().len() > 20,
                    "{name} / {model:?} / {weighting:?}: unclear message {e}"
                ),
            }
        }
        // The planner too.
        match plan(
            &view,
            &Settings::default(),
            &PlanSettings {
                replicates: 5,
                random_draws: 5,
                budget: Some(1),
                ..PlanSettings::default()
            },
        ) {
            Ok(p) => {
                assert!(
                    p.steps.iter().all(|s| s.expected_effective_n.is_finite()
                        && s.expected_mean_abs_smd.is_finite()),
                    "{name}: plan"
                )
            }
            Err(e) => assert!(e.to_string().len() > 20, "{name}: unclear plan message {e}"),
        }
    }
}

#[test]
fn pages_of_a_tiny_project_answer_with_messages_not_failures() {
    // Four countries: most analyses cannot run; every page must say so plainly.
    let dir = valid_project("tinypages");
    let addr = start_server(dir.path());
    for page in [
        "/",
        "/coverage",
        "/model",
        "/balance",
        "/plan?replicates=5",
        "/impact?bootstrap=9",
        "/sensitivity",
        "/report",
        "/projects",
        "/api/overview",
        "/api/model",
        "/api/plan",
    ] {
        let r = get(addr, page);
        assert!(
            matches!(r.status, 200 | 400 | 404 | 422),
            "{page}: {} {}",
            r.status,
            r.body
        );
        assert!(!r.body.contains("NaN"), "{page} shows NaN");
        if r.status != 200 {
            assert!(
                r.body.len() > 20 && !r.body.contains("panicked"),
                "{page}: unclear message {}",
                r.body
            );
        }
    }
}
