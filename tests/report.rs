//! The meeting report: every section, the pages' numbers, nothing fetched from outside,
//! written atomically.

mod common;
use common::*;

use serde_json::Value;

#[test]
fn report_has_every_section_and_the_pages_numbers() {
    let dir = TempDir::new("report");
    let out = dir.path().join("meeting.html");
    let run = gapwise(&[
        "report",
        demo_dir().to_str().unwrap(),
        "--wave",
        "3",
        "--out",
        out.to_str().unwrap(),
    ]);
    assert_eq!(run.code, 0, "{}", run.stderr);
    let html = std::fs::read_to_string(&out).unwrap();
    for id in [
        "settings",
        "coverage",
        "model",
        "balance",
        "plan",
        "impact",
        "cautions",
        "reproducibility",
    ] {
        assert!(
            html.contains(&format!("id=\"{id}\"")),
            "section {id} missing"
        );
    }
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
    let balance: Value =
        serde_json::from_str(&http(addr, "GET", "/api/balance?wave=3", &[]).body).unwrap();
    let entropy = balance["methods"]
        .as_array()
        .unwrap()
        .iter()
        .find(|m| m["kind"] == "entropy")
        .unwrap();
    let ess = format!("<td>{:.1}</td>", entropy["effective_n"].as_f64().unwrap());
    assert!(html.contains(&ess), "report lacks the balance page's {ess}");
    let model: Value =
        serde_json::from_str(&http(addr, "GET", "/api/model?wave=3", &[]).body).unwrap();
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
    // The button in the app serves the same document.
    let r = http(addr, "GET", "/report?wave=3", &[]);
    assert_eq!(r.status, 200);
    assert!(r
        .header("content-disposition")
        .unwrap_or("")
        .contains("attachment"));
    assert!(r.body.contains("id=\"reproducibility\""));
}

#[test]
fn weights_export_with_sidecar() {
    let dir = TempDir::new("weights");
    let out = dir.path().join("w.csv");
    let run = gapwise(&[
        "weights",
        demo_dir().to_str().unwrap(),
        "--out",
        out.to_str().unwrap(),
    ]);
    assert_eq!(run.code, 0, "{}", run.stderr);
    let csv = std::fs::read_to_string(&out).unwrap();
    assert!(csv.starts_with("wave,code,name,took_part,propensity,weight\n"));
    let sidecar: Value =
        serde_json::from_str(&std::fs::read_to_string(dir.path().join("w.csv.json")).unwrap())
            .unwrap();
    assert_eq!(sidecar["method"], "entropy");
    assert_eq!(sidecar["waves"].as_array().unwrap().len(), 4);
    // Per wave, participants' weights sum to the number of eligible countries.
    for w in sidecar["waves"].as_array().unwrap() {
        let wave = w["wave"].as_i64().unwrap().to_string();
        let total: f64 = csv
            .lines()
            .skip(1)
            .filter(|l| l.split(',').next() == Some(wave.as_str()))
            .map(|l| l.rsplit(',').next().unwrap().parse::<f64>().unwrap())
            .sum();
        assert!(
            (total - w["n_eligible"].as_f64().unwrap()).abs() < 1e-6,
            "wave {wave}"
        );
    }
}
