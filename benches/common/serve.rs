//! What the page benchmarks share: a fresh server state on a project, one timed request
//! through the router, a runtime sized like the machine, and the median.

use std::path::Path;
use std::sync::Arc;
use std::time::Instant;

use axum::body::Body;
use axum::http::Request;
use gapwise::project::Project;
use gapwise::web::{self, AppState};
use tower::ServiceExt;

/// A new server state (empty result cache) on the project in `dir`.
pub fn fresh_state(dir: &Path) -> Arc<AppState> {
    Arc::new(AppState::new(Project::load(dir).expect("project loads")))
}

/// The runtime the benchmarks answer requests on: two workers, as on the 2-core machine.
pub fn runtime() -> tokio::runtime::Runtime {
    tokio::runtime::Builder::new_multi_thread()
        .worker_threads(2)
        .enable_all()
        .build()
        .expect("runtime")
}

/// Milliseconds to answer `uri`; panics unless the answer is 200.
pub fn time(runtime: &tokio::runtime::Runtime, state: &Arc<AppState>, uri: &str) -> f64 {
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

/// The middle value (the upper one of an even count).
#[allow(dead_code)]
pub fn median(mut v: Vec<f64>) -> f64 {
    v.sort_by(f64::total_cmp);
    v[v.len() / 2]
}

/// The header of the route tables `cold_and_cached` fills.
#[allow(dead_code)]
pub fn print_route_header() {
    println!(
        "{:<64} {:>10} {:>10} {:>11}",
        "route", "cold ms", "max ms", "cached ms"
    );
}

/// `uri` on the demo: the first request on each of five fresh servers (cold) and four
/// more on each (cached). Returns the cold median, the cold maximum and the cached median.
#[allow(dead_code)]
pub fn cold_and_cached(runtime: &tokio::runtime::Runtime, uri: &str) -> (f64, f64, f64) {
    let mut cold = Vec::new();
    let mut cached = Vec::new();
    for _ in 0..5 {
        let state = fresh_state(&gapwise::demo_dir());
        cold.push(time(runtime, &state, uri));
        for _ in 0..4 {
            cached.push(time(runtime, &state, uri));
        }
    }
    let max = cold.iter().copied().fold(0.0, f64::max);
    (median(cold), max, median(cached))
}
