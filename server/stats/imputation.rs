//! Multiple imputation of a country frame by chained equations (van Buuren &
//! Groothuis-Oudshoorn 2011; van Buuren 2018, ch. 4 and 6).
//!
//! Every column with missing values is imputed in turn from a model of it on the others,
//! and the cycle is repeated `cycles` times; each of the M imputations is its own chain,
//! started from random draws of the observed values and run on its own random stream
//! (`Rng::stream(seed, m)`), so that imputation m is the same whatever order the chains
//! run in.
//!
//! Numeric columns: predictive mean matching (Little 1988; van Buuren 2018, section
//! 3.4, "type 1" matching). With X the predictors of the rows where y is observed,
//!   β̂ = (X'X + κ diag(X'X))⁻¹ X'y (κ = 1e-5, a small ridge as in `mice`),
//!   σ*² = (y − Xβ̂)'(y − Xβ̂) / g, g ~ χ²(n_obs − p),
//!   β* = β̂ + σ* L z, L L' = (X'X + κ diag(X'X))⁻¹, z ~ N(0, I);
//! each missing row's prediction x'β* is matched to the `donors` observed rows whose x'β̂
//! is closest, and one of them, drawn at random, gives its observed value. Filled values
//! are therefore always values somebody observed.
//!
//! Categorical columns: a multinomial logit (a logistic model for two levels) fitted by
//! Newton's method with a small ridge penalty τ = 0.1 on the standardised slopes (which
//! keeps the fit finite under separation, as a level with few countries often is),
//! coefficients drawn from N(β̂, H⁻¹) with H the penalised information (the
//! approximate-Bayesian draw of van Buuren 2018, section 3.6), and each missing row's
//! level drawn from its predicted probabilities.
//!
//! Panel frames (several waves): the first predictor of a column is the same country's
//! current value of that column in its nearest other wave (nearest in time, earlier on a
//! tie); rows of a country seen in no other wave take the column mean there and a 0/1
//! column says so. The fixed predictors (participation, wave dummies) come next to the
//! other columns.

use ndarray::{Array1, Array2};
use serde::Serialize;

use super::linalg;
use super::random::Rng;

