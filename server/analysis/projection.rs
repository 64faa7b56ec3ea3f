//! What the whole eligible universe would say: a random-intercept model of a respondent
//! outcome with the country indicators as country-level predictors, projected to every
//! eligible country of the wave (multilevel regression and poststratification; Gelman &
//! Little 1997, Survey Methodology 23, 127-135; Park, Gelman & Bafumi 2004, Political
//! Analysis 12, 375-385).
//!
//! The model is linear (REML) unless the outcome is binary (every value 0 or 1), when it is
//! the logistic random-intercept model by the Laplace approximation and the projections
//! are probabilities.
//!
//! Participants: the mean over their own respondents of the prediction at their
//! conditional mode u_j (linear: x_i'b + z_j'g + u_j; logistic: the inverse logit of it).
//! Absent countries: their indicators z_j, their composition from the project's
//! composition file when it has their cells, else the participants' pooled respondents,
//! and the country effect integrated over u ~ N(0, tau^2) (linear: u = 0; logistic: by
//! 32-point Gauss-Hermite quadrature). Indicators are standardised with the participants'
//! means and SDs. The universe estimate is the mean of the eligible countries' predictions,
//! countries counted equally or by population. The 95% prediction interval comes from
//! seeded simulation: fixed effects from N(b-hat, Cov), log tau from its approximate normal
//! sampling distribution, participants' effects from N(mode, conditional variance) with the
//! mode moved to first order with the drawn fixed effects (exact for the linear model), absent
//! countries' effects from N(0, tau*^2). For the logistic model the draws summarise each
//! composition by at most [`CELLS`] respondents at evenly spaced quantiles of the fitted
//! linear predictor (exact when a composition has fewer distinct respondents).
//!
//! Support: an absent country is flagged when an indicator lies outside the participants'
//! range, or when it lies outside the participants' convex hull on the first two principal
//! components of the indicators (over the eligible countries; Jolliffe 2002).

use std::collections::HashMap;

use ndarray::Array2;
use rayon::prelude::*;
use serde::Serialize;

use super::multilevel::{Kind, RandomInterceptSummary};
use super::settings::Settings;
use crate::project::{Project, WaveView};
use crate::stats::multilevel::{self, Criterion, Data, MultilevelFit};
use crate::stats::random::Rng;
use crate::stats::{linalg, pca};

/// Simulation draws of the prediction interval.
pub const DRAWS: usize = 2000;

/// Most cells a composition keeps in the logistic model's simulation draws.
pub const CELLS: usize = 48;

/// Gauss-Hermite nodes of the logistic projection of absent countries.
const NODES: usize = 32;

#[derive(Debug, Clone, Serialize)]
pub struct ProjectedCountry {
    pub code: String,
    pub name: String,
    pub region: Option<String>,
    pub participated: bool,
    pub respondents: usize,
    /// Predicted mean outcome (null when an indicator is missing: not estimable).
    pub prediction: Option<f64>,
    pub low: Option<f64>,
    pub high: Option<f64>,
    /// Absent and outside the participants' range on these indicators.
    pub outside_range: Vec<String>,
    /// Absent and outside the participants' convex hull on the first two components.
    pub outside_hull: bool,
    /// Position on the first two principal components (null without a map).
    pub pc1: Option<f64>,
    pub pc2: Option<f64>,
    /// The country's weight in the universe estimate (1 with equal counting, its
    /// population otherwise; null when not estimable).
    pub weight: Option<f64>,
    /// Where an absent country's composition came from ("file" or "pooled").
    pub composition: Option<&'static str>,
}

impl ProjectionReport {
    /// The readable label of one of the report's indicators (the column itself when it is
    /// not one of them).
    pub fn indicator_label<'a>(&'a self, column: &'a str) -> &'a str {
        self.indicators
            .iter()
            .position(|c| c == column)
            .and_then(|k| self.indicator_labels.get(k))
            .map_or(column, String::as_str)
    }
}

impl ProjectedCountry {
    /// Absent and outside the participants' support (range or hull).
    pub fn flagged(&self) -> bool {
        !self.participated && (!self.outside_range.is_empty() || self.outside_hull)
    }
}

#[derive(Debug, Clone, Serialize)]
pub struct RegionRow {
    pub region: String,
    pub participants: usize,
    pub absent: usize,
    pub participants_mean: Option<f64>,
    pub absent_mean: Option<f64>,
    pub universe_mean: Option<f64>,
}

#[derive(Debug, Clone, Serialize)]
pub struct Difference {
    pub code: String,
    pub name: String,
    pub region: String,
    pub prediction: f64,
    pub region_participants_mean: f64,
    pub difference: f64,
}

