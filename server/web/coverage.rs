//! The coverage page: which kinds of countries are missing.

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
use crate::analysis::coverage::{coverage, CoverageReport};
use crate::analysis::participation::{incomplete_for, IncompleteCountries};
use crate::charts;
use crate::csv_out::{cell, csv_text};

#[derive(Template)]
#[template(path = "coverage.html")]
struct CoveragePage<'a> {
    page: &'static str,
    nav_query: String,
    form: SettingsForm,
    f: Fmt,
    c: &'a CoverageReport,
    incomplete: Option<IncompleteCountries>,
    map_chart: String,
    spread_chart: String,
    cautions: &'a [Caution],
}

/// The coverage page's result; under multiple imputation the map is of the first
/// completed frame, and the countries with filled values are named in the last element.
pub(crate) type CoverageResult = (
    SettingsForm,
    CoverageReport,
    Option<IncompleteCountries>,
    Vec<String>,
);

fn compute(state: &AppState, query: &super::context::Query) -> AppResult<CoverageResult> {
    let (project, settings, view) = resolve(state, query)?;
    let form = SettingsForm::new("/coverage", &project, &settings);
    if crate::analysis::imputed::wanted(&settings) {
        let r = crate::analysis::imputed::coverage(Some(&project), &view, &settings)
            .map_err(|e| AppError::BadRequest(e.to_string()))?;
        return Ok((form, r.coverage, None, r.filled));
    }
    Ok((
        form,
        coverage(&view),
        incomplete_for(&view, &settings),
        Vec::new(),
    ))
}

pub async fn page(
    State(state): State<Arc<AppState>>,
    Query(query): Query<super::context::Query>,
) -> AppResult<Html<String>> {
    let (form, c, incomplete, filled) = off_thread(&state, &query, compute).await?;
    let form = form.presenting(&query);
    let html = CoveragePage {
        page: "coverage",
        nav_query: form.query.clone(),
        form,
        f: Fmt,
        map_chart: charts::map::component_map_imputed(&c, &filled),
        spread_chart: charts::map::spreads(&c),
        c: &c,
        incomplete,
        cautions: &STANDING,
    }
    .render()?;
    Ok(Html(html))
}

/// The coverage twin: the report and, under multiple imputation, the countries with
/// filled values (the ones the map crosses).
#[derive(serde::Serialize)]
pub struct CoverageTwin {
    #[serde(flatten)]
    coverage: CoverageReport,
    #[serde(skip_serializing_if = "Vec::is_empty")]
    filled: Vec<String>,
}

pub async fn json(
    State(state): State<Arc<AppState>>,
    Query(query): Query<super::context::Query>,
) -> AppResult<Json<CoverageTwin>> {
    let (_, coverage, _, filled) = off_thread(&state, &query, compute).await?;
    Ok(Json(CoverageTwin { coverage, filled }))
}

pub async fn artifact(
    State(state): State<Arc<AppState>>,
    Path(item): Path<String>,
    Query(query): Query<super::context::Query>,
) -> AppResult<Response> {
    let (_, c, _, filled) = off_thread(&state, &query, compute).await?;
    match item.as_str() {
        "map.svg" => Ok(svg_response(
            "component-map.svg",
            charts::map::component_map_imputed(&c, &filled),
        )),
        "spreads.svg" => Ok(svg_response(
            "indicator-spreads.svg",
            charts::map::spreads(&c),
        )),
        "points.csv" => Ok(csv_response(
            "component-scores.csv",
            csv_text(
                &[
                    "code",
                    "name",
                    "group",
                    "took_part",
                    "component_1",
                    "component_2",
                ],
                c.points.iter().map(|p| {
                    vec![
                        p.id.clone(),
                        p.name.clone(),
                        p.group.clone().unwrap_or_default(),
                        u8::from(p.participated).to_string(),
                        cell(Some(p.pc1)),
                        cell(Some(p.pc2)),
                    ]
                }),
            ),
        )),
        "loadings.csv" => {
            let shown = c.loadings.first().map_or(0, |l| l.values.len());
            let mut header = vec!["indicator".to_string(), "label".to_string()];
            header.extend((1..=shown).map(|k| format!("component_{k}")));
            let refs: Vec<&str> = header.iter().map(String::as_str).collect();
            Ok(csv_response(
                "component-loadings.csv",
                csv_text(
                    &refs,
                    c.loadings.iter().map(|l| {
                        [
                            vec![l.indicator.clone(), l.label.clone()],
                            l.values.iter().map(|v| cell(Some(*v))).collect(),
                        ]
                        .concat()
                    }),
                ),
            ))
        }
        "rates.csv" => {
            let group_rows = c.groups.iter().map(|g| {
                vec![
                    c.group_label.clone().unwrap_or_default(),
                    g.label.clone(),
                    g.eligible.to_string(),
                    g.participating.to_string(),
                    cell(g.rate),
                ]
            });
            let tercile_rows = c.terciles.iter().flat_map(|t| {
                t.cells.iter().map(move |g| {
                    vec![
                        t.label.clone(),
                        g.label.clone(),
                        g.eligible.to_string(),
                        g.participating.to_string(),
                        cell(g.rate),
                    ]
                })
            });
            Ok(csv_response(
                "coverage-rates.csv",
                csv_text(
                    &["breakdown", "level", "eligible", "took_part", "coverage"],
                    group_rows.chain(tercile_rows),
                ),
            ))
        }
        _ => Err(AppError::NotFound(format!(
            "no {item} here; try map.svg, spreads.svg, points.csv, loadings.csv or rates.csv"
        ))),
    }
}
