//! How far respondent-level findings move under each correction for country selection:
//! the pooled estimate of an outcome and a pooled regression, unweighted, under each
//! country weighting, and with the inverse Mills ratio of the country-level probit.

use std::collections::HashMap;

use ndarray::Array2;
use serde::Serialize;

use super::design;
use super::participation::{self, AnalysisError};
use super::settings::{ModelKind, Settings, WeightingKind};
use crate::project::{Project, WaveView};
use crate::stats::normal;
use crate::stats::regression::{self, Kind};

/// What the impact view estimates.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct ImpactSettings {
    pub outcome: String,
    /// Respondent variables or country indicators (joined by country).
    pub predictors: Vec<String>,
    pub kind: Kind,
    /// Country shares: each participating country counts by its weight ("equal"), or by
    /// its weight times its population ("population", from `population_column`).
    pub shares: Shares,
    /// Wild cluster bootstrap replicates (linear models; 0 to skip).
    pub replicates: usize,
}

#[derive(Debug, Clone, PartialEq, Serialize)]
#[serde(rename_all = "kebab-case")]
pub enum Shares {
    Equal,
    /// A numeric frame column; columns named `log_...` are taken as natural logarithms.
    Population(String),
}

#[derive(Debug, Clone, Serialize)]
pub struct Pooled {
    pub estimate: f64,
    pub se: f64,
    pub low: f64,
    pub high: f64,
}

#[derive(Debug, Clone, Serialize)]
pub struct Variant {
    pub key: String,
    pub label: String,
    pub error: Option<String>,
    pub pooled: Option<Pooled>,
    pub coef: Vec<f64>,
    pub se: Vec<f64>,
    /// Two-sided p-values from the CR1 z statistic.
    pub p_cluster: Vec<f64>,
    /// Wild cluster bootstrap p-values (linear models).
    pub p_bootstrap: Option<Vec<f64>>,
    /// Per term: the sign differs from the unweighted model's.
    pub sign_changed: Vec<bool>,
    /// Per term: significant at 5% here but not unweighted, or the reverse.
    pub verdict_changed: Vec<bool>,
}

#[derive(Debug, Clone, Serialize)]
pub struct ImpactReport {
    pub wave: i64,
    pub settings: Settings,
    pub impact: ImpactSettings,
    pub terms: Vec<String>,
    pub n_respondents: usize,
    pub n_countries: usize,
    pub variants: Vec<Variant>,
    pub notes: Vec<String>,
}

