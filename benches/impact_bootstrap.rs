//! Server time of the impact page on the demo with the country bootstrap of the whole
//! pipeline at its default 199 replicates (every weighting, the over-identified GMM one
//! included, and the two-step re-fitted on every draw), through the router as a browser's
//! request would go: first request on a fresh server (cold, the median of five fresh
//! servers) and the same request again (cached). For comparison the same page without the
//! bootstrap (`replicates=0`), and the wild bootstrap left at its default.
//! Target (issue 15): under 1 s cold with 199 replicates; cached under 5 ms.
//!
//!     cargo bench --bench impact_bootstrap

use std::sync::Arc;
use std::time::Instant;

use axum::body::Body;
use axum::http::Request;
use gapwise::project::Project;
use gapwise::web::{self, AppState};
use tower::ServiceExt;

const ROUTES: &[&str] = &[
    "/impact?wave=4",
    "/impact?wave=4&replicates=0",
    "/impact?wave=4&weighting=covariate-balancing-gmm",
    "/impact?wave=1&model=probit&weighting=covariate-balancing-gmm",
];

fn fresh_state() -> Arc<AppState> {
    Arc::new(AppState::new(
        Project::load(&gapwise::demo_dir()).expect("demo loads"),
    ))
}

/// Milliseconds to answer `uri`; panics unless the answer is 200.
fn time(runtime: &tokio::runtime::Runtime, state: &Arc<AppState>, uri: &str) -> f64 {
    let start = Instant::now();
    let status = runtime.block_on(async {
        let response = web::router(Arc::clone(state))
            .oneshot(Request::get(uri).body(Body::empty()).expect("request"))
            .await
            .expect("router answers");
        let status = response.status();
        let _ = axum::body::to_bytes(response.into_body(), usize::MAX).await;
        status
    });
    assert!(status.is_success(), "{uri} answered {status}");
    start.elapsed().as_secs_f64() * 1000.0
}

fn median(mut v: Vec<f64>) -> f64 {
    v.sort_by(f64::total_cmp);
    v[v.len() / 2]
}

fn main() {
    let runtime = tokio::runtime::Builder::new_multi_thread()
        .worker_threads(2)
        .enable_all()
        .build()
        .expect("runtime");
    println!(
        "{:<64} {:>10} {:>10} {:>11}",
        "route", "cold ms", "max ms", "cached ms"
    );
    for uri in ROUTES {
        let mut cold = Vec::new();
        let mut cached = Vec::new();
        for _ in 0..5 {
            let state = fresh_state();
            cold.push(time(&runtime, &state, uri));
            for _ in 0..4 {
                cached.push(time(&runtime, &state, uri));
            }
        }
        let max = cold.iter().copied().fold(0.0, f64::max);
        println!(
            "{uri:<64} {:>10.1} {max:>10.1} {:>11.2}",
            median(cold),
            median(cached)
        );
    }
    println!("targets: 199 replicates under 1,000 ms cold, under 5 ms cached");
}
