//! The participation model and the country weights for one wave: the result behind
//! `gapwise fit`, the participation and balance pages and the report.

use ndarray::{Array1, Array2};
use serde::Serialize;

use super::design::{self, Design};
use super::settings::{ModelKind, Settings, WeightingKind};
use crate::project::WaveView;
use crate::stats::{balance, binary, weights};

#[derive(Debug, Clone, Serialize)]
pub struct ModelReport {
    pub kind: &'static str,
    /// Intercept first.
    pub terms: Vec<String>,
    /// On the indicators' original scale.
    pub coef: Vec<f64>,
    pub se: Vec<f64>,
    pub log_likelihood: f64,
    pub converged: bool,
    pub iterations: usize,
    pub auc: Option<f64>,
    pub auc_loo: Option<f64>,
    pub warnings: Vec<String>,
}

#[derive(Debug, Clone, Serialize)]
pub struct WeightingReport {
    pub kind: &'static str,
    pub effective_n: f64,
    pub max_weight_share: f64,
    pub cv: f64,
    pub trim: Option<f64>,
    pub converged: bool,
    /// Coefficients of the covariate-balancing propensity model (original scale).
    #[serde(skip_serializing_if = "Option::is_none")]
    pub coef: Option<Vec<f64>>,
    pub warnings: Vec<String>,
}

#[derive(Debug, Clone, Serialize)]
pub struct UnitReport {
    pub id: String,
    pub name: String,
    pub participated: bool,
    pub propensity: f64,
    /// Normalised so that participants' weights sum to the number of eligible units;
    /// zero for non-participants.
    pub weight: f64,
}

#[derive(Debug, Clone, Serialize)]
pub struct BalanceRow {
    pub covariate: String,
    pub label: String,
    pub smd_before: Option<f64>,
    pub smd_after: Option<f64>,
    pub variance_ratio_before: Option<f64>,
    pub variance_ratio_after: Option<f64>,
    pub universe_mean: f64,
    pub participant_mean: f64,
    pub weighted_mean: f64,
}

/// The full result of fitting one wave.
#[derive(Debug, Clone, Serialize)]
pub struct FitReport {
    pub wave: Option<i64>,
    pub settings: Settings,
    pub n_eligible: usize,
    pub n_participants: usize,
    /// Countries left out for missing values.
    pub dropped: Vec<String>,
    /// How missing values were handled, in words.
    pub missing_note: String,
    pub model: ModelReport,
    pub weighting: WeightingReport,
    pub units: Vec<UnitReport>,
    pub balance: Vec<BalanceRow>,
}

