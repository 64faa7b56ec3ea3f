//! What every analysis page needs: the project, the settings from the query string, the
//! chosen wave's view, and the settings form.

use std::sync::Arc;

use serde::Serialize;

use super::error::{AppError, AppResult};
use super::state::AppState;
use super::work::Lane;
use crate::analysis::cache::CacheKey;
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
pub const IMPACT_KEYS: [&str; 7] = [
    "outcome",
    "predictor",
    "family",
    "shares",
    "population",
    "bootstrap",
    "country_indicator",
];

/// Query keys of the impact page's sensitivity bounds (web::impact_bounds).
pub const BOUNDS_KEYS: [&str; 2] = ["reference", "bounds_bootstrap"];

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
                && !BOUNDS_KEYS.contains(&k.as_str())
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
    let (wave, view) = project
        .resolve_wave(settings.wave)
        .map_err(AppError::NotFound)?;
    settings.wave = Some(wave);
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
                (
                    MissingRule::FillAndBalance,
                    "Fill with median + missing flag, and balance the flags",
                ),
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

/// The cache key of a page's result: the page (by its result type), the project's
/// revision and the normalised settings (wave filled in, then the page's own keys in a
/// fixed order). `None` when the settings do not parse; the computation then reports why.
fn page_key<T>(state: &AppState, query: &Query) -> Option<CacheKey> {
    let project = state.project();
    let mut settings = settings_from_query(query).ok()?;
    if settings.wave.is_none() {
        settings.wave = project.waves.last().copied();
    }
    let mut own: Vec<(&str, &str)> = query
        .iter()
        .filter(|(k, _)| {
            PLAN_KEYS.contains(&k.as_str())
                || IMPACT_KEYS.contains(&k.as_str())
                || BOUNDS_KEYS.contains(&k.as_str())
        })
        .map(|(k, v)| (k.as_str(), v.as_str()))
        .collect();
    // Stable: repeated keys (predictors, joiners) keep their order, which the result shows.
    own.sort_by_key(|(k, _)| *k);
    let mut canonical = form_urlencoded::Serializer::new(settings.to_query());
    canonical.extend_pairs(own);
    Some(CacheKey::new(
        project.revision,
        std::any::type_name::<T>(),
        canonical.finish(),
    ))
}

/// Runs a light page computation (a model fit, a table) on the blocking pool, through the
/// result cache.
pub async fn off_thread<T>(
    state: &Arc<AppState>,
    query: &Query,
    compute: fn(&AppState, &Query) -> AppResult<T>,
) -> AppResult<T>
where
    T: Clone + Serialize + Send + Sync + 'static,
{
    run(Lane::Light, state, query, compute).await
}

/// Runs a heavy page computation (bootstrap replicates, the planner, the report) on the
/// bounded heavy pool, through the result cache; answers 503 when too much is queued.
pub async fn off_thread_heavy<T>(
    state: &Arc<AppState>,
    query: &Query,
    compute: fn(&AppState, &Query) -> AppResult<T>,
) -> AppResult<T>
where
    T: Clone + Serialize + Send + Sync + 'static,
{
    run(Lane::Heavy, state, query, compute).await
}

async fn run<T>(
    lane: Lane,
    state: &Arc<AppState>,
    query: &Query,
    compute: fn(&AppState, &Query) -> AppResult<T>,
) -> AppResult<T>
where
    T: Clone + Serialize + Send + Sync + 'static,
{
    let key = page_key::<T>(state, query);
    let (job_state, query) = (Arc::clone(state), query.clone());
    Ok(state
        .work
        .run(lane, &state.cache, key, move || compute(&job_state, &query))
        .await?)
}
