//! The overview page `/` and its JSON twin `/api/overview`.

use std::sync::Arc;

use askama::Template;
use axum::extract::State;
use axum::response::{Html, IntoResponse};
use axum::Json;

use super::context::{off_thread, Query};
use super::error::AppResult;
use super::state::AppState;
use super::svg_response;
use crate::analysis::cautions::Caution;
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

pub async fn page(State(state): State<Arc<AppState>>) -> AppResult<impl IntoResponse> {
    let o = off_thread(&state, &Query::new(), compute).await?;
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
    }
    .render()?;
    Ok(Html(html))
}

pub async fn json(State(state): State<Arc<AppState>>) -> AppResult<Json<Overview>> {
    Ok(Json(off_thread(&state, &Query::new(), compute).await?))
}

pub async fn coverage_svg(State(state): State<Arc<AppState>>) -> AppResult<impl IntoResponse> {
    let o = off_thread(&state, &Query::new(), compute).await?;
    Ok(svg_response(
        "coverage-by-region.svg",
        charts::coverage::coverage_by_group(&o),
    ))
}
