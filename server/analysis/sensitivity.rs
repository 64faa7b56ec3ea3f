//! How the weights' concentration and the remaining imbalance move across trimming levels,
//! models and weighting methods.

use serde::Serialize;

use super::design;
use super::participation::{self, AnalysisError};
use super::settings::{ModelKind, Settings, WeightingKind};
use crate::project::WaveView;

/// Trimming levels compared (None: untrimmed).
pub const TRIM_LEVELS: [Option<f64>; 6] = [
    None,
    Some(0.99),
    Some(0.95),
    Some(0.9),
    Some(0.85),
    Some(0.8),
];

#[derive(Debug, Clone, Serialize)]
pub struct Outcome {
    pub effective_n: Option<f64>,
    pub max_abs_smd: Option<f64>,
    pub max_weight_share: Option<f64>,
    pub error: Option<String>,
    /// The weights leave the largest |SMD| worse than no weighting.
    pub worse_than_none: bool,
    /// The method returned another method's weights (named here).
    pub fell_back_to: Option<&'static str>,
    /// The method's own warnings.
    pub warnings: Vec<String>,
}

impl Outcome {
    fn failed(message: String) -> Outcome {
        Outcome {
            effective_n: None,
            max_abs_smd: None,
            max_weight_share: None,
            error: Some(message),
            worse_than_none: false,
            fell_back_to: None,
            warnings: Vec::new(),
        }
    }
}

#[derive(Debug, Clone, Serialize)]
pub struct TrimRow {
    pub trim: Option<f64>,
    pub outcome: Outcome,
}

#[derive(Debug, Clone, Serialize)]
pub struct GridRow {
    pub model: &'static str,
    pub weighting: &'static str,
    pub weighting_label: &'static str,
    pub outcome: Outcome,
}

#[derive(Debug, Clone, Serialize)]
pub struct Sensitivity {
    pub wave: i64,
    pub settings: Settings,
    pub n_participants: usize,
    pub max_abs_smd_before: f64,
    /// The settings' model and method across trimming levels.
    pub trims: Vec<TrimRow>,
    /// Every model and method, untrimmed.
    pub grid: Vec<GridRow>,
    /// Set when leaving out incomplete countries dropped participants or non-participants.
    pub incomplete: Option<participation::IncompleteCountries>,
    #[serde(skip_serializing_if = "Option::is_none")]
    pub missing_caveat: Option<String>,
    /// The participation model's own uncertainty (filled by [`with_model_uncertainty`]).
    pub model_uncertainty: Option<ModelUncertainty>,
}

pub fn sensitivity(view: &WaveView, settings: &Settings) -> Result<Sensitivity, AnalysisError> {
    let design = design::build(view, settings)?;
    let models: Vec<(ModelKind, Result<participation::FittedModel, AnalysisError>)> =
        [ModelKind::Logit, ModelKind::Firth, ModelKind::Probit]
            .into_iter()
            .map(|k| (k, participation::fit_model(&design, k, false)))
            .collect();
    let outcome =
        |s: &Settings, model: &Result<participation::FittedModel, AnalysisError>| -> Outcome {
            let weighted = match model {
                Ok(m) => participation::weigh(&design, s, m),
                Err(e) => Err(e.clone()),
            };
            match weighted {
                Ok(w) => Outcome {
                    effective_n: Some(w.report.effective_n),
                    max_abs_smd: Some(w.report.max_abs_smd_after),
                    max_weight_share: Some(w.report.max_weight_share),
                    error: None,
                    worse_than_none: w.report.worse_than_none,
                    fell_back_to: w.report.fell_back_to,
                    warnings: w.report.warnings,
                },
                Err(e) => Outcome::failed(e.to_string()),
            }
        };
    let chosen_model = models
        .iter()
        .find(|(k, _)| *k == settings.model)
        .map(|(_, m)| m);
    let trims = TRIM_LEVELS
        .iter()
        .map(|&trim| TrimRow {
            trim,
            outcome: chosen_model.map_or_else(
                || Outcome::failed("no model".into()),
                |m| {
                    outcome(
                        &Settings {
                            trim,
                            ..settings.clone()
                        },
                        m,
                    )
                },
            ),
        })
        .collect();
    let mut grid = Vec::new();
    for (kind, model) in &models {
        for weighting in WeightingKind::ALL {
            let s = Settings {
                model: *kind,
                weighting,
                trim: None,
                ..settings.clone()
            };
            grid.push(GridRow {
                model: kind.as_str(),
                weighting: weighting.as_str(),
                weighting_label: weighting.label(),
                outcome: outcome(&s, model),
            });
        }
    }
    let before = participation::balance_table(
        &design,
        &design
            .participated
            .iter()
            .map(|&t| f64::from(u8::from(t)))
            .collect::<Vec<_>>(),
    );
    Ok(Sensitivity {
        wave: view.wave,
        settings: settings.clone(),
        n_participants: design.n_participants(),
        max_abs_smd_before: before
            .iter()
            .filter_map(|r| r.smd_before)
            .fold(0.0f64, |m, v| m.max(v.abs())),
        trims,
        grid,
        incomplete: participation::incomplete_countries(&design),
        missing_caveat: participation::missing_caveat(settings),
        model_uncertainty: None,
    })
}

