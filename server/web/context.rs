//! What every analysis page needs: the project, the settings from the query string, the
//! chosen wave's view, and the settings form.

use std::sync::Arc;

use serde::Serialize;

use super::error::AppResult;
use super::state::AppState;
use super::work::Lane;
use crate::analysis::cache::CacheKey;
use crate::analysis::settings::{model_label, MissingRule, ModelKind, Settings, WeightingKind};
use crate::project::{Project, WaveView};

/// The query string as ordered pairs (repeated keys allowed, as checkboxes send them).
pub type Query = Vec<(String, String)>;

/// Query keys that belong to the recruitment planner, not to the analysis settings.
pub const PLAN_KEYS: [&str; 8] = [
    "budget",
    "cost_budget",
    "cost_column",
    "feasibility",
    "replicates",
    "joiner",
    "objective",
    "support",
];

/// Query keys that belong to the impact view (`kind` is the model: linear or logistic,
/// as the command line's `--kind`; `family` is read as its older name). `replicates`, the
/// pipeline bootstrap, is shared with the planner's list; `bootstrap` is the older name of
/// `wild_replicates`.
pub const IMPACT_KEYS: [&str; 9] = [
    "outcome",
    "predictor",
    "kind",
    "family",
    "shares",
    "population",
    "bootstrap",
    "wild_replicates",
    "country_indicator",
];

/// Query keys that belong to the meeting report (the waves it covers).
/// (`impact_replicates`: the impact section's pipeline bootstrap, whose page key
/// `replicates` is the planner's in the report.)
pub const REPORT_KEYS: [&str; 2] = ["waves", "impact_replicates"];

/// Query keys of the impact page's sensitivity bounds (web::impact_bounds).
pub const BOUNDS_KEYS: [&str; 2] = ["reference", "bounds_bootstrap"];

/// Whether `key` belongs to a page's own settings rather than to the analysis settings.
pub fn own_key(key: &str) -> bool {
    PLAN_KEYS.contains(&key)
        || IMPACT_KEYS.contains(&key)
        || REPORT_KEYS.contains(&key)
        || BOUNDS_KEYS.contains(&key)
}

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
            !matches!(k.as_str(), "form" | "covariate" | "factor" | "view") && !own_key(k)
        })
        .map(|(k, v)| (k.as_str(), v.clone()))
        .collect();
    if submitted {
        pairs.push(("covariates", ticked("covariate")));
        pairs.push(("factors", ticked("factor")));
    }
    Ok(Settings::from_pairs(
        pairs.iter().map(|(k, v)| (*k, v.as_str())),
    )?)
}

/// The project, the settings (wave filled in: the latest when not given) and the view.
pub fn resolve(state: &AppState, query: &Query) -> AppResult<(Arc<Project>, Settings, WaveView)> {
    let project = state.project();
    let mut settings = settings_from_query(query)?;
    let (wave, view) = project.resolve_wave(settings.wave)?;
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
    /// Completed frames under multiple imputation.
    pub imputations: usize,
    /// The seed of every random draw (kept across form submissions).
    pub seed: u64,
    pub covariates: Vec<Choice>,
    pub factors: Vec<Choice>,
    /// The current settings as a query string, for links between pages.
    pub query: String,
    /// Whether the page is shown for projecting (`view=present`: larger type, no forms).
    pub present: bool,
}

/// The query key and value of the presentation view (larger type, no forms), which
/// changes how a page looks, never what it shows.
pub const PRESENT: (&str, &str) = ("view", "present");

/// Whether the query asks for the presentation view.
pub fn presenting(query: &Query) -> bool {
    query.iter().any(|(k, v)| k == PRESENT.0 && v == PRESENT.1)
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
            models: [ModelKind::Logit, ModelKind::Firth, ModelKind::Probit]
                .into_iter()
                .map(|k| Choice {
                    value: k.as_str().into(),
                    label: model_label(k).into(),
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
                (
                    MissingRule::Impute,
                    "Multiple imputation (results combined)",
                ),
            ]
            .into_iter()
            .map(|(k, label)| Choice {
                value: k.as_str().into(),
                label: label.into(),
                selected: settings.missing == k,
            })
            .collect(),
            imputations: settings.imputations,
            seed: settings.seed,
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
            present: false,
        }
    }

    /// The same form for a page asked for in the presentation view (the links between
    /// pages then keep it).
    pub fn presenting(mut self, query: &Query) -> Self {
        if presenting(query) {
            self.present = true;
            let mut q = form_urlencoded::Serializer::new(std::mem::take(&mut self.query));
            q.append_pair(PRESENT.0, PRESENT.1);
            self.query = q.finish();
        }
        self
    }

    /// One line saying what the settings are now, for the collapsed form.
    pub fn summary(&self) -> String {
        let picked = |list: &[Choice]| list.iter().find(|c| c.selected).map(|c| c.label.clone());
        let wave = picked(&self.waves).unwrap_or_else(|| {
            self.waves.last().map_or_else(
                || "no wave".to_string(),
                |c| format!("{} (latest)", c.label),
            )
        });
        let ticked = self
            .covariates
            .iter()
            .chain(&self.factors)
            .filter(|c| c.selected)
            .count();
        let all = self.covariates.len() + self.factors.len();
        let mut parts = vec![wave];
        parts.extend(picked(&self.models));
        parts.extend(picked(&self.weightings));
        parts.extend(picked(&self.trims));
        parts.extend(picked(&self.missing));
        parts.push(if ticked == all {
            format!("all {all} indicators")
        } else {
            format!("{ticked} of {all} indicators")
        });
        parts.join(" · ")
    }
}

/// The cache key of a page's result: the page (by its result type), the project's
/// revision and the normalised settings (wave filled in, then the page's own keys in a
/// fixed order). `None` when the settings do not parse; the computation then reports why.
/// The current name of a page key that is still read under an older one, so that both
/// spellings of the same settings share one cached result.
fn current_name(key: &str) -> &str {
    match key {
        "bootstrap" => "wild_replicates",
        "family" => "kind",
        other => other,
    }
}

fn page_key<T>(state: &AppState, query: &Query) -> Option<CacheKey> {
    let project = state.project();
    let mut settings = settings_from_query(query).ok()?;
    if settings.wave.is_none() {
        settings.wave = project.waves.last().copied();
    }
    let mut own: Vec<(&str, &str)> = query
        .iter()
        .filter(|(k, _)| own_key(k))
        .map(|(k, v)| (current_name(k), v.as_str()))
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

/// A page's result from the result cache, computed here (on the caller's thread) when
/// absent: how the report takes the parts that pages have already shown.
pub fn cached<T>(
    state: &AppState,
    query: &Query,
    compute: fn(&AppState, &Query) -> AppResult<T>,
) -> AppResult<Arc<T>>
where
    T: Serialize + Send + Sync + 'static,
{
    match page_key::<T>(state, query) {
        Some(key) => state.cache.get_or_compute(&key, || compute(state, query)),
        None => compute(state, query).map(Arc::new),
    }
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

#[cfg(test)]
mod key_name_tests {
    /// Older key names map to the current ones (our own rule: one cached result per setting).
    #[test]
    fn older_key_names_share_the_current_key() {
        assert_eq!(super::current_name("bootstrap"), "wild_replicates");
        assert_eq!(super::current_name("family"), "kind");
        assert_eq!(super::current_name("replicates"), "replicates");
    }
}
