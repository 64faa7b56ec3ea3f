//! A synthetic universe shared by the benchmarks.

use gapwise::project::wave::{CategoricalIndicator, NumericIndicator};
use gapwise::project::WaveView;
use gapwise::stats::random::Rng;

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
        support: None,
    }
}
