//! Chances of joining from the programme's own history: a participation model of wave t
//! fitted on the earlier waves, with "took part in the previous wave" as a predictor, and
//! the evidence of how well such a forecast has done before.
//!
//! The model is the settings' binary model (logit, Firth or probit) over every eligible
//! country-wave of the waves before t that have a previous wave, with the wave's
//! indicators (the target wave's design terms, standardised over the training rows) and a
//! 0/1 column for taking part in the wave before. Candidates of wave t get their
//! probability from it with their own participation in wave t − 1. Pooling waves into one
//! model with a lagged outcome is the usual first-order Markov panel model (e.g.
//! Wooldridge 2010, ch. 15.8.4, dynamic binary response, without the initial-conditions
//! correction). The check refits on the waves before t − 1 and predicts wave t − 1: the
//! area under the ROC curve and a calibration table by fifths of the forecast (common
//! practice), so a coordinator can judge the forecast before trusting it.

use std::collections::HashMap;

use ndarray::Array2;
use serde::Serialize;

use super::PlanError;
use crate::analysis::design::{self, Design};
use crate::analysis::participation::AnalysisError;
use crate::analysis::settings::Settings;
use crate::project::{Project, WaveView};
use crate::stats::binary;

/// The name of the lagged-participation term.
pub const PREVIOUS_TERM: &str = "took part in the previous wave";

/// One fifth of the check's forecasts: what was forecast and what happened.
#[derive(Debug, Clone, Serialize)]
pub struct CalibrationBin {
    pub low: f64,
    pub high: f64,
    pub n: usize,
    pub mean_forecast: f64,
    pub observed_share: f64,
}

/// How the history model of the waves before `wave` forecast `wave`.
#[derive(Debug, Clone, Serialize)]
pub struct HistoryCheck {
    pub wave: i64,
    pub trained_on: Vec<i64>,
    pub n: usize,
    /// Area under the ROC curve of the forecast against who took part (None when only
    /// one outcome occurred).
    pub auc: Option<f64>,
    pub calibration: Vec<CalibrationBin>,
}

/// The history model for one wave and its check.
#[derive(Debug, Clone, Serialize)]
pub struct HistoryForecast {
    pub wave: i64,
    pub trained_on: Vec<i64>,
    pub n_training: usize,
    pub terms: Vec<String>,
    /// Coefficients on the standardised terms (null where not estimable).
    pub coef: Vec<Option<f64>>,
    pub converged: bool,
    /// Wave t − 1 forecast from the waves before it; None when too few waves.
    pub check: Option<HistoryCheck>,
    /// Per unit of the target design.
    #[serde(skip)]
    pub probability: Vec<f64>,
}

/// Participation by (code, wave) over the whole frame.
fn participation_by_code(project: &Project) -> HashMap<(String, i64), bool> {
    let codes = project.codes();
    let waves = project.row_waves();
    let took = project.participated();
    (0..codes.len())
        .map(|i| ((codes[i].clone(), waves[i]), took[i]))
        .collect()
}

/// The wave before `wave` in the project's waves.
fn previous_wave(project: &Project, wave: i64) -> Option<i64> {
    project.waves.iter().copied().filter(|&w| w < wave).max()
}

/// Rows of `design` laid out on `terms` (by name; a term the wave lacks, such as a level
/// no country of that wave has, is 0), with the lag column appended.
fn aligned(design: &Design, terms: &[String], lag: &[f64]) -> Array2<f64> {
    let mut x = Array2::zeros((design.n(), terms.len() + 1));
    for (j, t) in terms.iter().enumerate() {
        if let Some(k) = design.terms.iter().position(|d| d == t) {
            x.column_mut(j).assign(&design.x.column(k));
        }
    }
    for (i, l) in lag.iter().enumerate() {
        x[[i, terms.len()]] = *l;
    }
    x
}

fn lag_of(
    design: &Design,
    wave: i64,
    project: &Project,
    past: &HashMap<(String, i64), bool>,
) -> Vec<f64> {
    let before = previous_wave(project, wave);
    design
        .ids
        .iter()
        .map(|id| {
            let took = before.and_then(|b| past.get(&(id.clone(), b)).copied());
            f64::from(u8::from(took == Some(true)))
        })
        .collect()
}

/// A fitted history model: standardisation and coefficients on `terms` + lag.
struct HistoryModel {
    trained_on: Vec<i64>,
    n: usize,
    centre: Vec<f64>,
    scale: Vec<f64>,
    fit: binary::BinaryFit,
}

/// Standardises every column but the intercept (column 0).
fn standardise(x: &mut Array2<f64>, centre: &[f64], scale: &[f64]) {
    for j in 1..x.ncols() {
        let (m, s) = (centre[j], scale[j]);
        x.column_mut(j).mapv_inplace(|v| (v - m) / s);
    }
}

