//! The meeting report: every section, the pages' numbers, nothing fetched from outside,
//! written atomically.

mod common;
use common::*;

use serde_json::Value;

/// Runs `gapwise COMMAND <demo project> OPTIONS... --out OUT`.
fn on_demo(command: &str, options: &[&str], out: &std::path::Path) -> Output {
    let demo = demo_dir();
    let mut args = vec![command, demo.to_str().unwrap()];
    args.extend_from_slice(options);
    args.extend(["--out", out.to_str().unwrap()]);
    gapwise(&args)
}

/// The same, which must succeed: the text it wrote to OUT.
fn written_on_demo(command: &str, options: &[&str], out: &std::path::Path) -> String {
    let run = on_demo(command, options, out);
    assert_eq!(run.code, 0, "{}", run.stderr);
    std::fs::read_to_string(out).unwrap()
}

/// Asserts that the report has a section with each id.
fn assert_sections(html: &str, ids: &[&str]) {
    for id in ids {
        assert!(
            html.contains(&format!("id=\"{id}\"")),
            "section {id} missing"
        );
    }
}

#[test]
fn report_has_every_section_and_the_pages_numbers() {
    let dir = TempDir::new("report");
    let out = dir.path().join("meeting.html");
    let html = written_on_demo("report", &["--wave", "3"], &out);
    assert_sections(
        &html,
        &[
            "settings",
            "coverage",
            "wave-3",
            "missing-3",
            "model-3",
            "balance-3",
            "plan-3",
            "impact-3",
            "projection-3",
            "cautions",
            "reproducibility",
        ],
    );
    // Self-contained: no scripts, no stylesheet or image links, no external address (the
    // SVG namespace names an address but fetches nothing).
    let fetched = html
        .replace("xmlns=\"http://www.w3.org/2000/svg\"", "")
        .replace("xmlns:xlink=\"http://www.w3.org/1999/xlink\"", "");
    for needle in [
        "<script", "<link", "src=", "href=", "http://", "https://", "@import", "url(",
    ] {
        assert!(!fetched.contains(needle), "the report contains {needle}");
    }
    assert!(html.contains("sha256 "));
    assert!(!html.contains("NaN"));
    // Numbers equal the pages' (same analysis results, same formatting).
    let addr = start_server(&demo_dir());
    let balance: Value = get_json(addr, "/api/balance?wave=3");
    let entropy = balance["methods"]
        .as_array()
        .unwrap()
        .iter()
        .find(|m| m["kind"] == "entropy")
        .unwrap();
    let ess = format!("<td>{:.1}</td>", entropy["effective_n"].as_f64().unwrap());
    assert!(html.contains(&ess), "report lacks the balance page's {ess}");
    let model: Value = get_json(addr, "/api/model?wave=3");
    let auc = format!(
        "AUC {:.3} in sample",
        model["model"]["auc"].as_f64().unwrap()
    );
    assert!(html.contains(&auc), "report lacks {auc}");
    // No temporary file is left behind.
    let leftovers: Vec<_> = std::fs::read_dir(dir.path())
        .unwrap()
        .filter_map(Result::ok)
        .filter(|e| e.file_name().to_string_lossy().ends_with(".partial"))
        .collect();
    assert!(leftovers.is_empty());
    // The button in the app serves the same document, named by its wave.
    let r = get(addr, "/report?wave=3");
    assert_eq!(r.status, 200);
    assert_eq!(
        r.header("content-disposition"),
        Some("attachment; filename=\"gapwise-report-wave3.html\"")
    );
    assert!(r.body.contains("id=\"reproducibility\""));
}

#[test]
fn weights_export_with_sidecar() {
    let dir = TempDir::new("weights");
    let out = dir.path().join("w.csv");
    let csv = written_on_demo("weights", &[], &out);
    assert!(csv.starts_with("wave,code,name,took_part,propensity,weight,reason\n"));
    let sidecar: Value =
        serde_json::from_str(&std::fs::read_to_string(dir.path().join("w.csv.json")).unwrap())
            .unwrap();
    assert_eq!(sidecar["method"], "entropy");
    assert_eq!(sidecar["waves"].as_array().unwrap().len(), 4);
    // Per wave, participants' weights sum to the number of eligible countries.
    for w in sidecar["waves"].as_array().unwrap() {
        let wave = w["wave"].as_i64().unwrap().to_string();
        let total: f64 = csv_rows(&csv)
            .iter()
            .skip(1)
            .filter(|r| r[0] == wave)
            .filter_map(|r| r[5].parse::<f64>().ok())
            .sum();
        assert!(
            (total - w["n_analysed"].as_f64().unwrap()).abs() < 1e-6,
            "wave {wave}"
        );
    }
}

