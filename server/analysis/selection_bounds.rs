//! How strong an unmeasured cause of taking part would have to be to overturn a weighted
//! mean: the marginal sensitivity model's bounds on the inverse-probability mean of an
//! outcome over the participating countries, over a grid of Λ, with the breakdown Λ for a
//! chosen reference and percentile-bootstrap intervals over countries.

use std::collections::HashMap;

use ndarray::{Array2, Axis};
use serde::Serialize;

use super::design::{self, Design};
use super::impact::Shares;
use super::settings::{ModelKind, Settings};
use crate::project::manifest::PopulationScale;
use crate::project::{Project, WaveView};
use crate::stats::binary;
use crate::stats::bootstrap::DrawCounts;
use crate::stats::selection_bounds::{self as sb, BootstrapIntervals};

/// Why the bounds cannot be computed, by what the reader can do about it.
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
pub enum SelectionBoundsError {
    /// The request names something this project cannot give (an outcome that is neither
    /// a numeric indicator nor a survey variable, a population column that is not an
    /// indicator, a reference that is not a number): change the setting.
    #[error("{0}")]
    Request(String),
    /// The participation design cannot be built from these settings and data.
    #[error("{0}")]
    Design(#[from] design::DesignError),
    /// The participation model cannot be fitted on this wave.
    #[error("the participation model cannot be fitted: {0}")]
    Model(#[from] binary::FitError),
    /// The data cannot answer: no participant with a value, a missing or non-positive
    /// population, propensities outside (0, 1].
    #[error("{0}")]
    Data(String),
}

impl From<sb::BoundsError> for SelectionBoundsError {
    fn from(e: sb::BoundsError) -> Self {
        SelectionBoundsError::Data(e.to_string())
    }
}

/// The Λ grid shown on the impact page.
pub const LAMBDA_GRID: [f64; 6] = [1.0, 1.1, 1.25, 1.5, 2.0, 3.0];
/// Bootstrap replicates of the bounds unless asked otherwise.
pub const DEFAULT_REPLICATES: usize = 199;
/// Most replicates a request may ask for.
pub const MAX_REPLICATES: usize = 4999;

/// What the breakdown Λ is measured against.
#[derive(Debug, Clone, PartialEq, Serialize)]
#[serde(tag = "kind", content = "value", rename_all = "kebab-case")]
pub enum Reference {
    Zero,
    /// The participants' mean with every participating country counting the same (or by
    /// population when countries count by population).
    Unweighted,
    Number(f64),
}

impl Reference {
    /// `zero`, `unweighted` or a number.
    pub fn parse(text: &str) -> Result<Reference, SelectionBoundsError> {
        match text.trim() {
            "zero" => Ok(Reference::Zero),
            "unweighted" => Ok(Reference::Unweighted),
            other => other
                .parse::<f64>()
                .ok()
                .filter(|v| v.is_finite())
                .map(Reference::Number)
                .ok_or_else(|| {
                    SelectionBoundsError::Request(format!(
                        "the reference must be zero, unweighted or a number, not '{other}'"
                    ))
                }),
        }
    }

    pub fn as_query(&self) -> String {
        match self {
            Reference::Zero => "zero".to_string(),
            Reference::Unweighted => "unweighted".to_string(),
            Reference::Number(v) => v.to_string(),
        }
    }
}

/// What the bounds are computed for.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct BoundsSettings {
    /// A numeric country indicator, or a survey variable (through its design-weighted
    /// country means).
    pub outcome: String,
    pub shares: Shares,
    pub lambdas: Vec<f64>,
    pub reference: Reference,
    /// Bootstrap replicates over countries (0: no intervals).
    pub replicates: usize,
    pub level: f64,
}

#[derive(Debug, Clone, Serialize)]
pub struct BoundRow {
    pub lambda: f64,
    pub lower: f64,
    pub upper: f64,
    /// Percentile-bootstrap interval: the lower end (null without a bootstrap).
    pub interval_low: Option<f64>,
    pub interval_high: Option<f64>,
}

#[derive(Debug, Clone, Serialize)]
pub struct SelectionBounds {
    pub wave: i64,
    pub settings: Settings,
    pub bounds_settings: BoundsSettings,
    /// How each country's value was obtained.
    pub outcome_source: String,
    /// The participation model whose propensities the weights invert.
    pub model: &'static str,
    pub model_converged: bool,
    /// Participating countries with a value.
    pub n_countries: usize,
    /// Participating countries left out because they have no value of the outcome.
    pub left_out: Vec<String>,
    /// The normalised inverse-probability mean (Λ = 1).
    pub weighted_mean: f64,
    /// Every participating country counting the same (or by population).
    pub unweighted_mean: f64,
    pub reference_value: f64,
    pub reference_label: String,
    pub rows: Vec<BoundRow>,
    /// The smallest Λ at which the bounds reach the reference (null: not by Λ = 10000).
    pub breakdown: Option<f64>,
    /// The smallest Λ of the grid whose bootstrap interval reaches the reference (null:
    /// none does, or no bootstrap).
    pub breakdown_with_sampling: Option<f64>,
    /// The breakdown in one sentence (and one on sampling error with a bootstrap).
    pub conclusion: String,
    pub bootstrap: Option<BootstrapIntervals>,
    pub notes: Vec<String>,
}

/// The command line's `outcome` object of `gapwise fit --outcome COL --sensitivity ...`.
#[derive(Debug, Clone, Serialize)]
pub struct OutcomeSummary {
    pub column: String,
    pub weighted_mean: f64,
    pub bounds: Vec<LambdaBound>,
}

#[derive(Debug, Clone, Serialize)]
pub struct LambdaBound {
    pub lambda: f64,
    pub lower: f64,
    pub upper: f64,
}

/// The pieces every bound needs, aligned with the design's units.
pub struct Prepared {
    pub design: Design,
    /// Each unit's value of the outcome (participants only; None elsewhere).
    pub value: Vec<Option<f64>>,
    /// Each unit's base weight (1, or its population).
    pub base: Vec<f64>,
    pub source: String,
    pub left_out: Vec<String>,
}

/// Each design unit's value of `outcome`: a numeric country indicator, or a survey
/// variable's design-weighted mean over the unit's respondents in the wave
/// (Σ d_r y_r / Σ d_r over respondents with both values).
pub fn country_values(
    project: Option<&Project>,
    view: &WaveView,
    design: &Design,
    outcome: &str,
) -> Result<(Vec<Option<f64>>, String), SelectionBoundsError> {
    if let Some(ind) = view.numeric.iter().find(|n| n.column == outcome) {
        return Ok((
            design
                .units
                .iter()
                .zip(&design.participated)
                .map(|(&u, &took)| if took { ind.values[u] } else { None })
                .collect(),
            format!("the country indicator {}", ind.label),
        ));
    }
    let roles = project.and_then(|p| p.manifest.microdata.as_ref());
    let micro = project.and_then(|p| p.microdata.as_ref());
    let (Some(roles), Some(micro)) = (roles, micro) else {
        return Err(SelectionBoundsError::Request(format!(
            "'{outcome}' is not a numeric country indicator{}",
            if project.is_some() {
                " and the project has no microdata"
            } else {
                " of this frame (survey variables need a project folder with microdata)"
            }
        )));
    };
    if !roles.variables.contains(&outcome.to_string()) {
        return Err(SelectionBoundsError::Request(format!(
            "'{outcome}' is neither a numeric country indicator ({}) nor a survey variable ({})",
            view.numeric
                .iter()
                .map(|n| n.column.as_str())
                .collect::<Vec<_>>()
                .join(", "),
            roles.variables.join(", ")
        )));
    }
    // Country codes as level indices: no copy of each respondent's code.
    let factor = micro.shared_factorise(&roles.country);
    let (countries, levels) = (&factor.0, &factor.1);
    let waves = micro.shared_integers(&roles.wave);
    let dw = micro.shared_numbers(&roles.design_weight);
    let y = micro.shared_numbers(outcome);
    let mut sums = vec![(0.0, 0.0); levels.len()];
    for i in 0..micro.height() {
        if waves[i] != Some(view.wave) {
            continue;
        }
        if let (Some(c), Some(w), Some(v)) = (countries[i], dw[i], y[i]) {
            sums[c].0 += w * v;
            sums[c].1 += w;
        }
    }
    let level_of: HashMap<&str, usize> = levels
        .iter()
        .enumerate()
        .map(|(i, l)| (l.as_str(), i))
        .collect();
    Ok((
        design
            .ids
            .iter()
            .zip(&design.participated)
            .map(|(id, &took)| {
                level_of
                    .get(id.as_str())
                    .map(|&l| sums[l])
                    .filter(|s| took && s.1 > 0.0)
                    .map(|s| s.0 / s.1)
            })
            .collect(),
        format!("each country's design-weighted mean of respondents' {outcome}"),
    ))
}

/// Builds the design, the values and the base weights.
pub fn prepare(
    project: Option<&Project>,
    view: &WaveView,
    settings: &Settings,
    outcome: &str,
    shares: &Shares,
) -> Result<Prepared, SelectionBoundsError> {
    let design = design::build(view, settings)?;
    let (value, source) = country_values(project, view, &design, outcome)?;
    let base = match shares {
        Shares::Equal => vec![1.0; design.n()],
        Shares::Population(col) => {
            // Without a project (a bare frame) the column is a count of people.
            let scale =
                project.map_or(PopulationScale::Count, |p| p.manifest.population_scale(col));
            let people = design
                .people(view, col, scale)
                .map_err(|e| SelectionBoundsError::Request(e.0))?;
            if people
                .iter()
                .zip(&design.participated)
                .any(|(p, &t)| t && !(p.is_finite() && *p > 0.0))
            {
                return Err(SelectionBoundsError::Data(
                    "a participating country's population is missing or not positive".to_string(),
                ));
            }
            people
        }
    };
    let left_out = (0..design.n())
        .filter(|&i| design.participated[i] && value[i].is_none())
        .map(|i| design.ids[i].clone())
        .collect();
    Ok(Prepared {
        design,
        value,
        base,
        source,
        left_out,
    })
}

/// Participants with a value: their values, propensities and base weights.
fn participants(
    value: &[Option<f64>],
    participated: &[bool],
    propensity: &[f64],
    base: &[f64],
) -> (Vec<f64>, Vec<f64>, Vec<f64>) {
    let mut out = (Vec::new(), Vec::new(), Vec::new());
    for i in 0..value.len() {
        if let (true, Some(v)) = (participated[i], value[i]) {
            out.0.push(v);
            out.1.push(propensity[i]);
            out.2.push(base[i]);
        }
    }
    out
}

/// The fitted propensities of the model on the standardised design, whether it converged
/// at a determined estimate, and the estimate (where the bootstrap's draws start).
fn propensities(
    kind: ModelKind,
    z: &Array2<f64>,
    participated: &[bool],
) -> Result<(Vec<f64>, bool, ndarray::Array1<f64>), binary::FitError> {
    let fit = binary::fit(kind, z.view(), participated)?;
    let converged = fit.converged && fit.weak_directions.is_empty();
    Ok((
        binary::predict(kind, z.view(), &fit.coef),
        converged,
        fit.coef,
    ))
}

fn bounds_at(
    y: &[f64],
    e: &[f64],
    base: &[f64],
    lambdas: &[f64],
) -> Result<Vec<(f64, f64)>, sb::BoundsError> {
    lambdas
        .iter()
        .map(|&l| sb::msm_bounds(y, e, base, l))
        .collect()
}

fn normalised_mean(y: &[f64], w: &[f64]) -> f64 {
    y.iter().zip(w).map(|(a, b)| a * b).sum::<f64>() / w.iter().sum::<f64>()
}

/// The command line's summary: the inverse-probability mean and its bounds per Λ.
pub fn outcome_summary(
    project: Option<&Project>,
    view: &WaveView,
    settings: &Settings,
    column: &str,
    lambdas: &[f64],
) -> Result<OutcomeSummary, SelectionBoundsError> {
    let p = prepare(project, view, settings, column, &Shares::Equal)?;
    let z = p.design.standardised();
    let (e, _, _) = propensities(settings.model, &z, &p.design.participated)?;
    let (y, e, base) = participants(&p.value, &p.design.participated, &e, &p.base);
    let (point, _) = sb::msm_bounds(&y, &e, &base, 1.0)?;
    let bounds = bounds_at(&y, &e, &base, lambdas)?;
    Ok(OutcomeSummary {
        column: column.to_string(),
        weighted_mean: point,
        bounds: lambdas
            .iter()
            .zip(bounds)
            .map(|(&lambda, (lower, upper))| LambdaBound {
                lambda,
                lower,
                upper,
            })
            .collect(),
    })
}

/// The bounds over the settings' Λ grid, the breakdown Λ and the bootstrap intervals.
pub fn selection_bounds(
    project: Option<&Project>,
    view: &WaveView,
    settings: &Settings,
    bs: &BoundsSettings,
) -> Result<SelectionBounds, SelectionBoundsError> {
    let p = prepare(project, view, settings, &bs.outcome, &bs.shares)?;
    let design = &p.design;
    let z = design.standardised();
    let (e_all, model_converged, estimate) =
        propensities(settings.model, &z, &design.participated)?;
    let (y, e, base) = participants(&p.value, &design.participated, &e_all, &p.base);
    let bounds = bounds_at(&y, &e, &base, &bs.lambdas)?;
    let (weighted_mean, _) = sb::msm_bounds(&y, &e, &base, 1.0)?;
    let unweighted_mean = normalised_mean(&y, &base);
    let (reference_value, reference_label) = match bs.reference {
        Reference::Zero => (0.0, "zero".to_string()),
        Reference::Unweighted => (
            unweighted_mean,
            format!(
                "the participants' unweighted mean ({unweighted_mean:.3}, every participating country counting {})",
                if matches!(bs.shares, Shares::Equal) { "the same" } else { "by population" }
            ),
        ),
        Reference::Number(v) => (v, format!("{v}")),
    };
    let breakdown = sb::breakdown_lambda(&y, &e, &base, reference_value)?;
    let bootstrap = if bs.replicates > 0 {
        let n = design.n();
        Some(sb::percentile_bootstrap(
            n,
            bs.lambdas.len(),
            bs.replicates,
            settings.seed,
            bs.level,
            |rows| {
                let took: Vec<bool> = rows.iter().map(|&i| design.participated[i]).collect();
                if took.iter().all(|&t| t) || !took.iter().any(|&t| t) {
                    return None;
                }
                // The model on the draw's distinct countries weighted by how often each was
                // drawn: the draw's estimate at the cost of its distinct rows.
                let counts = DrawCounts::of(rows, n)?;
                let zs = z.select(Axis(0), &counts.clusters);
                let took_distinct: Vec<bool> = counts
                    .clusters
                    .iter()
                    .map(|&i| design.participated[i])
                    .collect();
                let fit = binary::refit_counted(
                    settings.model,
                    zs.view(),
                    &took_distinct,
                    &counts.counts,
                    &estimate,
                    binary::SCORE_TOLERANCE,
                )
                .ok()?;
                if !(fit.converged && fit.weak_directions.is_empty()) {
                    return None;
                }
                let er = counts.expand(&binary::predict(settings.model, zs.view(), &fit.coef));
                let vr: Vec<Option<f64>> = rows.iter().map(|&i| p.value[i]).collect();
                let br: Vec<f64> = rows.iter().map(|&i| p.base[i]).collect();
                let (ys, es, bss) = participants(&vr, &took, &er, &br);
                bounds_at(&ys, &es, &bss, &bs.lambdas).ok()
            },
        )?)
    } else {
        None
    };
    let rows = bs
        .lambdas
        .iter()
        .zip(&bounds)
        .enumerate()
        .map(|(j, (&lambda, &(lower, upper)))| BoundRow {
            lambda,
            lower,
            upper,
            interval_low: bootstrap.as_ref().and_then(|b| b.low[j]),
            interval_high: bootstrap.as_ref().and_then(|b| b.high[j]),
        })
        .collect();
    let breakdown_with_sampling = bootstrap.as_ref().and_then(|b| {
        bs.lambdas
            .iter()
            .enumerate()
            .filter(|(j, _)| {
                matches!((b.low[*j], b.high[*j]), (Some(l), Some(h)) if l <= reference_value && reference_value <= h)
            })
            .map(|(_, &l)| l)
            .reduce(f64::min)
    });
    let mut conclusion = conclusion(
        &bs.outcome,
        weighted_mean,
        reference_value,
        &reference_label,
        breakdown,
    );
    if let Some(b) = &bootstrap {
        let level = format!("{:.0}%", 100.0 * b.level);
        conclusion.push(' ');
        conclusion.push_str(&match breakdown_with_sampling {
            Some(l) if l <= 1.0 => format!(
                "Allowing for sampling error, though, the {level} bootstrap interval already includes the reference without any unmeasured factor (Λ = 1)."
            ),
            Some(l) => format!(
                "Allowing for sampling error, the {level} bootstrap interval reaches the reference from Λ = {l} of the values shown."
            ),
            None => format!(
                "Allowing for sampling error, no {level} bootstrap interval of the values shown (up to Λ = {}) reaches the reference.",
                bs.lambdas.iter().copied().fold(f64::NAN, f64::max)
            ),
        });
    }
    let mut notes = vec![
        "Λ is an odds ratio on taking part, not on the outcome: Λ = 2 lets a factor the indicators do not measure double or halve a country's odds of taking part, given its indicators. The bounds are the worst case over every way that factor could be tied to the outcome.".to_string(),
        format!(
            "The bounds hold for inverse-probability-type weights: 1 / propensity from the {} participation model, untrimmed, each participant's weight free within [1 + (1/e − 1)/Λ, 1 + (1/e − 1)·Λ] (Tan 2006; Zhao, Small & Bhattacharya 2019). At Λ = 1 they give the inverse-probability estimate; they say nothing exact about entropy balancing, raking or trimmed weights.",
            settings.model.as_str()
        ),
        format!("Each country's value: {}.", p.source),
    ];
    if let Some(b) = &bootstrap {
        notes.push(format!(
            "Intervals: percentile bootstrap over the eligible countries (Zhao, Small & Bhattacharya 2019): {} replicates (seed {}) resample countries with replacement, refit the participation model and recompute the bounds; each interval runs from the {:.1}% quantile of the lower bounds to the {:.1}% quantile of the upper bounds. {} replicates failed (no participant or no non-participant drawn, or a model that does not converge) and are left out.",
            b.replicates,
            b.seed,
            50.0 * (1.0 - b.level),
            100.0 - 50.0 * (1.0 - b.level),
            b.failed
        ));
    }
    if !p.left_out.is_empty() {
        notes.push(format!(
            "Left out for want of a value: {} participating countr{} ({}).",
            p.left_out.len(),
            if p.left_out.len() == 1 { "y" } else { "ies" },
            p.left_out.join(", ")
        ));
    }
    if !model_converged {
        notes.push("The participation model did not converge to a finite estimate (separation or undetermined directions): propensities near 0 make the weights and their bounds unreliable.".to_string());
    }
    Ok(SelectionBounds {
        wave: view.wave,
        settings: settings.clone(),
        bounds_settings: bs.clone(),
        outcome_source: p.source.clone(),
        model: settings.model.as_str(),
        model_converged,
        n_countries: y.len(),
        left_out: p.left_out.clone(),
        weighted_mean,
        unweighted_mean,
        reference_value,
        reference_label,
        rows,
        breakdown,
        breakdown_with_sampling,
        conclusion,
        bootstrap,
        notes,
    })
}

/// The breakdown in one plain sentence.
fn conclusion(
    outcome: &str,
    estimate: f64,
    reference: f64,
    label: &str,
    breakdown: Option<f64>,
) -> String {
    if (estimate - reference).abs() <= 1e-12 * (1.0 + reference.abs()) {
        return format!(
            "The weighted mean of {outcome} equals {label}, so there is no difference for an unmeasured cause of taking part to overturn."
        );
    }
    let side = if estimate > reference {
        "above"
    } else {
        "below"
    };
    let claim = format!("The conclusion that the universe's mean of {outcome} lies {side} {label}");
    match breakdown {
        Some(l) => format!(
            "{claim} holds unless an unmeasured factor changes some countries' odds of taking part by more than {l:.2} times (breakdown Λ = {l:.2})."
        ),
        None => format!(
            "{claim} holds for every Λ up to {}: no weights the model allows bring the mean to it.",
            sb::LAMBDA_SEARCH_LIMIT
        ),
    }
}
