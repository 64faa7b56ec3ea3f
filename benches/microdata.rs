//! Speed and memory of the respondent-level path: 2,000,000 respondents in 60 countries
//! with 6 predictors. Read the CSV (checked and typed), rescale design weights to country
//! weights, fit the logistic model with standard errors clustered by country. Also times
//! polars' bare CSV read of the same file, the floor to aim at, and, when python3 has
//! pandas, numpy and statsmodels, runs benches/pandas_reference.py on the same file and
//! prints the ratio (skipped with a note otherwise). Goal: at least 15 times faster than
//! pandas + statsmodels, under 350 MB.
//!
//!     cargo bench --bench microdata
//!
//! The data are generated (seeded) into the target directory on first run by
//! benches/common/respondents.rs. The peak memory figure is the process's high-water mark
//! (VmHWM, Linux) after our read and fit.

use std::fmt::Write as _;
use std::path::PathBuf;
use std::time::Instant;

use gapwise::analysis::microdata::read_regression_file;
use gapwise::stats::regression::{self, Kind};
#[path = "common/respondents.rs"]
mod respondents;
use respondents::{respondent_file, COUNTRIES, PREDICTORS, RESPONDENTS};

fn data_file() -> PathBuf {
    respondent_file(
        "bench-microdata-2m.csv",
        2_000_000,
        48,
        "country,design_weight,age,female,education,income,urban,interest,voted\n",
        |rng, r, out| {
            let voted = u8::from(rng.bernoulli(1.0 / (1.0 + (-r.eta).exp())));
            let _ = writeln!(
                out,
                "X{:02},{:.3},{},{},{},{},{},{},{voted}",
                r.country,
                (0.3 * rng.normal()).exp(),
                r.age,
                r.female,
                r.education,
                r.income,
                r.urban,
                r.interest
            );
        },
    )
}

fn peak_memory_mb() -> Option<f64> {
    let status = std::fs::read_to_string("/proc/self/status").ok()?;
    let line = status.lines().find(|l| l.starts_with("VmHWM:"))?;
    let kb: f64 = line.split_whitespace().nth(1)?.parse().ok()?;
    Some(kb / 1024.0)
}

/// Processor time of this process so far (user and system, every thread), from
/// /proc/self/stat in clock ticks of 1/100 s (Linux).
fn cpu_seconds() -> Option<f64> {
    let stat = std::fs::read_to_string("/proc/self/stat").ok()?;
    let after_name = &stat[stat.rfind(')')? + 2..];
    let fields: Vec<&str> = after_name.split_whitespace().collect();
    let user: f64 = fields.get(11)?.parse().ok()?;
    let system: f64 = fields.get(12)?.parse().ok()?;
    Some((user + system) / 100.0)
}

/// The same work in pandas + statsmodels (benches/pandas_reference.py) on the same file, in
/// this run: its total seconds and peak megabytes, or why it was skipped.
fn pandas_reference(path: &std::path::Path) -> Result<(f64, f64, f64, String), String> {
    use std::process::Command;
    let ready = Command::new("python3")
        .args(["-c", "import pandas, numpy, statsmodels"])
        .output()
        .map_err(|e| format!("python3 not found ({e})"))?;
    if !ready.status.success() {
        return Err("python3 lacks pandas, numpy or statsmodels".to_string());
    }
    let script =
        std::path::Path::new(env!("CARGO_MANIFEST_DIR")).join("benches/pandas_reference.py");
    let out = Command::new("python3")
        .arg(&script)
        .arg(path)
        .output()
        .map_err(|e| format!("cannot run {} ({e})", script.display()))?;
    let text = String::from_utf8_lossy(&out.stdout).to_string();
    if !out.status.success() {
        return Err(format!(
            "the script failed: {}",
            String::from_utf8_lossy(&out.stderr).trim()
        ));
    }
    // "total: 6.20 s; peak memory: 1950 MB; processor time: 6.90 s"
    let line = text
        .lines()
        .find(|l| l.starts_with("total:"))
        .ok_or("the script printed no total")?;
    let numbers: Vec<f64> = line
        .split(|c: char| !(c.is_ascii_digit() || c == '.'))
        .filter_map(|t| t.parse().ok())
        .collect();
    match numbers[..] {
        [seconds, mb, cpu, ..] => Ok((seconds, mb, cpu, text)),
        _ => Err(format!("cannot read the script's total line: {line}")),
    }
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
    // Warm the page cache, so that neither reader below pays for the disk.
    drop(std::fs::read(&path).expect("read bench data"));

    let cpu_start = cpu_seconds();
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

    // Country weights (any positive numbers; the same formula as the pandas script, so that
    // the two fits' coefficients can be compared), design weights rescaled within country.
    let start = Instant::now();
    let country_weight: Vec<f64> = (0..data.clusters.len())
        .map(|g| 0.5 + ((g * 37) % 60) as f64 / 60.0)
        .collect();
    let design = data.weight.as_ref().expect("weights");
    let mut totals = vec![0.0; data.clusters.len()];
    for (&g, &d) in data.cluster.iter().zip(design) {
        totals[g] += d;
    }
    let w: Vec<f64> = data
        .cluster
        .iter()
        .zip(design)
        .map(|(&g, &d)| country_weight[g] * d / totals[g])
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
    let cpu = cpu_seconds()
        .zip(cpu_start)
        .map_or(f64::NAN, |(b, a)| b - a);
    let peak = peak_memory_mb().unwrap_or(f64::NAN);
    drop((data, w));

    // Polars' bare read of the whole file (every column, types inferred), the floor of any
    // CSV read; after ours, so that it does not count in our peak memory.
    let start = Instant::now();
    let floor = polars::prelude::CsvReadOptions::default()
        .try_into_reader_with_file_path(Some(path.clone()))
        .and_then(polars::prelude::SerReader::finish)
        .expect("polars read");
    let floor_s = start.elapsed().as_secs_f64();
    drop(floor);

    println!("polars bare CSV read (floor): {floor_s:.2} s");
    println!("read and check: {read_s:.2} s ({:.1}x polars' bare read); weights: {weight_s:.3} s; logistic fit with clustered errors ({} iterations): {fit_s:.2} s", read_s / floor_s, fit.iterations);
    println!("total: {total:.2} s; peak memory: {peak:.0} MB (goal: under 350 MB); processor time: {cpu:.2} s");
    println!(
        "coefficients: {:?}",
        fit.coef
            .iter()
            .map(|c| (c * 1e4).round() / 1e4)
            .collect::<Vec<_>>()
    );
    match pandas_reference(&path) {
        Ok((seconds, mb, pandas_cpu, text)) => {
            print!("pandas + statsmodels on the same file, in this run:\n{text}");
            println!(
                "ratio: {:.1}x faster than pandas + statsmodels (goal: at least 15x), {:.1}x less memory, {:.1}x less processor time",
                seconds / total,
                mb / peak,
                pandas_cpu / cpu
            );
        }
        Err(why) => println!("pandas + statsmodels comparison skipped: {why}"),
    }
}