/// The text of the reproducibility block (from its heading to the end of the document).
fn reproducibility(html: &str) -> &str {
    let at = html
        .find("id=\"reproducibility\"")
        .expect("reproducibility block");
    &html[at..]
}

/// The rows of a CSV file as cells, the header first (read by the csv crate, so quoted
/// commas stay inside their cell).
fn csv_rows(text: &str) -> Vec<Vec<String>> {
    csv::ReaderBuilder::new()
        .has_headers(false)
        .from_reader(text.as_bytes())
        .records()
        .map(|r| r.unwrap().iter().map(str::to_string).collect())
        .collect()
}

#[test]
fn report_uses_and_states_the_settings_it_was_asked_with() {
    let dir = TempDir::new("report-settings");
    let out = dir.path().join("r.html");
    let html = written_on_demo(
        "report",
        &[
            "--wave",
            "3",
            "--outcome",
            "left_right",
            "--predictors",
            "age,education",
            "--weighting",
            "raking",
            "--budget",
            "3",
            "--feasibility",
            "model",
            "--joiners",
            "XAB",
            "--bootstrap",
            "0",
            "--replicates",
            "5",
        ],
        &out,
    );
    let block = reproducibility(&html);
    for stated in [
        "<th scope=\"row\">Wave</th><td class=\"text\">3</td>",
        "<th scope=\"row\">Weighting</th><td class=\"text\">Raking to category shares</td>",
        "<th scope=\"row\">Outcome</th><td class=\"text\">left_right</td>",
        "<th scope=\"row\">Predictors</th><td class=\"text\">age, education</td>",
        "<th scope=\"row\">Recruitment budget</th><td class=\"text\">3 countries</td>",
        "<th scope=\"row\">Chance of joining</th><td class=\"text\">the participation model, leave-one-out</td>",
        "<th scope=\"row\">What-if joiners</th><td class=\"text\">XAB</td>",
        "<th scope=\"row\">Participation model</th><td class=\"text\">Logit</td>",
        "--weighting raking",
        "--outcome left_right",
        "weighting=raking",
        "outcome=left_right",
    ] {
        assert!(block.contains(stated), "the reproducibility block lacks {stated}");
    }
    // The time it was made: an ISO 8601 UTC timestamp.
    let made = html
        .split("<time datetime=\"")
        .nth(1)
        .and_then(|r| r.split('"').next())
        .expect("a made-at time");
    assert_eq!(made.len(), 20, "{made}");
    assert!(made.ends_with('Z') && made.as_bytes()[10] == b'T', "{made}");
    assert!(block.contains(made));
    // Used, not only stated: the numbers are the pages' for the same settings.
    // Readable labels, not raw column names (README, `[indicators.labels]`).
    assert!(
        html.contains("outcome Left right; predictors Age, Education"),
        "{html}"
    );
    assert!(html.contains("A linear random-intercept model of Left right on"));
    assert!(!html.contains("model of left_right"));
    assert!(html.contains("What if XAB joined"));
    let addr = start_server(&demo_dir());
    let impact: Value = get_json(addr, "/api/impact?wave=3&weighting=raking&outcome=left_right&predictor=age&predictor=education&bootstrap=0");
    let variants = impact["variants"].as_array().unwrap();
    assert!(!variants.is_empty());
    for v in variants {
        if let Some(p) = v["pooled"]["estimate"].as_f64() {
            let cell = format!("<td>{p:.3}</td>");
            assert!(html.contains(&cell), "report lacks {} {cell}", v["key"]);
        }
    }
    let plan: Value = get_json(
        addr,
        "/api/plan?wave=3&weighting=raking&budget=3&feasibility=model&joiner=XAB&replicates=5",
    );
    let steps = plan["steps"].as_array().unwrap();
    assert_eq!(steps.len(), 3);
    for s in steps {
        let id = s["id"].as_str().unwrap();
        assert!(
            html.contains(&format!("<td class=\"text\">{id} ")),
            "report lacks step {id}"
        );
    }
    let projection: Value = get_json(addr, "/api/projection?wave=3&weighting=raking&outcome=left_right&predictor=age&predictor=education");
    let universe = format!("{:.3}", projection["universe_estimate"].as_f64().unwrap());
    assert!(
        html.contains(&format!(
            "<td>{universe} <span class=\"count\">(95% prediction interval"
        )),
        "report lacks the projection's {universe}"
    );
}

