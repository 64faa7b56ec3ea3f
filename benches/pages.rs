//! Server time of every route on the demo (analysis, charts, template; no network), through
//! the router as a browser's request would go: first request on a fresh server (cold, the
//! median of several fresh servers) and the same request again (cached).
//! Targets: every page, twin and download under 150 ms cold (the report under 500 ms) and
//! under 5 ms cached.
//!
//!     cargo bench --bench pages

#[path = "common/serve.rs"]
mod serve;

#[path = "common/routes.rs"]
mod routes;
use routes::ROUTES;

fn main() {
    let runtime = serve::runtime();
    serve::print_route_header();
    let (mut worst_cold, mut worst_cached, mut worst_report) = (0.0f64, 0.0f64, 0.0f64);
    for uri in ROUTES {
        let (c, max, h) = serve::cold_and_cached(&runtime, uri);
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
