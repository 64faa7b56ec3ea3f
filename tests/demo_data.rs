//! The committed demo is the generator's output, loads cleanly, and shows what its
//! scenario promises (selection that favours richer, older democracies; one region
//! clearly under-covered; participation shifting across waves).

mod common;
use common::*;

use gapwise::analysis::overview::overview;
use gapwise::project::Project;

#[test]
fn committed_demo_equals_generator_output() {
    let dir = TempDir::new("demo");
    gapwise::demo::write(dir.path(), gapwise::demo::SEED).unwrap();
    for file in [
        "project.toml",
        "frame.csv",
        "microdata.csv",
        "SCENARIO.md",
        "truth.json",
    ] {
        let fresh = std::fs::read(dir.path().join(file)).unwrap();
        let committed = std::fs::read(demo_dir().join(file)).unwrap();
        assert!(
            fresh == committed,
            "demo-data/{file} differs from `gapwise make-demo` output; regenerate it"
        );
    }
}

#[test]
fn demo_loads_and_matches_its_documented_truth() {
    let project = Project::load(&demo_dir()).expect("demo loads");
    let truth: serde_json::Value =
        serde_json::from_str(&std::fs::read_to_string(demo_dir().join("truth.json")).unwrap())
            .unwrap();
    let o = overview(&project);
    assert_eq!(o.n_countries, 150);
    assert_eq!(o.waves.len(), 4);
    for (w, t) in o.waves.iter().zip(truth["waves"].as_array().unwrap()) {
        assert_eq!(
            w.eligible as u64,
            t["eligible"].as_u64().unwrap(),
            "wave {}",
            w.wave
        );
        assert_eq!(
            w.participating as u64,
            t["took_part"].as_u64().unwrap(),
            "wave {}",
            w.wave
        );
        // About half the eligible universe takes part.
        assert!(
            (0.3..0.75).contains(&w.coverage),
            "wave {} coverage {}",
            w.wave,
            w.coverage
        );
    }
    // Codes from the user-assigned range only.
    for c in &o.countries {
        assert!(c.code.len() == 3 && c.code.starts_with('X'), "{}", c.code);
    }
    // Participation shifts: wave 4 covers more than wave 1.
    assert!(o.waves[3].coverage > o.waves[0].coverage);
    // One region clearly under-covered: the shifted region has the lowest mean coverage
    // across waves, below 30% in every wave.
    let mean_coverage = |g: &gapwise::analysis::overview::GroupCoverage| {
        g.coverage.iter().flatten().sum::<f64>() / 4.0
    };
    let shifted = o
        .coverage
        .iter()
        .find(|g| g.group == "Savanna Belt")
        .unwrap();
    for g in &o.coverage {
        assert!(
            mean_coverage(shifted) <= mean_coverage(g),
            "{} is covered less",
            g.group
        );
    }
    assert!(
        shifted.coverage.iter().all(|c| c.unwrap() < 0.3),
        "{:?}",
        shifted.coverage
    );
    // Turnover between waves and the balance trend are reported.
    assert_eq!(o.trends.len(), 4);
    assert!(o.trends[1].joined.len() + o.trends[1].left.len() > 0);
    assert!(o
        .trends
        .iter()
        .all(|t| t.max_abs_smd.is_some_and(|v| v > 0.1)));
    // Missing values exist and are shown.
    assert!(o.missing.iter().any(|m| m.total_missing > 0));
    // Selection visibly biases a pooled estimate: participants' mean trust exceeds the universe's.
    for t in truth["waves"].as_array().unwrap() {
        let gap = t["trust_participant_mean"].as_f64().unwrap()
            - t["trust_universe_mean"].as_f64().unwrap();
        assert!(gap > 0.15, "{t}");
    }
    let micro = o.microdata.expect("demo has microdata");
    let participating: usize = o.waves.iter().map(|w| w.participating).sum();
    let per_country = micro.respondents as f64 / participating as f64;
    assert!((900.0..=1100.0).contains(&per_country), "{per_country}");
}

#[test]
fn richer_countries_take_part_more_often() {
    let project = Project::load(&demo_dir()).unwrap();
    let view = project.wave(1).unwrap();
    let gdp = &view
        .numeric
        .iter()
        .find(|n| n.column == "log_gdp_pc")
        .unwrap()
        .values;
    let mean = |took: bool| {
        let v: Vec<f64> = gdp
            .iter()
            .zip(&view.participated)
            .filter(|(_, &p)| p == took)
            .filter_map(|(g, _)| *g)
            .collect();
        v.iter().sum::<f64>() / v.len() as f64
    };
    assert!(
        mean(true) > mean(false) + 0.5,
        "{} vs {}",
        mean(true),
        mean(false)
    );
}
