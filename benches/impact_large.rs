//! The impact page on a project with about 570,000 respondents, cold: the demo's frame and
//! manifest with twice the demo's respondents per country and wave (each demo respondent
//! and one drawn at random, seeded, from the same country and wave), through the router as
//! a browser's request would go, first request on a fresh server (the median of several).
//! Target: under 300 ms cold.
//!
//!     cargo bench --bench impact_large [-- ROUTE...]
//!
//! The project is written (seeded) into the target directory on first run.

use std::collections::HashMap;
use std::fmt::Write as _;
use std::path::PathBuf;
use std::sync::Arc;
use std::time::Instant;

use gapwise::project::Project;
use gapwise::stats::random::Rng;
use gapwise::web::AppState;
#[path = "common/serve.rs"]
mod serve;

const ROUTES: [&str; 3] = [
    "/impact",
    "/api/impact",
    "/impact?wave=1&kind=logistic&outcome=turnout",
];

fn project_dir() -> PathBuf {
    let target = std::env::var("CARGO_TARGET_DIR")
        .map(PathBuf::from)
        .unwrap_or_else(|_| PathBuf::from("target"));
    let dir = target.join("bench-impact-large");
    if dir.join("microdata.csv").exists() {
        return dir;
    }
    let demo = gapwise::demo_dir();
    std::fs::create_dir_all(&dir).expect("bench project dir");
    for file in ["project.toml", "frame.csv"] {
        std::fs::copy(demo.join(file), dir.join(file)).expect("copy demo file");
    }
    let text = std::fs::read_to_string(demo.join("microdata.csv")).expect("demo microdata");
    let mut lines = text.lines();
    let header = lines.next().expect("header");
    let rows: Vec<&str> = lines.filter(|l| !l.is_empty()).collect();
    // Rows of each country and wave (the first two fields).
    let mut groups: HashMap<&str, Vec<usize>> = HashMap::new();
    for (i, row) in rows.iter().enumerate() {
        let end = row.match_indices(',').nth(1).map_or(row.len(), |(p, _)| p);
        groups.entry(&row[..end]).or_default().push(i);
    }
    let mut rng = Rng::new(560_000);
    let mut out = String::with_capacity(text.len() * 2 + 1);
    let _ = writeln!(out, "{header}");
    for row in &rows {
        let end = row.match_indices(',').nth(1).map_or(row.len(), |(p, _)| p);
        let group = &groups[&row[..end]];
        let drawn = rows[group[rng.below(group.len())]];
        let _ = writeln!(out, "{row}\n{drawn}");
    }
    let tmp = dir.join("microdata.csv.part");
    std::fs::write(&tmp, out).expect("write bench microdata");
    std::fs::rename(&tmp, dir.join("microdata.csv")).expect("rename bench microdata");
    dir
}

/// Processor time of this process so far in milliseconds (user and system, every thread),
/// from /proc/self/stat in clock ticks of 10 ms (Linux); a measure that other programs
/// on a shared machine do not inflate.
fn cpu_ms() -> f64 {
    let stat = std::fs::read_to_string("/proc/self/stat").unwrap_or_default();
    let after_name = stat.rfind(')').map_or("", |p| &stat[p + 2..]);
    let fields: Vec<f64> = after_name
        .split_whitespace()
        .skip(11)
        .take(2)
        .filter_map(|f| f.parse().ok())
        .collect();
    fields.iter().sum::<f64>() * 10.0
}

/// Milliseconds to answer `uri` (wall clock, processor); panics unless the answer is 200.
fn time(runtime: &tokio::runtime::Runtime, state: &Arc<AppState>, uri: &str) -> (f64, f64) {
    let cpu = cpu_ms();
    let wall = serve::time(runtime, state, uri);
    (wall, cpu_ms() - cpu)
}

fn main() {
    let dir = project_dir();
    let start = Instant::now();
    let project = Project::load(&dir).expect("bench project loads");
    let load_ms = start.elapsed().as_secs_f64() * 1000.0;
    let respondents = project.microdata.as_ref().map_or(0, |m| m.height());
    println!("{respondents} respondents; project load {load_ms:.0} ms (not counted below)");
    drop(project);
    let runtime = serve::runtime();
    println!(
        "{:<56} {:>10} {:>10} {:>13} {:>11}",
        "route", "cold ms", "max ms", "processor ms", "cached ms"
    );
    let mut worst = 0.0f64;
    // `cargo bench --bench impact_large -- ROUTE...` times only those routes.
    let chosen: Vec<String> = std::env::args()
        .skip(1)
        .filter(|a| a.starts_with('/'))
        .collect();
    let routes: Vec<&str> = if chosen.is_empty() {
        ROUTES.to_vec()
    } else {
        chosen.iter().map(String::as_str).collect()
    };
    for uri in routes {
        let mut cold = Vec::new();
        let mut cpu = Vec::new();
        let mut cached = Vec::new();
        for _ in 0..3 {
            let state = serve::fresh_state(&dir);
            let (wall, processor) = time(&runtime, &state, uri);
            cold.push(wall);
            cpu.push(processor);
            cached.push(time(&runtime, &state, uri).0);
        }
        for v in [&mut cold, &mut cpu, &mut cached] {
            v.sort_by(f64::total_cmp);
        }
        let (c, max, p, h) = (cold[1], cold[2], cpu[1], cached[1]);
        worst = worst.max(c);
        println!("{uri:<56} {c:>10.1} {max:>10.1} {p:>13.0} {h:>11.2}");
    }
    println!("slowest cold median: {worst:.0} ms (goal: under 300 ms)");
}
