//! The self-contained meeting report: one HTML file with inline CSS and SVG, nothing
//! fetched from anywhere, printable on A4 and Letter. Written by `gapwise report` and by
//! the report button (`/report`).

use std::sync::Arc;

use askama::Template;
use axum::extract::{Query, State};
use axum::http::header;
use axum::response::{IntoResponse, Response};

use super::context::{off_thread_heavy, settings_from_query, Query as PageQuery};
use super::error::{AppError, AppResult};
use super::format::Fmt;
use super::impact::{side_by_side, Cell};
use super::state::AppState;
use crate::analysis::cautions::{Caution, STANDING};
use crate::analysis::participation::Coefficient;
use crate::analysis::report::{report, Report};
use crate::analysis::Settings;
use crate::charts;
use crate::project::Project;

/// Our stylesheet, inlined so the report stands alone.
const CSS: &str = include_str!("../../static/gapwise.css");

#[derive(Template)]
#[template(path = "report.html")]
struct ReportPage<'a> {
    r: &'a Report,
    f: Fmt,
    css: &'static str,
    cautions: &'a [Caution],
    coefficients: Vec<Coefficient>,
    impact_table: Vec<(String, Vec<Cell>)>,
    coverage_chart: String,
    propensity_chart: String,
    smd_chart: String,
    map_chart: String,
    plan_chart: String,
    pooled_chart: String,
    settings_query: String,
}

/// Renders the report of a project as one HTML document.
pub fn render(project: &Project, settings: &Settings) -> Result<String, String> {
    let r = report(project, settings)?;
    let planned: Vec<String> = r
        .plan
        .as_ref()
        .map(|p| p.steps.iter().map(|s| s.id.clone()).collect())
        .unwrap_or_default();
    let page = ReportPage {
        f: Fmt,
        css: CSS,
        cautions: &STANDING,
        coefficients: r
            .fit
            .as_ref()
            .map(|f| f.model.coefficients.clone())
            .unwrap_or_default(),
        impact_table: r
            .impact
            .as_ref()
            .and_then(|i| i.as_ref().ok())
            .map(side_by_side)
            .unwrap_or_default(),
        coverage_chart: charts::coverage::coverage_by_group(&r.overview),
        propensity_chart: r
            .fit
            .as_ref()
            .map(charts::model::propensity_vs_weight)
            .unwrap_or_default(),
        smd_chart: r
            .balance
            .as_ref()
            .map(charts::balance::smd_dots)
            .unwrap_or_default(),
        map_chart: charts::map::component_map_marked(&r.coverage, &planned, &[]),
        plan_chart: r.plan.as_ref().map(charts::plan::paths).unwrap_or_default(),
        pooled_chart: r
            .impact
            .as_ref()
            .and_then(|i| i.as_ref().ok())
            .map(charts::impact::pooled)
            .unwrap_or_default(),
        settings_query: r.settings.to_query(),
        r: &r,
    };
    page.render()
        .map_err(|e| format!("the report template failed: {e}"))
}

/// The rendered report, as the cache keeps it.
#[derive(Clone, serde::Serialize)]
struct ReportHtml(String);

fn compute(state: &AppState, query: &PageQuery) -> AppResult<ReportHtml> {
    let settings = settings_from_query(query)?;
    render(&state.project(), &settings)
        .map(ReportHtml)
        .map_err(AppError::BadRequest)
}

/// The report button: the same document, offered as a download.
pub async fn download(
    State(state): State<Arc<AppState>>,
    Query(query): Query<PageQuery>,
) -> AppResult<Response> {
    let ReportHtml(html) = off_thread_heavy(&state, &query, compute).await?;
    Ok((
        [
            (header::CONTENT_TYPE, "text/html; charset=utf-8"),
            (
                header::CONTENT_DISPOSITION,
                "attachment; filename=\"gapwise-report.html\"",
            ),
        ],
        html,
    )
        .into_response())
}