#[derive(Debug, Clone, Serialize)]
pub struct ProjectionReport {
    pub wave: i64,
    pub outcome: String,
    pub predictors: Vec<String>,
    pub indicators: Vec<String>,
    /// Readable labels (the manifest's, else derived from the column name) of the
    /// outcome, the respondent predictors and the indicators, for pages and charts.
    pub outcome_label: String,
    pub predictor_labels: Vec<String>,
    pub indicator_labels: Vec<String>,
    /// Per term of `terms`, its readable label.
    pub term_labels: Vec<String>,
    /// The model; its terms: intercept, respondent predictors, then standardised
    /// indicators.
    #[serde(flatten)]
    pub fit: RandomInterceptSummary,
    pub method: &'static str,
    /// How the countries' predictions and the interval are made, in words.
    pub projection_method: String,
    pub converged: bool,
    /// The country SD is estimated at its boundary, 0 (a note says what that means).
    pub at_boundary: bool,
    pub n_respondents: usize,
    pub n_participants: usize,
    pub n_absent: usize,
    /// The mean over participants of their respondents' mean outcome (unweighted).
    pub participants_mean: f64,
    pub projected_absent_mean: Option<f64>,
    pub universe_estimate: f64,
    pub universe_low: f64,
    pub universe_high: f64,
    /// How countries count in the universe estimate: "equal" or "population".
    pub shares: &'static str,
    /// The population column when countries count by population, and its label.
    pub population_column: Option<String>,
    pub population_label: Option<String>,
    pub seed: u64,
    pub draws: usize,
    pub flagged: usize,
    /// Share of the universe estimate's country weight on flagged countries.
    pub flagged_share: f64,
    /// Variance shares of the map's two components (empty without a map).
    pub map_explained: Vec<f64>,
    /// Why there is no map (and no hull check), if there is none.
    pub map_error: Option<String>,
    pub countries: Vec<ProjectedCountry>,
    pub regions: Vec<RegionRow>,
    pub largest_differences: Vec<Difference>,
    pub composition: &'static str,
    pub notes: Vec<String>,
}

#[derive(Debug, Clone, PartialEq, thiserror::Error)]
pub enum ProjectionError {
    #[error("{0}")]
    Request(String),
}

fn req(message: impl Into<String>) -> ProjectionError {
    ProjectionError::Request(message.into())
}

/// The projection request.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct ProjectionSettings {
    pub outcome: String,
    /// Respondent-level predictors (survey variables).
    pub predictors: Vec<String>,
}

impl ProjectionSettings {
    /// The projection of an impact request's outcome, with those of its predictors that
    /// are survey variables (`variables`; country indicators enter the projection anyway).
    pub fn for_impact(imp: &super::impact::ImpactSettings, variables: &[String]) -> Self {
        ProjectionSettings {
            outcome: imp.outcome.clone(),
            predictors: imp
                .predictors
                .iter()
                .filter(|p| variables.contains(p))
                .cloned()
                .collect(),
        }
    }
}

/// How countries count in the universe estimate.
#[derive(Debug, Clone, Copy, Default, PartialEq, Eq, Serialize)]
#[serde(rename_all = "kebab-case")]
pub enum CountryShares {
    /// Every eligible country the same.
    #[default]
    Equal,
    /// By population (the manifest's `[population]` column).
    Population,
}

/// Options beyond the request, with defaults (`projection` uses them).
#[derive(Debug, Clone, Default, PartialEq, Eq, Serialize)]
pub struct ProjectionOptions {
    pub shares: CountryShares,
}

/// Computes the projection for one wave of a project with microdata, countries counted
/// equally.
pub fn projection(
    project: &Project,
    view: &WaveView,
    settings: &Settings,
    ps: &ProjectionSettings,
) -> Result<ProjectionReport, ProjectionError> {
    projection_with(project, view, settings, ps, &ProjectionOptions::default())
}

/// A composition: cells of the respondent part of the design (intercept first) with
/// shares summing to 1.
#[derive(Debug, Clone)]
struct Cells {
    rows: Vec<Vec<f64>>,
    share: Vec<f64>,
}

impl Cells {
    fn mean(&self) -> Vec<f64> {
        let k = self.rows.first().map_or(0, Vec::len);
        let mut m = vec![0.0; k];
        for (r, s) in self.rows.iter().zip(&self.share) {
            for (a, v) in m.iter_mut().zip(r) {
                *a += s * v;
            }
        }
        m
    }
}

/// At most `most` respondents standing for `members` (row indices into `x`): all of
/// them when there are few, else those at evenly spaced quantiles of the fitted
/// respondent part `eta`; equal shares.
fn representatives(
    members: &[usize],
    eta: &[f64],
    x: &Array2<f64>,
    kr: usize,
    most: usize,
) -> Cells {
    let mut order: Vec<usize> = members.to_vec();
    let picked: Vec<usize> = if order.len() <= most {
        order
    } else {
        order.sort_by(|&a, &b| eta[a].total_cmp(&eta[b]));
        let n = order.len();
        (0..most)
            .map(|k| order[((2 * k + 1) * n / (2 * most)).min(n - 1)])
            .collect()
    };
    let m = picked.len().max(1) as f64;
    Cells {
        rows: picked
            .iter()
            .map(|&r| (0..kr).map(|j| x[[r, j]]).collect())
            .collect(),
        share: vec![1.0 / m; picked.len()],
    }
}

