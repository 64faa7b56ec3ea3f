//! Time of the impact page's sensitivity bounds (199 bootstrap replicates over countries)
//! and of the sensitivity page's 500 draws of the participation model, on the demo's
//! latest wave, computed from scratch (no result cache), median of 7 runs.
//! Target: the bounds section adds under 300 ms cold.
//!
//!     cargo bench --bench bounds

use std::time::Instant;

use gapwise::analysis::impact::Shares;
use gapwise::analysis::selection_bounds::{
    selection_bounds, BoundsSettings, Reference, DEFAULT_REPLICATES, LAMBDA_GRID,
};
use gapwise::analysis::sensitivity::{model_uncertainty, MODEL_DRAWS};
use gapwise::analysis::Settings;
use gapwise::project::Project;

fn median(mut v: Vec<f64>) -> f64 {
    v.sort_by(f64::total_cmp);
    v[v.len() / 2]
}

fn main() {
    let project = Project::load(&gapwise::demo_dir()).expect("demo loads");
    let (wave, view) = project.resolve_wave(None).expect("wave");
    let settings = Settings {
        wave: Some(wave),
        ..Settings::default()
    };
    let outcome = project
        .manifest
        .default_outcome()
        .expect("outcome")
        .to_string();
    let bs = BoundsSettings {
        outcome: outcome.clone(),
        shares: Shares::Equal,
        lambdas: LAMBDA_GRID.to_vec(),
        reference: Reference::Unweighted,
        replicates: DEFAULT_REPLICATES,
        level: 0.95,
    };
    let time = |f: &dyn Fn()| {
        median(
            (0..7)
                .map(|_| {
                    let start = Instant::now();
                    f();
                    start.elapsed().as_secs_f64() * 1000.0
                })
                .collect(),
        )
    };
    let bounds = time(&|| {
        selection_bounds(Some(&project), &view, &settings, &bs).expect("bounds");
    });
    let without = BoundsSettings {
        replicates: 0,
        ..bs.clone()
    };
    let point = time(&|| {
        selection_bounds(Some(&project), &view, &settings, &without).expect("bounds");
    });
    let draws = time(&|| {
        model_uncertainty(
            Some(&project),
            &view,
            &settings,
            Some(&outcome),
            MODEL_DRAWS,
        )
        .expect("draws");
    });
    println!(
        "sensitivity bounds, {DEFAULT_REPLICATES} replicates: {bounds:.1} ms (target < 300 ms)"
    );
    println!("sensitivity bounds without bootstrap: {point:.1} ms");
    println!("participation model draws, {MODEL_DRAWS} draws: {draws:.1} ms");
    assert!(bounds < 300.0, "the bounds take {bounds:.1} ms");
}
