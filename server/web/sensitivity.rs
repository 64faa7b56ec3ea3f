//! The sensitivity page: trimming levels, models and weighting methods compared.

use askama::Template;
use axum::response::Response;

use super::context::{first_completed_frame, resolve_page, Query, SettingsForm};
use super::error::{AppError, AppResult};
use super::format::Fmt;
use super::handlers::Computation;
use super::state::AppState;
use super::{csv_response, svg_response};
use crate::analysis::cautions::{Caution, STANDING};
use crate::analysis::sensitivity::{with_model_uncertainty, Sensitivity};
use crate::charts;
use crate::csv_out::{cell, csv_text};

#[derive(Template)]
#[template(path = "sensitivity.html")]
struct SensitivityPage<'a> {
    page: &'static str,
    nav_query: String,
    form: SettingsForm,
    f: Fmt,
    s: &'a Sensitivity,
    chart: String,
    draws_chart: String,
    cautions: &'a [Caution],
}

/// The sensitivity page's result: the form and the comparison.
pub(super) type SensitivityResult = (SettingsForm, Sensitivity);

/// The grid of models and weightings, with the model's draws, is heavy work.
pub(super) const COMPUTATION: Computation<SensitivityResult> = Computation::heavy(compute);

fn compute(state: &AppState, query: &Query) -> AppResult<SensitivityResult> {
    let (project, settings, view, form) = resolve_page(state, query, "/sensitivity")?;
    if crate::analysis::imputed::wanted(&settings) {
        let (first, note) = first_completed_frame(&project, &view, &settings)?;
        // What fails on a completed frame is the imputation's doing: a setting to change.
        let mut s = with_model_uncertainty(&project, &first, &settings)
            .map_err(|e| AppError::BadRequest(e.to_string()))?;
        s.missing_caveat = Some(note);
        return Ok((form, s));
    }
    let s = with_model_uncertainty(&project, &view, &settings)?;
    Ok((form, s))
}

pub(super) fn page(_: &AppState, query: &Query, (form, s): SensitivityResult) -> AppResult<String> {
    let form = form.presenting(query);
    Ok(SensitivityPage {
        page: "sensitivity",
        nav_query: form.query.clone(),
        form,
        f: Fmt,
        chart: charts::sensitivity::trimming(&s),
        draws_chart: charts::sensitivity::model_draws(&s),
        s: &s,
        cautions: &STANDING,
    }
    .render()?)
}

pub(super) fn artifact(item: &str, (_, s): &SensitivityResult) -> AppResult<Response> {
    match item {
        "trimming.svg" => Ok(svg_response(
            "trimming.svg",
            charts::sensitivity::trimming(s),
        )),
        "model-draws.svg" => Ok(svg_response(
            "model-draws.svg",
            charts::sensitivity::model_draws(s),
        )),
        "model-draws.csv" => {
            let m = s.model_uncertainty.as_ref();
            let rows = m
                .map(|m| {
                    [
                        ("effective_n", &m.effective_n),
                        ("max_weight_share", &m.max_weight_share),
                        ("pooled_mean", &m.pooled_mean),
                    ]
                    .into_iter()
                    .map(|(name, spread)| {
                        let get = |f: fn(&crate::analysis::sensitivity::Spread) -> f64| {
                            cell(spread.as_ref().map(f))
                        };
                        vec![
                            name.to_string(),
                            get(|x| x.at_estimate),
                            get(|x| x.mean),
                            get(|x| x.sd),
                            get(|x| x.low),
                            get(|x| x.median),
                            get(|x| x.high),
                            m.draws.to_string(),
                            m.failed.to_string(),
                            m.seed.to_string(),
                        ]
                    })
                    .collect::<Vec<_>>()
                })
                .unwrap_or_default();
            Ok(csv_response(
                "model-draws.csv",
                csv_text(
                    &[
                        "quantity",
                        "at_estimate",
                        "mean",
                        "sd",
                        "q025",
                        "median",
                        "q975",
                        "draws",
                        "failed_draws",
                        "seed",
                    ],
                    rows,
                ),
            ))
        }
        "table.csv" => {
            let trims = s.trims.iter().map(|t| {
                vec![
                    s.settings.model.as_str().to_string(),
                    s.settings.weighting.as_str().to_string(),
                    t.trim.map_or(String::new(), |q| q.to_string()),
                    cell(t.outcome.effective_n),
                    cell(t.outcome.max_abs_smd),
                    cell(t.outcome.max_weight_share),
                    u8::from(t.outcome.worse_than_none).to_string(),
                    t.outcome.fell_back_to.unwrap_or_default().to_string(),
                    t.outcome.error.clone().unwrap_or_default(),
                ]
            });
            let grid = s.grid.iter().map(|g| {
                vec![
                    g.model.to_string(),
                    g.weighting.to_string(),
                    String::new(),
                    cell(g.outcome.effective_n),
                    cell(g.outcome.max_abs_smd),
                    cell(g.outcome.max_weight_share),
                    u8::from(g.outcome.worse_than_none).to_string(),
                    g.outcome.fell_back_to.unwrap_or_default().to_string(),
                    g.outcome.error.clone().unwrap_or_default(),
                ]
            });
            Ok(csv_response(
                "sensitivity.csv",
                csv_text(
                    &[
                        "model",
                        "weighting",
                        "trim",
                        "effective_n",
                        "max_abs_smd",
                        "max_weight_share",
                        "worse_than_no_weighting",
                        "fell_back_to",
                        "error",
                    ],
                    trims.chain(grid),
                ),
            ))
        }
        _ => Err(AppError::NotFound(format!(
            "no {item} here; try trimming.svg, table.csv, model-draws.svg or model-draws.csv"
        ))),
    }
}