#[derive(Debug, Clone, PartialEq, thiserror::Error)]
pub enum ImputationError {
    #[error("column {0} has no observed values, so there is nothing to impute it from")]
    NothingObserved(String),
    #[error("column {column} has {found} values but the frame has {rows} rows")]
    Length {
        column: String,
        found: usize,
        rows: usize,
    },
    #[error("{0} must be at least 1")]
    Parameter(&'static str),
    #[error("column {column}: level {level} is not below its number of levels {levels}")]
    Level {
        column: String,
        level: usize,
        levels: usize,
    },
}

/// A categorical column: the number of levels and each row's level (or `None`).
#[derive(Debug, Clone)]
pub struct CategoricalColumn {
    pub name: String,
    pub levels: usize,
    pub values: Vec<Option<usize>>,
}

/// A numeric column to impute.
#[derive(Debug, Clone)]
pub struct NumericColumn {
    pub name: String,
    pub values: Vec<Option<f64>>,
}

/// Which rows belong to the same unit at other times.
#[derive(Debug, Clone)]
pub struct Panel {
    /// Unit of each row (any labels; equal labels mean the same country).
    pub unit: Vec<usize>,
    /// Time of each row (the wave).
    pub time: Vec<f64>,
}

/// The frame to impute: all columns have one value per row.
#[derive(Debug, Clone)]
pub struct Frame {
    pub numeric: Vec<NumericColumn>,
    pub categorical: Vec<CategoricalColumn>,
    /// Complete predictors that are never imputed (participation, wave dummies).
    pub fixed: Vec<Vec<f64>>,
    pub panel: Option<Panel>,
}

#[derive(Debug, Clone, Copy, Serialize)]
pub struct Options {
    /// M, the number of completed frames.
    pub imputations: usize,
    /// Cycles of the chained equations per imputation.
    pub cycles: usize,
    /// Donor pool of predictive mean matching.
    pub donors: usize,
    pub seed: u64,
}

impl Default for Options {
    fn default() -> Self {
        Options {
            imputations: 20,
            cycles: 10,
            donors: 5,
            seed: 1,
        }
    }
}

/// One completed frame.
#[derive(Debug, Clone, Serialize)]
pub struct Completed {
    pub numeric: Vec<Vec<f64>>,
    pub categorical: Vec<Vec<usize>>,
}

/// Which column a trace follows.
#[derive(Debug, Clone, Copy, Serialize, PartialEq, Eq)]
#[serde(tag = "kind", content = "index", rename_all = "kebab-case")]
pub enum ColumnRef {
    Numeric(usize),
    Categorical(usize),
}

/// A convergence trace: for each imputation, the mean of the column's imputed values
/// after each cycle (categorical columns: the share of the imputed values at the level
/// most often observed, named in `level`).
#[derive(Debug, Clone, Serialize)]
pub struct Trace {
    pub column: ColumnRef,
    pub name: String,
    pub level: Option<usize>,
    /// `[imputation][cycle]`.
    pub means: Vec<Vec<f64>>,
}

#[derive(Debug, Clone, Serialize)]
pub struct Imputations {
    pub options: Options,
    pub completed: Vec<Completed>,
    pub traces: Vec<Trace>,
    /// Columns whose model could not be fitted in some cycle and were filled by a random
    /// draw of observed values instead (named, with the reason).
    pub fallbacks: Vec<String>,
}

const RIDGE_PMM: f64 = 1e-5;
const RIDGE_LOGIT: f64 = 0.1;

/// Runs M chains of the chained equations (see the module comment).
pub fn impute(frame: &Frame, options: &Options) -> Result<Imputations, ImputationError> {
    use rayon::prelude::*;
    if options.imputations == 0 {
        return Err(ImputationError::Parameter("the number of imputations"));
    }
    if options.cycles == 0 {
        return Err(ImputationError::Parameter("the number of cycles"));
    }
    if options.donors == 0 {
        return Err(ImputationError::Parameter("the donor pool"));
    }
    let n = check(frame)?;
    let nearest = frame.panel.as_ref().map(|p| nearest_other(p, n));
    let chains: Vec<(Completed, Vec<Vec<f64>>, Vec<String>)> = (0..options.imputations)
        .into_par_iter()
        .map(|m| chain(frame, options, nearest.as_deref(), n, m))
        .collect();
    let mut traces = Vec::new();
    let targets = targets(frame);
    for (t, &col) in targets.iter().enumerate() {
        let (name, level) = match col {
            ColumnRef::Numeric(j) => (frame.numeric[j].name.clone(), None),
            ColumnRef::Categorical(j) => (
                frame.categorical[j].name.clone(),
                Some(modal_level(&frame.categorical[j])),
            ),
        };
        traces.push(Trace {
            column: col,
            name,
            level,
            means: chains.iter().map(|c| c.1[t].clone()).collect(),
        });
    }
    let mut fallbacks: Vec<String> = chains.iter().flat_map(|c| c.2.clone()).collect();
    fallbacks.sort();
    fallbacks.dedup();
    Ok(Imputations {
        options: *options,
        completed: chains.into_iter().map(|c| c.0).collect(),
        traces,
        fallbacks,
    })
}

fn check(frame: &Frame) -> Result<usize, ImputationError> {
    let n = frame
        .numeric
        .first()
        .map(|c| c.values.len())
        .or_else(|| frame.categorical.first().map(|c| c.values.len()))
        .unwrap_or(0);
    let len_err = |column: &str, found: usize| ImputationError::Length {
        column: column.to_string(),
        found,
        rows: n,
    };
    for c in &frame.numeric {
        if c.values.len() != n {
            return Err(len_err(&c.name, c.values.len()));
        }
        if c.values.iter().all(Option::is_none) {
            return Err(ImputationError::NothingObserved(c.name.clone()));
        }
    }
    for c in &frame.categorical {
        if c.values.len() != n {
            return Err(len_err(&c.name, c.values.len()));
        }
        if c.values.iter().all(Option::is_none) {
            return Err(ImputationError::NothingObserved(c.name.clone()));
        }
        if let Some(&level) = c.values.iter().flatten().find(|&&l| l >= c.levels) {
            return Err(ImputationError::Level {
                column: c.name.clone(),
                level,
                levels: c.levels,
            });
        }
    }
    for (k, f) in frame.fixed.iter().enumerate() {
        if f.len() != n {
            return Err(len_err(&format!("fixed predictor {}", k + 1), f.len()));
        }
    }
    if let Some(p) = &frame.panel {
        if p.unit.len() != n || p.time.len() != n {
            return Err(len_err("panel", p.unit.len().min(p.time.len())));
        }
    }
    Ok(n)
}

/// The columns with missing values, numeric first, in frame order.
fn targets(frame: &Frame) -> Vec<ColumnRef> {
    let mut out: Vec<ColumnRef> = frame
        .numeric
        .iter()
        .enumerate()
        .filter(|(_, c)| c.values.iter().any(Option::is_none))
        .map(|(j, _)| ColumnRef::Numeric(j))
        .collect();
    out.extend(
        frame
            .categorical
            .iter()
            .enumerate()
            .filter(|(_, c)| c.values.iter().any(Option::is_none))
            .map(|(j, _)| ColumnRef::Categorical(j)),
    );
    out
}

fn modal_level(c: &CategoricalColumn) -> usize {
    let mut counts = vec![0usize; c.levels];
    for &l in c.values.iter().flatten() {
        counts[l] += 1;
    }
    (0..c.levels)
        .max_by_key(|&l| (counts[l], usize::MAX - l))
        .unwrap_or(0)
}

/// For each row, the row of the same unit at the nearest other time (earlier on a tie).
fn nearest_other(panel: &Panel, n: usize) -> Vec<Option<usize>> {
    let mut by_unit: std::collections::HashMap<usize, Vec<usize>> = Default::default();
    for i in 0..n {
        by_unit.entry(panel.unit[i]).or_default().push(i);
    }
    (0..n)
        .map(|i| {
            by_unit[&panel.unit[i]]
                .iter()
                .copied()
                .filter(|&r| r != i && panel.time[r] != panel.time[i])
                .min_by(|&a, &b| {
                    let da = (panel.time[a] - panel.time[i]).abs();
                    let db = (panel.time[b] - panel.time[i]).abs();
                    da.total_cmp(&db)
                        .then(panel.time[a].total_cmp(&panel.time[b]))
                })
        })
        .collect()
}

/// One chain: returns the completed frame, the trace of each target by cycle, and the
/// columns that fell back to random draws.
fn chain(
    frame: &Frame,
    options: &Options,
    nearest: Option<&[Option<usize>]>,
    n: usize,
    m: usize,
) -> (Completed, Vec<Vec<f64>>, Vec<String>) {
    let mut rng = Rng::stream(options.seed, m as u64);
    // Start: every missing value a random draw of the column's observed values.
    let mut numeric: Vec<Vec<f64>> = frame
        .numeric
        .iter()
        .map(|c| {
            let observed: Vec<f64> = c.values.iter().flatten().copied().collect();
            c.values
                .iter()
                .map(|v| v.unwrap_or_else(|| observed[rng.below(observed.len())]))
                .collect()
        })
        .collect();
    let mut categorical: Vec<Vec<usize>> = frame
        .categorical
        .iter()
        .map(|c| {
            let observed: Vec<usize> = c.values.iter().flatten().copied().collect();
            c.values
                .iter()
                .map(|v| v.unwrap_or_else(|| observed[rng.below(observed.len())]))
                .collect()
        })
        .collect();
    let targets = targets(frame);
    let mut traces = vec![Vec::with_capacity(options.cycles); targets.len()];
    let mut fallbacks = Vec::new();
    for _ in 0..options.cycles {
        for (t, &col) in targets.iter().enumerate() {
            let x = predictors(frame, &numeric, &categorical, nearest, col, n);
            match col {
                ColumnRef::Numeric(j) => {
                    let c = &frame.numeric[j];
                    if let Err(why) = pmm(&x, &c.values, &mut numeric[j], options.donors, &mut rng)
                    {
                        fallbacks.push(format!("{}: {why}", c.name));
                        hot_deck(&c.values, &mut numeric[j], &mut rng);
                    }
                    let imputed: Vec<f64> = (0..n)
                        .filter(|&i| c.values[i].is_none())
                        .map(|i| numeric[j][i])
                        .collect();
                    traces[t].push(imputed.iter().sum::<f64>() / imputed.len().max(1) as f64);
                }
                ColumnRef::Categorical(j) => {
                    let c = &frame.categorical[j];
                    if let Err(why) = draw_levels(&x, c, &mut categorical[j], &mut rng) {
                        fallbacks.push(format!("{}: {why}", c.name));
                        hot_deck(&c.values, &mut categorical[j], &mut rng);
                    }
                    let modal = modal_level(c);
                    let imputed: Vec<usize> = (0..n)
                        .filter(|&i| c.values[i].is_none())
                        .map(|i| categorical[j][i])
                        .collect();
                    traces[t].push(
                        imputed.iter().filter(|&&l| l == modal).count() as f64
                            / imputed.len().max(1) as f64,
                    );
                }
            }
        }
    }
    (
        Completed {
            numeric,
            categorical,
        },
        traces,
        fallbacks,
    )
}

fn hot_deck<T: Copy>(observed: &[Option<T>], current: &mut [T], rng: &mut Rng) {
    let pool: Vec<T> = observed.iter().flatten().copied().collect();
    for (i, v) in observed.iter().enumerate() {
        if v.is_none() {
            current[i] = pool[rng.below(pool.len())];
        }
    }
}

/// The predictors of one target column: intercept, the panel value (and its flag), the
/// other columns' current values (level dummies for categories), the fixed columns;
/// every non-intercept column standardised, constant columns left out.
fn predictors(
    frame: &Frame,
    numeric: &[Vec<f64>],
    categorical: &[Vec<usize>],
    nearest: Option<&[Option<usize>]>,
    target: ColumnRef,
    n: usize,
) -> Array2<f64> {
    let mut cols: Vec<Vec<f64>> = Vec::new();
    if let Some(near) = nearest {
        if near.iter().any(Option::is_some) {
            match target {
                ColumnRef::Numeric(j) => {
                    let v = &numeric[j];
                    let mean = v.iter().sum::<f64>() / n as f64;
                    cols.push(near.iter().map(|r| r.map_or(mean, |r| v[r])).collect());
                }
                ColumnRef::Categorical(j) => {
                    let c = &categorical[j];
                    for l in 1..frame.categorical[j].levels {
                        let share = c.iter().filter(|&&v| v == l).count() as f64 / n as f64;
                        cols.push(
                            near.iter()
                                .map(|r| r.map_or(share, |r| f64::from(u8::from(c[r] == l))))
                                .collect(),
                        );
                    }
                }
            }
            cols.push(
                near.iter()
                    .map(|r| f64::from(u8::from(r.is_none())))
                    .collect(),
            );
        }
    }
    for (j, v) in numeric.iter().enumerate() {
        if target != ColumnRef::Numeric(j) {
            cols.push(v.clone());
        }
    }
    for (j, v) in categorical.iter().enumerate() {
        if target != ColumnRef::Categorical(j) {
            for l in 1..frame.categorical[j].levels {
                cols.push(v.iter().map(|&c| f64::from(u8::from(c == l))).collect());
            }
        }
    }
    cols.extend(frame.fixed.iter().cloned());
    let mut kept: Vec<Vec<f64>> = vec![vec![1.0; n]];
    for mut c in cols {
        let mean = c.iter().sum::<f64>() / n as f64;
        let sd = (c.iter().map(|v| (v - mean).powi(2)).sum::<f64>() / n.max(2) as f64).sqrt();
        if sd > 1e-12 && sd.is_finite() {
            c.iter_mut().for_each(|v| *v = (*v - mean) / sd);
            kept.push(c);
        }
    }
    let mut x = Array2::<f64>::zeros((n, kept.len()));
    for (j, c) in kept.iter().enumerate() {
        x.column_mut(j).assign(&Array1::from(c.clone()));
    }
    x
}

/// χ²(df) by the sum of squared standard normals (df is a count of countries).
fn chi_square(df: usize, rng: &mut Rng) -> f64 {
    (0..df).map(|_| rng.normal().powi(2)).sum()
}

/// Predictive mean matching (module comment); writes the draws into `current`.
fn pmm(
    x: &Array2<f64>,
    observed: &[Option<f64>],
    current: &mut [f64],
    donors: usize,
    rng: &mut Rng,
) -> Result<(), String> {
    let obs: Vec<usize> = (0..observed.len())
        .filter(|&i| observed[i].is_some())
        .collect();
    let mis: Vec<usize> = (0..observed.len())
        .filter(|&i| observed[i].is_none())
        .collect();
    let mut x_obs = x.select(ndarray::Axis(0), &obs);
    let y: Array1<f64> = obs.iter().map(|&i| observed[i].unwrap_or(0.0)).collect();
    let p = x_obs.ncols();
    // With fewer observed rows than predictors (plus a residual degree of freedom), keep
    // the intercept and the first predictors only.
    let p = p.min(obs.len().saturating_sub(2)).max(1);
    if p < x_obs.ncols() {
        x_obs = x_obs.slice(ndarray::s![.., ..p]).to_owned();
    }
    if obs.len() < 2 {
        return Err("fewer than two observed values".into());
    }
    let mut xtx = x_obs.t().dot(&x_obs);
    for j in 0..p {
        xtx[[j, j]] *= 1.0 + RIDGE_PMM;
        if xtx[[j, j]] == 0.0 {
            xtx[[j, j]] = RIDGE_PMM;
        }
    }
    let inv = linalg::inverse_spd(xtx.view()).map_err(|e| e.to_string())?;
    let beta = inv.dot(&x_obs.t().dot(&y));
    let fitted = x_obs.dot(&beta);
    let ssr: f64 = (&y - &fitted).iter().map(|r| r * r).sum();
    let df = obs.len().saturating_sub(p).max(1);
    let sigma = (ssr / chi_square(df, rng)).sqrt();
    let l = linalg::cholesky(inv.view()).map_err(|e| e.to_string())?;
    let z: Array1<f64> = (0..p).map(|_| rng.normal()).collect();
    let beta_star = &beta + &(l.dot(&z) * sigma);
    let x_mis = x.select(ndarray::Axis(0), &mis);
    let x_mis = x_mis.slice(ndarray::s![.., ..p]);
    let pred = x_mis.dot(&beta_star);
    let d = donors.min(obs.len());
    let mut order: Vec<usize> = (0..obs.len()).collect();
    for (k, &i) in mis.iter().enumerate() {
        let target = pred[k];
        // The d closest (ties by position), then in that order: a partial selection.
        let closer = |a: &usize, b: &usize| {
            (fitted[*a] - target)
                .abs()
                .total_cmp(&(fitted[*b] - target).abs())
                .then(a.cmp(b))
        };
        if d < order.len() {
            order.select_nth_unstable_by(d - 1, closer);
        }
        order[..d].sort_by(closer);
        let donor = order[rng.below(d)];
        current[i] = y[donor];
    }
    Ok(())
}

/// Multinomial logit with a ridge on the slopes; draws coefficients and then levels.
fn draw_levels(
    x: &Array2<f64>,
    column: &CategoricalColumn,
    current: &mut [usize],
    rng: &mut Rng,
) -> Result<(), String> {
    let k_levels = column.levels;
    let obs: Vec<usize> = (0..column.values.len())
        .filter(|&i| column.values[i].is_some())
        .collect();
    let mis: Vec<usize> = (0..column.values.len())
        .filter(|&i| column.values[i].is_none())
        .collect();
    if k_levels < 2 {
        for &i in &mis {
            current[i] = 0;
        }
        return Ok(());
    }
    let x_obs = x.select(ndarray::Axis(0), &obs);
    let y: Vec<usize> = obs.iter().map(|&i| column.values[i].unwrap_or(0)).collect();
    let p = x.ncols();
    let q = k_levels - 1;
    let dim = p * q;
    // Parameters stacked by level: theta[(l-1) * p + j].
    let mut theta = Array1::<f64>::zeros(dim);
    let probs = |theta: &Array1<f64>, row: ndarray::ArrayView1<f64>| -> Vec<f64> {
        let mut eta = vec![0.0; k_levels];
        for l in 1..k_levels {
            eta[l] = (0..p).map(|j| row[j] * theta[(l - 1) * p + j]).sum();
        }
        let top = eta.iter().copied().fold(f64::NEG_INFINITY, f64::max);
        let e: Vec<f64> = eta.iter().map(|v| (v - top).exp()).collect();
        let s: f64 = e.iter().sum();
        e.iter().map(|v| v / s).collect()
    };
    let mut info = Array2::<f64>::zeros((dim, dim));
    for _ in 0..30 {
        let mut grad = Array1::<f64>::zeros(dim);
        info.fill(0.0);
        for (r, row) in x_obs.rows().into_iter().enumerate() {
            let pr = probs(&theta, row);
            for a in 1..k_levels {
                let ya = f64::from(u8::from(y[r] == a));
                for j in 0..p {
                    grad[(a - 1) * p + j] += row[j] * (ya - pr[a]);
                }
                for b in 1..k_levels {
                    let w = pr[a] * (f64::from(u8::from(a == b)) - pr[b]);
                    for j in 0..p {
                        let rj = row[j] * w;
                        for h in 0..p {
                            info[[(a - 1) * p + j, (b - 1) * p + h]] += rj * row[h];
                        }
                    }
                }
            }
        }
        for a in 0..q {
            for j in 1..p {
                let idx = a * p + j;
                grad[idx] -= RIDGE_LOGIT * theta[idx];
                info[[idx, idx]] += RIDGE_LOGIT;
            }
            // A tiny ridge on the intercept too, for a level nobody observed.
            info[[a * p, a * p]] += 1e-8;
        }
        let step = linalg::solve_spd(info.view(), grad.view()).map_err(|e| e.to_string())?;
        let size = step.iter().fold(0.0f64, |m, v| m.max(v.abs()));
        theta = theta + step.mapv(|v| v.clamp(-5.0, 5.0));
        if size < 1e-8 {
            break;
        }
    }
    let cov = linalg::inverse_spd(info.view()).map_err(|e| e.to_string())?;
    let l = linalg::cholesky(cov.view()).map_err(|e| e.to_string())?;
    let z: Array1<f64> = (0..dim).map(|_| rng.normal()).collect();
    let theta_star = &theta + &l.dot(&z);
    for &i in &mis {
        let pr = probs(&theta_star, x.row(i));
        current[i] = rng.choose_weighted(&pr);
    }
    Ok(())
}

#[cfg(test)]
mod tests {
    use super::*;

