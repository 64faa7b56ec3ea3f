//! The sensitivity page: trimming levels, models and weighting methods compared.

use std::sync::Arc;

use askama::Template;
use axum::extract::{Path, Query, State};
use axum::response::{Html, Response};

use super::context::{off_thread_heavy, resolve, SettingsForm};
use super::error::{AppError, AppResult};
use super::format::Fmt;
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

pub(super) fn compute(
    state: &AppState,
    query: &super::context::Query,
) -> AppResult<(SettingsForm, Sensitivity)> {
    let (project, settings, view) = resolve(state, query)?;
    let form = SettingsForm::new("/sensitivity", &project, &settings);
    if crate::analysis::imputed::wanted(&settings) {
        let done =
            crate::analysis::imputed::complete_project_wave(Some(&project), &view, &settings)
                .map_err(|e| AppError::BadRequest(e.to_string()))?;
        let mut s = with_model_uncertainty(&project, &done.views[0], &settings)
            .map_err(|e| AppError::BadRequest(e.to_string()))?;
        s.missing_caveat = Some(crate::analysis::imputed::single_frame_note(&done.summary));
        return Ok((form, s));
    }
    let s = with_model_uncertainty(&project, &view, &settings)?;
    Ok((form, s))
}

pub async fn page(
    State(state): State<Arc<AppState>>,
    Query(query): Query<super::context::Query>,
) -> AppResult<Html<String>> {
    let (form, s) = off_thread_heavy(&state, &query, compute).await?;
    let form = form.presenting(&query);
    let html = SensitivityPage {
        page: "sensitivity",
        nav_query: form.query.clone(),
        form,
        f: Fmt,
        chart: charts::sensitivity::trimming(&s),
        draws_chart: charts::sensitivity::model_draws(&s),
        s: &s,
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
    let (_, s) = off_thread_heavy(&state, &query, compute).await?;
    match item.as_str() {
        "trimming.svg" => Ok(svg_response(
            "trimming.svg",
            charts::sensitivity::trimming(&s),
        )),
        "model-draws.svg" => Ok(svg_response(
            "model-draws.svg",
            charts::sensitivity::model_draws(&s),
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
