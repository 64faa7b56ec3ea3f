//! What every analysis page needs: the project, the settings from the query string, the
//! chosen wave's view, and the settings form.

use std::sync::Arc;

use serde::Serialize;

use super::error::{AppError, AppResult};
use super::state::AppState;
use crate::analysis::cache::CacheKey;
use crate::analysis::imputed;
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

/// The settings of the query for this project: parsed, with the chosen indicators in the
/// project's order and each named once ([`Settings::with_indicators_in_order`]), so that
/// every spelling of one choice computes, and is cached as, one result.
pub fn normalised_settings(project: &Project, query: &Query) -> AppResult<Settings> {
    let indicators = &project.manifest.indicators;
    Ok(settings_from_query(query)?
        .with_indicators_in_order(&indicators.numeric, &indicators.categorical))
}

/// The respondent variables the project's microdata declares (none without microdata).
pub fn microdata_variables(project: &Project) -> Vec<String> {
    project
        .manifest
        .microdata
        .as_ref()
        .map(|m| m.variables.clone())
        .unwrap_or_default()
}

/// The project, the settings (normalised; wave filled in: the latest when not given) and
/// the view.
pub fn resolve(state: &AppState, query: &Query) -> AppResult<(Arc<Project>, Settings, WaveView)> {
    let project = state.project();
    let mut settings = normalised_settings(&project, query)?;
    let (wave, view) = project.resolve_wave(settings.wave)?;
    settings.wave = Some(wave);
    Ok((project, settings, view))
}

/// [`resolve`], with the settings form of the page at `action`: where every analysis page's
/// computation starts.
pub fn resolve_page(
    state: &AppState,
    query: &Query,
    action: &'static str,
) -> AppResult<(Arc<Project>, Settings, WaveView, SettingsForm)> {
    let (project, settings, view) = resolve(state, query)?;
    let form = SettingsForm::new(action, &project, &settings);
    Ok((project, settings, view, form))
}

