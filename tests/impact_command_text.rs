//! `gapwise impact` without `--json` prints the country bootstrap of the whole pipeline
//! beside the cluster-robust numbers: its standard errors and percentile intervals, the
//! replicates, the seed, the failed replicates by reason, and why a variant has none.
//! Checked against the same command's `--json` (common practice: the text and the JSON
//! render one result, so every number of one is in the other).

mod common;
use common::*;

use serde_json::Value;

fn impact(extra: &[&str]) -> Output {
    let demo = demo_dir();
    let mut args = vec![
        "impact",
        demo.to_str().expect("path"),
        "--wave",
        "4",
        "--outcome",
        "trust_parliament",
        "--predictors",
        "age",
        "--wild-replicates",
        "0",
    ];
    args.extend_from_slice(extra);
    let out = gapwise(&args);
    assert_eq!(out.code, 0, "{args:?}: {}", out.stderr);
    out
}

#[test]
fn impact_text_shows_the_country_bootstrap_beside_the_clustered_errors() {
    let settings = ["--replicates", "29", "--seed", "7"];
    let text = impact(&settings).stdout;
    let json: Value =
        serde_json::from_str(&impact(&[&settings[..], &["--json"]].concat()).stdout).expect("json");
    assert!(
        text.contains("Country bootstrap: 29 replicates of the whole pipeline")
            && text.contains("seed 7"),
        "{text}"
    );
    let variants = json["variants"].as_array().expect("variants");
    assert!(variants.len() >= 5, "{}", variants.len());
    let mut bootstrapped = 0;
    let mut failures_shown = 0;
    for v in variants {
        let label = v["label"].as_str().expect("label");
        assert!(text.contains(label), "{label}");
        if let Some(error) = v["error"].as_str() {
            assert!(text.contains(&format!("not estimated: {error}")), "{label}");
            continue;
        }
        if let Some(note) = v["bootstrap_note"].as_str() {
            assert!(
                text.contains(&format!("country bootstrap: {note}")),
                "{label}: {note}"
            );
            continue;
        }
        let replicates = v["bootstrap_replicates"].as_u64().expect("replicates");
        assert_eq!(replicates, 29, "{label}");
        bootstrapped += 1;
        assert!(
            text.contains(&format!(
                "country bootstrap: 29 replicates, seed {}; {} gave no value",
                v["bootstrap_seed"], v["bootstrap_failed"]
            )),
            "{label}\n{text}"
        );
        let mut counted = 0;
        for f in v["bootstrap_failures"].as_array().expect("failures") {
            let count = f["count"].as_u64().expect("count");
            counted += count;
            let line = format!("{count:>5}  {}", f["label"].as_str().expect("label"));
            assert!(text.contains(&line), "{label}: {line}");
            failures_shown += 1;
        }
        assert_eq!(counted, v["bootstrap_failed"].as_u64().expect("failed"));
        let pooled = &v["pooled"];
        if let Some(se) = pooled["bootstrap_se"].as_f64() {
            let shown = format!(
                "country bootstrap s.e. {se:.4}, 95% {:.4} to {:.4}",
                pooled["bootstrap_ci95_low"].as_f64().expect("low"),
                pooled["bootstrap_ci95_high"].as_f64().expect("high")
            );
            assert!(text.contains(&shown), "{label}: {shown}");
        }
        let terms = v["bootstrap_se"].as_array().expect("term s.e.");
        assert_eq!(terms.len(), v["coef"].as_array().expect("coef").len());
        for (j, se) in terms.iter().enumerate() {
            if let Some(se) = se.as_f64() {
                let interval = format!(
                    "{:.5} to {:.5}",
                    v["bootstrap_ci95_low"][j].as_f64().expect("low"),
                    v["bootstrap_ci95_high"][j].as_f64().expect("high")
                );
                let row = text
                    .lines()
                    .skip_while(|l| !l.contains(label))
                    .find(|l| l.contains(&interval))
                    .unwrap_or_else(|| panic!("{label}: term {j} {interval}"));
                assert!(row.contains(&format!("{se:.5}")), "{row}");
            }
        }
    }
    // The demo's wave 4 has variants with a bootstrap and failed replicates to show.
    assert!(bootstrapped >= 3, "{bootstrapped}");
    assert!(failures_shown >= 1, "{text}");
}

#[test]
fn impact_text_says_when_no_bootstrap_ran() {
    let text = impact(&["--replicates", "0"]).stdout;
    assert!(
        text.contains("Country bootstrap: not run (--replicates 0)"),
        "{text}"
    );
    assert!(!text.contains("bootstrap s.e."), "{text}");
    assert!(!text.contains("replicates, seed"), "{text}");
}
