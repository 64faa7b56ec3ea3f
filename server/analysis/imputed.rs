//! Multiple imputation carried through the analyses: builds M completed wave views with
//! `stats::imputation`, runs an unchanged analysis on each, and combines the results
//! (`stats::combine`: Rubin's rules for estimates; mean and range for diagnostics that
//! are not estimates). The analyses themselves never know that a frame was imputed.

use serde::Serialize;

use super::balance::{self, BalanceComparison};
use super::participation::{self, AnalysisError, Coefficient, FitReport};
use super::settings::{MissingRule, Settings};
use crate::project::{Project, WaveView};
use crate::stats::combine::{self, Spread};
use crate::stats::imputation::{self, CategoricalColumn, Frame, NumericColumn, Options, Panel};

/// Cycles of the chained equations per imputation (as R's mice by default).
pub const CYCLES: usize = 5;
/// Donor pool of predictive mean matching.
pub const DONORS: usize = 5;

/// The caution every imputed result carries.
pub const CAUTION: &str = "Multiple imputation assumes that which values are missing is explained by what is observed (the other indicators, taking part, the wave and the country's values in other waves): missing at random. If countries lack an indicator because of its unseen value itself (say, the poorest report least), the filled values are too optimistic and so are the corrections built on them.";

/// One country's filled cell: which indicator, and its values over the imputations.
#[derive(Debug, Clone, Serialize)]
pub struct FilledCell {
    pub code: String,
    pub name: String,
    pub indicator: String,
    pub label: String,
    /// Numeric indicators: the M filled values.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub values: Option<Vec<f64>>,
    /// Categorical indicators: the M filled levels.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub levels: Option<Vec<String>>,
}

/// Observed and filled values of one indicator in the wave (the usual diagnostic plot).
#[derive(Debug, Clone, Serialize)]
pub struct ObservedImputed {
    pub indicator: String,
    pub label: String,
    pub observed: Vec<f64>,
    /// Every filled value of every imputation.
    pub imputed: Vec<f64>,
}

/// Observed and filled levels of one categorical indicator in the wave (the categorical
/// form of the usual diagnostic): counts per level, aligned with `levels`.
#[derive(Debug, Clone, Serialize)]
pub struct ObservedImputedLevels {
    pub indicator: String,
    pub label: String,
    pub levels: Vec<String>,
    /// Countries of the wave observed at each level.
    pub observed: Vec<usize>,
    /// Filled values at each level, over every imputation.
    pub imputed: Vec<usize>,
}

/// A convergence trace over the whole frame imputed (every wave used).
#[derive(Debug, Clone, Serialize)]
pub struct TraceReport {
    pub indicator: String,
    pub label: String,
    /// For categories: the level whose share of filled values is traced.
    pub level: Option<String>,
    /// `[imputation][cycle]`.
    pub means: Vec<Vec<f64>>,
}

/// What was imputed and how: shown beside every imputed result.
#[derive(Debug, Clone, Serialize)]
pub struct ImputationSummary {
    pub wave: i64,
    pub imputations: usize,
    pub cycles: usize,
    pub donors: usize,
    pub seed: u64,
    /// The waves whose rows entered the imputation model.
    pub waves_used: Vec<i64>,
    pub method: String,
    /// Countries of this wave with at least one filled value.
    pub countries_filled: Vec<String>,
    /// Indicators with filled values in this wave, with their counts.
    pub indicators_filled: Vec<(String, usize)>,
    pub cells: Vec<FilledCell>,
    pub observed_vs_imputed: Vec<ObservedImputed>,
    /// Categorical indicators with filled values: observed against filled level counts.
    pub observed_vs_imputed_levels: Vec<ObservedImputedLevels>,
    pub traces: Vec<TraceReport>,
    pub fallbacks: Vec<String>,
    pub caution: String,
}

/// The M completed views of one wave and what was filled.
#[derive(Debug, Clone)]
pub struct CompletedViews {
    pub views: Vec<WaveView>,
    pub summary: ImputationSummary,
}