#[test]
fn report_covers_several_waves_on_request() {
    let dir = TempDir::new("report-waves");
    let out = dir.path().join("r.html");
    let html = written_on_demo(
        "report",
        &["--waves", "3,4", "--bootstrap", "0", "--replicates", "0"],
        &out,
    );
    assert_sections(
        &html,
        &[
            "wave-3",
            "wave-4",
            "model-3",
            "model-4",
            "plan-3",
            "plan-4",
            "projection-4",
        ],
    );
    assert!(!html.contains("id=\"wave-2\""));
    assert!(
        reproducibility(&html).contains("<th scope=\"row\">Waves</th><td class=\"text\">3, 4</td>")
    );
    assert!(reproducibility(&html).contains("waves=3%2C4"));
    // A wave the project lacks is refused with the waves it has.
    let bad = on_demo("report", &["--waves", "3,9"], &out);
    assert_ne!(bad.code, 0);
    assert!(bad.stderr.contains("there is no wave 9"), "{}", bad.stderr);
    // The button: all waves, named by them.
    let addr = start_server(&demo_dir());
    let r = get(addr, "/report?waves=all&bootstrap=0&replicates=0");
    assert_eq!(r.status, 200, "{}", r.body);
    assert_eq!(
        r.header("content-disposition"),
        Some("attachment; filename=\"gapwise-report-waves1-2-3-4.html\"")
    );
    for w in 1..=4 {
        assert!(r.body.contains(&format!("id=\"wave-{w}\"")));
    }
}

/// The `href` of the first element with `class="CLASS"` (HTML entities for `&` undone).
fn href_of(html: &str, class: &str) -> String {
    let at = html.find(&format!("class=\"{class}\"")).expect(class);
    let rest = &html[at..];
    let start = rest.find("href=\"").expect("href") + 6;
    rest[start..start + rest[start..].find('"').unwrap()]
        .replace("&amp;", "&")
        .replace("&#38;", "&")
}

#[test]
fn the_report_button_carries_the_page_settings() {
    let addr = start_server(&demo_dir());
    let page = get(
        addr,
        "/impact?wave=3&weighting=raking&trim=0.9&outcome=left_right&predictor=age&bootstrap=0",
    );
    assert_eq!(page.status, 200, "{}", page.body);
    let link = href_of(&page.body, "report-button");
    assert!(link.starts_with("/report?"), "{link}");
    for kept in [
        "wave=3",
        "weighting=raking",
        "trim=0.9",
        "outcome=left_right",
        "predictor=age",
        // `bootstrap` is read as the older name of `wild_replicates`.
        "wild_replicates=0",
    ] {
        assert!(
            link.contains(kept),
            "the report button drops {kept}: {link}"
        );
    }
    let report = get(addr, &link);
    assert_eq!(report.status, 200);
    let block = reproducibility(&report.body).to_string();
    assert!(block.contains("Raking to category shares"));
    assert!(block.contains("<th scope=\"row\">Outcome</th><td class=\"text\">left_right</td>"));
    assert!(block.contains("weights capped at the 90th percentile"));
    // From the planner: its budget and joiners.
    let plan = get(addr, "/plan?wave=2&budget=2&joiner=XAB&replicates=3");
    assert_eq!(plan.status, 200, "{}", plan.body);
    let link = href_of(&plan.body, "report-button");
    for kept in ["wave=2", "budget=2", "joiner=XAB", "replicates=3"] {
        assert!(
            link.contains(kept),
            "the report button drops {kept}: {link}"
        );
    }
    let report = get(addr, &link);
    assert!(reproducibility(&report.body)
        .contains("<th scope=\"row\">Recruitment budget</th><td class=\"text\">2 countries</td>"));
}

