//! The participation-model page: coefficients, odds ratios, AUC, warnings, and the charts
//! of propensity against weight and of overlap.

use std::sync::Arc;

use askama::Template;
use axum::extract::{Path, Query, State};
use axum::response::{Html, Response};
use axum::Json;

use super::context::{off_thread, resolve, SettingsForm};
use super::error::{AppError, AppResult};
use super::format::Fmt;
use super::state::AppState;
use super::{csv_response, svg_response};
use crate::analysis::cautions::{Caution, STANDING};
use crate::analysis::participation::{fit, FitReport};
use crate::charts;
use crate::csv_out::{cell, csv_text};

/// A coefficient row as shown: odds ratios and 95% intervals for the logit models.
pub struct CoefficientRow {
    pub term: String,
    pub coef: f64,
    pub se: f64,
    pub z: f64,
    pub odds_ratio: Option<f64>,
    pub low: f64,
    pub high: f64,
}

#[derive(Template)]
#[template(path = "model.html")]
struct ModelPage<'a> {
    page: &'static str,
    nav_query: String,
    form: SettingsForm,
    f: Fmt,
    r: &'a FitReport,
    rows: Vec<CoefficientRow>,
    propensity_chart: String,
    overlap_chart: String,
    cautions: &'a [Caution],
}

fn compute(
    state: &AppState,
    query: &super::context::Query,
) -> AppResult<(SettingsForm, FitReport)> {
    let (project, settings, view) = resolve(state, query)?;
    let form = SettingsForm::new("/model", &project, &settings);
    let r = fit(&view, &settings).map_err(|e| AppError::BadRequest(e.to_string()))?;
    Ok((form, r))
}

/// Coefficient rows with z statistics, 95% intervals (normal approximation) and, for the
/// logit models, odds ratios exp(b) (the intercept has none).
pub fn coefficient_rows(r: &FitReport) -> Vec<CoefficientRow> {
    let logit = r.model.kind != "probit";
    r.model
        .terms
        .iter()
        .zip(&r.model.coef)
        .zip(&r.model.se)
        .enumerate()
        .map(|(j, ((term, &coef), &se))| CoefficientRow {
            term: term.clone(),
            coef,
            se,
            z: coef / se,
            odds_ratio: (logit && j > 0).then(|| coef.exp()),
            low: coef - 1.959_963_984_540_054 * se,
            high: coef + 1.959_963_984_540_054 * se,
        })
        .collect()
}

pub async fn page(
    State(state): State<Arc<AppState>>,
    Query(query): Query<super::context::Query>,
) -> AppResult<Html<String>> {
    let (form, r) = off_thread(&state, &query, compute).await?;
    let html = ModelPage {
        page: "model",
        nav_query: form.query.clone(),
        form,
        f: Fmt,
        rows: coefficient_rows(&r),
        propensity_chart: charts::model::propensity_vs_weight(&r),
        overlap_chart: charts::model::overlap(&r),
        r: &r,
        cautions: &STANDING,
    }
    .render()?;
    Ok(Html(html))
}

pub async fn json(
    State(state): State<Arc<AppState>>,
    Query(query): Query<super::context::Query>,
) -> AppResult<Json<FitReport>> {
    Ok(Json(off_thread(&state, &query, compute).await?.1))
}

pub async fn artifact(
    State(state): State<Arc<AppState>>,
    Path(item): Path<String>,
    Query(query): Query<super::context::Query>,
) -> AppResult<Response> {
    let (_, r) = off_thread(&state, &query, compute).await?;
    match item.as_str() {
        "propensity.svg" => Ok(svg_response(
            "propensity-and-weight.svg",
            charts::model::propensity_vs_weight(&r),
        )),
        "overlap.svg" => Ok(svg_response(
            "propensity-overlap.svg",
            charts::model::overlap(&r),
        )),
        "coefficients.csv" => Ok(csv_response(
            "participation-model.csv",
            csv_text(
                &[
                    "term",
                    "coefficient",
                    "std_error",
                    "z",
                    "odds_ratio",
                    "ci95_low",
                    "ci95_high",
                ],
                coefficient_rows(&r).into_iter().map(|c| {
                    vec![
                        c.term,
                        cell(Some(c.coef)),
                        cell(Some(c.se)),
                        cell(Some(c.z)),
                        cell(c.odds_ratio),
                        cell(Some(c.low)),
                        cell(Some(c.high)),
                    ]
                }),
            ),
        )),
        "weights.csv" => Ok(csv_response(
            "country-weights.csv",
            csv_text(
                &["code", "name", "took_part", "propensity", "weight"],
                r.units.iter().map(|u| {
                    vec![
                        u.id.clone(),
                        u.name.clone(),
                        u8::from(u.participated).to_string(),
                        cell(Some(u.propensity)),
                        cell(Some(u.weight)),
                    ]
                }),
            ),
        )),
        _ => Err(AppError::NotFound(format!(
            "no {item} here; try propensity.svg, overlap.svg, coefficients.csv or weights.csv"
        ))),
    }
}
