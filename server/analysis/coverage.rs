//! Which kinds of countries are missing: principal components of the indicators over the
//! eligible universe, coverage by group and by tercile of each indicator, and each
//! indicator's distribution among participants against the universe.

use ndarray::Array2;
use serde::Serialize;

use crate::project::WaveView;
use crate::stats::{describe, pca};

#[derive(Debug, Clone, Serialize)]
pub struct Component {
    pub number: usize,
    pub eigenvalue: f64,
    pub explained: f64,
    pub cumulative: f64,
}

#[derive(Debug, Clone, Serialize)]
pub struct Loading {
    pub indicator: String,
    pub label: String,
    /// Loadings on the first components (up to four).
    pub values: Vec<f64>,
}

#[derive(Debug, Clone, Serialize)]
pub struct MapPoint {
    pub id: String,
    pub name: String,
    pub group: Option<String>,
    pub participated: bool,
    pub pc1: f64,
    pub pc2: f64,
    /// Among the countries farthest from the centre of the map (labelled on the chart).
    pub outlier: bool,
}

#[derive(Debug, Clone, Serialize)]
pub struct RateCell {
    pub label: String,
    pub eligible: usize,
    pub participating: usize,
    pub rate: Option<f64>,
}

#[derive(Debug, Clone, Serialize)]
pub struct TercileCoverage {
    pub indicator: String,
    pub label: String,
    /// The two cut points (33rd and 67th percentiles of the universe).
    pub cuts: [f64; 2],
    /// Low, middle and high thirds.
    pub cells: Vec<RateCell>,
}

/// Quartiles of an indicator.
#[derive(Debug, Clone, Serialize)]
pub struct Spread {
    pub q1: f64,
    pub median: f64,
    pub q3: f64,
    pub min: f64,
    pub max: f64,
}

#[derive(Debug, Clone, Serialize)]
pub struct Distribution {
    pub indicator: String,
    pub label: String,
    pub universe: Spread,
    pub participants: Spread,
    /// Universe mean and standard deviation, for drawing on a common scale.
    pub mean: f64,
    pub sd: f64,
}

#[derive(Debug, Clone, Serialize)]
pub struct CoverageReport {
    pub wave: i64,
    pub n_eligible: usize,
    pub n_participants: usize,
    pub indicators: Vec<String>,
    /// Countries left out of the components for a missing value.
    pub dropped: Vec<String>,
    pub components: Vec<Component>,
    pub loadings: Vec<Loading>,
    pub points: Vec<MapPoint>,
    /// Why there is no map, if there is none.
    pub map_error: Option<String>,
    pub group_label: Option<String>,
    pub groups: Vec<RateCell>,
    pub terciles: Vec<TercileCoverage>,
    pub distributions: Vec<Distribution>,
    /// In words: what the first component measures and where the missing countries lie.
    pub summary: Vec<String>,
}

/// How many of the farthest countries get a label on the map.
const LABELLED: usize = 8;

