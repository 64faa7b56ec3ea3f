//! The projection page: what the whole eligible universe would say, from a multilevel
//! model projected to the countries that did not take part.

use std::sync::Arc;

use askama::Template;
use axum::extract::{Path, Query, State};
use axum::response::{Html, Response};

use super::context::{off_thread, resolve, SettingsForm};
use super::error::{AppError, AppResult};
use super::format::Fmt;
use super::state::AppState;
use super::{csv_response, svg_response};
use crate::analysis::cautions::{Caution, STANDING};
use crate::analysis::projection::{
    projection_with, CountryShares, ProjectionOptions, ProjectionReport, ProjectionSettings,
};
use crate::charts;
use crate::csv_out::{cell, csv_text};
use crate::project::Project;

#[derive(Template)]
#[template(path = "projection.html")]
struct ProjectionPage<'a> {
    page: &'static str,
    nav_query: String,
    form: SettingsForm,
    f: Fmt,
    r: &'a ProjectionReport,
    /// The survey variables with their readable labels.
    variables: Vec<(String, String)>,
    own_query: String,
    map_chart: String,
    /// The project declares a population column (countries can count by population).
    has_population: bool,
    cautions: &'a [Caution],
}

/// The outcome and respondent predictors from the query (`outcome`, repeated `predictor`);
/// without an outcome, the project's last survey variable.
pub(crate) fn projection_settings(
    project: &Project,
    query: &super::context::Query,
) -> AppResult<ProjectionSettings> {
    let outcome = query
        .iter()
        .find(|(k, _)| k == "outcome")
        .map(|(_, v)| v.clone())
        .or_else(|| project.manifest.default_outcome().map(str::to_string))
        .ok_or_else(|| AppError::BadRequest("the project has no survey variables".into()))?;
    let predictors = query
        .iter()
        .filter(|(k, v)| k == "predictor" && !v.is_empty())
        .map(|(_, v)| v.clone())
        .collect();
    Ok(ProjectionSettings {
        outcome,
        predictors,
    })
}

/// How countries count (`shares=equal|population`; population from project.toml).
pub(crate) fn projection_options(query: &super::context::Query) -> AppResult<ProjectionOptions> {
    let shares = match query
        .iter()
        .find(|(k, _)| k == "shares")
        .map(|(_, v)| v.as_str())
    {
        None | Some("equal") => CountryShares::Equal,
        Some("population") => CountryShares::Population,
        Some(other) => {
            return Err(AppError::BadRequest(format!(
                "shares must be equal or population, not '{other}'"
            )))
        }
    };
    Ok(ProjectionOptions { shares })
}

pub(crate) fn compute(
    state: &AppState,
    query: &super::context::Query,
) -> AppResult<(SettingsForm, ProjectionReport, Vec<String>)> {
    let (project, settings, view) = resolve(state, query)?;
    let form = SettingsForm::new("/projection", &project, &settings);
    let ps = projection_settings(&project, query)?;
    let options = projection_options(query)?;
    let r = if crate::analysis::imputed::wanted(&settings) {
        // One completed frame (the notes say so); the combination is not computed here.
        let done =
            crate::analysis::imputed::complete_project_wave(Some(&project), &view, &settings)
                .map_err(|e| AppError::BadRequest(e.to_string()))?;
        let mut r = projection_with(&project, &done.views[0], &settings, &ps, &options)?;
        r.notes.insert(
            0,
            crate::analysis::imputed::single_frame_note(&done.summary),
        );
        r
    } else {
        projection_with(&project, &view, &settings, &ps, &options)?
    };
    let variables = super::context::microdata_variables(&project);
    Ok((form, r, variables))
}

/// The projection's own keys as a query string, percent-encoded (read back by
/// [`projection_settings`] it gives the same settings).
pub(crate) fn own_query(ps: &ProjectionSettings) -> String {
    let mut q = form_urlencoded::Serializer::new(String::new());
    q.append_pair("outcome", &ps.outcome);
    for p in &ps.predictors {
        q.append_pair("predictor", p);
    }
    q.finish()
}

/// [`own_query`] with the counting of countries (left out when equal, the default).
fn own_query_of(r: &ProjectionReport) -> String {
    let mut q = own_query(&ProjectionSettings {
        outcome: r.outcome.clone(),
        predictors: r.predictors.clone(),
    });
    if r.shares == "population" {
        q.push_str("&shares=population");
    }
    q
}

pub async fn page(
    State(state): State<Arc<AppState>>,
    Query(query): Query<super::context::Query>,
) -> AppResult<Html<String>> {
    let (form, r, variables) = off_thread(&state, &query, compute).await?;
    let form = form.presenting(&query);
    let project = state.project();
    let html = ProjectionPage {
        page: "projection",
        nav_query: form.query.clone(),
        own_query: own_query_of(&r),
        map_chart: charts::projection::component_map(&r),
        has_population: project.manifest.population.is_some(),
        form,
        f: Fmt,
        r: &r,
        variables: variables
            .iter()
            .map(|v| (v.clone(), project.manifest.label(v).into_owned()))
            .collect(),
        cautions: &STANDING,
    }
    .render()?;
    Ok(Html(html))
}

pub async fn artifact(
    State(state): State<Arc<AppState>>,
    Path(item): Path<String>,
    Query(query): Query<super::context::Query>,
) -> AppResult<Response> {
    let (_, r, _) = off_thread(&state, &query, compute).await?;
    match item.as_str() {
        "map.svg" => Ok(svg_response(
            "projection-map.svg",
            charts::projection::component_map(&r),
        )),
        "table.csv" => Ok(csv_response(
            "projection.csv",
            csv_text(
                &[
                    "code",
                    "name",
                    "region",
                    "took_part",
                    "respondents",
                    "prediction",
                    "low_95",
                    "high_95",
                    "outside_participants_range",
                    "outside_participants_hull",
                    "pc1",
                    "pc2",
                    "weight",
                ],
                r.countries.iter().map(|c| {
                    vec![
                        c.code.clone(),
                        c.name.clone(),
                        c.region.clone().unwrap_or_default(),
                        u8::from(c.participated).to_string(),
                        c.respondents.to_string(),
                        cell(c.prediction),
                        cell(c.low),
                        cell(c.high),
                        c.outside_range.join(" "),
                        u8::from(c.outside_hull).to_string(),
                        cell(c.pc1),
                        cell(c.pc2),
                        cell(c.weight),
                    ]
                }),
            ),
        )),
        _ => Err(AppError::NotFound(format!(
            "no /projection/{item}; try map.svg or table.csv"
        ))),
    }
}
