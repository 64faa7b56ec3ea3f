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
    })
}
