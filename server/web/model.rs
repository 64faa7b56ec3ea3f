//! The participation-model page: coefficients, odds ratios, AUC, warnings, and the charts
//! of propensity against weight and of overlap.

use askama::Template;
use axum::response::Response;

use super::context::{resolve_page, Query, SettingsForm};
use super::error::{AppError, AppResult};
use super::format::Fmt;
use super::handlers::Computation;
use super::state::AppState;
use super::{csv_response, svg_response};
use crate::analysis::cautions::{Caution, STANDING};
use crate::analysis::participation::{fit, Coefficient, FitReport};
use crate::analysis::settings::{ModelKind, Settings};
use crate::charts;
use crate::csv_out::{cell, csv_text};

#[derive(Template)]
#[template(path = "model.html")]
struct ModelPage<'a> {
    page: &'static str,
    nav_query: String,
    form: SettingsForm,
    f: Fmt,
    r: &'a FitReport,
    rows: &'a [Coefficient],
    /// The same view with Firth's model, offered when the model warns of separation.
    firth_query: Option<String>,
    propensity_chart: String,
    overlap_chart: String,
    cautions: &'a [Caution],
}

/// The model page's result: the form and the fit.
pub(super) type ModelResult = (SettingsForm, FitReport);

/// The fit is light work; the page, its twin and its downloads share it.
pub(super) const COMPUTATION: Computation<ModelResult> = Computation::light(compute);

fn compute(state: &AppState, query: &Query) -> AppResult<ModelResult> {
    let (project, settings, view, form) = resolve_page(state, query, "/model")?;
    // Under multiple imputation: the fit combined over the completed frames (Rubin's
    // rules for the coefficients; weights and balance as means).
    if crate::analysis::imputed::wanted(&settings) {
        let r = crate::analysis::imputed::fit(Some(&project), &view, &settings)?;
        return Ok((form, r.report));
    }
    let r = fit(&view, &settings)?;
    Ok((form, r))
}

/// The settings' query string with the Firth model, when the fitted model shows separation.
pub fn firth_query(r: &FitReport) -> Option<String> {
    (r.model.separation && r.settings.model != ModelKind::Firth).then(|| {
        Settings {
            model: ModelKind::Firth,
            wave: r.settings.wave.or(r.wave),
            ..r.settings.clone()
        }
        .to_query()
    })
}

/// A number for the CSV, or the words "not estimable" where the model cannot estimate it.
fn estimable_cell(x: Option<f64>, c: &Coefficient) -> String {
    match x {
        Some(v) if v.is_finite() => v.to_string(),
        _ if c.not_estimable.is_some() => "not estimable".to_string(),
        _ => String::new(),
    }
}

pub(super) fn page(_: &AppState, query: &Query, (form, r): ModelResult) -> AppResult<String> {
    let form = form.presenting(query);
    Ok(ModelPage {
        page: "model",
        nav_query: form.query.clone(),
        form,
        f: Fmt,
        rows: &r.model.coefficients,
        firth_query: firth_query(&r),
        propensity_chart: charts::model::propensity_vs_weight(&r),
        overlap_chart: charts::model::overlap(&r),
        r: &r,
        cautions: &STANDING,
    }
    .render()?)
}

pub(super) fn artifact(item: &str, (_, r): &ModelResult) -> AppResult<Response> {
    match item {
        "propensity.svg" => Ok(svg_response(
            "propensity-and-weight.svg",
            charts::model::propensity_vs_weight(r),
        )),
        "overlap.svg" => Ok(svg_response(
            "propensity-overlap.svg",
            charts::model::overlap(r),
        )),
        "coefficients.csv" => Ok(csv_response(
            "participation-model.csv",
            csv_text(
                &[
                    "term",
                    "label",
                    "coefficient",
                    "std_error",
                    "z",
                    "ci95_low",
                    "ci95_high",
                    "odds_ratio",
                    "odds_ratio_ci95_low",
                    "odds_ratio_ci95_high",
                    "not_estimable_because",
                ],
                r.model.coefficients.iter().map(|c| {
                    let odds = |x: Option<f64>| {
                        if r.model.kind == ModelKind::Probit
                            || c.term == crate::analysis::design::INTERCEPT
                        {
                            String::new()
                        } else {
                            estimable_cell(x, c)
                        }
                    };
                    vec![
                        c.term.clone(),
                        c.label.clone(),
                        estimable_cell(c.coef, c),
                        estimable_cell(c.se, c),
                        estimable_cell(c.z, c),
                        estimable_cell(c.ci95_low, c),
                        estimable_cell(c.ci95_high, c),
                        odds(c.odds_ratio),
                        odds(c.odds_ratio_low),
                        odds(c.odds_ratio_high),
                        c.not_estimable.clone().unwrap_or_default(),
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