#[derive(Debug, Clone, PartialEq, thiserror::Error)]
pub enum ImputedError {
    #[error("imputation: {0}")]
    Imputation(#[from] imputation::ImputationError),
    #[error("{0}")]
    Analysis(#[from] AnalysisError),
    #[error("combining the imputations: {0}")]
    Combine(#[from] combine::CombineError),
    #[error("imputation {imputation}: {message}")]
    OneImputation { imputation: usize, message: String },
}

/// The other waves of the project (for the panel predictors), or none.
pub fn other_waves(project: &Project, wave: i64) -> Vec<WaveView> {
    project
        .waves
        .iter()
        .filter(|&&w| w != wave)
        .filter_map(|&w| project.wave(w))
        .collect()
}

/// A numeric indicator's values in `view`.
fn numeric_values(view: &WaveView, j: usize) -> &[Option<f64>] {
    &view.numeric[j].values
}

/// A categorical indicator's level indices in `view`.
fn categorical_values(view: &WaveView, j: usize) -> &[Option<usize>] {
    &view.categorical[j].values
}

/// The indicators (of `count`, read by `values`) with something observed in the whole
/// stacked frame: the others cannot be imputed and stay as they are (an analysis using
/// them says so).
fn observed_columns<T>(
    stacked: &[&WaveView],
    count: usize,
    values: fn(&WaveView, usize) -> &[Option<T>],
) -> Vec<usize> {
    (0..count)
        .filter(|&j| {
            stacked
                .iter()
                .any(|v| values(v, j).iter().any(Option::is_some))
        })
        .collect()
}

/// Indicator `j`'s values (read by `values`) over the stacked frame, view after view.
fn stacked_values<T: Copy>(
    stacked: &[&WaveView],
    j: usize,
    values: fn(&WaveView, usize) -> &[Option<T>],
) -> Vec<Option<T>> {
    stacked
        .iter()
        .flat_map(|v| values(v, j).iter().copied())
        .collect()
}

/// What was filled in the wave, indicator after indicator.
#[derive(Default)]
struct FilledRecord {
    cells: Vec<FilledCell>,
    countries: Vec<String>,
    indicators: Vec<(String, usize)>,
}

impl FilledRecord {
    /// Records the rows of `view` where one indicator (`values`, as observed) is missing,
    /// each with what `fill` gives for that row (the numeric values or the levels over
    /// the imputations), and returns those rows (none when nothing is missing).
    fn record<T>(
        &mut self,
        view: &WaveView,
        column: &str,
        label: &str,
        values: &[Option<T>],
        fill: impl Fn(usize) -> (Option<Vec<f64>>, Option<Vec<String>>),
    ) -> Vec<usize> {
        let missing: Vec<usize> = (0..view.len()).filter(|&i| values[i].is_none()).collect();
        if missing.is_empty() {
            return missing;
        }
        self.indicators.push((column.to_string(), missing.len()));
        self.countries
            .extend(missing.iter().map(|&i| view.codes[i].clone()));
        self.cells.extend(missing.iter().map(|&i| {
            let (values, levels) = fill(i);
            FilledCell {
                code: view.codes[i].clone(),
                name: view.names[i].clone(),
                indicator: column.to_string(),
                label: label.to_string(),
                values,
                levels,
            }
        }));
        missing
    }
}

/// Imputes the wave `view` jointly with `others` (the same project's other waves, whose
/// values of a country are its first predictors) and returns M completed copies of `view`.
pub fn complete(
    view: &WaveView,
    others: &[WaveView],
    settings: &Settings,
) -> Result<CompletedViews, ImputedError> {
    let mut stacked: Vec<&WaveView> = vec![view];
    stacked.extend(others.iter().filter(|o| {
        o.numeric.len() == view.numeric.len()
            && o.categorical.len() == view.categorical.len()
            && o.numeric
                .iter()
                .zip(&view.numeric)
                .all(|(a, b)| a.column == b.column)
            && o.categorical
                .iter()
                .zip(&view.categorical)
                .all(|(a, b)| a.column == b.column && a.levels == b.levels)
    }));
    let n0 = view.len();
    let numeric_cols = observed_columns(&stacked, view.numeric.len(), numeric_values);
    let categorical_cols = observed_columns(&stacked, view.categorical.len(), categorical_values);
    let numeric: Vec<NumericColumn> = numeric_cols
        .iter()
        .map(|&j| NumericColumn {
            name: view.numeric[j].column.clone(),
            values: stacked_values(&stacked, j, numeric_values),
        })
        .collect();
    let categorical: Vec<CategoricalColumn> = categorical_cols
        .iter()
        .map(|&j| CategoricalColumn {
            name: view.categorical[j].column.clone(),
            levels: view.categorical[j].levels.len(),
            values: stacked_values(&stacked, j, categorical_values),
        })
        .collect();
    let mut fixed: Vec<Vec<f64>> = vec![stacked
        .iter()
        .flat_map(|v| v.participated.iter().map(|&t| f64::from(u8::from(t))))
        .collect()];
    for w in stacked.iter().skip(1) {
        fixed.push(
            stacked
                .iter()
                .flat_map(|v| std::iter::repeat_n(f64::from(u8::from(v.wave == w.wave)), v.len()))
                .collect(),
        );
    }
    let panel = (stacked.len() > 1).then(|| {
        let mut ids: std::collections::HashMap<&str, usize> = Default::default();
        let mut unit = Vec::new();
        let mut time = Vec::new();
        for v in &stacked {
            for c in &v.codes {
                let next = ids.len();
                unit.push(*ids.entry(c.as_str()).or_insert(next));
                time.push(v.wave as f64);
            }
        }
        Panel { unit, time }
    });
    let options = Options {
        imputations: settings.imputations,
        cycles: CYCLES,
        donors: DONORS,
        seed: settings.seed,
    };
    let frame = Frame {
        numeric,
        categorical,
        fixed,
        panel,
    };
    let result = imputation::impute(&frame, &options)?;

    let views: Vec<WaveView> = result
        .completed
        .iter()
        .map(|c| {
            let mut v = view.clone();
            for (k, &j) in numeric_cols.iter().enumerate() {
                v.numeric[j].values = c.numeric[k][..n0].iter().map(|&x| Some(x)).collect();
            }
            for (k, &j) in categorical_cols.iter().enumerate() {
                v.categorical[j].values = c.categorical[k][..n0].iter().map(|&x| Some(x)).collect();
            }
            v
        })
        .collect();

    let mut filled = FilledRecord::default();
    let mut observed_vs_imputed = Vec::new();
    let mut observed_vs_imputed_levels = Vec::new();
    for (k, &j) in numeric_cols.iter().enumerate() {
        let ind = &view.numeric[j];
        let missing = filled.record(view, &ind.column, &ind.label, &ind.values, |i| {
            let values = result.completed.iter().map(|c| c.numeric[k][i]).collect();
            (Some(values), None)
        });
        if missing.is_empty() {
            continue;
        }
        observed_vs_imputed.push(ObservedImputed {
            indicator: ind.column.clone(),
            label: ind.label.clone(),
            observed: ind.values.iter().flatten().copied().collect(),
            imputed: result
                .completed
                .iter()
                .flat_map(|c| missing.iter().map(|&i| c.numeric[k][i]))
                .collect(),
        });
    }
    for (k, &j) in categorical_cols.iter().enumerate() {
        let ind = &view.categorical[j];
        let missing = filled.record(view, &ind.column, &ind.label, &ind.values, |i| {
            let levels = result.completed.iter();
            let levels = levels.map(|c| ind.levels[c.categorical[k][i]].clone());
            (None, Some(levels.collect()))
        });
        if missing.is_empty() {
            continue;
        }
        let mut observed = vec![0; ind.levels.len()];
        for &l in ind.values.iter().flatten() {
            if let Some(n) = observed.get_mut(l) {
                *n += 1;
            }
        }
        let mut imputed = vec![0; ind.levels.len()];
        for c in &result.completed {
            for &i in &missing {
                if let Some(n) = imputed.get_mut(c.categorical[k][i]) {
                    *n += 1;
                }
            }
        }
        observed_vs_imputed_levels.push(ObservedImputedLevels {
            indicator: ind.column.clone(),
            label: ind.label.clone(),
            levels: ind.levels.clone(),
            observed,
            imputed,
        });
    }
    let FilledRecord {
        cells,
        mut countries,
        indicators: indicators_filled,
    } = filled;
    countries.sort();
    countries.dedup();
    let traces = result
        .traces
        .iter()
        .map(|t| {
            let (indicator, label, level) = match t.column {
                imputation::ColumnRef::Numeric(k) => {
                    let ind = &view.numeric[numeric_cols[k]];
                    (ind.column.clone(), ind.label.clone(), None)
                }
                imputation::ColumnRef::Categorical(k) => {
                    let ind = &view.categorical[categorical_cols[k]];
                    (
                        ind.column.clone(),
                        ind.label.clone(),
                        t.level.and_then(|l| ind.levels.get(l).cloned()),
                    )
                }
            };
            TraceReport {
                indicator,
                label,
                level,
                means: t.means.clone(),
            }
        })
        .collect();
    let mut waves_used: Vec<i64> = stacked.iter().map(|v| v.wave).collect();
    waves_used.sort_unstable();
    Ok(CompletedViews {
        views,
        summary: ImputationSummary {
            wave: view.wave,
            imputations: options.imputations,
            cycles: options.cycles,
            donors: options.donors,
            seed: options.seed,
            method: format!(
                "chained equations over {} row{} ({} wave{}): predictive mean matching ({} donors) for numbers, multinomial logit for categories; taking part{} as predictors; {} cycles",
                frame.fixed[0].len(),
                if frame.fixed[0].len() == 1 { "" } else { "s" },
                waves_used.len(),
                if waves_used.len() == 1 { "" } else { "s" },
                options.donors,
                if waves_used.len() > 1 { ", the wave and the country's values in its nearest other wave" } else { "" },
                options.cycles
            ),
            waves_used,
            countries_filled: countries,
            indicators_filled,
            cells,
            observed_vs_imputed,
            observed_vs_imputed_levels,
            traces,
            fallbacks: result.fallbacks,
            caution: CAUTION.to_string(),
        },
    })
}

/// The completed views for a project's wave (its other waves as panel predictors).
pub fn complete_project_wave(
    project: Option<&Project>,
    view: &WaveView,
    settings: &Settings,
) -> Result<CompletedViews, ImputedError> {
    let others = project.map_or_else(Vec::new, |p| other_waves(p, view.wave));
    complete(view, &others, settings)
}

/// Runs `analysis` on every completed view (in parallel; the results keep their order).
pub fn each<T: Send>(
    completed: &CompletedViews,
    analysis: impl Fn(&WaveView) -> Result<T, AnalysisError> + Sync,
) -> Result<Vec<T>, ImputedError> {
    use rayon::prelude::*;
    // Rubin's rules need a between-imputation variance: at least two completed frames.
    if completed.views.len() < 2 {
        return Err(combine::CombineError::TooFewImputations(completed.views.len()).into());
    }
    completed
        .views
        .par_iter()
        .enumerate()
        .map(|(m, v)| {
            analysis(v).map_err(|e| ImputedError::OneImputation {
                imputation: m + 1,
                message: e.to_string(),
            })
        })
        .collect()
}

/// One imputation's coefficients and standard errors (`null` where not estimable).
#[derive(Debug, Clone, Serialize)]
pub struct CoefSe {
    pub coef: Vec<Option<f64>>,
    pub se: Vec<Option<f64>>,
}

/// A country's weight over the imputations.
#[derive(Debug, Clone, Serialize)]
pub struct UnitSpread {
    pub id: String,
    pub weight: Spread,
    pub propensity: Spread,
    /// Imputation by imputation.
    pub weights: Vec<f64>,
}

/// A balance row's SMDs over the imputations.
#[derive(Debug, Clone, Serialize)]
pub struct SmdSpread {
    pub covariate: String,
    pub smd_before: Option<Spread>,
    pub smd_after: Option<Spread>,
}

/// `gapwise fit` under multiple imputation: a fit report whose model numbers are
/// combined by Rubin's rules and whose weights and balance are means over the
/// imputations, and beside it the combination itself.
#[derive(Debug, Clone, Serialize)]
pub struct ImputedFit {
    #[serde(flatten)]
    pub report: FitReport,
    /// Combined coefficients (original scale), intercept first, aligned with `model.terms`.
    pub coef: Vec<Option<f64>>,
    pub se: Vec<Option<f64>>,
    /// Barnard-Rubin degrees of freedom of each coefficient (complete data: n − k).
    pub df: Vec<Option<f64>>,
    pub fraction_missing_information: Vec<Option<f64>>,
    pub df_complete: f64,
    /// Each imputation's coefficients and standard errors.
    pub imputations: Vec<CoefSe>,
    pub effective_n: Option<Spread>,
    pub max_abs_smd_after: Option<Spread>,
    pub balance_spread: Vec<SmdSpread>,
    pub weights_spread: Vec<UnitSpread>,
    pub imputation: ImputationSummary,
}

/// Rubin's rules over aligned per-imputation vectors; a position where any imputation has
/// no estimate stays `None`.
pub fn pool_vectors(
    estimates: &[Vec<Option<f64>>],
    ses: &[Vec<Option<f64>>],
    df_complete: f64,
) -> Vec<Option<combine::Pooled>> {
    let k = estimates.first().map_or(0, Vec::len);
    (0..k)
        .map(|j| {
            let q: Option<Vec<f64>> = estimates
                .iter()
                .map(|e| e.get(j).copied().flatten())
                .collect();
            let u: Option<Vec<f64>> = ses
                .iter()
                .map(|s| s.get(j).copied().flatten().map(|s| s * s))
                .collect();
            match (q, u) {
                (Some(q), Some(u)) => combine::pool(&q, &u, df_complete).ok(),
                _ => None,
            }
        })
        .collect()
}

/// `fit` under multiple imputation (see [`ImputedFit`]).
pub fn fit(
    project: Option<&Project>,
    view: &WaveView,
    settings: &Settings,
) -> Result<ImputedFit, ImputedError> {
    let completed = complete_project_wave(project, view, settings)?;
    fit_completed(&completed, settings)
}

/// [`fit`] on views already completed.
pub fn fit_completed(
    completed: &CompletedViews,
    settings: &Settings,
) -> Result<ImputedFit, ImputedError> {
    let fits = each(completed, |v| participation::fit(v, settings))?;
    let first = &fits[0];
    let terms = first.model.terms.clone();
    // Terms can differ when a level is present only through imputation; align by name.
    let aligned = |f: &FitReport, values: &[Option<f64>]| -> Vec<Option<f64>> {
        terms
            .iter()
            .map(|t| {
                f.model
                    .terms
                    .iter()
                    .position(|u| u == t)
                    .and_then(|j| values.get(j).copied().flatten())
            })
            .collect()
    };
    let coefs: Vec<Vec<Option<f64>>> = fits.iter().map(|f| aligned(f, &f.model.coef)).collect();
    let ses: Vec<Vec<Option<f64>>> = fits.iter().map(|f| aligned(f, &f.model.se)).collect();
    let df_complete = (first.n_eligible as f64 - terms.len() as f64).max(1.0);
    let pooled = pool_vectors(&coefs, &ses, df_complete);

    let mut report = first.clone();
    let logit = !matches!(settings.model, super::settings::ModelKind::Probit);
    report.model.coef = pooled
        .iter()
        .map(|p| p.as_ref().map(|p| p.estimate))
        .collect();
    report.model.se = pooled.iter().map(|p| p.as_ref().map(|p| p.se)).collect();
    report.model.coefficients = terms
        .iter()
        .enumerate()
        .map(|(j, term)| {
            let p = pooled[j].as_ref();
            let or = |v: f64| (logit && j > 0).then(|| v.exp());
            Coefficient {
                term: term.clone(),
                label: first
                    .model
                    .coefficients
                    .get(j)
                    .map_or_else(|| term.clone(), |c| c.label.clone()),
                coef: p.map(|p| p.estimate),
                se: p.map(|p| p.se),
                z: p.map(|p| p.estimate / p.se),
                ci95_low: p.map(|p| p.ci95_low),
                ci95_high: p.map(|p| p.ci95_high),
                odds_ratio: p.and_then(|p| or(p.estimate)),
                odds_ratio_low: p.and_then(|p| or(p.ci95_low)),
                odds_ratio_high: p.and_then(|p| or(p.ci95_high)),
                not_estimable: if p.is_some() {
                    None
                } else {
                    Some(
                        first.model.coefficients.get(j).and_then(|c| c.not_estimable.clone()).unwrap_or_else(|| {
                            "not estimable in every completed frame, so the imputations cannot be combined".to_string()
                        }),
                    )
                },
            }
        })
        .collect();
    report.model.log_likelihood =
        fits.iter().map(|f| f.model.log_likelihood).sum::<f64>() / fits.len() as f64;
    report.model.converged = fits.iter().all(|f| f.model.converged);
    report.model.separation = fits.iter().any(|f| f.model.separation);
    report.model.auc = mean_opt(fits.iter().map(|f| f.model.auc));
    report.model.auc_loo = mean_opt(fits.iter().map(|f| f.model.auc_loo));
    report.model.warnings = union(fits.iter().map(|f| &f.model.warnings));
    report.model.warnings.insert(
        0,
        format!(
            "intervals use t with Barnard-Rubin degrees of freedom (complete data {df_complete:.0}) from {} imputations",
            fits.len()
        ),
    );

    // Weights and balance: means over the imputations.
    let m = fits.len() as f64;
    let mut weights_spread = Vec::new();
    for (i, u) in report.units.iter_mut().enumerate() {
        let w: Vec<f64> = fits.iter().map(|f| f.units[i].weight).collect();
        let p: Vec<f64> = fits.iter().map(|f| f.units[i].propensity).collect();
        u.weight = w.iter().sum::<f64>() / m;
        u.propensity = p.iter().sum::<f64>() / m;
        if let (Some(weight), Some(propensity)) = (combine::spread(&w), combine::spread(&p)) {
            weights_spread.push(UnitSpread {
                id: u.id.clone(),
                weight,
                propensity,
                weights: w,
            });
        }
    }
    let balance_spread = average_balance(&mut report.balance, fits.iter().map(|f| &f.balance));
    let eff: Vec<f64> = fits.iter().map(|f| f.weighting.effective_n).collect();
    let smd: Vec<f64> = fits.iter().map(|f| f.weighting.max_abs_smd_after).collect();
    report.weighting.effective_n = eff.iter().sum::<f64>() / m;
    report.weighting.max_abs_smd_after = smd.iter().sum::<f64>() / m;
    report.weighting.max_abs_smd_before = fits
        .iter()
        .map(|f| f.weighting.max_abs_smd_before)
        .sum::<f64>()
        / m;
    report.weighting.max_weight_share = fits
        .iter()
        .map(|f| f.weighting.max_weight_share)
        .sum::<f64>()
        / m;
    report.weighting.cv = fits.iter().map(|f| f.weighting.cv).sum::<f64>() / m;
    report.weighting.converged = fits.iter().all(|f| f.weighting.converged);
    report.weighting.warnings = union(fits.iter().map(|f| &f.weighting.warnings));
    report.weighting.coef = None;
    report.weighting.worse_than_none =
        report.weighting.max_abs_smd_after > report.weighting.max_abs_smd_before + 1e-9;
    report.missing_note = missing_note(&completed.summary);
    report.dropped = Vec::new();
    report.incomplete = None;
    report.missing_caveat = Some(CAUTION.to_string());

    Ok(ImputedFit {
        coef: report.model.coef.clone(),
        se: report.model.se.clone(),
        df: pooled.iter().map(|p| p.as_ref().map(|p| p.df)).collect(),
        fraction_missing_information: pooled.iter().map(|p| p.as_ref().map(|p| p.fmi)).collect(),
        df_complete,
        imputations: coefs
            .into_iter()
            .zip(ses)
            .map(|(coef, se)| CoefSe { coef, se })
            .collect(),
        effective_n: combine::spread(&eff),
        max_abs_smd_after: combine::spread(&smd),
        balance_spread,
        weights_spread,
        imputation: completed.summary.clone(),
        report,
    })
}

/// The missing-values note of an imputed result.
pub fn missing_note(summary: &ImputationSummary) -> String {
    if summary.cells.is_empty() {
        return format!(
            "Multiple imputation asked for, but no values are missing in wave {}; the {} completed frames are all the observed frame",
            summary.wave, summary.imputations
        );
    }
    format!(
        "Multiple imputation: {} value{} of {} countr{} filled {} times each (seed {}); {}; estimates combined by Rubin's rules",
        summary.cells.len(),
        if summary.cells.len() == 1 { "" } else { "s" },
        summary.countries_filled.len(),
        if summary.countries_filled.len() == 1 { "y" } else { "ies" },
        summary.imputations,
        summary.seed,
        summary
            .indicators_filled
            .iter()
            .map(|(c, n)| format!("{c} ({n})"))
            .collect::<Vec<_>>()
            .join(", "),
    )
}

fn mean_opt(values: impl Iterator<Item = Option<f64>>) -> Option<f64> {
    let v: Option<Vec<f64>> = values.collect();
    v.filter(|v| !v.is_empty())
        .map(|v| v.iter().sum::<f64>() / v.len() as f64)
}

fn union<'a>(lists: impl Iterator<Item = &'a Vec<String>>) -> Vec<String> {
    let mut out: Vec<String> = Vec::new();
    for l in lists {
        for w in l {
            if !out.contains(w) {
                out.push(w.clone());
            }
        }
    }
    out
}

/// Replaces `rows` (the first imputation's) by means over the imputations, rows matched
/// by covariate name; returns the SMD ranges.
fn average_balance<'a>(
    rows: &mut [participation::BalanceRow],
    all: impl Iterator<Item = &'a Vec<participation::BalanceRow>>,
) -> Vec<SmdSpread> {
    let all: Vec<&Vec<participation::BalanceRow>> = all.collect();
    rows.iter_mut()
        .map(|r| {
            let same: Vec<&participation::BalanceRow> = all
                .iter()
                .filter_map(|rs| rs.iter().find(|x| x.covariate == r.covariate))
                .collect();
            let k = same.len() as f64;
            let before: Vec<f64> = same.iter().filter_map(|x| x.smd_before).collect();
            let after: Vec<f64> = same.iter().filter_map(|x| x.smd_after).collect();
            let sb = (before.len() == same.len())
                .then(|| combine::spread(&before))
                .flatten();
            let sa = (after.len() == same.len())
                .then(|| combine::spread(&after))
                .flatten();
            r.smd_before = sb.map(|s| s.mean);
            r.smd_after = sa.map(|s| s.mean);
            r.variance_ratio_before = mean_opt(same.iter().map(|x| x.variance_ratio_before));
            r.variance_ratio_after = mean_opt(same.iter().map(|x| x.variance_ratio_after));
            r.universe_mean = same.iter().map(|x| x.universe_mean).sum::<f64>() / k;
            r.participant_mean = same.iter().map(|x| x.participant_mean).sum::<f64>() / k;
            r.weighted_mean = same.iter().map(|x| x.weighted_mean).sum::<f64>() / k;
            SmdSpread {
                covariate: r.covariate.clone(),
                smd_before: sb,
                smd_after: sa,
            }
        })
        .collect()
}

/// The balance page under multiple imputation: every number a mean over the
/// imputations, with the ranges of the SMDs and of each method's effective number.
#[derive(Debug, Clone, Serialize)]
pub struct ImputedBalance {
    #[serde(flatten)]
    pub comparison: BalanceComparison,
    #[serde(flatten)]
    pub spread: BalanceSpread,
}

/// What the imputed balance adds to a balance comparison.
#[derive(Debug, Clone, Serialize)]
pub struct BalanceSpread {
    pub balance_spread: Vec<SmdSpread>,
    /// Per method (aligned with `methods`): the range of the effective number of countries.
    pub effective_n_spread: Vec<Option<Spread>>,
    pub max_abs_smd_spread: Vec<Option<Spread>>,
    pub imputation: ImputationSummary,
}

/// [`balance::compare`] on each completed view, averaged.
pub fn compare(
    project: Option<&Project>,
    view: &WaveView,
    settings: &Settings,
) -> Result<ImputedBalance, ImputedError> {
    let completed = complete_project_wave(project, view, settings)?;
    compare_completed(&completed, settings)
}

/// [`compare`] on views already completed.
pub fn compare_completed(
    completed: &CompletedViews,
    settings: &Settings,
) -> Result<ImputedBalance, ImputedError> {
    let all = each(completed, |v| balance::compare(v, settings))?;
    let mut comparison = all[0].clone();
    let balance_spread = average_balance(&mut comparison.rows, all.iter().map(|c| &c.rows));
    let mut effective_n_spread = Vec::new();
    let mut max_abs_smd_spread = Vec::new();
    for (k, method) in comparison.methods.iter_mut().enumerate() {
        let eff: Option<Vec<f64>> = all.iter().map(|c| c.methods[k].effective_n).collect();
        let smd: Option<Vec<f64>> = all.iter().map(|c| c.methods[k].max_abs_smd).collect();
        let eff = eff.and_then(|v| combine::spread(&v));
        let smd = smd.and_then(|v| combine::spread(&v));
        method.effective_n = eff.map(|s| s.mean);
        method.max_abs_smd = smd.map(|s| s.mean);
        method.max_weight_share = mean_opt(all.iter().map(|c| c.methods[k].max_weight_share));
        method.cv = mean_opt(all.iter().map(|c| c.methods[k].cv));
        let n_rows = method.smd_after.len();
        for r in 0..n_rows {
            method.smd_after[r] = mean_opt(
                all.iter()
                    .map(|c| c.methods[k].smd_after.get(r).copied().flatten()),
            );
            method.variance_ratio_after[r] = mean_opt(
                all.iter()
                    .map(|c| c.methods[k].variance_ratio_after.get(r).copied().flatten()),
            );
        }
        if method.error.is_none() {
            method.error = all.iter().find_map(|c| c.methods[k].error.clone());
        }
        method.warnings = union(all.iter().map(|c| &c.methods[k].warnings));
        effective_n_spread.push(eff);
        max_abs_smd_spread.push(smd);
    }
    comparison.max_abs_smd_before =
        all.iter().map(|c| c.max_abs_smd_before).sum::<f64>() / all.len() as f64;
    comparison.model_warnings = union(all.iter().map(|c| &c.model_warnings));
    comparison.missing_note = missing_note(&completed.summary);
    comparison.incomplete = None;
    comparison.missing_caveat = Some(CAUTION.to_string());
    Ok(ImputedBalance {
        comparison,
        spread: BalanceSpread {
            balance_spread,
            effective_n_spread,
            max_abs_smd_spread,
            imputation: completed.summary.clone(),
        },
    })
}

/// What a result that uses one completed frame says about it.
pub fn single_frame_note(summary: &ImputationSummary) -> String {
    format!(
        "Multiple imputation: this uses a single completed frame (the first of {}, seed {}), not the combination of all of them; {}. {}",
        summary.imputations,
        summary.seed,
        missing_note(summary),
        CAUTION
    )
}

/// Whether the settings ask for multiple imputation.
pub fn wanted(settings: &Settings) -> bool {
    settings.missing == MissingRule::Impute
}

/// An estimate and its standard error on one completed frame (`se` null where the
/// estimate has none).
#[derive(Debug, Clone, Copy, Serialize)]
pub struct EstimateSe {
    pub estimate: f64,
    pub se: f64,
}

/// One correction's estimates on one completed frame: the pooled mean and the
/// coefficients (aligned with `terms`), `null` where not estimated.
#[derive(Debug, Clone, Serialize)]
pub struct VariantImputation {
    pub pooled: Option<EstimateSe>,
    pub coef: Vec<Option<f64>>,
    pub se: Vec<Option<f64>>,
}

/// One correction's estimates combined over the imputations, beside the estimates of
/// each imputation (so that anyone can recombine them).
#[derive(Debug, Clone, Serialize)]
pub struct VariantCombination {
    pub key: String,
    /// The pooled mean by Rubin's rules (with its df and fraction of missing information).
    pub pooled: Option<combine::Pooled>,
    /// Per term (`terms`); `None` where some imputation has no estimate.
    pub coef: Vec<Option<combine::Pooled>>,
    /// Complete-data degrees of freedom of the pooled mean (countries − 1).
    pub df_complete_pooled: f64,
    /// Complete-data degrees of freedom of the coefficients (countries − 1 − terms, at least 1).
    pub df_complete_coef: f64,
    /// Imputation by imputation (M entries).
    pub imputations: Vec<VariantImputation>,
    /// The largest |SMD| over the imputations (a diagnostic: mean and range).
    pub max_abs_smd: Option<Spread>,
}

/// What multiple imputation adds to an impact report: the combination per correction and
/// what was filled.
#[derive(Debug, Clone, Serialize)]
pub struct ImpactCombination {
    pub combination: Vec<VariantCombination>,
    pub imputation: ImputationSummary,
}

/// The impact view under multiple imputation: every correction's pooled mean and
/// coefficients combined by Rubin's rules (complete-data df: countries − 1 for the pooled
/// mean, countries − 1 − terms for the coefficients, floored at 1), SMDs as means.
#[derive(Debug, Clone, Serialize)]
pub struct ImputedImpact {
    #[serde(flatten)]
    pub report: super::impact::ImpactReport,
    #[serde(flatten)]
    pub combined: ImpactCombination,
}

/// [`super::impact::impact`] on each completed view, combined. Neither the pipeline nor
/// the wild cluster bootstrap is run per imputation (its p-values do not combine by Rubin's rules); the
/// p-values shown are t tests on the combined estimates.
pub fn impact(
    project: &Project,
    view: &WaveView,
    settings: &Settings,
    imp: &super::impact::ImpactSettings,
) -> Result<ImputedImpact, String> {
    use super::impact;
    use crate::stats::regression::student;
    let completed =
        complete_project_wave(Some(project), view, settings).map_err(|e| e.to_string())?;
    let imp_each = impact::ImpactSettings {
        replicates: 0,
        wild_replicates: 0,
        ..imp.clone()
    };
    let all: Vec<impact::ImpactReport> = {
        use rayon::prelude::*;
        completed
            .views
            .par_iter()
            .enumerate()
            .map(|(m, v)| {
                impact::impact(project, v, settings, &imp_each)
                    .map_err(|e| format!("imputation {}: {e}", m + 1))
            })
            .collect::<Result<_, _>>()?
    };
    let mut report = all[0].clone();
    report.impact = imp.clone();
    let df_mean = (report.df as f64).max(1.0);
    let mut combination = Vec::new();
    for (k, variant) in report.variants.iter_mut().enumerate() {
        let same: Vec<&impact::Variant> = all.iter().filter_map(|r| r.variants.get(k)).collect();
        if variant.error.is_none() {
            variant.error = same.iter().find_map(|v| v.error.clone());
        }
        let pooled = {
            let q: Option<Vec<f64>> = same
                .iter()
                .map(|v| v.pooled.as_ref().map(|p| p.estimate))
                .collect();
            let u: Option<Vec<f64>> = same
                .iter()
                .map(|v| v.pooled.as_ref().map(|p| p.se * p.se))
                .collect();
            q.zip(u)
                .and_then(|(q, u)| combine::pool(&q, &u, df_mean).ok())
        };
        if pooled.is_none() && variant.error.is_none() {
            variant.error = Some(
                "no pooled mean with a standard error on every completed frame, so the imputations cannot be combined by Rubin's rules (the bootstraps that give this correction its standard error are not run per imputation)"
                    .to_string(),
            );
        }
        variant.pooled = pooled.as_ref().map(|p| impact::Pooled {
            estimate: p.estimate,
            se: p.se,
            low: p.ci95_low,
            high: p.ci95_high,
            bootstrap: impact::PooledBootstrap::default(),
        });
        let n_terms = variant.coef.len();
        let df_coef = (report.df as f64 - n_terms as f64).max(1.0);
        let coefs: Vec<Vec<Option<f64>>> = same
            .iter()
            .map(|v| (0..n_terms).map(|j| v.coef.get(j).copied()).collect())
            .collect();
        let ses: Vec<Vec<Option<f64>>> = same
            .iter()
            .map(|v| (0..n_terms).map(|j| v.se.get(j).copied()).collect())
            .collect();
        let pooled_coef = if n_terms > 0 {
            pool_vectors(&coefs, &ses, df_coef)
        } else {
            Vec::new()
        };
        let finite = |x: Option<f64>| x.filter(|x| x.is_finite());
        let per_imputation: Vec<VariantImputation> = same
            .iter()
            .zip(coefs.iter().zip(&ses))
            .map(|(v, (c, e))| VariantImputation {
                pooled: v.pooled.as_ref().map(|p| EstimateSe {
                    estimate: p.estimate,
                    se: p.se,
                }),
                coef: c.iter().map(|&x| finite(x)).collect(),
                se: e.iter().map(|&x| finite(x)).collect(),
            })
            .collect();
        variant.coef = pooled_coef
            .iter()
            .map(|p| p.as_ref().map_or(f64::NAN, |p| p.estimate))
            .collect();
        variant.se = pooled_coef
            .iter()
            .map(|p| p.as_ref().map_or(f64::NAN, |p| p.se))
            .collect();
        variant.p_cluster = pooled_coef
            .iter()
            .map(|p| {
                p.as_ref()
                    .map_or(f64::NAN, |p| student::two_sided_p(p.estimate / p.se, p.df))
            })
            .collect();
        variant.p_bootstrap = None;
        for j in 0..variant.smd.len() {
            variant.smd[j] = mean_opt(same.iter().map(|v| v.smd.get(j).copied().flatten()));
        }
        let smd: Option<Vec<f64>> = same.iter().map(|v| v.max_abs_smd).collect();
        let smd = smd.and_then(|v| combine::spread(&v));
        variant.max_abs_smd = smd.map(|s| s.mean);
        variant.se_kind = format!(
            "{}, combined over {} imputations by Rubin's rules (t with Barnard-Rubin df)",
            variant.se_kind,
            all.len()
        );
        combination.push(VariantCombination {
            key: variant.key.clone(),
            pooled,
            coef: pooled_coef,
            df_complete_pooled: df_mean,
            df_complete_coef: df_coef,
            imputations: per_imputation,
            max_abs_smd: smd,
        });
    }
    // Sign and verdict changes against the combined unweighted variant.
    if let Some(base) = report.variants.first().cloned() {
        for v in report.variants.iter_mut() {
            let n = v.coef.len().min(base.coef.len());
            v.sign_changed = (0..n)
                .map(|j| v.coef[j].signum() != base.coef[j].signum())
                .collect();
            v.verdict_changed = (0..n)
                .map(|j| (v.p_cluster[j] < 0.05) != (base.p_cluster[j] < 0.05))
                .collect();
            v.worse_than_none = match (v.max_abs_smd, base.max_abs_smd) {
                (Some(a), Some(b)) => a > b + 1e-9,
                _ => false,
            };
        }
    }
    report.notes.insert(0, missing_note(&completed.summary));
    if imp.replicates > 0 {
        report.notes.push("under multiple imputation the wild cluster bootstrap is not run; p-values are t tests on the combined estimates".to_string());
    }
    report.notes.push(CAUTION.to_string());
    Ok(ImputedImpact {
        report,
        combined: ImpactCombination {
            combination,
            imputation: completed.summary,
        },
    })
}

/// The planner under multiple imputation: the plan is built on the first completed
/// frame (with its stability); the same invitations are then judged on every completed
/// frame, and those expected objectives are combined by Rubin's rules; every other
/// imputation's own plan (without bootstrap) says how often it picks the same countries.
#[derive(Debug, Clone, Serialize)]
pub struct ImputedPlan {
    #[serde(flatten)]
    pub plan: super::planner::Plan,
    /// Which frame the plan itself was built on.
    pub plan_frame: String,
    /// For each pick of the plan: the share of imputations whose plan picks it too.
    pub pick_agreement: Vec<(String, f64)>,
    /// The expected objective of each imputation's own plan (mean and range).
    pub objective_spread: Option<Spread>,
    /// The plan's expected objective on each completed frame (M entries): the estimate and
    /// its Monte Carlo standard error (0 where every outcome is enumerated). The first is
    /// the plan's own `optimality.plan_value`.
    pub objective_by_imputation: Vec<EstimateSe>,
    /// Those combined by Rubin's rules, with complete-data df taken as infinite (the
    /// within-imputation variance is the Monte Carlo one only: the uncertainty of the
    /// chances of joining is not in it); `None` when they cannot be combined.
    pub objective_combined: Option<combine::Pooled>,
    /// What the combination's within-imputation variance does and does not include.
    pub objective_note: String,
    pub imputation: ImputationSummary,
}

/// [`super::planner::plan_for`] under multiple imputation (see [`ImputedPlan`]).
pub fn plan(
    project: Option<&Project>,
    view: &WaveView,
    settings: &Settings,
    plan_settings: &super::planner::PlanSettings,
) -> Result<ImputedPlan, String> {
    use super::planner;
    use rayon::prelude::*;
    let completed = complete_project_wave(project, view, settings).map_err(|e| e.to_string())?;
    if completed.views.len() < 2 {
        return Err(combine::CombineError::TooFewImputations(completed.views.len()).to_string());
    }
    let run = |v: &WaveView, ps: &planner::PlanSettings| match project {
        Some(p) => planner::plan_for(p, v, settings, ps),
        None => planner::plan(v, settings, ps),
    };
    let mut first = run(&completed.views[0], plan_settings).map_err(|e| e.to_string())?;
    let quick = planner::PlanSettings {
        replicates: 0,
        ..plan_settings.clone()
    };
    let picks: Vec<(String, bool)> = first
        .steps
        .iter()
        .map(|s| (s.id.clone(), s.supported))
        .collect();
    // Every completed frame judges the first plan's invitations; each other one also
    // makes its own plan.
    let each: Vec<(Option<planner::Plan>, planner::PlanValue)> = completed
        .views
        .par_iter()
        .enumerate()
        .map(|(m, v)| {
            let value = planner::expected_objective(project, v, settings, &quick, &picks);
            let own = if m == 0 {
                Ok(None)
            } else {
                run(v, &quick).map(Some)
            };
            own.and_then(|o| value.map(|x| (o, x)))
                .map_err(|e| format!("imputation {}: {e}", m + 1))
        })
        .collect::<Result<_, _>>()?;
    let others: Vec<&planner::Plan> = each.iter().filter_map(|(p, _)| p.as_ref()).collect();
    let m = completed.views.len() as f64;
    let pick_agreement = first
        .steps
        .iter()
        .map(|s| {
            let n = 1 + others
                .iter()
                .filter(|p| p.steps.iter().any(|t| t.id == s.id))
                .count();
            (s.id.clone(), n as f64 / m)
        })
        .collect();
    let own_values: Vec<f64> = std::iter::once(first.optimality.plan_value)
        .chain(others.iter().map(|p| p.optimality.plan_value))
        .collect();
    let objective_by_imputation: Vec<EstimateSe> = each
        .iter()
        .map(|(_, v)| EstimateSe {
            estimate: v.estimate,
            se: v.mc_error,
        })
        .collect();
    let q: Vec<f64> = objective_by_imputation.iter().map(|v| v.estimate).collect();
    let u: Vec<f64> = objective_by_imputation
        .iter()
        .map(|v| v.se * v.se)
        .collect();
    let objective_combined = combine::pool(&q, &u, f64::INFINITY).ok();
    first.notes.insert(0, format!("{}; the plan is built on the first completed frame, its invitations are judged on every completed frame (combined by Rubin's rules), and each of the other imputations' own plans is compared with it", missing_note(&completed.summary)));
    first.notes.push(CAUTION.to_string());
    Ok(ImputedPlan {
        plan: first,
        plan_frame: "the first completed frame".to_string(),
        pick_agreement,
        objective_spread: combine::spread(&own_values),
        objective_by_imputation,
        objective_combined,
        objective_note: "Within each completed frame the expected objective is computed exactly (or by Monte Carlo, whose variance is the within-imputation variance); the uncertainty of the chances of joining themselves is not included, so the interval shows only what the missing values and the draws leave open.".to_string(),
        imputation: completed.summary,
    })
}

/// The coverage view under multiple imputation: the first completed frame's map and
/// tables (coverage is a picture, not an estimate, so it is not combined), the countries
/// with filled values to mark on the map, and a sentence that says so.
#[derive(Debug, Clone, Serialize)]
pub struct ImputedCoverage {
    #[serde(flatten)]
    pub coverage: super::coverage::CoverageReport,
    /// Codes of the countries with at least one filled value.
    pub filled: Vec<String>,
}

/// [`super::coverage::coverage`] on the first completed frame (see [`ImputedCoverage`]).
pub fn coverage(
    project: Option<&Project>,
    view: &WaveView,
    settings: &Settings,
) -> Result<ImputedCoverage, ImputedError> {
    let done = complete_project_wave(project, view, settings)?;
    let mut c = super::coverage::coverage(&done.views[0]);
    let filled = done.summary.countries_filled.clone();
    c.summary.push(format!(
        "Multiple imputation: this shows a single completed frame (the first of {}, seed {}), not a combination; the {} countr{} with filled values are crossed on the map. {}",
        done.summary.imputations,
        done.summary.seed,
        filled.len(),
        if filled.len() == 1 { "y" } else { "ies" },
        CAUTION
    ));
    Ok(ImputedCoverage {
        coverage: c,
        filled,
    })
}