#[test]
fn weights_export_keeps_every_eligible_country_with_a_reason() {
    let dir = TempDir::new("weights-all");
    let out = dir.path().join("w.csv");
    let rows = csv_rows(&written_on_demo("weights", &[], &out));
    assert_eq!(rows[0].last().map(String::as_str), Some("reason"));
    let check = gapwise(&["check", demo_dir().to_str().unwrap(), "--json"]);
    let overview: Value = serde_json::from_str(&check.stdout).unwrap();
    let waves = overview["waves"].as_array().unwrap();
    assert_eq!(waves.len(), 4);
    for w in waves {
        let wave = w["wave"].as_i64().unwrap().to_string();
        let of_wave: Vec<&Vec<String>> = rows.iter().skip(1).filter(|r| r[0] == wave).collect();
        // Every eligible country, and so every participant, of the wave has a row.
        assert_eq!(
            of_wave.len() as u64,
            w["eligible"].as_u64().unwrap(),
            "wave {wave}"
        );
        let took_part = of_wave.iter().filter(|r| r[3] == "1").count();
        assert_eq!(
            took_part as u64,
            w["participating"].as_u64().unwrap(),
            "wave {wave}"
        );
        // A row has a weight or a reason, never both, never neither.
        for r in &of_wave {
            let n = r.len();
            assert!(r[n - 2].is_empty() != r[n - 1].is_empty(), "{r:?}");
        }
    }
    // The demo's wave 4 leaves out five countries with a missing indicator (four took
    // part; see reference_models.rs): they keep their rows.
    let left_out: Vec<&Vec<String>> = rows
        .iter()
        .filter(|r| r[0] == "4" && !r.last().unwrap().is_empty())
        .collect();
    assert_eq!(left_out.len(), 5);
    assert_eq!(left_out.iter().filter(|r| r[3] == "1").count(), 4);
    assert!(left_out.iter().all(|r| r
        .last()
        .unwrap()
        .starts_with("left out of the analysis: missing ")));
}

#[test]
fn respondent_weights_give_one_row_per_respondent() {
    // The real-indicator frame, with its respondent id column named in the manifest.
    let src = std::path::Path::new(env!("CARGO_MANIFEST_DIR")).join("tests/fixtures/real_frame");
    let dir = TempDir::new("respondents");
    for f in ["frame.csv", "microdata.csv"] {
        std::fs::copy(src.join(f), dir.path().join(f)).unwrap();
    }
    let manifest = std::fs::read_to_string(src.join("project.toml"))
        .unwrap()
        .replace(
            "outcome = \"trust\"",
            "outcome = \"trust\"\nrespondent = \"respondent\"",
        );
    dir.write("project.toml", manifest);
    let out = dir.path().join("r.csv");
    let run = gapwise(&[
        "weights",
        dir.path().to_str().unwrap(),
        "--respondents",
        "--out",
        out.to_str().unwrap(),
    ]);
    assert_eq!(run.code, 0, "{}", run.stderr);
    let rows = csv_rows(&std::fs::read_to_string(&out).unwrap());
    // The columns are a contract with whoever reads the file: the golden header, kept
    // apart from the code, fails this test when one is renamed, moved or dropped.
    let golden = fixtures().join("respondent_weights_header.csv");
    let header = csv_rows(&std::fs::read_to_string(golden).unwrap());
    assert_eq!(rows[0], header[0]);
    let micro = std::fs::read_to_string(dir.path().join("microdata.csv")).unwrap();
    let respondents = micro.lines().count() - 1;
    assert!(respondents > 10_000);
    assert_eq!(rows.len() - 1, respondents);
    assert!(rows[1][2].contains('-'), "respondent id: {:?}", rows[1]);
    // Per country and wave the combined weights sum to the country's weight (common
    // practice: the design weights are rescaled within each country).
    let mut sums: std::collections::HashMap<(String, String), (f64, f64)> = Default::default();
    for r in rows.iter().skip(1) {
        if let (Ok(c), Ok(k)) = (r[5].parse::<f64>(), r[4].parse::<f64>()) {
            let e = sums.entry((r[0].clone(), r[1].clone())).or_insert((0.0, k));
            e.0 += c;
        } else {
            assert!(!r[6].is_empty(), "no weight and no reason: {r:?}");
        }
    }
    assert!(!sums.is_empty());
    for ((c, w), (total, country)) in sums {
        assert!(
            (total - country).abs() < 1e-9 * country.max(1.0),
            "{c} {w}: {total} vs {country}"
        );
    }
    // Without microdata: refused with the reason.
    let plain = valid_project("no-micro");
    std::fs::remove_file(plain.path().join("microdata.csv")).unwrap();
    let none = gapwise(&[
        "weights",
        plain.path().to_str().unwrap(),
        "--respondents",
        "--out",
        out.to_str().unwrap(),
    ]);
    assert_eq!(none.code, 1);
    assert!(none.stderr.contains("no microdata"), "{}", none.stderr);
}