/// The sensitivity comparison with the participation model's own uncertainty, the pooled
/// mean taken of the project's default survey outcome.
pub fn with_model_uncertainty(
    project: &crate::project::Project,
    view: &WaveView,
    settings: &Settings,
) -> Result<Sensitivity, AnalysisError> {
    let mut s = sensitivity(view, settings)?;
    s.model_uncertainty = Some(model_uncertainty(
        Some(project),
        view,
        settings,
        project.manifest.default_outcome(),
        MODEL_DRAWS,
    )?);
    Ok(s)
}

/// Per coefficient draw: effective number, largest weight's share, pooled mean.
type DrawSummary = (f64, f64, Option<f64>);

/// Draws of the participation model's coefficients shown on the sensitivity page.
pub const MODEL_DRAWS: usize = 500;

/// The spread of one quantity across the coefficient draws.
#[derive(Debug, Clone, Serialize)]
pub struct Spread {
    /// At the estimated coefficients.
    pub at_estimate: f64,
    pub mean: f64,
    pub sd: f64,
    /// 2.5%, 50% and 97.5% quantiles over the draws (Hyndman & Fan 1996, definition 7).
    pub low: f64,
    pub median: f64,
    pub high: f64,
}

impl Spread {
    fn of(at_estimate: f64, values: &[f64]) -> Option<Spread> {
        let q = |p| crate::stats::describe::quantile(values, p);
        let mean = crate::stats::describe::mean(values)?;
        let sd = (values.iter().map(|v| (v - mean).powi(2)).sum::<f64>()
            / (values.len().max(2) - 1) as f64)
            .sqrt();
        Some(Spread {
            at_estimate,
            mean,
            sd,
            low: q(0.025)?,
            median: q(0.5)?,
            high: q(0.975)?,
        })
    }
}

/// How far the weights and the pooled mean move across the participation model's
/// sampling distribution.
#[derive(Debug, Clone, Serialize)]
pub struct ModelUncertainty {
    pub model: &'static str,
    /// The weights recomputed per draw: inverse-probability weights (with the settings'
    /// trimming).
    pub weighting: &'static str,
    pub draws: usize,
    pub seed: u64,
    /// Draws whose weights could not be computed (left out).
    pub failed: usize,
    /// Why nothing was drawn (e.g. a covariance that cannot be estimated).
    pub not_estimable: Option<String>,
    pub effective_n: Option<Spread>,
    pub max_weight_share: Option<Spread>,
    /// The survey outcome whose pooled mean is shown (the project's default outcome).
    pub outcome: Option<String>,
    pub pooled_mean: Option<Spread>,
    /// Why there is no pooled mean (no microdata, no respondents).
    pub pooled_note: Option<String>,
    pub notes: Vec<String>,
}

