//! Speed of the random-intercept models on 2,000,000 respondents in 60 countries with 6
//! predictors, the CSV read (checked and typed) included: the linear model by REML over
//! the countries' sums, the logistic one by the Laplace approximation (targets < 2 s and
//! < 6 s). Then the projection page on the demo through the router, for a linear outcome
//! and a binary one (logistic), first request on a fresh server (median of five) and the
//! same request again (target < 300 ms cold).
//!
//!     cargo bench --bench multilevel
//!
//! The data are generated here (seeded) into the target directory on first run.

use std::fmt::Write as _;
use std::path::PathBuf;
use std::time::Instant;

use gapwise::analysis::multilevel::{multilevel_file, Kind, Request};
use gapwise::stats::random::Rng;
#[path = "common/serve.rs"]
mod serve;

const RESPONDENTS: usize = 2_000_000;
const COUNTRIES: usize = 60;
const PREDICTORS: [&str; 6] = ["age", "female", "education", "income", "urban", "interest"];

fn data_file() -> PathBuf {
    let dir = std::env::var("CARGO_TARGET_DIR")
        .map(PathBuf::from)
        .unwrap_or_else(|_| PathBuf::from("target"));
    let path = dir.join("bench-multilevel-2m.csv");
    if path.exists() {
        return path;
    }
    std::fs::create_dir_all(&dir).expect("target dir");
    let mut rng = Rng::new(6_000_000);
    let country_effect: Vec<f64> = (0..COUNTRIES).map(|_| 0.5 * rng.normal()).collect();
    let mut out = String::with_capacity(RESPONDENTS * 56);
    out.push_str("country,age,female,education,income,urban,interest,trust,voted\n");
    for i in 0..RESPONDENTS {
        let c = i % COUNTRIES;
        let age = 18 + rng.below(73);
        let female = u8::from(rng.bernoulli(0.5));
        let education = 1 + rng.below(3);
        let income = 1 + rng.below(10);
        let urban = u8::from(rng.bernoulli(0.6));
        let interest = rng.below(5);
        let eta = -1.0
            + 0.02 * (age as f64 - 45.0)
            + 0.3 * education as f64
            + 0.05 * income as f64
            + 0.2 * interest as f64
            + country_effect[c];
        let trust = 5.0 + 2.0 * eta + 1.5 * rng.normal();
        let voted = u8::from(rng.bernoulli(1.0 / (1.0 + (-eta).exp())));
        let _ = writeln!(
            out,
            "X{c:02},{age},{female},{education},{income},{urban},{interest},{trust:.3},{voted}"
        );
    }
    std::fs::write(&path, out).expect("write bench data");
    path
}

fn main() {
    let path = data_file();
    let predictors: Vec<String> = PREDICTORS.iter().map(|s| s.to_string()).collect();
    for (kind, outcome, limit) in [(Kind::Linear, "trust", 2.0), (Kind::Logistic, "voted", 6.0)] {
        let request = Request {
            outcome,
            predictors: &predictors,
            country: "country",
            weight: None,
            kind,
            ml: false,
            nodes: 1,
        };
        let start = Instant::now();
        let report = multilevel_file(&path, &request).expect("fit");
        let seconds = start.elapsed().as_secs_f64();
        println!(
            "{} ({}): {seconds:.2} s read included (target < {limit} s); country SD {:.4}, converged {}, {} iterations",
            report.kind, report.method, report.country_sd, report.converged, report.iterations
        );
    }
    projection_page();
}

fn projection_page() {
    let runtime = serve::runtime();
    for (what, uri) in [
        (
            "linear (trust in parliament)",
            "/projection?outcome=trust_parliament&predictor=age",
        ),
        (
            "logistic (turnout)",
            "/projection?outcome=turnout&predictor=age&predictor=female",
        ),
    ] {
        let mut cold = Vec::new();
        let mut cached = Vec::new();
        for _ in 0..5 {
            let state = serve::fresh_state(&gapwise::demo_dir());
            cold.push(serve::time(&runtime, &state, uri));
            cached.push(serve::time(&runtime, &state, uri));
        }
        println!(
            "projection page, {what}: {:.0} ms cold (median of 5; target < 300 ms), {:.1} ms cached",
            serve::median(cold),
            serve::median(cached)
        );
    }
}