#[derive(Debug, Clone, PartialEq, thiserror::Error)]
pub enum AnalysisError {
    #[error("{0}")]
    Design(#[from] design::DesignError),
    #[error("the participation model cannot be fitted: {0}")]
    Model(#[from] binary::FitError),
    #[error("{method} weighting failed: {message}")]
    Weighting {
        method: &'static str,
        message: String,
    },
}

/// Fits the participation model and the chosen weighting on one wave's universe.
pub fn fit(view: &WaveView, settings: &Settings) -> Result<FitReport, AnalysisError> {
    let design = design::build(view, settings)?;
    fit_design(&design, settings, Some(view.wave))
}

/// A fitted participation model: its report, each unit's propensity, and the
/// standardised design it was fitted on (reused by the weighting methods).
#[derive(Debug, Clone)]
pub struct FittedModel {
    pub report: ModelReport,
    pub propensity: Vec<f64>,
    pub standardised: Array2<f64>,
}

/// Fits the participation model; `leave_one_out` adds the leave-one-out AUC (n refits).
pub fn fit_model(
    design: &Design,
    kind: ModelKind,
    leave_one_out: bool,
) -> Result<FittedModel, AnalysisError> {
    let z = design.standardised();
    let fit = binary::fit(kind, z.view(), &design.participated)?;
    let propensity = binary::predict(kind, z.view(), &fit.coef);
    let report = model_report(design, kind, &z, &fit, &propensity, leave_one_out);
    Ok(FittedModel {
        report,
        propensity,
        standardised: z,
    })
}

/// Participants' weights from one method, normalised to sum to the number of eligible units.
#[derive(Debug, Clone)]
pub struct Weighted {
    pub report: WeightingReport,
    /// Aligned with the design's units; zero for non-participants.
    pub weights: Vec<f64>,
}

/// Weights the participants by the settings' method (and trimming).
pub fn weigh(
    design: &Design,
    settings: &Settings,
    model: &FittedModel,
) -> Result<Weighted, AnalysisError> {
    let y = &design.participated;
    let (raw_weights, converged, cbps_coef) =
        compute_weights(design, settings, &model.standardised, &model.propensity)?;
    let mut w = raw_weights;
    let mut warnings = Vec::new();
    if let Some(q) = settings.trim {
        w = weights::trim(&w, y, q);
        if matches!(
            settings.weighting,
            WeightingKind::Entropy | WeightingKind::Raking | WeightingKind::CovariateBalancing
        ) {
            warnings.push(format!("trimming at the {:.0}th percentile undoes part of the exact balance this method achieves", 100.0 * q));
        }
    }
    let w = weights::normalise(&w, design.n() as f64);
    let participant_weights: Vec<f64> = w
        .iter()
        .zip(y)
        .filter(|(_, &t)| t)
        .map(|(&v, _)| v)
        .collect();
    let effective_n = balance::effective_n(&participant_weights);
    let max_weight_share = balance::max_share(&participant_weights);
    warnings.extend(concentration_warnings(
        effective_n,
        max_weight_share,
        design.n_participants(),
        design,
        &w,
    ));
    if !converged {
        warnings.push("the weighting did not converge; its balance is approximate".to_string());
    }
    Ok(Weighted {
        report: WeightingReport {
            kind: settings.weighting.as_str(),
            effective_n,
            max_weight_share,
            cv: balance::coefficient_of_variation(&participant_weights),
            trim: settings.trim,
            converged,
            coef: cbps_coef,
            warnings,
        },
        weights: w,
    })
}

/// The same on a ready design (used by the planner and by frames without a project).
pub fn fit_design(
    design: &Design,
    settings: &Settings,
    wave: Option<i64>,
) -> Result<FitReport, AnalysisError> {
    let model = fit_model(design, settings.model, true)?;
    let weighted = weigh(design, settings, &model)?;
    let y = &design.participated;
    let units = (0..design.n())
        .map(|i| UnitReport {
            id: design.ids[i].clone(),
            name: design.names[i].clone(),
            participated: y[i],
            propensity: model.propensity[i],
            weight: weighted.weights[i],
        })
        .collect();
    Ok(FitReport {
        wave,
        settings: settings.clone(),
        n_eligible: design.n(),
        n_participants: design.n_participants(),
        dropped: design.dropped.clone(),
        missing_note: missing_note(design, settings),
        balance: balance_table(design, &weighted.weights),
        model: model.report,
        weighting: weighted.report,
        units,
    })
}

/// Maps coefficients and their covariance from the standardised to the original scale:
/// b_j = b*_j / s_j, b_0 = b*_0 - sum_j b*_j m_j / s_j, Cov = A Cov* A'.
pub fn to_original_scale(
    design: &Design,
    coef: &Array1<f64>,
    cov: Option<&Array2<f64>>,
) -> (Vec<f64>, Option<Vec<f64>>) {
    let k = coef.len();
    let mut a = Array2::<f64>::zeros((k, k));
    a[[0, 0]] = 1.0;
    for j in 1..k {
        a[[j, j]] = 1.0 / design.scale[j];
        a[[0, j]] = -design.centre[j] / design.scale[j];
    }
    let b = a.dot(coef);
    let se = cov.map(|c| {
        a.dot(c)
            .dot(&a.t())
            .diag()
            .iter()
            .map(|v| v.max(0.0).sqrt())
            .collect()
    });
    (b.to_vec(), se)
}

fn model_report(
    design: &Design,
    kind: ModelKind,
    z: &Array2<f64>,
    fit: &binary::BinaryFit,
    propensity: &[f64],
    leave_one_out: bool,
) -> ModelReport {
    let y = &design.participated;
    let (coef, se) = to_original_scale(design, &fit.coef, Some(&fit.cov));
    let loo_complete: Option<Vec<f64>> = if leave_one_out {
        binary::leave_one_out(kind, z.view(), y, fit)
            .into_iter()
            .collect()
    } else {
        None
    };
    let mut warnings = Vec::new();
    let n1 = design.n_participants();
    let n0 = design.n() - n1;
    let k = design.terms.len() - 1;
    let per_parameter = n1.min(n0) as f64 / k.max(1) as f64;
    if per_parameter < 10.0 {
        warnings.push(format!(
            "only {per_parameter:.1} {} per parameter ({k} parameters besides the intercept; common practice asks for at least 10): the model may overfit, so compare the leave-one-out AUC with the in-sample AUC",
            if n1 <= n0 { "participants" } else { "non-participants" }
        ));
    }
    if kind != ModelKind::Firth {
        let separating = binary::separating_terms(z.view(), y);
        if let Some(s) = separating.first() {
            warnings.push(format!(
                "{} separation: every participant's {} is {} every non-participant's, so the maximum-likelihood estimate does not exist; use the Firth model",
                if s.complete { "complete" } else { "quasi-complete" },
                design.terms[s.term],
                if s.participants_above { "at or above" } else { "at or below" }
            ));
        } else if binary::looks_separated(fit, kind, z.view()) {
            let largest = (1..fit.coef.len())
                .max_by(|&a, &b| fit.coef[a].abs().total_cmp(&fit.coef[b].abs()))
                .unwrap_or(0);
            warnings.push(format!(
                "the fit shows signs of separation (fitted probabilities of 0 or 1, or no convergence), driven mostly by {}; use the Firth model",
                design.terms[largest]
            ));
        }
    }
    if !fit.converged {
        warnings.push(format!(
            "the model did not converge after {} iterations",
            fit.iterations
        ));
    }
    if leave_one_out && loo_complete.is_none() {
        warnings.push(
            "some leave-one-out refits failed, so the leave-one-out AUC is not reported"
                .to_string(),
        );
    }
    ModelReport {
        kind: kind.as_str(),
        terms: design.terms.clone(),
        coef,
        se: se.unwrap_or_default(),
        log_likelihood: fit.log_likelihood,
        converged: fit.converged,
        iterations: fit.iterations,
        auc: binary::auc(propensity, y),
        auc_loo: loo_complete.and_then(|p| binary::auc(&p, y)),
        warnings,
    }
}

/// Raw (unnormalised) weights, whether the method converged, and CBPS coefficients.
type RawWeights = (Vec<f64>, bool, Option<Vec<f64>>);

fn compute_weights(
    design: &Design,
    settings: &Settings,
    z: &Array2<f64>,
    propensity: &[f64],
) -> Result<RawWeights, AnalysisError> {
    let y = &design.participated;
    let method = settings.weighting.as_str();
    let fail = |message: String| AnalysisError::Weighting { method, message };
    match settings.weighting {
        WeightingKind::InverseProbability => weights::inverse_probability(propensity, y)
            .map(|w| (w, true, None))
            .map_err(|e| fail(e.to_string())),
        WeightingKind::CovariateBalancing | WeightingKind::CovariateBalancingGmm => {
            let cbps = if settings.weighting == WeightingKind::CovariateBalancing {
                weights::cbps_just_identified(z.view(), y)
            } else {
                let start = binary::fit(ModelKind::Logit, z.view(), y)
                    .map(|f| f.coef)
                    .unwrap_or_else(|_| Array1::zeros(z.ncols()));
                weights::cbps_over_identified(z.view(), y, &start)
            }
            .map_err(|e| fail(e.to_string()))?;
            if settings.weighting == WeightingKind::CovariateBalancing && !cbps.converged {
                return Err(fail(
                    "the exact balance conditions have no solution: with weights 1/p of at least 1 (each participant stands at least for itself) the participants cannot reproduce the universe's means; use fewer indicators, the GMM variant, or entropy balancing (which allows weights below 1 and names the indicator that cannot be matched)".to_string(),
                ));
            }
            let w = weights::inverse_probability(&cbps.propensity, y)
                .map_err(|e| fail(e.to_string()))?;
            let (coef, _) = to_original_scale(design, &cbps.coef, None);
            Ok((w, cbps.converged, Some(coef)))
        }
        WeightingKind::Entropy => {
            let mut columns: Vec<(String, Vec<f64>)> = design
                .balance
                .iter()
                .filter(|b| !is_reference_level(design, &b.name))
                .map(|b| (b.label.clone(), b.values.clone()))
                .collect();
            if settings.match_variances {
                let squares: Vec<(String, Vec<f64>)> = design
                    .balance
                    .iter()
                    .filter(|b| !b.is_level)
                    .map(|b| {
                        let m = b.values.iter().sum::<f64>() / b.values.len() as f64;
                        (
                            format!("{} (variance)", b.label),
                            b.values.iter().map(|v| (v - m).powi(2)).collect(),
                        )
                    })
                    .collect();
                columns.extend(squares);
            }
            let n = design.n();
            let mut c = Array2::<f64>::zeros((n, columns.len()));
            let mut targets = Vec::with_capacity(columns.len());
            let mut scale = Vec::with_capacity(columns.len());
            for (j, (_, values)) in columns.iter().enumerate() {
                for (i, &v) in values.iter().enumerate() {
                    c[[i, j]] = v;
                }
                let m = values.iter().sum::<f64>() / n as f64;
                let sd = (values.iter().map(|v| (v - m).powi(2)).sum::<f64>() / n as f64).sqrt();
                targets.push(m);
                scale.push(if sd > 0.0 { sd } else { 1.0 });
            }
            match weights::entropy_balance(c.view(), y, &targets, &scale, None) {
                Ok(fit) => Ok((fit.weights, fit.converged, None)),
                Err(weights::WeightError::Infeasible { column, reason }) => Err(fail(format!(
                    "cannot match {}: {reason}",
                    columns.get(column).map_or("an indicator", |c| c.0.as_str())
                ))),
                Err(e) => Err(fail(e.to_string())),
            }
        }
        WeightingKind::Raking => {
            if design.margins.is_empty() {
                return Err(fail("raking needs at least one categorical indicator (factors) whose shares to match".to_string()));
            }
            let n = design.n() as f64;
            let margins: Vec<Vec<usize>> = design.margins.iter().map(|m| m.codes.clone()).collect();
            let targets: Vec<Vec<f64>> = design
                .margins
                .iter()
                .map(|m| {
                    (0..m.levels.len())
                        .map(|l| m.codes.iter().filter(|&&c| c == l).count() as f64 / n)
                        .collect()
                })
                .collect();
            match weights::rake(&margins, &targets, y) {
                Ok(fit) => Ok((fit.weights, fit.converged, None)),
                Err(weights::WeightError::Infeasible { column, reason }) => {
                    let m = &design.margins[column];
                    let reason = m.levels.iter().enumerate().fold(reason, |r, (l, name)| {
                        r.replace(&format!("level {l} "), &format!("'{name}' "))
                    });
                    Err(fail(format!(
                        "cannot match the shares of {}: {reason}",
                        m.name
                    )))
                }
                Err(e) => Err(fail(e.to_string())),
            }
        }
    }
}

/// Reference levels are implied by the other levels' shares; matching them too would make
/// the entropy-balancing constraints collinear.
fn is_reference_level(design: &Design, name: &str) -> bool {
    design.margins.iter().any(|m| {
        m.levels
            .first()
            .is_some_and(|l| format!("{}={}", m.name, l) == name)
    })
}

fn concentration_warnings(
    effective_n: f64,
    max_share: f64,
    n_part: usize,
    design: &Design,
    w: &[f64],
) -> Vec<String> {
    let mut out = Vec::new();
    if effective_n < 0.5 * n_part as f64 {
        out.push(format!(
            "the weights are concentrated: {n_part} participants count as only {effective_n:.1} countries (Kish's effective number)"
        ));
    }
    if max_share > 0.1 {
        let heaviest = (0..w.len())
            .max_by(|&a, &b| w[a].total_cmp(&w[b]))
            .map(|i| design.ids[i].clone())
            .unwrap_or_default();
        out.push(format!(
            "one country ({heaviest}) carries {:.0}% of the total weight; results lean on it",
            100.0 * max_share
        ));
    }
    out
}

pub fn missing_note(design: &Design, settings: &Settings) -> String {
    match settings.missing {
        super::settings::MissingRule::CompleteCases if design.dropped.is_empty() => {
            "No missing values among the chosen indicators".to_string()
        }
        super::settings::MissingRule::CompleteCases => format!(
            "Complete cases: {} countr{} left out for missing values: {}",
            design.dropped.len(),
            if design.dropped.len() == 1 {
                "y"
            } else {
                "ies"
            },
            design.dropped.join("; ")
        ),
        super::settings::MissingRule::MedianFill if design.filled.is_empty() => {
            "No missing values among the chosen indicators".to_string()
        }
        super::settings::MissingRule::MedianFill => format!(
            "Median fill with a missingness indicator per filled indicator: {}",
            design
                .filled
                .iter()
                .map(|(c, n, m)| format!("{c} ({n} filled with {m:.3})"))
                .collect::<Vec<_>>()
                .join("; ")
        ),
    }
}

/// SMDs and variance ratios before (unweighted participants) and after weighting,
/// against the whole analysed universe (unweighted).
pub fn balance_table(design: &Design, w: &[f64]) -> Vec<BalanceRow> {
    let y = &design.participated;
    let ones: Vec<f64> = y.iter().map(|&t| f64::from(u8::from(t))).collect();
    let all = vec![1.0; design.n()];
    design
        .balance
        .iter()
        .map(|col| {
            let universe_mean = balance::weighted_mean(&col.values, &all).unwrap_or(0.0);
            let universe_var = balance::weighted_variance(&col.values, &all).unwrap_or(0.0);
            let universe_sd = if col.is_level {
                (universe_mean * (1.0 - universe_mean)).sqrt()
            } else {
                universe_var.sqrt()
            };
            let before = balance::weighted_mean(&col.values, &ones).unwrap_or(0.0);
            let after = balance::weighted_mean(&col.values, w).unwrap_or(0.0);
            let ratio =
                |v: Option<f64>| v.and_then(|v| (universe_var > 0.0).then(|| v / universe_var));
            BalanceRow {
                covariate: col.name.clone(),
                label: col.label.clone(),
                smd_before: balance::smd(before, universe_mean, universe_sd),
                smd_after: balance::smd(after, universe_mean, universe_sd),
                variance_ratio_before: ratio(balance::weighted_variance(&col.values, &ones)),
                variance_ratio_after: ratio(balance::weighted_variance(&col.values, w)),
                universe_mean,
                participant_mean: before,
                weighted_mean: after,
            }
        })
        .collect()
}
