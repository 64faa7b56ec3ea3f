//! Speed of the recruitment planner: 200 eligible countries (about 100 candidates),
//! 12 indicators, a plan of 10 on the expected objective (greedy, exchange, exact
//! expectations over 2^10 join outcomes), 1,000 random plans and the other baselines;
//! then with 200 bootstrap replicates (both cores). Targets: under 1 s without the
//! bootstrap, under 5 s with it. Prints wall-clock and CPU time (on a shared machine the
//! wall-clock time also measures the other work).
//!
//!     cargo bench --bench planner

use std::time::Instant;

use gapwise::analysis::planner::{plan, Feasibility, PlanSettings};
use gapwise::analysis::settings::Settings;

#[path = "synthetic.rs"]
mod synthetic;
use synthetic::synthetic_universe;

fn main() {
    let view = synthetic_universe(200, 10, 42);
    let candidates = view.len() - view.n_participants();
    println!("200 eligible units, {candidates} candidates, 10 numeric + 2 categorical indicators, plan of 10");
    let settings = Settings::default();
    let replicates_list: Vec<usize> = std::env::var("PLANNER_BENCH_REPLICATES")
        .ok()
        .and_then(|v| v.split(',').map(|r| r.parse().ok()).collect())
        .unwrap_or_else(|| vec![0, 200]);
    for replicates in replicates_list {
        let ps = PlanSettings {
            budget: Some(10),
            feasibility: Feasibility::Model,
            random_draws: 1000,
            replicates,
            ..PlanSettings::default()
        };
        let mut times = Vec::new();
        let mut cpu = Vec::new();
        for _ in 0..if replicates == 0 { 5 } else { 3 } {
            let start = Instant::now();
            let cpu_start = cpu_seconds();
            let p = plan(&view, &settings, &ps).expect("plan");
            times.push(start.elapsed().as_secs_f64() * 1000.0);
            cpu.push((cpu_seconds() - cpu_start) * 1000.0);
            assert_eq!(p.steps.len(), 10);
        }
        cpu.sort_by(f64::total_cmp);
        println!(
            "    CPU time (all threads): median {:.1} ms",
            cpu[cpu.len() / 2]
        );
        times.sort_by(f64::total_cmp);
        println!(
            "{replicates:>3} bootstrap replicates: median {:.1} ms, max {:.1} ms (target {})",
            times[times.len() / 2],
            times[times.len() - 1],
            if replicates == 0 {
                "1000 ms"
            } else {
                "5000 ms"
            }
        );
    }
}

/// CPU time of this process (user + system, all threads) from /proc, in seconds; 0 where
/// /proc is missing.
fn cpu_seconds() -> f64 {
    let Ok(stat) = std::fs::read_to_string("/proc/self/stat") else {
        return 0.0;
    };
    // Fields after the command name (which is in parentheses): utime is field 14, stime 15.
    let rest = stat.rsplit_once(')').map_or("", |(_, r)| r);
    let fields: Vec<&str> = rest.split_whitespace().collect();
    let ticks = |i: usize| {
        fields
            .get(i)
            .and_then(|v| v.parse::<f64>().ok())
            .unwrap_or(0.0)
    };
    (ticks(11) + ticks(12)) / 100.0
}