pub fn coverage(view: &WaveView) -> CoverageReport {
    let indicators: Vec<usize> = (0..view.numeric.len()).collect();
    let complete: Vec<usize> = (0..view.len())
        .filter(|&i| {
            indicators
                .iter()
                .all(|&j| view.numeric[j].values[i].is_some())
        })
        .collect();
    let dropped: Vec<String> = (0..view.len())
        .filter(|i| !complete.contains(i))
        .map(|i| view.codes[i].clone())
        .collect();
    let group = view.group.map(|g| &view.categorical[g]);
    let group_of = |i: usize| group.and_then(|g| g.values[i].map(|l| g.levels[l].clone()));

    let mut x = Array2::<f64>::zeros((complete.len(), indicators.len()));
    for (r, &i) in complete.iter().enumerate() {
        for (c, &j) in indicators.iter().enumerate() {
            x[[r, c]] = view.numeric[j].values[i].unwrap_or(0.0);
        }
    }
    let (components, loadings, points, map_error, summary) =
        match pca::principal_components(x.view()) {
            Ok(p) => {
                let mut cumulative = 0.0;
                let components: Vec<Component> = p
                    .eigenvalues
                    .iter()
                    .zip(&p.explained)
                    .enumerate()
                    .map(|(k, (&eigenvalue, &explained))| {
                        cumulative += explained;
                        Component {
                            number: k + 1,
                            eigenvalue,
                            explained,
                            cumulative,
                        }
                    })
                    .collect();
                let shown = indicators.len().min(4);
                let loadings: Vec<Loading> = indicators
                    .iter()
                    .enumerate()
                    .map(|(r, &j)| Loading {
                        indicator: view.numeric[j].column.clone(),
                        label: view.numeric[j].label.clone(),
                        values: (0..shown).map(|c| p.loadings[[r, c]]).collect(),
                    })
                    .collect();
                let distance: Vec<f64> = (0..complete.len())
                    .map(|r| {
                        p.scores[[r, 0]].powi(2) / p.eigenvalues[0].max(1e-12)
                            + p.scores[[r, 1]].powi(2) / p.eigenvalues[1].max(1e-12)
                    })
                    .collect();
                let mut order: Vec<usize> = (0..complete.len()).collect();
                order.sort_by(|&a, &b| distance[b].total_cmp(&distance[a]));
                let far: Vec<usize> = order.into_iter().take(LABELLED).collect();
                let points: Vec<MapPoint> = complete
                    .iter()
                    .enumerate()
                    .map(|(r, &i)| MapPoint {
                        id: view.codes[i].clone(),
                        name: view.names[i].clone(),
                        group: group_of(i),
                        participated: view.participated[i],
                        pc1: p.scores[[r, 0]],
                        pc2: p.scores[[r, 1]],
                        outlier: far.contains(&r),
                    })
                    .collect();
                let summary = map_summary(&loadings, &points);
                (components, loadings, points, None, summary)
            }
            Err(e) => (
                Vec::new(),
                Vec::new(),
                Vec::new(),
                Some(format!("No map: {e}.")),
                Vec::new(),
            ),
        };

    let groups = group
        .map(|g| {
            g.levels
                .iter()
                .enumerate()
                .map(|(l, name)| {
                    rate(
                        name.clone(),
                        (0..view.len()).filter(|&i| g.values[i] == Some(l)),
                        view,
                    )
                })
                .filter(|c| c.eligible > 0)
                .collect()
        })
        .unwrap_or_default();

    let mut terciles = Vec::new();
    let mut distributions = Vec::new();
    for ind in &view.numeric {
        let values: Vec<f64> = ind.values.iter().flatten().copied().collect();
        let participants: Vec<f64> = ind
            .values
            .iter()
            .zip(&view.participated)
            .filter(|(_, &t)| t)
            .filter_map(|(v, _)| *v)
            .collect();
        let (Some(c1), Some(c2)) = (
            describe::quantile(&values, 1.0 / 3.0),
            describe::quantile(&values, 2.0 / 3.0),
        ) else {
            continue;
        };
        let third = |v: f64| {
            if v <= c1 {
                0
            } else if v <= c2 {
                1
            } else {
                2
            }
        };
        let names = [
            format!("low (≤ {})", short(c1)),
            "middle".to_string(),
            format!("high (> {})", short(c2)),
        ];
        let cells = (0..3)
            .map(|k| {
                rate(
                    names[k].clone(),
                    (0..view.len()).filter(|&i| ind.values[i].is_some_and(|v| third(v) == k)),
                    view,
                )
            })
            .collect();
        terciles.push(TercileCoverage {
            indicator: ind.column.clone(),
            label: ind.label.clone(),
            cuts: [c1, c2],
            cells,
        });
        if let (Some(u), Some(p)) = (spread(&values), spread(&participants)) {
            let mean = describe::mean(&values).unwrap_or(0.0);
            let sd = (values.iter().map(|v| (v - mean).powi(2)).sum::<f64>()
                / (values.len().max(2) - 1) as f64)
                .sqrt();
            distributions.push(Distribution {
                indicator: ind.column.clone(),
                label: ind.label.clone(),
                universe: u,
                participants: p,
                mean,
                sd,
            });
        }
    }

    CoverageReport {
        wave: view.wave,
        n_eligible: view.len(),
        n_participants: view.n_participants(),
        indicators: indicators
            .iter()
            .map(|&j| view.numeric[j].label.clone())
            .collect(),
        dropped,
        components,
        loadings,
        points,
        map_error,
        group_label: group.map(|g| g.label.clone()),
        groups,
        terciles,
        distributions,
        summary,
    }
}

fn rate(label: String, members: impl Iterator<Item = usize>, view: &WaveView) -> RateCell {
    let (mut eligible, mut participating) = (0, 0);
    for i in members {
        eligible += 1;
        participating += usize::from(view.participated[i]);
    }
    RateCell {
        label,
        eligible,
        participating,
        rate: (eligible > 0).then(|| participating as f64 / eligible as f64),
    }
}

fn spread(x: &[f64]) -> Option<Spread> {
    Some(Spread {
        q1: describe::quantile(x, 0.25)?,
        median: describe::quantile(x, 0.5)?,
        q3: describe::quantile(x, 0.75)?,
        min: describe::quantile(x, 0.0)?,
        max: describe::quantile(x, 1.0)?,
    })
}

fn short(x: f64) -> String {
    super::balance::readable(x)
}

/// What the first component is mostly made of, and where participants and absent
/// countries sit on it.
fn map_summary(loadings: &[Loading], points: &[MapPoint]) -> Vec<String> {
    let mut out = Vec::new();
    let mut by_weight: Vec<&Loading> = loadings.iter().collect();
    by_weight.sort_by(|a, b| b.values[0].abs().total_cmp(&a.values[0].abs()));
    let top: Vec<String> = by_weight
        .iter()
        .take(3)
        .map(|l| {
            format!(
                "{} ({})",
                l.label,
                if l.values[0] >= 0.0 { "+" } else { "−" }
            )
        })
        .collect();
    out.push(format!(
        "The first component mostly measures {}.",
        top.join(", ")
    ));
    let mean = |took: bool| {
        let v: Vec<f64> = points
            .iter()
            .filter(|p| p.participated == took)
            .map(|p| p.pc1)
            .collect();
        describe::mean(&v)
    };
    if let (Some(p), Some(a)) = (mean(true), mean(false)) {
        out.push(format!(
            "Participants average {} on it, eligible countries that did not take part {}: the missing countries lie toward the {} end.",
            super::balance::readable(p),
            super::balance::readable(a),
            if a < p { "low" } else { "high" }
        ));
    }
    out
}
