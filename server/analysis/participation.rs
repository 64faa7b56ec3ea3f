//! The participation model and the country weights for one wave: the result behind
//! `gapwise fit`, the participation and balance pages and the report.

use ndarray::{Array1, Array2};
use serde::Serialize;

use super::design::{self, Design};
use super::settings::{ModelKind, Settings, WeightingKind};
use crate::project::WaveView;
use crate::stats::{balance, binary, normal, weights};

/// One coefficient as every output shows it. A term the data cannot estimate has `None`
/// everywhere and says why in `not_estimable`.
#[derive(Debug, Clone, Serialize)]
pub struct Coefficient {
    pub term: String,
    /// The term's readable label (the manifest's, or one derived from the column name).
    pub label: String,
    /// On the indicator's original scale.
    pub coef: Option<f64>,
    pub se: Option<f64>,
    /// coef / se.
    pub z: Option<f64>,
    /// coef -/+ z_{0.975} se (normal approximation).
    pub ci95_low: Option<f64>,
    pub ci95_high: Option<f64>,
    /// exp(coef) and its interval (logit models, not the intercept).
    pub odds_ratio: Option<f64>,
    pub odds_ratio_low: Option<f64>,
    pub odds_ratio_high: Option<f64>,
    /// Why the term is not estimable, if it is not.
    pub not_estimable: Option<String>,
}

#[derive(Debug, Clone, Serialize)]
pub struct ModelReport {
    pub kind: ModelKind,
    /// Intercept first.
    pub terms: Vec<String>,
    /// On the indicators' original scale; `None` where not estimable.
    pub coef: Vec<Option<f64>>,
    pub se: Vec<Option<f64>>,
    /// Every term with its z value, 95% interval and (logit models) odds ratio.
    pub coefficients: Vec<Coefficient>,
    /// The standard normal quantile behind the 95% intervals.
    pub z_critical: f64,
    pub log_likelihood: f64,
    /// True only when the fit met its convergence criterion at a finite, determined estimate.
    pub converged: bool,
    pub iterations: usize,
    /// Largest absolute (for Firth: penalised) score element at the estimate.
    pub max_score: f64,
    pub auc: Option<f64>,
    /// AUC of the leave-one-out predictions, over the units whose refit succeeded.
    pub auc_loo: Option<f64>,
    /// Units whose leave-one-out prediction entered `auc_loo`.
    pub auc_loo_units: usize,
    /// Units whose leave-one-out refit failed (codes); their full-fit prediction is never used.
    pub loo_failed: Vec<String>,
    /// The model shows separation (the Firth model gives finite estimates then).
    pub separation: bool,
    pub warnings: Vec<String>,
}

#[derive(Debug, Clone, Serialize)]
pub struct WeightingReport {
    pub kind: WeightingKind,
    pub effective_n: f64,
    pub max_weight_share: f64,
    pub cv: f64,
    pub trim: Option<f64>,
    /// True only when the method met its own criterion (and did what its name says).
    pub converged: bool,
    /// Coefficients of the covariate-balancing propensity model (original scale).
    #[serde(skip_serializing_if = "Option::is_none")]
    pub coef: Option<Vec<f64>>,
    /// Largest |SMD| over the balance columns without weighting and with these weights.
    pub max_abs_smd_before: f64,
    pub max_abs_smd_after: f64,
    /// These weights leave the largest |SMD| worse than no weighting at all.
    pub worse_than_none: bool,
    /// The method could not do what its name says and returned another method's weights
    /// (named here).
    #[serde(skip_serializing_if = "Option::is_none")]
    pub fell_back_to: Option<&'static str>,
    pub warnings: Vec<String>,
}

/// Countries left out because an indicator value is missing, when that changes who is
/// analysed.
#[derive(Debug, Clone, Serialize)]
pub struct IncompleteCountries {
    pub dropped_participants: usize,
    pub dropped_non_participants: usize,
    /// Participant share among all eligible countries, and among those analysed.
    pub share_eligible: f64,
    pub share_analysed: f64,
    pub warning: String,
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
    /// Set when leaving out incomplete countries dropped participants or non-participants.
    pub incomplete: Option<IncompleteCountries>,
    /// Set when the missingness indicators are balanced as well (its caveat).
    #[serde(skip_serializing_if = "Option::is_none")]
    pub missing_caveat: Option<String>,
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
    /// The coefficients on the standardised design and whether the fit converged, for
    /// the fits that start from them (the GMM weighting's logit start, the pipeline
    /// bootstrap's draws) instead of fitting the model again.
    pub coef: Array1<f64>,
    pub converged: bool,
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
        coef: fit.coef,
        converged: fit.converged,
    })
}

