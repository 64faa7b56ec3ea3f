//! Speed of the statistical core: one wave of 200 eligible countries with 12 indicators
//! (10 numeric, 2 categorical), every participation model and every weighting method.
//! Target: each combination under 50 ms in release.
//!
//!     cargo bench --bench participation

use std::time::Instant;

use gapwise::analysis::participation;
use gapwise::analysis::settings::{ModelKind, Settings, WeightingKind};
use gapwise::demo::rng::Rng;
use gapwise::project::wave::{CategoricalIndicator, NumericIndicator};
use gapwise::project::WaveView;

/// A synthetic universe: participation depends on the first three indicators.
pub fn synthetic_universe(n: usize, numeric: usize, seed: u64) -> WaveView {
    let mut rng = Rng::new(seed);
    let mut columns: Vec<Vec<Option<f64>>> = vec![Vec::with_capacity(n); numeric];
    let mut region = Vec::with_capacity(n);
    let mut system = Vec::with_capacity(n);
    let mut took_part = Vec::with_capacity(n);
    for _ in 0..n {
        let latent = rng.normal();
        let values: Vec<f64> = (0..numeric)
            .map(|j| {
                if j < 3 {
                    0.6 * latent + 0.8 * rng.normal()
                } else {
                    rng.normal()
                }
            })
            .collect();
        let eta = 0.8 * values[0] + 0.5 * values[1] - 0.4 * values[2];
        took_part.push(rng.bernoulli(1.0 / (1.0 + (-eta).exp())));
        for (j, v) in values.into_iter().enumerate() {
            columns[j].push(Some(v));
        }
        region.push(Some(rng.below(4)));
        system.push(Some(rng.below(3)));
    }
    WaveView {
        wave: 1,
        rows: (0..n).collect(),
        codes: (0..n).map(|i| format!("U{i:03}")).collect(),
        names: (0..n).map(|i| format!("Unit {i}")).collect(),
        participated: took_part,
        numeric: columns
            .into_iter()
            .enumerate()
            .map(|(j, values)| NumericIndicator {
                column: format!("x{j}"),
                label: format!("x{j}"),
                values,
            })
            .collect(),
        categorical: vec![
            CategoricalIndicator {
                column: "region".into(),
                label: "region".into(),
                levels: ["A", "B", "C", "D"].map(String::from).to_vec(),
                values: region,
            },
            CategoricalIndicator {
                column: "system".into(),
                label: "system".into(),
                levels: ["P", "M", "X"].map(String::from).to_vec(),
                values: system,
            },
        ],
        group: Some(0),
        cost: None,
        cost_column: None,
        feasibility: None,
        feasibility_column: None,
    }
}

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