    fn frame() -> Frame {
        let mut rng = Rng::new(3);
        let n = 60;
        let a: Vec<f64> = (0..n).map(|_| rng.normal()).collect();
        let b: Vec<Option<f64>> = a
            .iter()
            .enumerate()
            .map(|(i, &v)| (i % 7 != 0).then_some(2.0 * v + rng.normal()))
            .collect();
        let c: Vec<Option<usize>> = a
            .iter()
            .enumerate()
            .map(|(i, &v)| (i % 5 != 1).then_some(usize::from(v > 0.0) + usize::from(v > 1.0)))
            .collect();
        Frame {
            numeric: vec![
                NumericColumn {
                    name: "a".into(),
                    values: a.into_iter().map(Some).collect(),
                },
                NumericColumn {
                    name: "b".into(),
                    values: b,
                },
            ],
            categorical: vec![CategoricalColumn {
                name: "c".into(),
                levels: 3,
                values: c,
            }],
            fixed: vec![(0..n).map(|i| f64::from(u8::from(i % 2 == 0))).collect()],
            panel: None,
        }
    }

    /// Filled numeric values are observed values, observed cells are untouched, and the
    /// same seed gives the same frames (common practice for PMM).
    #[test]
    fn pmm_fills_observed_values_reproducibly() {
        let f = frame();
        let o = Options {
            imputations: 4,
            cycles: 3,
            ..Default::default()
        };
        let a = impute(&f, &o).unwrap();
        let b = impute(&f, &o).unwrap();
        let observed: Vec<f64> = f.numeric[1].values.iter().flatten().copied().collect();
        assert_eq!(a.completed.len(), 4);
        for (ca, cb) in a.completed.iter().zip(&b.completed) {
            assert_eq!(ca.numeric, cb.numeric);
            assert_eq!(ca.categorical, cb.categorical);
            for (i, v) in ca.numeric[1].iter().enumerate() {
                match f.numeric[1].values[i] {
                    Some(o) => assert_eq!(*v, o),
                    None => assert!(observed.contains(v)),
                }
            }
            assert!(ca.categorical[0].iter().all(|&l| l < 3));
        }
        assert_eq!(a.traces.len(), 2);
        assert_eq!(a.traces[0].means.len(), 4);
        assert_eq!(a.traces[0].means[0].len(), 3);
        assert!(a.fallbacks.is_empty(), "{:?}", a.fallbacks);
    }
}
