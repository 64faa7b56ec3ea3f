//! Speed and memory of the respondent-level path: 2,000,000 respondents in 60 countries
//! with 6 predictors. Read the CSV (checked and typed), rescale design weights to country
//! weights, fit the logistic model with standard errors clustered by country. Also times
//! polars' bare CSV read of the same file, the floor to aim at.
//!
//!     cargo bench --bench microdata
//!
//! The data are generated here (seeded) into the target directory on first run. The peak
//! memory figure is the process's high-water mark (VmHWM, Linux).

use std::collections::HashMap;
use std::fmt::Write as _;
use std::path::PathBuf;
use std::time::Instant;

use gapwise::analysis::microdata::read_regression_file;
use gapwise::stats::random::Rng;
use gapwise::stats::regression::{self, Kind};

const RESPONDENTS: usize = 2_000_000;
const COUNTRIES: usize = 60;
const PREDICTORS: [&str; 6] = ["age", "female", "education", "income", "urban", "interest"];

fn data_file() -> PathBuf {
    let dir = std::env::var("CARGO_TARGET_DIR")
        .map(PathBuf::from)
        .unwrap_or_else(|_| PathBuf::from("target"));
    let path = dir.join("bench-microdata-2m.csv");
    if path.exists() {
        return path;
    }
    std::fs::create_dir_all(&dir).expect("target dir");
    let mut rng = Rng::new(2_000_000);
    let country_effect: Vec<f64> = (0..COUNTRIES).map(|_| 0.5 * rng.normal()).collect();
    let mut out = String::with_capacity(RESPONDENTS * 48);
    out.push_str("country,design_weight,age,female,education,income,urban,interest,voted\n");
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
        let voted = u8::from(rng.bernoulli(1.0 / (1.0 + (-eta).exp())));
        let _ = writeln!(
            out,
            "X{:02},{:.3},{age},{female},{education},{income},{urban},{interest},{voted}",
            c,
            (0.3 * rng.normal()).exp()
        );
    }
    std::fs::write(&path, out).expect("write bench data");
    path
}

fn peak_memory_mb() -> Option<f64> {
    let status = std::fs::read_to_string("/proc/self/status").ok()?;
    let line = status.lines().find(|l| l.starts_with("VmHWM:"))?;
    let kb: f64 = line.split_whitespace().nth(1)?.parse().ok()?;
    Some(kb / 1024.0)
}

fn main() {
    let path = data_file();
    let size = std::fs::metadata(&path)
        .map(|m| m.len() as f64 / 1e6)
        .unwrap_or(0.0);
    println!(
        "{RESPONDENTS} respondents, {COUNTRIES} countries, {} predictors; file {size:.0} MB",
        PREDICTORS.len()
    );

    let start = Instant::now();
    let floor = polars::prelude::CsvReadOptions::default()
        .try_into_reader_with_file_path(Some(path.clone()))
        .and_then(polars::prelude::SerReader::finish)
        .expect("polars read");
    let floor_s = start.elapsed().as_secs_f64();
    drop(floor);

    let start = Instant::now();
    let predictors: Vec<String> = PREDICTORS.iter().map(|s| s.to_string()).collect();
    let data = read_regression_file(
        &path,
        "voted",
        &predictors,
        "country",
        Some("design_weight"),
    )
    .expect("read");
    let read_s = start.elapsed().as_secs_f64();

    // Country weights (any positive numbers here), design weights rescaled within country.
    let start = Instant::now();
    let mut rng = Rng::new(60);
    let country_weight: Vec<f64> = (0..data.clusters.len())
        .map(|_| 0.5 + rng.uniform())
        .collect();
    let design = data.weight.as_ref().expect("weights");
    let mut totals: HashMap<usize, f64> = HashMap::new();
    for (i, &g) in data.cluster.iter().enumerate() {
        *totals.entry(g).or_insert(0.0) += design[i];
    }
    let w: Vec<f64> = data
        .cluster
        .iter()
        .enumerate()
        .map(|(i, &g)| country_weight[g] * design[i] / totals[&g])
        .collect();
    let weight_s = start.elapsed().as_secs_f64();

    let start = Instant::now();
    let fit = regression::fit(
        data.x.view(),
        &data.y,
        Some(&w),
        &data.cluster,
        Kind::Logistic,
    )
    .expect("fit");
    let fit_s = start.elapsed().as_secs_f64();
    let total = read_s + weight_s + fit_s;
    println!("polars bare CSV read (floor): {floor_s:.2} s");
    println!("read and check: {read_s:.2} s; weights: {weight_s:.3} s; logistic fit with clustered errors ({} iterations): {fit_s:.2} s", fit.iterations);
    println!("total: {total:.2} s (goal: under 1.4 s, five times faster than the 7 s quoted for pandas + statsmodels)");
    println!(
        "peak memory: {:.0} MB (goal: under 1,500 MB)",
        peak_memory_mb().unwrap_or(f64::NAN)
    );
    println!(
        "coefficients: {:?}",
        fit.coef
            .iter()
            .map(|c| (c * 1e4).round() / 1e4)
            .collect::<Vec<_>>()
    );
}
