//! The projection page: what the whole eligible universe would say, from a multilevel
//! model projected to the countries that did not take part.

use askama::Template;
use axum::response::Response;

use super::context::{first_completed_frame, resolve_page, Query, SettingsForm};
use super::error::{AppError, AppResult};
use super::format::Fmt;
use super::handlers::Computation;
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
    query: &Query,
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
pub(crate) fn projection_options(query: &Query) -> AppResult<ProjectionOptions> {
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

/// The projection page's result: the form, the projection and the survey variables.
pub(crate) type ProjectionResult = (SettingsForm, ProjectionReport, Vec<String>);

/// One multilevel fit and its projection: light work.
pub(super) const COMPUTATION: Computation<ProjectionResult> = Computation::light(compute);

pub(crate) fn compute(state: &AppState, query: &Query) -> AppResult<ProjectionResult> {
    let (project, settings, view, form) = resolve_page(state, query, "/projection")?;
    let ps = projection_settings(&project, query)?;
    let options = projection_options(query)?;
    let r = if crate::analysis::imputed::wanted(&settings) {
        // One completed frame (the notes say so); the combination is not computed here.
        let (first, note) = first_completed_frame(&project, &view, &settings)?;
        let mut r = projection_with(&project, &first, &settings, &ps, &options)?;
        r.notes.insert(0, note);
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

pub(super) fn page(
    state: &AppState,
    query: &Query,
    (form, r, variables): ProjectionResult,
) -> AppResult<String> {
    let form = form.presenting(query);
    let project = state.project();
    Ok(ProjectionPage {
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
    .render()?)
}

pub(super) fn artifact(item: &str, (_, r, _): &ProjectionResult) -> AppResult<Response> {
    match item {
        "map.svg" => Ok(svg_response(
            "projection-map.svg",
            charts::projection::component_map(r),
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
