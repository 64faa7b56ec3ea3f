//! Server time of every route on the demo (analysis, charts, template; no network), through
//! the router as a browser's request would go: first request on a fresh server (cold, the
//! median of several fresh servers) and the same request again (cached).
//! Targets: every page, twin and download under 150 ms cold (the report under 500 ms) and
//! under 5 ms cached.
//!
//!     cargo bench --bench pages

use std::sync::Arc;
use std::time::Instant;

use axum::body::Body;
use axum::http::Request;
use gapwise::project::Project;
use gapwise::web::{self, AppState};
use tower::ServiceExt;

#[path = "common/routes.rs"]
mod routes;
use routes::ROUTES;

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
    let (mut worst_cold, mut worst_cached, mut worst_report) = (0.0f64, 0.0f64, 0.0f64);
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
        let (c, h) = (median(cold), median(cached));
        if uri.starts_with("/report") {
            worst_report = worst_report.max(c);
        } else {
            worst_cold = worst_cold.max(c);
        }
        worst_cached = worst_cached.max(h);
        println!("{uri:<64} {c:>10.1} {max:>10.1} {h:>11.2}");
    }
    println!(
        "slowest cold page: {worst_cold:.1} ms (target 150); report cold: {worst_report:.1} ms (target 500); slowest cached: {worst_cached:.2} ms (target 5)"
    );
}