#[test]
fn check_json_prints_json_when_the_project_fails() {
    let dir = valid_project("check-json");
    dir.write(
        "frame.csv",
        "iso,name,wave,took_part,gdp,democracy,region\nXAA,Aland,1,2,9.5,8.0,North\n",
    );
    let run = gapwise(&["check", dir.path().to_str().unwrap(), "--json"]);
    assert_eq!(run.code, 1);
    let v: Value = serde_json::from_str(&run.stdout).expect("JSON on standard output");
    assert_eq!(v["valid"], false);
    let problems = v["problems"].as_array().unwrap();
    assert!(!problems.is_empty());
    assert!(problems
        .iter()
        .all(|p| p["file"].is_string() && p["message"].is_string()));
}

#[test]
fn downloads_carry_their_wave_and_settings() {
    let addr = start_server(&demo_dir());
    let csv = get(addr, "/balance/table.csv?wave=4&weighting=raking");
    assert_eq!(csv.status, 200);
    assert_eq!(
        csv.header("content-disposition"),
        Some("attachment; filename=\"balance-wave4.csv\"")
    );
    // Pure data: the header row first, no comment lines.
    assert!(csv.body.starts_with("covariate,"));
    assert!(!csv.body.lines().any(|l| l.starts_with('#')));
    let link = csv
        .header("link")
        .expect("a Link to the sidecar")
        .to_string();
    assert!(
        link.starts_with("<table.csv.json?wave=4&weighting=raking>; rel=\"describedby\""),
        "{link}"
    );
    let sidecar: Value = get_json(addr, "/balance/table.csv.json?wave=4&weighting=raking");
    assert_eq!(sidecar["file"], "balance-wave4.csv");
    assert_eq!(sidecar["wave"], 4);
    assert_eq!(sidecar["settings"]["weighting"], "raking");
    assert!(sidecar["inputs"].as_array().unwrap().len() >= 2);
    // Without a wave: the latest, said so in the name.
    let latest = get(addr, "/model/weights.csv");
    assert_eq!(
        latest.header("content-disposition"),
        Some("attachment; filename=\"country-weights-wave4.csv\"")
    );
    // The plan's sidecar carries the planner's settings.
    let plan: Value = get_json(addr, "/plan/plan.csv.json?wave=2&budget=2&replicates=0");
    assert_eq!(plan["plan"]["budget"], 2);
    assert_eq!(plan["file"], "recruitment-plan-wave2.csv");
    // Charts: named by wave, with a footnote stating the settings.
    let svg = get(addr, "/balance/smd.svg?wave=3&weighting=raking&trim=0.9");
    assert_eq!(svg.status, 200);
    assert_eq!(
        svg.header("content-disposition"),
        Some("inline; filename=\"balance-smd-wave3.svg\"")
    );
    assert!(svg.body.contains("class=\"gapwise-footnote\""));
    for said in [
        "wave 3",
        "Raking to category shares",
        "cap at 90th percentile",
        "Model: Logit",
    ] {
        assert!(svg.body.contains(said), "the footnote lacks {said}");
    }
    assert!(svg.body.trim_end().ends_with("</svg>"));
    let plan_svg = get(addr, "/plan/paths.svg?wave=2&budget=2&replicates=0");
    assert!(
        plan_svg.body.contains("budget 2"),
        "the plan chart's footnote lacks its budget"
    );
    let overview = get(addr, "/charts/coverage.svg");
    assert_eq!(
        overview.header("content-disposition"),
        Some("inline; filename=\"coverage-by-region-all-waves.svg\"")
    );
    assert!(overview.body.contains("all waves"));
}

/// The `name=value` pairs of the hidden inputs of the form labelled `label`.
fn hidden_inputs(html: &str, label: &str) -> Vec<(String, String)> {
    let at = html.find(&format!("aria-label=\"{label}\"")).expect(label);
    let form = &html[at..at + html[at..].find("</form>").unwrap()];
    form.split("<input type=\"hidden\"")
        .skip(1)
        .map(|i| {
            let attr = |a: &str| {
                let s = i.find(&format!("{a}=\"")).unwrap() + a.len() + 2;
                i[s..s + i[s..].find('"').unwrap()]
                    .replace("&amp;", "&")
                    .replace("&#38;", "&")
            };
            (attr("name"), attr("value"))
        })
        .collect()
}