/// The distinct respondent parts among `members`, each with its share of them (exact);
/// `None` when there are more than `most`.
fn distinct_cells(members: &[usize], x: &Array2<f64>, kr: usize, most: usize) -> Option<Cells> {
    let mut index: HashMap<Vec<u64>, usize> = HashMap::new();
    let mut cells = Cells {
        rows: Vec::new(),
        share: Vec::new(),
    };
    for &r in members {
        let key: Vec<u64> = (0..kr).map(|j| x[[r, j]].to_bits()).collect();
        let next = cells.rows.len();
        let at = *index.entry(key).or_insert(next);
        if at == next {
            if next == most {
                return None;
            }
            cells.rows.push((0..kr).map(|j| x[[r, j]]).collect());
            cells.share.push(0.0);
        }
        cells.share[at] += 1.0;
    }
    let n = members.len().max(1) as f64;
    cells.share.iter_mut().for_each(|s| *s /= n);
    Some(cells)
}

/// Most distinct cells of the pooled composition kept exactly in the logistic model's
/// point projections (beyond it, respondents at this many quantiles).
const POINT_CELLS: usize = 2000;

fn inv_logit(v: f64) -> f64 {
    if v >= 0.0 {
        1.0 / (1.0 + (-v).exp())
    } else {
        let e = v.exp();
        e / (1.0 + e)
    }
}