/// Under multiple imputation, for the pages that show one completed frame rather than a
/// combination: the wave's first completed frame, and the note that says so.
pub fn first_completed_frame(
    project: &Project,
    view: &WaveView,
    settings: &Settings,
) -> AppResult<(WaveView, String)> {
    let done = imputed::complete_project_wave(Some(project), view, settings)?;
    let note = imputed::single_frame_note(&done.summary);
    let first = done.views.into_iter().next().ok_or_else(|| {
        AppError::Internal("multiple imputation gave no completed frame".to_string())
    })?;
    Ok((first, note))
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
        // The indicators offered, each ticked when the list names it (all when it is None).
        let indicator_choices = |columns: &[String], list: &Option<Vec<String>>| {
            columns
                .iter()
                .map(|c| Choice {
                    value: c.clone(),
                    label: m.label(c).to_string(),
                    selected: list.as_ref().is_none_or(|l| l.contains(c)),
                })
                .collect()
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
            covariates: indicator_choices(&m.indicators.numeric, &settings.covariates),
            factors: indicator_choices(&m.indicators.categorical, &settings.factors),
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

/// A page's own settings, beyond the analysis settings, as its cache key holds them:
/// parsed by the page's own parser and serialised canonically (every field, defaults
/// filled in, older key names read as the current ones), so that every spelling of the
/// same settings shares one cached result and settings that differ never do. Every page
/// result type says which parser reads its query; a page that reads no key of its own
/// gives nothing, so that other pages' keys carried in its address do not split its
/// cache. (A result type without an implementation does not compile with the cache.)
pub trait PageSettings {
    /// The canonical text of the page's own settings; an error when they do not parse
    /// (the result is then computed uncached, and says why).
    fn own_settings(project: &Project, query: &Query) -> AppResult<String>;
}

/// Pages that read no key of their own.
macro_rules! no_own_settings {
    ($($t:ty),* $(,)?) => {$(
        impl PageSettings for $t {
            fn own_settings(_: &Project, _: &Query) -> AppResult<String> {
                Ok(String::new())
            }
        }
    )*};
}

no_own_settings!(
    (SettingsForm, super::balance::BalanceResult),
    super::coverage::CoverageResult,
    (SettingsForm, crate::analysis::participation::FitReport),
    crate::analysis::overview::Overview,
    crate::analysis::imputed::ImputationSummary,
    (SettingsForm, crate::analysis::sensitivity::Sensitivity),
);

/// The canonical text of a typed settings value: its JSON, fields in their declared order.
fn canonical<T: Serialize>(settings: &T) -> AppResult<String> {
    serde_json::to_string(settings)
        .map_err(|e| AppError::Internal(format!("settings not serialisable: {e}")))
}

impl PageSettings for super::plan::PlanResult {
    fn own_settings(_: &Project, query: &Query) -> AppResult<String> {
        canonical(&super::plan::plan_settings(query)?)
    }
}

impl PageSettings for super::impact::ImpactResult {
    fn own_settings(project: &Project, query: &Query) -> AppResult<String> {
        canonical(&super::impact::impact_settings(project, query)?)
    }
}

impl PageSettings for crate::analysis::selection_bounds::SelectionBounds {
    fn own_settings(project: &Project, query: &Query) -> AppResult<String> {
        canonical(&super::impact_bounds::bounds_settings(project, query)?)
    }
}

impl PageSettings
    for (
        SettingsForm,
        crate::analysis::projection::ProjectionReport,
        Vec<String>,
    )
{
    fn own_settings(project: &Project, query: &Query) -> AppResult<String> {
        canonical(&(
            super::projection::projection_settings(project, query)?,
            super::projection::projection_options(query)?,
        ))
    }
}

impl PageSettings for super::report::ReportHtml {
    fn own_settings(project: &Project, query: &Query) -> AppResult<String> {
        canonical(&super::report::report_settings(project, query)?)
    }
}

/// The cache key of a page's result: the page (by its result type), the project's
/// revision, the normalised analysis settings (wave filled in) and the page's own typed
/// settings ([`PageSettings`]). `None` when the settings do not parse; the computation
/// then reports why.
pub(super) fn page_key<T: PageSettings>(state: &AppState, query: &Query) -> Option<CacheKey> {
    let project = state.project();
    let mut settings = normalised_settings(&project, query).ok()?;
    if settings.wave.is_none() {
        settings.wave = project.waves.last().copied();
    }
    let own = T::own_settings(&project, query).ok()?;
    Some(CacheKey::new(
        project.revision,
        std::any::type_name::<T>(),
        format!("{}&{own}", settings.to_query()),
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
    T: PageSettings + Serialize + Send + Sync + 'static,
{
    match page_key::<T>(state, query) {
        Some(key) => state.cache.get_or_compute(&key, || compute(state, query)),
        None => compute(state, query).map(Arc::new),
    }
}

#[cfg(test)]
mod cache_key_tests {
    //! Our own rule (issue 12): one cached result per setting. Every spelling of the same
    //! settings gives one key; settings that change a result give another.
    use super::*;
    use crate::analysis::participation::FitReport;
    use crate::analysis::projection::ProjectionReport;

    type Model = (SettingsForm, FitReport);
    type Projection = (SettingsForm, ProjectionReport, Vec<String>);

    fn state() -> AppState {
        AppState::new(Project::load(&crate::demo_dir()).expect("demo loads"))
    }

    fn query(text: &str) -> Query {
        form_urlencoded::parse(text.as_bytes())
            .into_owned()
            .collect()
    }

    /// A page's result type, by what the tests need of it: its cache key and its own
    /// settings.
    struct Page {
        key: fn(&AppState, &Query) -> Option<CacheKey>,
        own: fn(&Project, &Query) -> AppResult<String>,
    }

    fn page<T: PageSettings>() -> Page {
        Page {
            key: page_key::<T>,
            own: T::own_settings,
        }
    }

    fn named(page_name: &str) -> Page {
        match page_name {
            "model" => page::<Model>(),
            "plan" => page::<super::super::plan::PlanResult>(),
            "impact" => page::<super::super::impact::ImpactResult>(),
            "bounds" => page::<crate::analysis::selection_bounds::SelectionBounds>(),
            "projection" => page::<Projection>(),
            "report" => page::<super::super::report::ReportHtml>(),
            other => panic!("no page {other}"),
        }
    }

    /// The key of `page`'s result for the query `text`.
    fn key(state: &AppState, page: &str, text: &str) -> CacheKey {
        (named(page).key)(state, &query(text)).unwrap_or_else(|| panic!("{page}?{text} has a key"))
    }

    #[test]
    fn spellings_of_the_same_settings_share_one_key() {
        let state = state();
        let latest = *state.project().waves.last().expect("waves");
        let spelled_out = format!("wave={latest}&model=logit&weighting=entropy&trim=none");
        let same = [
            ("model", "", spelled_out.as_str()),
            (
                "model",
                "covariates=literacy,log_gdp_pc&trim=0.90",
                "trim=0.9&covariates=log_gdp_pc,literacy,literacy",
            ),
            ("model", "factors=region,electoral_system", "factors=electoral_system,region"),
            // Other pages' keys do not split a page that does not read them.
            ("model", "", "outcome=age&budget=3&reference=zero"),
            (
                "plan",
                "",
                "objective=effective-n&replicates=100&feasibility=auto&support=offer&budget=",
            ),
            ("plan", "budget=3", "budget=%203"),
            (
                "impact",
                "outcome=trust_parliament&family=logistic&bootstrap=19",
                "wild_replicates=19&kind=logistic&outcome=trust_parliament",
            ),
            (
                "impact",
                "",
                "outcome=trust_parliament&predictor=age&predictor=female&predictor=education&kind=linear&shares=equal&wild_replicates=399",
            ),
            ("bounds", "", "reference=unweighted&bounds_bootstrap=199"),
            ("projection", "", "outcome=trust_parliament&shares=equal"),
            ("report", "", "waves=&model=logit"),
        ];
        for (page, a, b) in same {
            assert_eq!(
                key(&state, page, a),
                key(&state, page, b),
                "{page}: {a} | {b}"
            );
        }
        // One page's result is never another's.
        assert_ne!(key(&state, "model", ""), key(&state, "plan", ""));
    }

    /// Every field of every page's typed settings, with a change of it in the query (the
    /// base query first); fields no query key sets are listed in `FIXED`.
    // One change a line: a table reads best unwrapped.
    #[rustfmt::skip]
    const CHANGES: [(&str, &str, &str, &str); 37] = [
        ("settings", "wave", "", "wave=3"),
        ("settings", "model", "", "model=probit"),
        ("settings", "weighting", "", "weighting=raking"),
        ("settings", "covariates", "", "covariates=literacy"),
        ("settings", "factors", "", "factors=region"),
        ("settings", "trim", "", "trim=0.95"),
        ("settings", "missing", "", "missing=median-fill"),
        ("settings", "match_variances", "", "variances=1"),
        ("settings", "seed", "", "seed=5"),
        ("settings", "imputations", "missing=impute", "missing=impute&imputations=5"),
        ("plan", "budget", "", "budget=3"),
        ("plan", "cost_budget", "", "cost_budget=1000"),
        ("plan", "cost_column", "", "cost_column=support_cost"),
        ("plan", "feasibility", "", "feasibility=model"),
        ("plan", "objective", "", "objective=largest-smd"),
        ("plan", "replicates", "", "replicates=50"),
        ("plan", "joiners", "joiner=XAB", "joiner=XAC"),
        ("plan", "support", "", "support=none"),
        ("impact", "outcome", "", "outcome=left_right"),
        ("impact", "predictors", "predictor=age", "predictor=age&predictor=female"),
        ("impact", "kind", "", "kind=logistic"),
        ("impact", "country_indicators", "", "country_indicator=log_gdp_pc"),
        ("impact", "shares", "", "shares=population&population=log_population"),
        ("impact", "replicates", "", "replicates=49"),
        ("impact", "wild_replicates", "", "wild_replicates=19"),
        ("bounds", "outcome", "", "outcome=left_right"),
        ("bounds", "shares", "", "shares=population&population=log_population"),
        ("bounds", "reference", "", "reference=zero"),
        ("bounds", "replicates", "", "bounds_bootstrap=49"),
        ("projection", "outcome", "", "outcome=age"),
        ("projection", "predictors", "", "predictor=age"),
        ("projection", "shares", "", "shares=population"),
        ("report", "settings", "", "model=firth"),
        ("report", "waves", "", "waves=all"),
        ("report", "plan", "", "budget=3"),
        ("report", "impact", "", "outcome=left_right"),
        ("report", "impact", "", "impact_replicates=9"),
    ];

    /// Fields that no query key sets (fixed on the pages).
    const FIXED: [(&str, &str); 3] = [
        ("plan", "random_draws"),
        ("bounds", "lambdas"),
        ("bounds", "level"),
    ];

    /// The field names of a page's typed settings, read from their canonical JSON.
    fn fields(project: &Project, page: &str) -> Vec<String> {
        let text = match page {
            "settings" => canonical(&Settings::default()),
            other => (named(other).own)(project, &Query::new()),
        }
        .expect("default settings parse");
        let value: serde_json::Value = serde_json::from_str(&text).expect("json");
        // The projection's settings are a pair: the request and its options.
        let objects = match value {
            serde_json::Value::Array(parts) => parts,
            one => vec![one],
        };
        objects
            .iter()
            .flat_map(|o| o.as_object().expect("an object").keys().cloned())
            .collect()
    }

    #[test]
    fn settings_that_differ_never_share_a_key() {
        let state = state();
        for (page, field, base, changed) in CHANGES {
            // The analysis settings are in every page's key; the model page stands for them.
            let page = if page == "settings" { "model" } else { page };
            assert_ne!(
                key(&state, page, base),
                key(&state, page, changed),
                "{page}: {field} ({base} | {changed})"
            );
        }
        // Every field of every page's settings is changed above or fixed.
        let project = state.project();
        for page in [
            "settings",
            "plan",
            "impact",
            "bounds",
            "projection",
            "report",
        ] {
            let fields = fields(&project, page);
            assert!(fields.len() >= 2, "{page}: {fields:?}");
            for f in fields {
                assert!(
                    CHANGES
                        .iter()
                        .any(|(p, name, _, _)| *p == page && *name == f)
                        || FIXED.contains(&(page, f.as_str())),
                    "{page}.{f}: no query change tests it"
                );
            }
        }
    }
}