/// Draws the participation model's coefficients from their estimated sampling
/// distribution, β* ~ N(β̂, V̂) with V̂ the inverse information at the estimate (the usual
/// large-sample approximation; King, Tomz & Wittenberg 2000 simulate quantities of
/// interest this way), by β* = β̂ + L u with V̂ = L L' (Cholesky) and u standard normal from
/// `Rng::stream(seed, draw)`. Per draw: the propensities, the inverse-probability weights
/// (trimmed as the settings say), the effective number of countries (Σw)²/Σw² (Kish 1965),
/// the largest weight's share, and the pooled mean Σ w_c ȳ_c / Σ w_c of the countries'
/// design-weighted means ȳ_c of `outcome`. Columns the fit left out as aliased stay at 0
/// (they do not affect predictions); a fit with undetermined directions (separation) or a
/// covariance that is not positive definite is not estimable and nothing is drawn.
pub fn model_uncertainty(
    project: Option<&crate::project::Project>,
    view: &WaveView,
    settings: &Settings,
    outcome: Option<&str>,
    draws: usize,
) -> Result<ModelUncertainty, AnalysisError> {
    use crate::stats::{balance, binary, linalg, random::Rng, weights};
    let design = design::build(view, settings)?;
    let z = design.standardised();
    let y = &design.participated;
    let fit = binary::fit(settings.model, z.view(), y)?;
    let mut out = ModelUncertainty {
        model: settings.model.as_str(),
        weighting: WeightingKind::InverseProbability.as_str(),
        draws,
        seed: settings.seed,
        failed: 0,
        not_estimable: None,
        effective_n: None,
        max_weight_share: None,
        outcome: outcome.map(str::to_string),
        pooled_mean: None,
        pooled_note: None,
        notes: Vec::new(),
    };
    if settings.weighting != WeightingKind::InverseProbability {
        out.notes.push(format!(
            "The chosen weighting ({}) does not take the participation model's coefficients as given, so its weights do not move with them; shown are the inverse-probability weights of the {} model, which do.",
            settings.weighting.label(),
            settings.model.as_str()
        ));
    }
    let values: Option<Vec<Option<f64>>> = match outcome {
        None => {
            out.pooled_note = Some("the project has no survey outcome (microdata)".to_string());
            None
        }
        Some(o) => match super::selection_bounds::country_values(project, view, &design, o) {
            Ok((v, _)) if v.iter().any(Option::is_some) => Some(v),
            Ok(_) => {
                out.pooled_note =
                    Some(format!("no participating country has respondents with {o}"));
                None
            }
            Err(e) => {
                out.pooled_note = Some(e.to_string());
                None
            }
        },
    };
    let summarise = |propensity: &[f64]| -> Option<DrawSummary> {
        let mut w = weights::inverse_probability(propensity, y).ok()?;
        if let Some(q) = settings.trim {
            w = weights::trim(&w, y, q);
        }
        let pw: Vec<f64> = w
            .iter()
            .zip(y)
            .filter(|(_, &t)| t)
            .map(|(&v, _)| v)
            .collect();
        let pooled = values.as_ref().map(|v| {
            let (mut num, mut den) = (0.0, 0.0);
            for (wi, vi) in w.iter().zip(v) {
                if let Some(vi) = vi {
                    num += wi * vi;
                    den += wi;
                }
            }
            num / den
        });
        let ok = pw.iter().all(|v| v.is_finite()) && pooled.is_none_or(f64::is_finite);
        ok.then(|| (balance::effective_n(&pw), balance::max_share(&pw), pooled))
    };
    let at = summarise(&binary::predict(settings.model, z.view(), &fit.coef));
    let kept: Vec<usize> = (0..fit.coef.len())
        .filter(|&j| fit.cov[[j, j]].is_finite())
        .collect();
    let cholesky = if !fit.weak_directions.is_empty() || !fit.converged {
        Err("the participation model did not converge to a finite estimate (separation or directions the data do not determine), so its coefficients' covariance is not estimable".to_string())
    } else {
        let sub = fit.cov.select(ndarray::Axis(0), &kept);
        let sub = sub.select(ndarray::Axis(1), &kept);
        linalg::cholesky(sub.view()).map_err(|_| {
            "the coefficients' covariance is not positive definite, so it is not estimable"
                .to_string()
        })
    };
    let (l, at) = match (cholesky, at) {
        (Err(e), _) => {
            out.not_estimable = Some(e);
            return Ok(out);
        }
        (_, None) => {
            out.not_estimable = Some("the weights at the estimate are not finite".to_string());
            return Ok(out);
        }
        (Ok(l), Some(at)) => (l, at),
    };
    use rayon::prelude::*;
    let results: Vec<Option<DrawSummary>> = (0..draws)
        .into_par_iter()
        .map(|d| {
            let mut rng = Rng::stream(settings.seed, d as u64);
            let u = ndarray::Array1::from_iter((0..kept.len()).map(|_| rng.normal()));
            let shift = l.dot(&u);
            let mut coef = fit.coef.clone();
            for (k, &j) in kept.iter().enumerate() {
                coef[j] += shift[k];
            }
            summarise(&binary::predict(settings.model, z.view(), &coef))
        })
        .collect();
    let ok: Vec<DrawSummary> = results.iter().flatten().copied().collect();
    out.failed = draws - ok.len();
    let column =
        |f: fn(&DrawSummary) -> Option<f64>| -> Vec<f64> { ok.iter().filter_map(f).collect() };
    out.effective_n = Spread::of(at.0, &column(|r| Some(r.0)));
    out.max_weight_share = Spread::of(at.1, &column(|r| Some(r.1)));
    out.pooled_mean = at.2.and_then(|m| Spread::of(m, &column(|r| r.2)));
    out.notes.push(format!(
        "Coefficients drawn {draws} times (seed {}) from the normal distribution at the estimate with its estimated covariance; the spread shows how far the results move across the estimates the data allow, with the indicators and the model held fixed. It does not cover an unmeasured cause of taking part (see the impact page's sensitivity bounds).",
        settings.seed
    ));
    Ok(out)
}