/// Participants' weights from one method, normalised to sum to the number of eligible units.
#[derive(Debug, Clone)]
pub struct Weighted {
    pub report: WeightingReport,
    /// Aligned with the design's units; zero for non-participants.
    pub weights: Vec<f64>,
    /// The covariate-balancing fit's coefficients on the standardised design, when it
    /// converged (the pipeline bootstrap's draws start there).
    pub balancing_coef: Option<Array1<f64>>,
}

/// The weights of [`weigh`] alone, without its report, from the standardised design and
/// the model's propensities (the pipeline bootstrap fits the model on each draw without
/// its report, and needs only these; the balance table and the warnings cost more than
/// the weights of the cheaper methods).
pub fn weights_from(
    design: &Design,
    settings: &Settings,
    standardised: &Array2<f64>,
    propensity: &[f64],
) -> Result<Vec<f64>, AnalysisError> {
    let raw = compute_weights(design, settings, standardised, propensity, None)?;
    Ok(trimmed_and_normalised(design, settings, raw.weights))
}

/// The settings' trimming, then normalisation to the number of eligible units.
fn trimmed_and_normalised(design: &Design, settings: &Settings, w: Vec<f64>) -> Vec<f64> {
    let w = match settings.trim {
        Some(q) => weights::trim(&w, &design.participated, q),
        None => w,
    };
    weights::normalise(&w, design.n() as f64)
}

