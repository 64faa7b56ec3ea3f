//! Server time of the impact page on the demo with the country bootstrap of the whole
//! pipeline at its default 199 replicates (every weighting, the over-identified GMM one
//! included, and the two-step re-fitted on every draw), through the router as a browser's
//! request would go: first request on a fresh server (cold, the median of five fresh
//! servers) and the same request again (cached). For comparison the same page without the
//! bootstrap (`replicates=0`), and the wild bootstrap left at its default.
//! Target (issue 15): under 1 s cold with 199 replicates; cached under 5 ms.
//!
//!     cargo bench --bench impact_bootstrap

#[path = "common/serve.rs"]
mod serve;

const ROUTES: &[&str] = &[
    "/impact?wave=4",
    "/impact?wave=4&replicates=0",
    "/impact?wave=4&weighting=covariate-balancing-gmm",
    "/impact?wave=1&model=probit&weighting=covariate-balancing-gmm",
];

fn main() {
    let runtime = serve::runtime();
    serve::print_route_header();
    for uri in ROUTES {
        let (cold, max, cached) = serve::cold_and_cached(&runtime, uri);
        println!("{uri:<64} {cold:>10.1} {max:>10.1} {cached:>11.2}");
    }
    println!("targets: 199 replicates under 1,000 ms cold, under 5 ms cached");
}