#[test]
fn the_impact_model_form_keeps_every_setting() {
    let addr = start_server(&demo_dir());
    let page = get(addr, "/impact?form=1&wave=2&model=probit&weighting=raking&trim=0.95&missing=median-fill&covariate=log_gdp_pc&factor=region&outcome=left_right&bootstrap=0");
    assert_eq!(page.status, 200, "{}", page.body);
    let hidden = hidden_inputs(&page.body, "Model settings");
    for (k, v) in [
        ("wave", "2"),
        ("model", "probit"),
        ("weighting", "raking"),
        ("trim", "0.95"),
        ("missing", "median-fill"),
        ("covariates", "log_gdp_pc"),
        ("factors", "region"),
    ] {
        assert!(
            hidden.iter().any(|(hk, hv)| hk == k && hv == v),
            "the model form drops {k}={v}: {hidden:?}"
        );
    }
    // The outcome is not offered as its own predictor.
    let form_at = page.body.find("aria-label=\"Model settings\"").unwrap();
    let form = &page.body[form_at..];
    assert!(!form.contains("name=\"predictor\" value=\"left_right\""));
    assert!(form.contains("name=\"predictor\" value=\"age\""));
}

#[test]
fn incomplete_countries_are_warned_about_on_every_page() {
    // The demo's wave 4 leaves out five countries with a missing indicator.
    let addr = start_server(&demo_dir());
    for page in [
        "/",
        "/coverage?wave=4",
        "/plan?wave=4&replicates=0",
        "/impact?wave=4&bootstrap=0",
    ] {
        let r = get(addr, page);
        assert_eq!(r.status, 200, "{page}");
        assert!(r.body.contains("id=\"incomplete\""), "{page}");
        assert!(
            r.body
                .contains("Leaving out incomplete countries dropped 5 of 145"),
            "{page}"
        );
    }
    // Filled, nobody is left out: no warning.
    let r = get(addr, "/coverage?wave=4&missing=median-fill");
    assert!(!r.body.contains("id=\"incomplete\""));
}

#[test]
fn the_reload_button_reloads_and_returns_to_the_page() {
    let addr = start_server(&demo_dir());
    let page = get(addr, "/balance?wave=3");
    assert!(page.body.contains("action=\"/reload\""));
    let origin = format!("http://{addr}");
    let r = post_form(addr, &origin, "/reload", b"back=%2Fbalance%3Fwave%3D3");
    assert_eq!(r.status, 303, "{}", r.body);
    assert_eq!(r.header("location"), Some("/balance?wave=3"));
    // Somewhere else than this server: back to the overview.
    let away = post_form(addr, &origin, "/reload", b"back=%2F%2Fexample.org%2F");
    assert_eq!(away.header("location"), Some("/"));
}

/// The report takes the plan, the impact view and the projection that pages already
/// computed for the same settings from the result cache: asking for it computes only the
/// report itself.
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn the_report_reuses_what_the_pages_computed() {
    use axum::http::StatusCode;
    use std::sync::Arc;
    let project = gapwise::project::Project::load(&demo_dir()).expect("demo loads");
    let state = Arc::new(gapwise::web::AppState::new(project));
    let get = |uri: &'static str| route(&state, uri);
    for page in [
        "/plan?wave=3&replicates=3",
        // The settings the report's impact section asks for, written out (49 pipeline
        // replicates): the cache keys a page by its query.
        "/impact?wave=3&outcome=left_right&kind=linear&replicates=49&wild_replicates=0",
        "/projection?wave=3&outcome=left_right",
    ] {
        assert_eq!(get(page).await.0, StatusCode::OK, "{page}");
    }
    let before = state.cache.stats();
    let (status, html) = get("/report?wave=3&replicates=3&outcome=left_right&bootstrap=0").await;
    assert_eq!(status, StatusCode::OK);
    assert!(html.contains("id=\"projection-3\""));
    let after = state.cache.stats();
    assert_eq!(after.misses, before.misses + 1, "{before:?} then {after:?}");
    assert!(after.hits >= before.hits + 3, "{before:?} then {after:?}");
}
