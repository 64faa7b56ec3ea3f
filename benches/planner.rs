//! Speed of the recruitment planner: 200 eligible countries (about 100 candidates),
//! 12 indicators, a plan of 10; then with 200 bootstrap replicates (both cores).
//! Targets: under 300 ms without the bootstrap, under 5 s with it.
//!
//!     cargo bench --bench planner

use std::time::Instant;

use gapwise::analysis::planner::{plan, PlanSettings};
use gapwise::analysis::settings::Settings;

#[path = "synthetic.rs"]
mod synthetic;
use synthetic::synthetic_universe;

fn main() {
    let view = synthetic_universe(200, 10, 42);
    let candidates = view.len() - view.n_participants();
    println!("200 eligible units, {candidates} candidates, 10 numeric + 2 categorical indicators, plan of 10");
    let settings = Settings::default();
    for replicates in [0, 200] {
        let ps = PlanSettings {
            budget: Some(10),
            replicates,
            ..PlanSettings::default()
        };
        let mut times = Vec::new();
        for _ in 0..if replicates == 0 { 7 } else { 3 } {
            let start = Instant::now();
            let p = plan(&view, &settings, &ps).expect("plan");
            times.push(start.elapsed().as_secs_f64() * 1000.0);
            assert_eq!(p.steps.len(), 10);
        }
        times.sort_by(f64::total_cmp);
        println!(
            "{replicates:>3} bootstrap replicates: median {:.1} ms, max {:.1} ms (target {})",
            times[times.len() / 2],
            times[times.len() - 1],
            if replicates == 0 { "300 ms" } else { "5000 ms" }
        );
    }
}