/// Computes the projection for one wave of a project with microdata.
pub fn projection_with(
    project: &Project,
    view: &WaveView,
    settings: &Settings,
    ps: &ProjectionSettings,
    options: &ProjectionOptions,
) -> Result<ProjectionReport, ProjectionError> {
    let micro = project
        .microdata
        .as_ref()
        .ok_or_else(|| req("the project has no microdata (microdata.csv or microdata.parquet)"))?;
    let roles = project
        .manifest
        .microdata
        .as_ref()
        .ok_or_else(|| req("project.toml has no [microdata] section"))?;
    for v in std::iter::once(&ps.outcome).chain(&ps.predictors) {
        if !roles.variables.contains(v) {
            return Err(req(format!(
                "'{v}' is not a survey variable; the variables are: {}",
                roles.variables.join(", ")
            )));
        }
    }
    let indicators = super::design::covariate_positions(view, settings)
        .map_err(|n| req(format!("'{n}' is not a numeric indicator")))?;
    // Country codes as level numbers (no text copy per respondent).
    let factor = micro.shared_factorise(&roles.country);
    let (country_codes, country_levels) = (&factor.0, &factor.1);
    let waves = micro.shared_integers(&roles.wave);
    let outcome = micro.shared_numbers(&ps.outcome);
    let predictor_values: Vec<std::sync::Arc<Vec<Option<f64>>>> = ps
        .predictors
        .iter()
        .map(|p| micro.shared_numbers(p))
        .collect();
    let unit_of_code: HashMap<&str, usize> = view
        .codes
        .iter()
        .enumerate()
        .map(|(i, c)| (c.as_str(), i))
        .collect();
    let unit_of_level: Vec<Option<usize>> = country_levels
        .iter()
        .map(|c| unit_of_code.get(c.as_str()).copied())
        .collect();
    // Standardisation and range over participants with complete indicators.
    let complete = |i: usize| {
        indicators
            .iter()
            .all(|&c| view.numeric[c].values[i].is_some())
    };
    let part_units: Vec<usize> = (0..view.len())
        .filter(|&i| view.participated[i] && complete(i))
        .collect();
    let mut centre = Vec::new();
    let mut scale = Vec::new();
    let mut range = Vec::new();
    for &c in &indicators {
        let v: Vec<f64> = part_units
            .iter()
            .filter_map(|&i| view.numeric[c].values[i])
            .collect();
        let n = v.len() as f64;
        let m = v.iter().sum::<f64>() / n.max(1.0);
        let sd = (v.iter().map(|x| (x - m).powi(2)).sum::<f64>() / (n - 1.0).max(1.0)).sqrt();
        centre.push(m);
        scale.push(if sd > 0.0 { sd } else { 1.0 });
        let lo = v.iter().cloned().fold(f64::INFINITY, f64::min);
        let hi = v.iter().cloned().fold(f64::NEG_INFINITY, f64::max);
        range.push((lo, hi));
    }
    let z_of = |i: usize| -> Option<Vec<f64>> {
        indicators
            .iter()
            .enumerate()
            .map(|(k, &c)| view.numeric[c].values[i].map(|v| (v - centre[k]) / scale[k]))
            .collect()
    };
    // Respondents of participating countries with complete values.
    let usable_unit: Vec<bool> = (0..view.len())
        .map(|u| view.participated[u] && complete(u))
        .collect();
    let mut rows = Vec::new();
    let mut unit_rows: Vec<usize> = Vec::new();
    for i in 0..micro.height() {
        if waves[i] != Some(view.wave) {
            continue;
        }
        let Some(u) = country_codes[i].and_then(|c| unit_of_level[c]) else {
            continue;
        };
        if !usable_unit[u] {
            continue;
        }
        if outcome[i].is_none() || predictor_values.iter().any(|v| v[i].is_none()) {
            continue;
        }
        rows.push(i);
        unit_rows.push(u);
    }
    if rows.is_empty() {
        return Err(req(format!(
            "no respondents with complete values in wave {}",
            view.wave
        )));
    }
    let mut group_of_unit: HashMap<usize, usize> = HashMap::new();
    let group: Vec<usize> = unit_rows
        .iter()
        .map(|u| {
            let next = group_of_unit.len();
            *group_of_unit.entry(*u).or_insert(next)
        })
        .collect();
    let n_groups = group_of_unit.len();
    let kr = ps.predictors.len() + 1;
    let kz = indicators.len();
    let k = kr + kz;
    let z_units: HashMap<usize, Vec<f64>> = group_of_unit
        .keys()
        .map(|&u| (u, z_of(u).unwrap_or_default()))
        .collect();
    let mut x = Array2::<f64>::ones((rows.len(), k));
    let mut y = Vec::with_capacity(rows.len());
    for (r, &i) in rows.iter().enumerate() {
        for (j, v) in predictor_values.iter().enumerate() {
            x[[r, j + 1]] = v[i].unwrap_or(0.0);
        }
        for (j, v) in z_units[&unit_rows[r]].iter().enumerate() {
            x[[r, kr + j]] = *v;
        }
        y.push(outcome[i].unwrap_or(0.0));
    }
    let binary = y.iter().all(|&v| v == 0.0 || v == 1.0) && y.contains(&0.0) && y.contains(&1.0);
    let data = Data {
        x: x.view(),
        y: &y,
        group: &group,
        n_groups,
        weight: None,
    };
    let fitted: Result<MultilevelFit, _> = if binary {
        multilevel::fit_logistic(&data, 1)
    } else {
        multilevel::fit_linear(&data, Criterion::Reml)
    };
    let fit = fitted.map_err(|e| req(format!("the multilevel model cannot be fitted: {e}")))?;

    // The respondent part of each respondent's linear predictor at the estimates.
    let eta: Vec<f64> = (0..rows.len())
        .map(|r| (0..kr).map(|j| x[[r, j]] * fit.coef[j]).sum())
        .collect();
    let mut members: Vec<Vec<usize>> = vec![Vec::new(); n_groups];
    let mut ysum = vec![0.0; n_groups];
    // Participants' point predictions over their own respondents (exact).
    let mut own_point = vec![0.0; n_groups];
    // How each conditional mode moves with the fixed effects, d u_j / d b (so that a
    // simulation draw of b carries its participants' modes along instead of counting the
    // same uncertainty twice): -Var(u_j | y) sum_i c_i x_i, with c_i = 1 / sigma^2 (linear;
    // exact) or p_i (1 - p_i) (logistic; the Laplace mode's first-order change).
    let mut sensitivity = vec![vec![0.0; k]; n_groups];
    for r in 0..rows.len() {
        let g = group[r];
        members[g].push(r);
        ysum[g] += y[r];
        let z_part: f64 = (0..kz).map(|j| x[[r, kr + j]] * fit.coef[kr + j]).sum();
        let lin = eta[r] + z_part + fit.modes[g];
        let c = if binary {
            let p = inv_logit(lin);
            own_point[g] += p;
            p * (1.0 - p)
        } else {
            own_point[g] += lin;
            1.0 / fit.residual_sd.map_or(f64::NAN, |s| s * s)
        };
        for (j, v) in sensitivity[g].iter_mut().enumerate() {
            *v += c * x[[r, j]];
        }
    }
    for g in 0..n_groups {
        own_point[g] /= members[g].len() as f64;
        let scale = -fit.mode_variance[g];
        sensitivity[g].iter_mut().for_each(|v| {
            *v = if v.is_finite() { *v * scale } else { 0.0 };
        });
    }
    let all_rows: Vec<usize> = (0..rows.len()).collect();
    let cells_of = |m: &[usize]| -> Cells {
        if binary {
            distinct_cells(m, &x, kr, CELLS)
                .unwrap_or_else(|| representatives(m, &eta, &x, kr, CELLS))
        } else {
            let mut mean = vec![0.0; kr];
            for &r in m {
                for (j, a) in mean.iter_mut().enumerate() {
                    *a += x[[r, j]];
                }
            }
            mean.iter_mut().for_each(|v| *v /= m.len().max(1) as f64);
            Cells {
                rows: vec![mean],
                share: vec![1.0],
            }
        }
    };
    let own_cells: Vec<Cells> = members.iter().map(|m| cells_of(m)).collect();
    let pooled = cells_of(&all_rows);
    // The pooled composition of the logistic model's point projections: exact cells, or
    // many quantiles when the respondents are too varied.
    let pooled_point = if binary {
        distinct_cells(&all_rows, &x, kr, POINT_CELLS)
            .unwrap_or_else(|| representatives(&all_rows, &eta, &x, kr, POINT_CELLS))
    } else {
        pooled.clone()
    };

    // Absent countries' compositions from the composition file, where it covers the
    // model's respondent predictors.
    let mut notes = Vec::new();
    let file_positions: Option<Vec<usize>> = project.composition.as_ref().and_then(|c| {
        let pos: Option<Vec<usize>> = ps
            .predictors
            .iter()
            .map(|p| c.variables.iter().position(|v| v == p))
            .collect();
        if pos.is_none() {
            notes.push(format!(
                "{} does not give every respondent predictor of the model ({}): absent countries use the participants' pooled composition",
                c.file,
                ps.predictors.join(", ")
            ));
        }
        pos
    });
    let file_cells = |code: &str| -> Option<Cells> {
        let comp = project.composition.as_ref()?;
        let pos = file_positions.as_ref()?;
        let cells: Vec<_> = comp.of(code, view.wave).collect();
        let total: f64 = cells.iter().map(|c| c.share).sum();
        if cells.is_empty() || total <= 0.0 {
            return None;
        }
        let rows: Vec<Vec<f64>> = cells
            .iter()
            .map(|c| {
                std::iter::once(1.0)
                    .chain(pos.iter().map(|&p| c.values[p]))
                    .collect()
            })
            .collect();
        let share: Vec<f64> = cells.iter().map(|c| c.share / total).collect();
        let cells = Cells { rows, share };
        Some(if binary {
            cells
        } else {
            Cells {
                rows: vec![cells.mean()],
                share: vec![1.0],
            }
        })
    };

    // Country weights in the universe estimate.
    let population_column = match options.shares {
        CountryShares::Equal => None,
        CountryShares::Population => Some(
            project
                .manifest
                .population
                .as_ref()
                .map(|p| p.column.clone())
                .ok_or_else(|| {
                    req("counting countries by population needs a [population] section in project.toml naming the population column")
                })?,
        ),
    };
    let population: Option<Vec<Option<f64>>> = population_column.as_ref().map(|col| {
        let scale = project.manifest.population_scale(col);
        let all = project.frame.numbers(col);
        view.rows
            .iter()
            .map(|&r| {
                all.get(r)
                    .copied()
                    .flatten()
                    .map(|v| scale.people(v))
                    .filter(|p| p.is_finite() && *p > 0.0)
            })
            .collect()
    });

    // Eligible countries of the wave (the view is the eligible universe).
    let region_of = |i: usize| -> Option<String> {
        let g = view.group?;
        let cat = &view.categorical[g];
        cat.values[i].map(|l| cat.levels[l].clone())
    };
    struct Unit {
        view: usize,
        group: Option<usize>,
        /// The composition of the point projection (absent countries).
        point_cells: Cells,
        /// The composition of the draws: its index in `draw_sets`, which every absent
        /// country without a composition of its own shares (the pooled one), so that a
        /// draw forms each composition's linear predictors once.
        cells: usize,
        z: Vec<f64>,
        weight: f64,
    }
    // The draws' compositions: each participant's own (index g), then the pooled one,
    // then those of the composition file.
    let mut draw_sets: Vec<Cells> = own_cells.clone();
    let pooled_set = draw_sets.len();
    draw_sets.push(pooled.clone());
    let mut units = Vec::new();
    let mut countries = Vec::new();
    let mut not_estimable = Vec::new();
    let mut no_population = Vec::new();
    let mut from_file = 0usize;
    for i in 0..view.len() {
        let g = group_of_unit.get(&i).copied();
        let z = z_of(i);
        let mut outside = Vec::new();
        if let (Some(zv), false) = (&z, view.participated[i]) {
            for (kk, &c) in indicators.iter().enumerate() {
                let raw = zv[kk] * scale[kk] + centre[kk];
                if raw < range[kk].0 || raw > range[kk].1 {
                    outside.push(view.numeric[c].column.clone());
                }
            }
        }
        // A participant without usable respondents has no mode: it is projected as absent.
        let weight = match &population {
            None => Some(1.0),
            Some(p) => p[i],
        };
        let mut source = None;
        if let Some(z) = z.clone() {
            if weight.is_none() {
                no_population.push(view.codes[i].clone());
            }
            let (point_cells, cells) = match g {
                Some(g) => (own_cells[g].clone(), g),
                None => match file_cells(&view.codes[i]) {
                    Some(c) => {
                        from_file += 1;
                        source = Some("file");
                        draw_sets.push(c.clone());
                        (c, draw_sets.len() - 1)
                    }
                    None => {
                        source = Some("pooled");
                        (pooled_point.clone(), pooled_set)
                    }
                },
            };
            units.push(Unit {
                view: i,
                group: g,
                point_cells,
                cells,
                z,
                weight: weight.unwrap_or(0.0),
            });
        } else {
            not_estimable.push(view.codes[i].clone());
        }
        countries.push(ProjectedCountry {
            code: view.codes[i].clone(),
            name: view.names[i].clone(),
            region: region_of(i),
            participated: view.participated[i],
            respondents: g.map_or(0, |g| members[g].len()),
            prediction: None,
            low: None,
            high: None,
            outside_range: outside,
            outside_hull: false,
            pc1: None,
            pc2: None,
            weight: None,
            composition: source,
        });
    }
    if !not_estimable.is_empty() {
        notes.push(format!(
            "not estimable (a missing indicator), left out of the universe estimate: {}",
            not_estimable.join(", ")
        ));
    }
    if !no_population.is_empty() {
        return Err(req(format!(
            "counting countries by population needs every eligible country's population; missing or not positive for: {}",
            no_population.join(", ")
        )));
    }
    if units.is_empty() {
        return Err(req("no eligible country has every indicator"));
    }

    // The map: principal components of the indicators over the estimable countries, and
    // the participants' hull on the first two.
    let mut map_explained = Vec::new();
    let map_error = if kz < 2 {
        Some("the map needs at least two indicators".to_string())
    } else {
        let mut raw = Array2::<f64>::zeros((units.len(), kz));
        for (m, u) in units.iter().enumerate() {
            for (j, &c) in indicators.iter().enumerate() {
                raw[[m, j]] = view.numeric[c].values[u.view].unwrap_or(0.0);
            }
        }
        match pca::principal_components(raw.view()) {
            Ok(p) => {
                map_explained = p.explained.iter().take(2).copied().collect();
                let hull = pca::convex_hull(
                    &units
                        .iter()
                        .enumerate()
                        .filter(|(_, u)| u.group.is_some())
                        .map(|(m, _)| (p.scores[[m, 0]], p.scores[[m, 1]]))
                        .collect::<Vec<_>>(),
                );
                for (m, u) in units.iter().enumerate() {
                    let at = (p.scores[[m, 0]], p.scores[[m, 1]]);
                    let c = &mut countries[u.view];
                    c.pc1 = Some(at.0);
                    c.pc2 = Some(at.1);
                    c.outside_hull = !c.participated && !pca::inside_hull(&hull, at);
                }
                None
            }
            Err(e) => Some(format!("no map: {e}")),
        }
    };

    // Point predictions.
    let (gh_nodes, gh_weights) = multilevel::gauss_hermite(NODES);
    let z_part = |coef: &[f64], u: &Unit| -> f64 {
        u.z.iter().zip(&coef[kr..]).map(|(z, c)| z * c).sum::<f64>()
    };
    // A cell's part of the linear predictor, a'b over the respondent predictors.
    let cell_part = |coef: &[f64], a: &[f64]| -> f64 {
        a.iter().zip(&coef[..kr]).map(|(a, c)| a * c).sum::<f64>()
    };
    // The projection of a unit with the cells' parts of the linear predictor given.
    let over_parts = |coef: &[f64], u: &Unit, parts: &[f64], share: &[f64], shift: f64| -> f64 {
        let base = z_part(coef, u) + shift;
        parts
            .iter()
            .zip(share)
            .map(|(part, s)| {
                let lin = base + part;
                s * if binary { inv_logit(lin) } else { lin }
            })
            .sum()
    };
    let parts_of = |coef: &[f64], cells: &Cells| -> Vec<f64> {
        cells.rows.iter().map(|a| cell_part(coef, a)).collect()
    };
    let tau_hat = fit.country_sd;
    let point: Vec<f64> = units
        .iter()
        .map(|u| {
            let share = &u.point_cells.share;
            let parts = || parts_of(&fit.coef, &u.point_cells);
            match u.group {
                Some(g) => own_point[g],
                // The cells' parts once per country, for every quadrature node.
                None if binary => {
                    let parts = parts();
                    gh_nodes
                        .iter()
                        .zip(&gh_weights)
                        .map(|(t, w)| {
                            w / std::f64::consts::PI.sqrt()
                                * over_parts(
                                    &fit.coef,
                                    u,
                                    &parts,
                                    share,
                                    std::f64::consts::SQRT_2 * tau_hat * t,
                                )
                        })
                        .sum()
                }
                None => over_parts(&fit.coef, u, &parts(), share, 0.0),
            }
        })
        .collect();
    let total_weight: f64 = units.iter().map(|u| u.weight).sum();
    let weighted_mean = |v: &[f64]| -> f64 {
        v.iter().zip(&units).map(|(p, u)| p * u.weight).sum::<f64>() / total_weight
    };
    let universe_estimate = weighted_mean(&point);

    // Simulation (each draw its own seeded stream, so the draws run in parallel).
    let chol = linalg::cholesky(fit.cov.view()).ok();
    let log_tau = fit.country_sd.ln();
    let log_tau_sd = if fit.log_sd_variance.is_finite() {
        fit.log_sd_variance.sqrt()
    } else {
        0.0
    };
    let seed = settings.seed;
    let draws: Vec<Vec<f64>> = (0..DRAWS)
        .into_par_iter()
        .map(|d| {
            let mut rng = Rng::stream(seed, d as u64);
            let mut coef = fit.coef.clone();
            if let Some(l) = &chol {
                let e: Vec<f64> = (0..k).map(|_| rng.normal()).collect();
                for a in 0..k {
                    coef[a] += (0..=a).map(|b| l[[a, b]] * e[b]).sum::<f64>();
                }
            }
            let tau = if fit.country_sd > 0.0 {
                (log_tau + log_tau_sd * rng.normal()).exp()
            } else {
                0.0
            };
            let parts: Vec<Vec<f64>> = draw_sets.iter().map(|c| parts_of(&coef, c)).collect();
            units
                .iter()
                .map(|u| {
                    let effect = match u.group {
                        Some(g) => {
                            let shift: f64 = sensitivity[g]
                                .iter()
                                .zip(coef.iter().zip(&fit.coef))
                                .map(|(s, (b, b0))| s * (b - b0))
                                .sum();
                            fit.modes[g] + shift + fit.mode_variance[g].sqrt() * rng.normal()
                        }
                        None => tau * rng.normal(),
                    };
                    over_parts(&coef, u, &parts[u.cells], &draw_sets[u.cells].share, effect)
                })
                .collect()
        })
        .collect();
    // The 2.5% and 97.5% order statistics, each the value a full sort would put at its
    // rank, found by selection (one country's draws per call, 140 calls per page).
    let quantiles = |v: &mut Vec<f64>| -> (f64, f64) {
        if v.is_empty() {
            return (f64::NAN, f64::NAN);
        }
        let rank = |q: f64| ((q * (v.len() - 1) as f64).round() as usize).min(v.len() - 1);
        let (low, high) = (rank(0.025), rank(0.975));
        let (below, at_high, _) = v.select_nth_unstable_by(high, f64::total_cmp);
        let high_value = *at_high;
        let low_value = if low < high {
            *below.select_nth_unstable_by(low, f64::total_cmp).1
        } else {
            high_value
        };
        (low_value, high_value)
    };
    let mut universe_draws: Vec<f64> = draws.iter().map(|d| weighted_mean(d)).collect();
    for (m, u) in units.iter().enumerate() {
        let mut sims: Vec<f64> = draws.iter().map(|d| d[m]).collect();
        let (lo, hi) = quantiles(&mut sims);
        let c = &mut countries[u.view];
        c.prediction = Some(point[m]);
        c.low = Some(lo);
        c.high = Some(hi);
        c.weight = Some(u.weight);
    }
    let (universe_low, universe_high) = quantiles(&mut universe_draws);

    let participants_mean = (0..n_groups)
        .map(|g| ysum[g] / members[g].len() as f64)
        .sum::<f64>()
        / n_groups as f64;
    let wmean = |v: &[(f64, f64)]| -> Option<f64> {
        let w: f64 = v.iter().map(|p| p.1).sum();
        (!v.is_empty() && w > 0.0).then(|| v.iter().map(|p| p.0 * p.1).sum::<f64>() / w)
    };
    let absent: Vec<(f64, f64)> = countries
        .iter()
        .filter(|c| !c.participated)
        .filter_map(|c| Some((c.prediction?, c.weight?)))
        .collect();
    let flagged = countries.iter().filter(|c| c.flagged()).count();
    let flagged_share = countries
        .iter()
        .filter(|c| c.flagged())
        .filter_map(|c| c.weight)
        .sum::<f64>()
        / total_weight;

    // Regions (countries weighted as in the universe estimate).
    let mut region_names: Vec<String> = Vec::new();
    for c in &countries {
        if let Some(r) = &c.region {
            if !region_names.contains(r) {
                region_names.push(r.clone());
            }
        }
    }
    region_names.sort();
    let regions: Vec<RegionRow> = region_names
        .iter()
        .map(|r| {
            let of = |part: Option<bool>| -> Vec<(f64, f64)> {
                countries
                    .iter()
                    .filter(|c| c.region.as_ref() == Some(r))
                    .filter(|c| part.is_none_or(|p| c.participated == p))
                    .filter_map(|c| Some((c.prediction?, c.weight?)))
                    .collect()
            };
            let (p, a, all) = (of(Some(true)), of(Some(false)), of(None));
            RegionRow {
                region: r.clone(),
                participants: p.len(),
                absent: a.len(),
                participants_mean: wmean(&p),
                absent_mean: wmean(&a),
                universe_mean: wmean(&all),
            }
        })
        .collect();
    let mut largest_differences: Vec<Difference> = countries
        .iter()
        .filter(|c| !c.participated)
        .filter_map(|c| {
            let region = c.region.clone()?;
            let pm = regions
                .iter()
                .find(|r| r.region == region)?
                .participants_mean?;
            let prediction = c.prediction?;
            Some(Difference {
                code: c.code.clone(),
                name: c.name.clone(),
                region,
                prediction,
                region_participants_mean: pm,
                difference: prediction - pm,
            })
        })
        .collect();
    largest_differences.sort_by(|a, b| b.difference.abs().total_cmp(&a.difference.abs()));
    largest_differences.truncate(10);

    let mut terms = vec!["intercept".to_string()];
    terms.extend(ps.predictors.iter().cloned());
    terms.extend(
        indicators
            .iter()
            .map(|&c| format!("{} (standardised)", view.numeric[c].column)),
    );
    let label = |c: &str| project.manifest.label(c).into_owned();
    let predictor_labels: Vec<String> = ps.predictors.iter().map(|p| label(p)).collect();
    let indicator_labels: Vec<String> = indicators
        .iter()
        .map(|&c| label(&view.numeric[c].column))
        .collect();
    let term_labels: Vec<String> = std::iter::once("intercept".to_string())
        .chain(predictor_labels.iter().cloned())
        .chain(
            indicator_labels
                .iter()
                .map(|l| format!("{l} (standardised)")),
        )
        .collect();
    if !fit.converged {
        notes.push("the multilevel model did not converge: treat the projection with care".into());
    }
    if fit.at_boundary {
        notes.push(format!(
            "{}; the projections carry no country effect and the interval leaves out any uncertainty about variation between countries",
            multilevel::BOUNDARY_NOTE
        ));
    }
    let composition = match (&project.composition, &file_positions, from_file) {
        (None, _, _) => "absent countries: the participants' pooled respondent composition (the project has no composition file)",
        (Some(_), None, _) => "absent countries: the participants' pooled respondent composition (the composition file does not give every respondent predictor)",
        (Some(_), Some(_), 0) => "absent countries: the participants' pooled respondent composition (the composition file has no cells for them in this wave)",
        (Some(_), Some(_), _) => "absent countries: their cells in the composition file where it has them, else the participants' pooled respondent composition",
    };
    let pooled_absent: Vec<&str> = countries
        .iter()
        .filter(|c| c.composition == Some("pooled"))
        .map(|c| c.code.as_str())
        .collect();
    if from_file > 0 && !pooled_absent.is_empty() {
        notes.push(format!(
            "the composition file has no cells for {}: they use the participants' pooled composition",
            pooled_absent.join(", ")
        ));
    }
    let projection_method = if binary {
        format!(
            "The outcome is binary (0/1), so the model is logistic with a random country intercept (Laplace approximation) and the projections are probabilities. A participant's prediction is the mean over its respondents of the fitted probability at its conditional mode; an absent country's integrates the probability over its unknown country effect u ~ N(0, tau^2) by {NODES}-point Gauss-Hermite quadrature. The pooled composition enters the point projections exactly (by its distinct respondent cells, or {POINT_CELLS} quantiles of the linear predictor when there are more); the simulation draws summarise each country's composition by at most {CELLS} respondents at evenly spaced quantiles of the linear predictor."
        )
    } else {
        "The outcome is continuous, so the model is linear with a random country intercept (REML). A participant's prediction is the mean over its respondents of the fitted value at its conditional mode; an absent country's is the fitted value at its indicators and composition with a country effect of 0 (its expectation).".to_string()
    };
    Ok(ProjectionReport {
        wave: view.wave,
        outcome: ps.outcome.clone(),
        predictors: ps.predictors.clone(),
        indicators: indicators
            .iter()
            .map(|&c| view.numeric[c].column.clone())
            .collect(),
        outcome_label: label(&ps.outcome),
        predictor_labels,
        indicator_labels,
        term_labels,
        fit: RandomInterceptSummary::new(
            if binary { Kind::Logistic } else { Kind::Linear },
            terms,
            &fit,
        ),
        method: if binary { "Laplace" } else { "REML" },
        projection_method,
        converged: fit.converged,
        at_boundary: fit.at_boundary,
        n_respondents: rows.len(),
        n_participants: n_groups,
        n_absent: absent.len(),
        participants_mean,
        projected_absent_mean: wmean(&absent),
        universe_estimate,
        universe_low,
        universe_high,
        shares: match options.shares {
            CountryShares::Equal => "equal",
            CountryShares::Population => "population",
        },
        population_label: population_column.as_deref().map(label),
        population_column,
        seed,
        draws: DRAWS,
        flagged,
        flagged_share,
        map_explained,
        map_error,
        countries,
        regions,
        largest_differences,
        composition,
        notes,
    })
}
