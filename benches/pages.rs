//! Server time of every page on the demo (analysis, charts and template; no network).
//! Target: each page under 150 ms in release.
//!
//!     cargo bench --bench pages

use std::sync::Arc;
use std::time::Instant;

use axum::extract::{Query, State};
use gapwise::project::Project;
use gapwise::web::{self, AppState};

/// Renders one page; true on success.
type Render<'a> = Box<dyn Fn() -> bool + 'a>;

fn main() {
    let state = Arc::new(AppState::new(
        Project::load(&gapwise::demo_dir()).expect("demo loads"),
    ));
    let runtime = tokio::runtime::Runtime::new().expect("runtime");
    let queries: [(&str, Vec<(String, String)>); 3] = [
        ("defaults (latest wave)", vec![]),
        (
            "wave 2, firth, raking",
            vec![
                ("wave".into(), "2".into()),
                ("model".into(), "firth".into()),
                ("weighting".into(), "raking".into()),
            ],
        ),
        (
            "wave 1, probit, GMM",
            vec![
                ("wave".into(), "1".into()),
                ("model".into(), "probit".into()),
                ("weighting".into(), "covariate-balancing-gmm".into()),
            ],
        ),
    ];
    println!(
        "{:<14} {:<26} {:>10} {:>10}",
        "page", "settings", "median ms", "max ms"
    );
    let mut worst: f64 = 0.0;
    for (name, query) in &queries {
        let pages: [(&str, Render); 5] = [
            (
                "overview",
                Box::new(|| {
                    runtime
                        .block_on(web::overview::page(State(state.clone())))
                        .is_ok()
                }),
            ),
            (
                "coverage",
                Box::new(|| {
                    runtime
                        .block_on(web::coverage::page(
                            State(state.clone()),
                            Query(query.clone()),
                        ))
                        .is_ok()
                }),
            ),
            (
                "model",
                Box::new(|| {
                    runtime
                        .block_on(web::model::page(State(state.clone()), Query(query.clone())))
                        .is_ok()
                }),
            ),
            (
                "balance",
                Box::new(|| {
                    runtime
                        .block_on(web::balance::page(
                            State(state.clone()),
                            Query(query.clone()),
                        ))
                        .is_ok()
                }),
            ),
            (
                "sensitivity",
                Box::new(|| {
                    runtime
                        .block_on(web::sensitivity::page(
                            State(state.clone()),
                            Query(query.clone()),
                        ))
                        .is_ok()
                }),
            ),
        ];
        for (page, render) in &pages {
            let mut times = Vec::new();
            for _ in 0..11 {
                let start = Instant::now();
                assert!(render(), "{page} failed");
                times.push(start.elapsed().as_secs_f64() * 1000.0);
            }
            times.sort_by(f64::total_cmp);
            worst = worst.max(times[times.len() / 2]);
            println!(
                "{page:<14} {name:<26} {:>10.2} {:>10.2}",
                times[times.len() / 2],
                times[times.len() - 1]
            );
        }
    }
    println!("slowest median: {worst:.2} ms (target: under 150 ms)");
}