#[derive(Debug, Clone, PartialEq, thiserror::Error)]
pub enum ImpactError {
    #[error("{0}")]
    Analysis(#[from] AnalysisError),
    #[error("{0}")]
    Request(String),
}

/// Computes every variant for one wave.
pub fn impact(
    project: &Project,
    view: &WaveView,
    settings: &Settings,
    imp: &ImpactSettings,
) -> Result<ImpactReport, ImpactError> {
    let micro = project.microdata.as_ref().ok_or_else(|| {
        ImpactError::Request(
            "the project has no microdata (microdata.csv or microdata.parquet)".to_string(),
        )
    })?;
    let roles = project.manifest.microdata.as_ref().ok_or_else(|| {
        ImpactError::Request("project.toml has no [microdata] section".to_string())
    })?;
    let variables = &roles.variables;
    if !variables.contains(&imp.outcome) {
        return Err(ImpactError::Request(format!(
            "'{}' is not a survey variable; the variables are: {}",
            imp.outcome,
            variables.join(", ")
        )));
    }
    let design = design::build(view, settings).map_err(AnalysisError::from)?;
    // Country-level pieces: the model, every weighting, the probit for the Mills ratio.
    let model = participation::fit_model(&design, settings.model, false)?;
    let country_index: HashMap<&str, usize> = design
        .ids
        .iter()
        .enumerate()
        .filter(|(i, _)| design.participated[*i])
        .map(|(i, id)| (id.as_str(), i))
        .collect();

    // Respondents of this wave's participants with complete values.
    let countries = micro.texts(&roles.country);
    let waves = micro.integers(&roles.wave);
    let design_weight = micro.numbers(&roles.design_weight);
    let outcome = micro.numbers(&imp.outcome);
    let mut predictor_values: Vec<Vec<Option<f64>>> = Vec::new();
    for p in &imp.predictors {
        if variables.contains(p) {
            predictor_values.push(micro.numbers(p));
        } else if let Some(ind) = view.numeric.iter().find(|n| &n.column == p) {
            // A country indicator, joined by country.
            let by_code: HashMap<&str, Option<f64>> = view
                .codes
                .iter()
                .map(String::as_str)
                .zip(ind.values.iter().copied())
                .collect();
            predictor_values.push(
                countries
                    .iter()
                    .map(|c| c.as_deref().and_then(|c| by_code.get(c).copied().flatten()))
                    .collect(),
            );
        } else {
            return Err(ImpactError::Request(format!(
                "'{p}' is neither a survey variable ({}) nor a numeric country indicator",
                variables.join(", ")
            )));
        }
    }
    let rows: Vec<usize> = (0..micro.height())
        .filter(|&i| waves[i] == Some(view.wave))
        .filter(|&i| {
            countries[i]
                .as_deref()
                .is_some_and(|c| country_index.contains_key(c))
        })
        .filter(|&i| {
            outcome[i].is_some()
                && design_weight[i].is_some()
                && predictor_values.iter().all(|v| v[i].is_some())
        })
        .collect();
    if rows.is_empty() {
        return Err(ImpactError::Request(format!(
            "no respondents with complete values in wave {}",
            view.wave
        )));
    }
    let unit_of: Vec<usize> = rows
        .iter()
        .map(|&i| country_index[countries[i].as_deref().unwrap_or("")])
        .collect();
    let mut cluster_ids: HashMap<usize, usize> = HashMap::new();
    let cluster: Vec<usize> = unit_of
        .iter()
        .map(|u| {
            let next = cluster_ids.len();
            *cluster_ids.entry(*u).or_insert(next)
        })
        .collect();
    let y: Vec<f64> = rows.iter().map(|&i| outcome[i].unwrap_or(0.0)).collect();
    let k = imp.predictors.len() + 1;
    let mut x = Array2::<f64>::ones((rows.len(), k));
    for (r, &i) in rows.iter().enumerate() {
        for (j, v) in predictor_values.iter().enumerate() {
            x[[r, j + 1]] = v[i].unwrap_or(0.0);
        }
    }
    // Design weights summed per country, for rescaling.
    let mut design_total: HashMap<usize, f64> = HashMap::new();
    for (r, &i) in rows.iter().enumerate() {
        *design_total.entry(unit_of[r]).or_insert(0.0) += design_weight[i].unwrap_or(0.0);
    }
    let population: Option<Vec<f64>> = match &imp.shares {
        Shares::Equal => None,
        Shares::Population(col) => {
            let ind = view
                .numeric
                .iter()
                .find(|n| &n.column == col)
                .ok_or_else(|| {
                    ImpactError::Request(format!("'{col}' is not a numeric country indicator"))
                })?;
            let logged = col.starts_with("log_");
            Some(
                design
                    .units
                    .iter()
                    .map(|&u| ind.values[u].map_or(f64::NAN, |v| if logged { v.exp() } else { v }))
                    .collect(),
            )
        }
    };
    // Respondent weight: design weight rescaled so each country's respondents sum to the
    // country's weight (times its population share when asked).
    let respondent_weights = |country_weight: &dyn Fn(usize) -> f64| -> Vec<f64> {
        rows.iter()
            .enumerate()
            .map(|(r, &i)| {
                let u = unit_of[r];
                let share = population.as_ref().map_or(1.0, |p| p[u]);
                country_weight(u) * share * design_weight[i].unwrap_or(0.0) / design_total[&u]
            })
            .collect()
    };

    let mut terms = vec!["intercept".to_string()];
    terms.extend(imp.predictors.iter().cloned());
    let mut variants = Vec::new();
    let seed = settings.seed;
    let run = |key: &str, label: &str, w: Result<Vec<f64>, String>, x: &Array2<f64>| -> Variant {
        match w {
            Err(e) => failed(key, label, e, x.ncols()),
            Ok(w) => estimate(key, label, x, &y, &w, &cluster, imp, seed),
        }
    };
    variants.push(run(
        "unweighted",
        "Every participating country counts the same",
        Ok(respondent_weights(&|_| 1.0)),
        &x,
    ));
    for kind in WeightingKind::ALL {
        let s = Settings {
            weighting: kind,
            ..settings.clone()
        };
        let w = participation::weigh(&design, &s, &model)
            .map(|w| w.weights)
            .map_err(|e| e.to_string());
        let rw = w.map(|w| respondent_weights(&|u| w[u]));
        variants.push(run(kind.as_str(), kind.label(), rw, &x));
    }
    // Heckman-type: the inverse Mills ratio of the country-level probit as a regressor.
    let mills = participation::fit_model(&design, ModelKind::Probit, false).map(|probit| {
        probit
            .propensity
            .iter()
            .map(|&p| normal::inverse_mills(normal::quantile(p)))
            .collect::<Vec<f64>>()
    });
    let mut x_mills = Array2::<f64>::ones((rows.len(), k + 1));
    x_mills.slice_mut(ndarray::s![.., ..k]).assign(&x);
    let mills_ok = match &mills {
        Ok(lambda) => {
            for (r, u) in unit_of.iter().enumerate() {
                x_mills[[r, k]] = lambda[*u];
            }
            Ok(respondent_weights(&|_| 1.0))
        }
        Err(e) => Err(e.to_string()),
    };
    // Its last coefficient is the ratio's own; the flags compare the substantive terms only.
    variants.push(run(
        "mills-ratio",
        "Inverse Mills ratio of the country probit added",
        mills_ok,
        &x_mills,
    ));

    flag_changes(&mut variants, k);
    let mut notes = vec![
        "Unweighted: design weights rescaled so that every participating country counts the same. Weighted: so that each country counts by its country weight.".to_string(),
        "Confidence intervals and p-values use standard errors clustered by country (CR1); with few countries they are rough, and the wild cluster bootstrap p-values are the safer guide.".to_string(),
        "The Mills-ratio variant changes the model, not the weights (its pooled mean is the unweighted one), and does not correct its standard errors for the estimated first step.".to_string(),
    ];
    if let Shares::Population(c) = &imp.shares {
        notes.push(format!(
            "Country shares are proportional to population ({c}) times the country weight."
        ));
    }
    let mut all_terms = terms.clone();
    all_terms.push("inverse Mills ratio".to_string());
    Ok(ImpactReport {
        wave: view.wave,
        settings: settings.clone(),
        impact: imp.clone(),
        terms: all_terms,
        n_respondents: rows.len(),
        n_countries: cluster_ids.len(),
        variants,
        notes,
    })
}

fn failed(key: &str, label: &str, error: String, k: usize) -> Variant {
    Variant {
        key: key.to_string(),
        label: label.to_string(),
        error: Some(error),
        pooled: None,
        coef: Vec::new(),
        se: Vec::new(),
        p_cluster: Vec::new(),
        p_bootstrap: None,
        sign_changed: vec![false; k],
        verdict_changed: vec![false; k],
    }
}

#[allow(clippy::too_many_arguments)]
fn estimate(
    key: &str,
    label: &str,
    x: &Array2<f64>,
    y: &[f64],
    w: &[f64],
    cluster: &[usize],
    imp: &ImpactSettings,
    seed: u64,
) -> Variant {
    // Drop respondents of countries without weight (never for participants, but trimming
    // to zero is possible in principle).
    let keep: Vec<usize> = (0..y.len()).filter(|&i| w[i] > 0.0).collect();
    let xs = x.select(ndarray::Axis(0), &keep);
    let ys: Vec<f64> = keep.iter().map(|&i| y[i]).collect();
    let ws: Vec<f64> = keep.iter().map(|&i| w[i]).collect();
    let cs: Vec<usize> = keep.iter().map(|&i| cluster[i]).collect();
    let ones = Array2::<f64>::ones((keep.len(), 1));
    let pooled = regression::fit(ones.view(), &ys, Some(&ws), &cs, Kind::Linear)
        .ok()
        .map(|f| Pooled {
            estimate: f.coef[0],
            se: f.se[0],
            low: f.coef[0] - 1.959_963_984_540_054 * f.se[0],
            high: f.coef[0] + 1.959_963_984_540_054 * f.se[0],
        });
    match regression::fit(xs.view(), &ys, Some(&ws), &cs, imp.kind) {
        Err(e) => failed(key, label, e.to_string(), x.ncols()),
        Ok(f) => {
            let p_cluster: Vec<f64> = f
                .coef
                .iter()
                .zip(&f.se)
                .map(|(c, s)| 2.0 * normal::cdf(-(c / s).abs()))
                .collect();
            let p_bootstrap = (imp.replicates > 0).then(|| {
                (0..x.ncols())
                    .map(|j| {
                        let p = match imp.kind {
                            Kind::Linear => regression::wild_cluster_bootstrap(
                                xs.view(),
                                &ys,
                                Some(&ws),
                                &cs,
                                j,
                                imp.replicates,
                                seed,
                            ),
                            Kind::Logistic => regression::score_cluster_bootstrap(
                                xs.view(),
                                &ys,
                                Some(&ws),
                                &cs,
                                j,
                                imp.replicates,
                                seed,
                            ),
                        };
                        p.unwrap_or(f64::NAN)
                    })
                    .collect()
            });
            Variant {
                key: key.to_string(),
                label: label.to_string(),
                error: None,
                pooled,
                sign_changed: vec![false; f.coef.len()],
                verdict_changed: vec![false; f.coef.len()],
                coef: f.coef,
                se: f.se,
                p_cluster,
                p_bootstrap,
            }
        }
    }
}

/// Marks, per term, a sign or a 5%-significance verdict that differs from the unweighted
/// model (bootstrap p-values where available).
fn flag_changes(variants: &mut [Variant], k: usize) {
    let Some(base) = variants.first().cloned() else {
        return;
    };
    if base.error.is_some() {
        return;
    }
    let p = |v: &Variant, j: usize| v.p_bootstrap.as_ref().map_or(v.p_cluster[j], |b| b[j]);
    for v in variants.iter_mut().skip(1) {
        if v.error.is_some() {
            continue;
        }
        for j in 1..k.min(v.coef.len()) {
            v.sign_changed[j] = v.coef[j].signum() != base.coef[j].signum();
            v.verdict_changed[j] = (p(v, j) < 0.05) != (p(&base, j) < 0.05);
        }
    }
}
