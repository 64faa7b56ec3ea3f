//! Speed of the random-intercept models on 2,000,000 respondents in 60 countries with 6
//! predictors, the CSV read (checked and typed) included: the linear model by REML over
//! the countries' sums, the logistic one by the Laplace approximation (targets < 2 s and
//! < 6 s). Then the projection page on the demo through the router, for a linear outcome
//! and a binary one (logistic), first request on a fresh server (median of five) and the
//! same request again (target < 300 ms cold).
//!
//!     cargo bench --bench multilevel
//!
//! The data are generated (seeded) into the target directory on first run by
//! benches/common/respondents.rs.

use std::fmt::Write as _;
use std::path::PathBuf;
use std::time::Instant;

use gapwise::analysis::multilevel::{multilevel_file, Kind, Request};
#[path = "common/respondents.rs"]
mod respondents;
use respondents::{respondent_file, PREDICTORS};
#[path = "common/serve.rs"]
mod serve;

fn data_file() -> PathBuf {
    respondent_file(
        "bench-multilevel-2m.csv",
        6_000_000,
        56,
        "country,age,female,education,income,urban,interest,trust,voted\n",
        |rng, r, out| {
            let trust = 5.0 + 2.0 * r.eta + 1.5 * rng.normal();
            let voted = u8::from(rng.bernoulli(1.0 / (1.0 + (-r.eta).exp())));
            let _ = writeln!(
                out,
                "X{:02},{},{},{},{},{},{},{trust:.3},{voted}",
                r.country, r.age, r.female, r.education, r.income, r.urban, r.interest
            );
        },
    )
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
            report.fit.kind, report.method, report.fit.country_sd, report.converged, report.iterations
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