/// Fits the model on every wave before `wave` that has a wave before it.
fn fit_before(
    project: &Project,
    settings: &Settings,
    terms: &[String],
    wave: i64,
    past: &HashMap<(String, i64), bool>,
) -> Result<Option<HistoryModel>, PlanError> {
    let mut blocks = Vec::new();
    let mut y = Vec::new();
    let mut trained_on = Vec::new();
    for &w in project.waves.iter().filter(|&&w| w < wave) {
        if previous_wave(project, w).is_none() {
            continue;
        }
        let Some(view) = WaveView::new(project, w) else {
            continue;
        };
        let Ok(d) = design::build(
            &view,
            &Settings {
                wave: Some(w),
                ..settings.clone()
            },
        ) else {
            continue;
        };
        let lag = lag_of(&d, w, project, past);
        blocks.push(aligned(&d, terms, &lag));
        y.extend(d.participated.iter().copied());
        trained_on.push(w);
    }
    if blocks.is_empty() {
        return Ok(None);
    }
    let views: Vec<_> = blocks.iter().map(|b| b.view()).collect();
    let mut x = ndarray::concatenate(ndarray::Axis(0), &views)
        .map_err(|e| PlanError::Request(format!("the history model's rows do not line up: {e}")))?;
    let k = x.ncols();
    let mut centre = vec![0.0; k];
    let mut scale = vec![1.0; k];
    for j in 1..k {
        let col = x.column(j);
        let m = col.mean().unwrap_or(0.0);
        let sd = col.std(1.0);
        centre[j] = m;
        scale[j] = if sd > 1e-12 { sd } else { 1.0 };
    }
    standardise(&mut x, &centre, &scale);
    let fit = binary::fit(settings.model, x.view(), &y)
        .map_err(|e| PlanError::Analysis(AnalysisError::from(e)))?;
    Ok(Some(HistoryModel {
        trained_on,
        n: y.len(),
        centre,
        scale,
        fit,
    }))
}

/// Forecasts of `design`'s units (wave `wave`) from `model`.
fn forecast(
    model: &HistoryModel,
    design: &Design,
    terms: &[String],
    wave: i64,
    project: &Project,
    past: &HashMap<(String, i64), bool>,
    settings: &Settings,
) -> Vec<f64> {
    let lag = lag_of(design, wave, project, past);
    let mut x = aligned(design, terms, &lag);
    standardise(&mut x, &model.centre, &model.scale);
    binary::predict(settings.model, x.view(), &model.fit.coef)
}

/// Calibration by fifths of the forecast (equal counts, ties kept together by order).
fn calibration(forecast: &[f64], took: &[bool]) -> Vec<CalibrationBin> {
    let mut order: Vec<usize> = (0..forecast.len()).collect();
    order.sort_by(|&a, &b| forecast[a].total_cmp(&forecast[b]));
    let bins = 5.min(order.len());
    (0..bins)
        .map(|b| {
            let lo = b * order.len() / bins;
            let hi = (b + 1) * order.len() / bins;
            let members = &order[lo..hi];
            let n = members.len();
            CalibrationBin {
                low: forecast[members[0]],
                high: forecast[members[n - 1]],
                n,
                mean_forecast: members.iter().map(|&i| forecast[i]).sum::<f64>() / n as f64,
                observed_share: members.iter().filter(|&&i| took[i]).count() as f64 / n as f64,
            }
        })
        .collect()
}

/// The history forecast for the units of `target` (the design of wave `wave`).
pub fn history_chances(
    project: &Project,
    target: &Design,
    wave: i64,
    settings: &Settings,
) -> Result<HistoryForecast, PlanError> {
    let past = participation_by_code(project);
    let terms: Vec<String> = target.terms.clone();
    let model = fit_before(project, settings, &terms, wave, &past)?.ok_or_else(|| {
        PlanError::Request(format!(
            "chances from the programme's history need at least two waves before wave {wave} (a wave to learn from and the one before it); choose the participation model or a column instead"
        ))
    })?;
    let probability = forecast(&model, target, &terms, wave, project, &past, settings);
    let check = match previous_wave(project, wave) {
        Some(last) => match fit_before(project, settings, &terms, last, &past)? {
            Some(earlier) => WaveView::new(project, last)
                .and_then(|v| {
                    design::build(
                        &v,
                        &Settings {
                            wave: Some(last),
                            ..settings.clone()
                        },
                    )
                    .ok()
                })
                .map(|d| {
                    let f = forecast(&earlier, &d, &terms, last, project, &past, settings);
                    HistoryCheck {
                        wave: last,
                        trained_on: earlier.trained_on.clone(),
                        n: f.len(),
                        auc: binary::auc(&f, &d.participated),
                        calibration: calibration(&f, &d.participated),
                    }
                }),
            None => None,
        },
        None => None,
    };
    let mut names = terms;
    names.push(PREVIOUS_TERM.to_string());
    let aliased: Vec<usize> = model.fit.aliased.iter().map(|a| a.term).collect();
    Ok(HistoryForecast {
        wave,
        trained_on: model.trained_on.clone(),
        n_training: model.n,
        coef: model
            .fit
            .coef
            .iter()
            .enumerate()
            .map(|(j, c)| (!aliased.contains(&j) && c.is_finite()).then_some(*c))
            .collect(),
        terms: names,
        converged: model.fit.converged,
        check,
        probability,
    })
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn calibration_bins_partition_the_forecasts() {
        // Common practice: equal-count bins over the sorted forecasts.
        let f: Vec<f64> = (0..23).map(|i| f64::from(i) / 23.0).collect();
        let took: Vec<bool> = (0..23).map(|i| i % 3 == 0).collect();
        let bins = calibration(&f, &took);
        assert_eq!(bins.len(), 5);
        assert_eq!(bins.iter().map(|b| b.n).sum::<usize>(), 23);
        assert!(bins.windows(2).all(|w| w[0].high <= w[1].low));
        let observed: f64 = bins.iter().map(|b| b.observed_share * b.n as f64).sum();
        assert!((observed - 8.0).abs() < 1e-12);
    }
}