/// Weights the participants by the settings' method (and trimming).
pub fn weigh(
    design: &Design,
    settings: &Settings,
    model: &FittedModel,
) -> Result<Weighted, AnalysisError> {
    let y = &design.participated;
    // The GMM weighting starts from the logit, which is the model itself when the model is
    // a logit.
    let logit = (settings.model == ModelKind::Logit).then_some(&model.coef);
    let raw = compute_weights(
        design,
        settings,
        &model.standardised,
        &model.propensity,
        logit,
    )?;
    let (converged, cbps_coef) = (raw.converged, raw.coef);
    let mut warnings = raw.warnings;
    if let Some(q) = settings.trim {
        if matches!(
            settings.weighting,
            WeightingKind::Entropy | WeightingKind::Raking | WeightingKind::CovariateBalancing
        ) {
            warnings.push(format!("trimming at the {:.0}th percentile undoes part of the exact balance this method achieves", 100.0 * q));
        }
    }
    let w = trimmed_and_normalised(design, settings, raw.weights);
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
    if !converged && raw.fell_back_to.is_none() {
        warnings.push("the weighting did not converge; its balance is approximate".to_string());
    }
    let rows = balance_table(design, &w);
    let largest = |f: fn(&BalanceRow) -> Option<f64>| {
        rows.iter()
            .filter_map(f)
            .fold(0.0f64, |m, v| m.max(v.abs()))
    };
    let max_abs_smd_before = largest(|r| r.smd_before);
    let max_abs_smd_after = largest(|r| r.smd_after);
    // Common practice: weights should bring participants closer to the universe; a
    // larger worst |SMD| than without weights (beyond rounding) is flagged.
    let worse_than_none = max_abs_smd_after > max_abs_smd_before + 1e-9;
    if worse_than_none {
        warnings.push(format!(
            "worse than no weighting: with these weights the largest |SMD| is {max_abs_smd_after:.2}, against {max_abs_smd_before:.2} for the participants unweighted; they make participants less like the eligible universe"
        ));
    }
    Ok(Weighted {
        report: WeightingReport {
            kind: settings.weighting,
            effective_n,
            max_weight_share,
            cv: balance::coefficient_of_variation(&participant_weights),
            trim: settings.trim,
            converged,
            coef: cbps_coef,
            max_abs_smd_before,
            max_abs_smd_after,
            worse_than_none,
            fell_back_to: raw.fell_back_to,
            warnings,
        },
        weights: w,
        balancing_coef: raw.balancing_coef,
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
        incomplete: incomplete_countries(design),
        missing_caveat: missing_caveat(settings),
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

/// The linear map from standardised to original-scale coefficients, b = A b*.
fn scale_map(design: &Design, k: usize) -> Array2<f64> {
    let mut a = Array2::<f64>::zeros((k, k));
    a[[0, 0]] = 1.0;
    for j in 1..k {
        a[[j, j]] = 1.0 / design.scale[j];
        a[[0, j]] = -design.centre[j] / design.scale[j];
    }
    a
}

/// Which original-scale terms a direction d* in standardised coefficient space moves:
/// slope j when |d*_j| > 1e-4 (d* of unit length); the intercept when its image
/// d*_0 - sum_j d*_j m_j / s_j does not cancel to within 1e-4 of its parts.
fn terms_moved(design: &Design, d: &Array1<f64>) -> Vec<usize> {
    let norm = d.dot(d).sqrt();
    if norm == 0.0 || !norm.is_finite() {
        return Vec::new();
    }
    let d = d / norm;
    let mut out = Vec::new();
    let parts: f64 = d[0].abs()
        + (1..d.len())
            .map(|j| (d[j] * design.centre[j] / design.scale[j]).abs())
            .sum::<f64>();
    let image: f64 = d[0]
        - (1..d.len())
            .map(|j| d[j] * design.centre[j] / design.scale[j])
            .sum::<f64>();
    if image.abs() > 1e-4 * parts.max(1.0) {
        out.push(0);
    }
    out.extend((1..d.len()).filter(|&j| d[j].abs() > 1e-4));
    out
}

fn name_list(names: &[&str]) -> String {
    match names {
        [] => String::new(),
        [one] => (*one).to_string(),
        [init @ .., last] => format!("{} and {last}", init.join(", ")),
    }
}

/// For each term, why it is not estimable (if it is not): aliased columns and the terms in
/// their relation; weak directions of the information (separation or near-singularity).
fn not_estimable_reasons(
    design: &Design,
    kind: ModelKind,
    fit: &binary::BinaryFit,
) -> Vec<Option<String>> {
    let k = fit.coef.len();
    let mut reasons: Vec<Option<String>> = vec![None; k];
    let name = |j: usize| design.term_labels[j].as_str();
    for alias in &fit.aliased {
        let mut d = Array1::<f64>::zeros(k);
        d[alias.term] = 1.0;
        // The relation z_term = sum c_l z_l on the standardised scale.
        let zs = design.standardised();
        let xk = zs.select(ndarray::Axis(1), &alias.combination_of);
        let gram = xk.t().dot(&xk);
        let rhs = xk.t().dot(&zs.column(alias.term));
        if let Ok(c) = crate::stats::linalg::solve_spd(gram.view(), rhs.view()) {
            for (&l, cl) in alias.combination_of.iter().zip(c.iter()) {
                d[l] -= cl;
            }
        }
        let moved = terms_moved(design, &d);
        let others: Vec<&str> = alias
            .combination_of
            .iter()
            .filter(|&&l| l != 0)
            .map(|&l| name(l))
            .collect();
        let reason = format!(
            "{} is an exact linear combination of {}{}, so the data cannot tell their effects apart; the model is fitted without {} (fitted probabilities and weights are unaffected)",
            name(alias.term),
            if others.is_empty() { "the intercept".to_string() } else { name_list(&others) },
            if others.is_empty() || !alias.combination_of.contains(&0) { "" } else { " and the intercept" },
            name(alias.term),
        );
        for j in moved.into_iter().chain(std::iter::once(alias.term)) {
            reasons[j].get_or_insert_with(|| reason.clone());
        }
    }
    for d in &fit.weak_directions {
        let moved = terms_moved(design, d);
        let names: Vec<&str> = moved.iter().map(|&j| name(j)).collect();
        let reason = if fit.extreme_units > 0 && kind != ModelKind::Firth {
            format!(
                "separation: {} countr{} fitted with a probability of 0 or 1, and the likelihood keeps rising as the coefficients of {} grow without bound, so no finite estimate exists; the Firth model gives finite estimates",
                fit.extreme_units,
                if fit.extreme_units == 1 { "y is" } else { "ies are" },
                name_list(&names)
            )
        } else {
            format!(
                "the information matrix is singular (to 1 part in 10^10) along a combination of {}: the data do not determine these coefficients (nearly collinear indicators)",
                name_list(&names)
            )
        };
        for j in moved {
            reasons[j].get_or_insert_with(|| reason.clone());
        }
    }
    reasons
}

/// Coefficients, standard errors, z values, 95% intervals and odds ratios on the original
/// scale; every not-estimable term is `None` throughout.
fn coefficients(design: &Design, kind: ModelKind, fit: &binary::BinaryFit) -> Vec<Coefficient> {
    let k = fit.coef.len();
    let a = scale_map(design, k);
    let b = a.dot(&fit.coef);
    // Aliased coefficients are fixed at 0 in the fit: their NaN covariance entries count 0.
    let cov = fit.cov.mapv(|v| if v.is_finite() { v } else { 0.0 });
    let variance = a.dot(&cov).dot(&a.t());
    let reasons = not_estimable_reasons(design, kind, fit);
    let zc = normal::quantile(0.975);
    let logit = kind != ModelKind::Probit;
    (0..k)
        .map(|j| {
            let v = variance[[j, j]];
            let usable = reasons[j].is_none() && b[j].is_finite() && v.is_finite() && v > 0.0;
            let mut reason = reasons[j].clone();
            if reason.is_none() && !usable {
                reason = Some(
                    "the information matrix gives this term no positive, finite variance"
                        .to_string(),
                );
            }
            let (coef, se) = if usable {
                (Some(b[j]), Some(v.sqrt()))
            } else {
                (None, None)
            };
            let low = coef.zip(se).map(|(c, s)| c - zc * s);
            let high = coef.zip(se).map(|(c, s)| c + zc * s);
            let or = |x: Option<f64>| x.filter(|_| logit && j > 0).map(f64::exp);
            Coefficient {
                term: design.terms[j].clone(),
                label: design.term_labels[j].clone(),
                coef,
                se,
                z: coef.zip(se).map(|(c, s)| c / s),
                ci95_low: low,
                ci95_high: high,
                odds_ratio: or(coef),
                odds_ratio_low: or(low),
                odds_ratio_high: or(high),
                not_estimable: reason,
            }
        })
        .collect()
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
    let coefficients = coefficients(design, kind, fit);
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
    for alias in &fit.aliased {
        if let Some(reason) = &coefficients[alias.term].not_estimable {
            warnings.push(format!("not estimable: {reason}"));
        }
    }
    let mut separation = false;
    if kind != ModelKind::Firth {
        let separating = binary::separating_terms(z.view(), y);
        if let Some(s) = separating.first() {
            separation = true;
            warnings.push(format!(
                "{} separation: every participant's {} is {} every non-participant's, so the maximum-likelihood estimate does not exist; use the Firth model",
                if s.complete { "complete" } else { "quasi-complete" },
                design.term_labels[s.term],
                if s.participants_above { "at or above" } else { "at or below" }
            ));
        } else if fit.extreme_units > 0 && !fit.weak_directions.is_empty() {
            separation = true;
            let moved: Vec<&str> = fit
                .weak_directions
                .iter()
                .flat_map(|d| terms_moved(design, d))
                .map(|j| design.term_labels[j].as_str())
                .collect::<std::collections::BTreeSet<_>>()
                .into_iter()
                .collect();
            warnings.push(format!(
                "separation: {} countr{} fitted with a probability of 0 or 1 and the estimate runs off to infinity along {}, so the maximum-likelihood estimate does not exist; use the Firth model",
                fit.extreme_units,
                if fit.extreme_units == 1 { "y is" } else { "ies are" },
                name_list(&moved)
            ));
        } else if binary::looks_separated(fit, kind, z.view()) && fit.extreme_units > 0 {
            separation = true;
            warnings.push(
                "the fit shows signs of separation (fitted probabilities of 0 or 1); use the Firth model"
                    .to_string(),
            );
        }
    }
    if !fit.converged {
        if fit.weak_directions.is_empty() {
            warnings.push(format!(
                "the model did not meet its convergence criterion after {} iterations (largest score element {:.1e}); treat its numbers as approximate",
                fit.iterations, fit.max_score
            ));
        } else if !separation {
            warnings.push(
                "the model has no determined estimate (a singular information matrix); the terms concerned are marked not estimable"
                    .to_string(),
            );
        }
    }
    let not_estimable: Vec<&str> = coefficients
        .iter()
        .filter(|c| c.not_estimable.is_some())
        .map(|c| c.term.as_str())
        .collect();
    if !not_estimable.is_empty() {
        warnings.push(format!(
            "not estimable: {} (standard errors, z values and intervals are not shown for {})",
            name_list(&not_estimable),
            if not_estimable.len() == 1 {
                "it"
            } else {
                "them"
            }
        ));
    }
    let (auc_loo, auc_loo_units, loo_failed) = if leave_one_out {
        let predictions = binary::leave_one_out(kind, z.view(), y, fit);
        let failed: Vec<String> = predictions
            .iter()
            .enumerate()
            .filter(|(_, p)| p.is_none())
            .map(|(i, _)| design.ids[i].clone())
            .collect();
        let (scores, outcomes): (Vec<f64>, Vec<bool>) = predictions
            .iter()
            .zip(y)
            .filter_map(|(p, &t)| p.map(|p| (p, t)))
            .unzip();
        if !failed.is_empty() {
            warnings.push(format!(
                "{} of {} leave-one-out refits failed (without {}: the refit did not converge, or the country's prediction rests on a coefficient the other countries cannot estimate); the leave-one-out AUC {}",
                failed.len(),
                y.len(),
                if failed.len() <= 10 { failed.join(", ") } else { format!("{} and {} more", failed[..10].join(", "), failed.len() - 10) },
                if scores.is_empty() { "is not reported".to_string() } else { format!("uses the other {} countries", scores.len()) }
            ));
        }
        (binary::auc(&scores, &outcomes), scores.len(), failed)
    } else {
        (None, 0, Vec::new())
    };
    ModelReport {
        kind,
        terms: design.terms.clone(),
        coef: coefficients.iter().map(|c| c.coef).collect(),
        se: coefficients.iter().map(|c| c.se).collect(),
        coefficients,
        z_critical: normal::quantile(0.975),
        log_likelihood: fit.log_likelihood,
        converged: fit.converged,
        iterations: fit.iterations,
        max_score: fit.max_score,
        auc: binary::auc(propensity, y),
        auc_loo,
        auc_loo_units,
        loo_failed,
        separation,
        warnings,
    }
}

/// Raw (unnormalised) weights of one method and what it says about them.
struct RawWeights {
    weights: Vec<f64>,
    converged: bool,
    /// CBPS coefficients (original scale).
    coef: Option<Vec<f64>>,
    /// The same on the standardised design, when the fit converged.
    balancing_coef: Option<Array1<f64>>,
    fell_back_to: Option<&'static str>,
    warnings: Vec<String>,
}

impl RawWeights {
    fn plain(weights: Vec<f64>, converged: bool) -> Self {
        RawWeights {
            weights,
            converged,
            coef: None,
            balancing_coef: None,
            fell_back_to: None,
            warnings: Vec::new(),
        }
    }
}

/// `logit`: the logit's coefficients on `z` when already fitted (the GMM weighting starts
/// there); `None`: fitted here when needed.
fn compute_weights(
    design: &Design,
    settings: &Settings,
    z: &Array2<f64>,
    propensity: &[f64],
    logit: Option<&Array1<f64>>,
) -> Result<RawWeights, AnalysisError> {
    let y = &design.participated;
    let method = settings.weighting.as_str();
    let fail = |message: String| AnalysisError::Weighting { method, message };
    match settings.weighting {
        WeightingKind::InverseProbability => weights::inverse_probability(propensity, y)
            .map(|w| RawWeights::plain(w, true))
            .map_err(|e| fail(e.to_string())),
        WeightingKind::CovariateBalancing | WeightingKind::CovariateBalancingGmm => {
            let cbps = if settings.weighting == WeightingKind::CovariateBalancing {
                weights::cbps_just_identified(z.view(), y)
            } else {
                let start = match logit {
                    Some(coef) => coef.clone(),
                    None => binary::fit(ModelKind::Logit, z.view(), y)
                        .map(|f| f.coef)
                        .unwrap_or_else(|_| Array1::zeros(z.ncols())),
                };
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
            let mut warnings = Vec::new();
            let mut fell_back_to = None;
            let gmm = settings.weighting == WeightingKind::CovariateBalancingGmm;
            let unreachable: Vec<&str> = cbps
                .unreachable
                .iter()
                .map(|&j| design.term_labels[j].as_str())
                .collect();
            if gmm && cbps.stayed_at_start {
                fell_back_to = Some("inverse-probability");
                warnings.push(format!(
                    "fell back to plain inverse-probability weights: the over-identified (GMM) fit could not move from its starting logit{}, so these are the logit's inverse-probability weights and balance nothing beyond them",
                    if unreachable.is_empty() { String::new() } else { format!(" because every participant has the same value of {} (a level without participants), whose universe share no weighting of participants can reach", name_list(&unreachable)) }
                ));
            } else if gmm && !unreachable.is_empty() {
                warnings.push(format!(
                    "{} cannot be balanced: every participant has the same value (a level without participants), so the weights leave {} unbalanced",
                    name_list(&unreachable),
                    if unreachable.len() == 1 { "it" } else { "them" }
                ));
            }
            let converged = cbps.converged && !cbps.stayed_at_start;
            Ok(RawWeights {
                weights: w,
                converged,
                coef: Some(coef),
                balancing_coef: converged.then(|| cbps.coef.clone()),
                fell_back_to,
                warnings,
            })
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
                Ok(fit) => Ok(RawWeights::plain(fit.weights, fit.converged)),
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
                Ok(fit) => Ok(RawWeights::plain(fit.weights, fit.converged)),
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
    use super::settings::MissingRule;
    let filled = || {
        design
            .filled
            .iter()
            .map(|(c, n, m)| format!("{c} ({n} filled with {m:.3})"))
            .collect::<Vec<_>>()
            .join("; ")
    };
    match settings.missing {
        MissingRule::CompleteCases if design.dropped.is_empty() => {
            "No missing values among the chosen indicators".to_string()
        }
        MissingRule::CompleteCases => format!(
            "Complete cases: {} countr{} left out for missing values: {}",
            design.dropped.len(),
            if design.dropped.len() == 1 {
                "y"
            } else {
                "ies"
            },
            design.dropped.join("; ")
        ),
        MissingRule::MedianFill | MissingRule::FillAndBalance if design.filled.is_empty() => {
            "No missing values among the chosen indicators".to_string()
        }
        MissingRule::MedianFill => format!(
            "Median fill with a missingness indicator per filled indicator: {}",
            filled()
        ),
        MissingRule::FillAndBalance => format!(
            "Median fill with a missingness indicator per filled indicator, in the model and among the balanced columns: {}",
            filled()
        ),
        // An imputed analysis replaces this note (analysis::imputed); on a frame that
        // reached an analysis without being completed, the incomplete countries are left out.
        MissingRule::Impute if design.dropped.is_empty() => {
            "No missing values among the chosen indicators".to_string()
        }
        MissingRule::Impute => format!(
            "This result did not use the imputations: {} countr{} with missing values left out: {}",
            design.dropped.len(),
            if design.dropped.len() == 1 { "y" } else { "ies" },
            design.dropped.join("; ")
        ),
    }
}

/// The warning when complete cases leave out participants or non-participants: counts,
/// and the participant share among all eligible countries against the analysed ones.
pub fn incomplete_countries(design: &Design) -> Option<IncompleteCountries> {
    if design.dropped.is_empty() {
        return None;
    }
    let dropped_participants = design.dropped_took_part.iter().filter(|&&t| t).count();
    let dropped_non_participants = design.dropped_took_part.len() - dropped_participants;
    let n_all = design.n() + design.dropped.len();
    let share_eligible =
        (design.n_participants() + dropped_participants) as f64 / n_all.max(1) as f64;
    let share_analysed = design.n_participants() as f64 / design.n().max(1) as f64;
    let warning = format!(
        "Leaving out incomplete countries dropped {} of {n_all} eligible countries ({dropped_participants} participant{}, {dropped_non_participants} non-participant{}): the participant share moves from {:.1}% among all eligible countries to {:.1}% among those analysed, and the weights stand for the complete countries only. To keep them, choose missing values \"fill-and-balance\" (or \"median-fill\").",
        design.dropped.len(),
        if dropped_participants == 1 { "" } else { "s" },
        if dropped_non_participants == 1 { "" } else { "s" },
        100.0 * share_eligible,
        100.0 * share_analysed,
    );
    Some(IncompleteCountries {
        dropped_participants,
        dropped_non_participants,
        share_eligible,
        share_analysed,
        warning,
    })
}

/// [`incomplete_countries`] of a wave under `settings` (for pages whose own result does
/// not carry it: coverage, plan, impact); `None` also when the design cannot be built
/// (the page's own analysis then says why).
pub fn incomplete_for(view: &WaveView, settings: &Settings) -> Option<IncompleteCountries> {
    design::build(view, settings)
        .ok()
        .and_then(|d| incomplete_countries(&d))
}

/// The caveat of balancing missingness indicators.
pub fn missing_caveat(settings: &Settings) -> Option<String> {
    (settings.missing == super::settings::MissingRule::FillAndBalance).then(|| {
        "Missing-indicator approach: filled values stand in for unknown ones, and the weights match how often each indicator is missing, not the unknown values themselves. Participants then resemble the universe on the observed values and on the pattern of missingness (Rosenbaum & Rubin 1984, from memory); if the unknown values differ from the filled ones in a way related to participation, balance on them is not assured.".to_string()
    })
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
