//! The overview page `/` and its JSON twin `/api/overview`.

use std::sync::Arc;

use askama::Template;
use axum::extract::{Query as QueryString, State};
use axum::response::{Html, IntoResponse};
use axum::Json;

use super::context::Query;
use super::error::AppResult;
use super::handlers::Computation;
use super::state::AppState;
use super::svg_response;
use crate::analysis::cautions::Caution;
use crate::analysis::imputed::{self, ImputationSummary};
use crate::analysis::overview::{overview, Overview, WaveStatus};
use crate::charts;

#[derive(Template)]
#[template(path = "overview.html")]
struct OverviewPage<'a> {
    page: &'static str,
    nav_query: String,
    /// Per wave, the warning when leaving out incomplete countries changed who is analysed.
    incomplete: Vec<(i64, String)>,
    o: &'a Overview,
    coverage_chart: String,
    cautions: &'a [Caution],
    f: super::format::Fmt,
    /// With `missing=impute` in the query: what multiple imputation fills in the wave.
    imputation: Option<ImputationView>,
}

/// The overview's section on multiple imputation (with its two charts).
struct ImputationView {
    s: ImputationSummary,
    /// Per filled cell: code, name, indicator label, the filled values in words.
    rows: Vec<(String, String, String, String)>,
    observed_chart: String,
    /// Observed against filled level shares, when a categorical indicator was filled.
    levels_chart: Option<String>,
    convergence_chart: String,
    query: String,
}

impl OverviewPage<'_> {
    fn percent(&self, x: &f64) -> String {
        format!("{:.0}%", 100.0 * x)
    }

    fn percent_or_dash(&self, x: &Option<f64>) -> String {
        x.map_or_else(|| "–".to_string(), |x| format!("{:.0}%", 100.0 * x))
    }

    /// Shade class of a coverage cell, in steps of 20 points.
    fn shade(&self, x: &Option<f64>) -> String {
        x.map_or_else(
            || "shade-none".to_string(),
            |x| format!("shade-{}", ((x * 5.0).floor() as i64).clamp(0, 4)),
        )
    }

    fn mark(&self, s: &WaveStatus) -> &'static str {
        match s {
            WaveStatus::TookPart => "●",
            WaveStatus::EligibleAbsent => "○",
            WaveStatus::NotEligible => "·",
            WaveStatus::NotInFrame => "",
        }
    }

    fn mark_title(&self, s: &WaveStatus) -> &'static str {
        match s {
            WaveStatus::TookPart => "took part",
            WaveStatus::EligibleAbsent => "eligible, did not take part",
            WaveStatus::NotEligible => "not eligible",
            WaveStatus::NotInFrame => "not in the frame",
        }
    }
}

/// The overview of the current project (it fits a model per wave for the trends, so it
/// runs on the blocking pool like the other pages).
fn compute(state: &AppState, _query: &Query) -> AppResult<Overview> {
    Ok(overview(&state.project()))
}

/// The overview is one result for every query (it reads no settings).
const OVERVIEW: Computation<Overview> = Computation::light(compute);

/// What multiple imputation fills in a wave (the overview's imputation section, and its
/// twin), with every filled value of every imputation and the convergence traces.
pub(super) const IMPUTATION: Computation<ImputationSummary> =
    Computation::light(compute_imputation);

/// What multiple imputation fills in the query's wave (`missing=impute`).
fn compute_imputation(state: &AppState, query: &Query) -> AppResult<ImputationSummary> {
    let (project, settings, view) = super::context::resolve(state, query)?;
    imputed::complete_project_wave(Some(&project), &view, &settings)
        .map(|c| c.summary)
        .map_err(|e| super::error::AppError::BadRequest(e.to_string()))
}

fn filled_in_words(c: &imputed::FilledCell) -> String {
    if let Some(v) = &c.values {
        let lo = v.iter().copied().fold(f64::INFINITY, f64::min);
        let hi = v.iter().copied().fold(f64::NEG_INFINITY, f64::max);
        let mean = v.iter().sum::<f64>() / v.len().max(1) as f64;
        format!("mean {mean:.3}, from {lo:.3} to {hi:.3}")
    } else if let Some(l) = &c.levels {
        let mut counts: Vec<(String, usize)> = Vec::new();
        for level in l {
            match counts.iter_mut().find(|(x, _)| x == level) {
                Some(e) => e.1 += 1,
                None => counts.push((level.clone(), 1)),
            }
        }
        counts.sort_by(|a, b| b.1.cmp(&a.1).then(a.0.cmp(&b.0)));
        counts
            .iter()
            .map(|(x, n)| format!("{x} ({n} of {})", l.len()))
            .collect::<Vec<_>>()
            .join(", ")
    } else {
        String::new()
    }
}

pub async fn page(
    State(state): State<Arc<AppState>>,
    QueryString(query): QueryString<Query>,
) -> AppResult<impl IntoResponse> {
    let o = OVERVIEW.result(&state, &Query::new()).await?;
    let settings = super::context::settings_from_query(&query)?;
    let imputation = if imputed::wanted(&settings) {
        let s = IMPUTATION.result(&state, &query).await?;
        Some(ImputationView {
            rows: s
                .cells
                .iter()
                .map(|c| {
                    (
                        c.code.clone(),
                        c.name.clone(),
                        c.label.clone(),
                        filled_in_words(c),
                    )
                })
                .collect(),
            observed_chart: charts::imputation::observed_vs_imputed(&s),
            levels_chart: (!s.observed_vs_imputed_levels.is_empty())
                .then(|| charts::imputation::observed_vs_imputed_levels(&s)),
            convergence_chart: charts::imputation::convergence(&s),
            query: settings.to_query(),
            s,
        })
    } else {
        None
    };
    let html = OverviewPage {
        page: "overview",
        nav_query: String::new(),
        incomplete: o
            .trends
            .iter()
            .filter_map(|t| t.incomplete.as_ref().map(|i| (t.wave, i.warning.clone())))
            .collect(),
        coverage_chart: charts::coverage::coverage_by_group(&o),
        f: super::format::Fmt,
        cautions: &o.cautions,
        o: &o,
        imputation,
    }
    .render()?;
    Ok(Html(html))
}

pub async fn json(State(state): State<Arc<AppState>>) -> AppResult<Json<Overview>> {
    Ok(Json(OVERVIEW.result(&state, &Query::new()).await?))
}

pub async fn coverage_svg(State(state): State<Arc<AppState>>) -> AppResult<impl IntoResponse> {
    let o = OVERVIEW.result(&state, &Query::new()).await?;
    Ok(svg_response(
        "coverage-by-region.svg",
        charts::coverage::coverage_by_group(&o),
    ))
}
