//! What every analysis page needs: the project, the settings from the query string, the
//! chosen wave's view, and the settings form.

use std::sync::Arc;

use serde::Serialize;

use super::error::{AppError, AppResult};
use super::state::AppState;
use crate::analysis::settings::{MissingRule, ModelKind, Settings, WeightingKind};
use crate::project::{Project, WaveView};

/// The query string as ordered pairs (repeated keys allowed, as checkboxes send them).
pub type Query = Vec<(String, String)>;

/// Query keys that belong to the recruitment planner, not to the analysis settings.
pub const PLAN_KEYS: [&str; 7] = [
    "budget",
    "cost_budget",
    "cost_column",
    "feasibility",
    "replicates",
    "joiner",
    "objective",
];

/// Query keys that belong to the impact view.
pub const IMPACT_KEYS: [&str; 6] = [
    "outcome",
    "predictor",
    "family",
    "shares",
    "population",
    "bootstrap",
];

/// Folds the form's repeated `covariate` / `factor` checkboxes into the settings' lists.
/// A submitted form (`form=1`) with nothing ticked means an empty list, not "all".
pub fn settings_from_query(query: &Query) -> AppResult<Settings> {
    let submitted = query.iter().any(|(k, _)| k == "form");
    let ticked = |key: &str| {
        query
            .iter()
            .filter(|(k, _)| k == key)
            .map(|(_, v)| v.as_str())
            .collect::<Vec<_>>()
            .join(",")
    };
    let mut pairs: Vec<(&str, String)> = query
        .iter()
        .filter(|(k, _)| {
            !matches!(k.as_str(), "form" | "covariate" | "factor")
                && !PLAN_KEYS.contains(&k.as_str())
                && !IMPACT_KEYS.contains(&k.as_str())
        })
        .map(|(k, v)| (k.as_str(), v.clone()))
        .collect();
    if submitted {
        pairs.push(("covariates", ticked("covariate")));
        pairs.push(("factors", ticked("factor")));
    }
    Settings::from_pairs(pairs.iter().map(|(k, v)| (*k, v.as_str())))
        .map_err(|e| AppError::BadRequest(e.to_string()))
}

/// The project, the settings (wave filled in: the latest when not given) and the view.
pub fn resolve(state: &AppState, query: &Query) -> AppResult<(Arc<Project>, Settings, WaveView)> {
    let project = state.project();
    let mut settings = settings_from_query(query)?;
    let wave = match settings.wave {
        Some(w) => w,
        None => *project
            .waves
            .last()
            .ok_or_else(|| AppError::NotFound("the project has no waves".into()))?,
    };
    settings.wave = Some(wave);
    let view = project.wave(wave).ok_or_else(|| {
        AppError::NotFound(format!(
            "there is no wave {wave}; the project's waves are {}",
            project
                .waves
                .iter()
                .map(i64::to_string)
                .collect::<Vec<_>>()
                .join(", ")
        ))
    })?;
    Ok((project, settings, view))
}

#[derive(Debug, Clone, Serialize)]
pub struct Choice {
    pub value: String,
    pub label: String,
    pub selected: bool,
}

/// The settings form shown on every analysis page.
#[derive(Debug, Clone, Serialize)]
pub struct SettingsForm {
    pub action: &'static str,
    pub waves: Vec<Choice>,
    pub models: Vec<Choice>,
    pub weightings: Vec<Choice>,
    pub trims: Vec<Choice>,
    pub missing: Vec<Choice>,
    pub covariates: Vec<Choice>,
    pub factors: Vec<Choice>,
    /// The current settings as a query string, for links between pages.
    pub query: String,
}

impl SettingsForm {
    pub fn new(action: &'static str, project: &Project, settings: &Settings) -> Self {
        let m = &project.manifest;
        let chosen = |list: &Option<Vec<String>>, column: &String| {
            list.as_ref().is_none_or(|l| l.contains(column))
        };
        SettingsForm {
            action,
            waves: project
                .waves
                .iter()
                .map(|w| Choice {
                    value: w.to_string(),
                    label: format!("Wave {w}"),
                    selected: settings.wave == Some(*w),
                })
                .collect(),
            models: [
                (ModelKind::Logit, "Logit"),
                (ModelKind::Firth, "Logit, Firth-penalised"),
                (ModelKind::Probit, "Probit"),
            ]
            .into_iter()
            .map(|(k, label)| Choice {
                value: k.as_str().into(),
                label: label.into(),
                selected: settings.model == k,
            })
            .collect(),
            weightings: WeightingKind::ALL
                .into_iter()
                .map(|k| Choice {
                    value: k.as_str().into(),
                    label: k.label().into(),
                    selected: settings.weighting == k,
                })
                .collect(),
            trims: [None, Some(0.99), Some(0.95), Some(0.9), Some(0.8)]
                .into_iter()
                .map(|t| Choice {
                    value: t.map_or("none".into(), |q: f64| q.to_string()),
                    label: t.map_or("No trimming".into(), |q| {
                        format!("Cap at {:.0}th percentile", 100.0 * q)
                    }),
                    selected: settings.trim == t,
                })
                .collect(),
            missing: [
                (
                    MissingRule::CompleteCases,
                    "Leave out countries with missing values",
                ),
                (MissingRule::MedianFill, "Fill with median + missing flag"),
            ]
            .into_iter()
            .map(|(k, label)| Choice {
                value: k.as_str().into(),
                label: label.into(),
                selected: settings.missing == k,
            })
            .collect(),
            covariates: m
                .indicators
                .numeric
                .iter()
                .map(|c| Choice {
                    value: c.clone(),
                    label: m.label(c).to_string(),
                    selected: chosen(&settings.covariates, c),
                })
                .collect(),
            factors: m
                .indicators
                .categorical
                .iter()
                .map(|c| Choice {
                    value: c.clone(),
                    label: m.label(c).to_string(),
                    selected: chosen(&settings.factors, c),
                })
                .collect(),
            query: settings.to_query(),
        }
    }
}

/// Runs a page's computation on the blocking pool, so that a long analysis (a bootstrap,
/// say) does not hold up the server's other requests.
pub async fn off_thread<T: Send + 'static>(
    state: &Arc<AppState>,
    query: &Query,
    compute: fn(&AppState, &Query) -> AppResult<T>,
) -> AppResult<T> {
    let (state, query) = (Arc::clone(state), query.clone());
    tokio::task::spawn_blocking(move || compute(&state, &query))
        .await
        .map_err(|e| AppError::Internal(format!("the computation stopped: {e}")))?
}
