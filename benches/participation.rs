//! Speed of the statistical core: one wave of 200 eligible countries with 12 indicators
//! (10 numeric, 2 categorical), every participation model and every weighting method.
//! Target: each combination under 50 ms in release.
//!
//!     cargo bench --bench participation

use std::time::Instant;

use gapwise::analysis::participation;
use gapwise::analysis::settings::{ModelKind, Settings, WeightingKind};

#[path = "synthetic.rs"]
mod synthetic;
use synthetic::synthetic_universe;

fn main() {
    let view = synthetic_universe(200, 10, 42);
    println!(
        "200 eligible units, {} took part, 10 numeric + 2 categorical indicators",
        view.n_participants()
    );
    println!(
        "{:<8} {:<26} {:>10} {:>10}",
        "model", "weighting", "median ms", "max ms"
    );
    let mut worst: f64 = 0.0;
    for model in [ModelKind::Logit, ModelKind::Firth, ModelKind::Probit] {
        for weighting in WeightingKind::ALL {
            let settings = Settings {
                model,
                weighting,
                ..Settings::default()
            };
            let mut times = Vec::new();
            for _ in 0..15 {
                let start = Instant::now();
                let result = participation::fit(&view, &settings);
                times.push(start.elapsed().as_secs_f64() * 1000.0);
                if let Err(e) = result {
                    println!("  ({} / {}: {e})", model.as_str(), weighting.as_str());
                    break;
                }
            }
            times.sort_by(f64::total_cmp);
            let median = times[times.len() / 2];
            let max = times[times.len() - 1];
            worst = worst.max(median);
            println!(
                "{:<8} {:<26} {:>10.2} {:>10.2}",
                model.as_str(),
                weighting.as_str(),
                median,
                max
            );
        }
    }
    println!("slowest median: {worst:.2} ms (target: under 50 ms)");
}
