//! The coverage page: which kinds of countries are missing.

use askama::Template;
use axum::response::Response;

use super::context::{resolve_page, Query, SettingsForm};
use super::error::{AppError, AppResult};
use super::format::Fmt;
use super::handlers::Computation;
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

/// The components and rates are light work; the page, its twin and its downloads share them.
pub(super) const COMPUTATION: Computation<CoverageResult> = Computation::light(compute);

fn compute(state: &AppState, query: &Query) -> AppResult<CoverageResult> {
    let (project, settings, view, form) = resolve_page(state, query, "/coverage")?;
    if crate::analysis::imputed::wanted(&settings) {
        let r = crate::analysis::imputed::coverage(Some(&project), &view, &settings)?;
        return Ok((form, r.coverage, None, r.filled));
    }
    Ok((
        form,
        coverage(&view),
        incomplete_for(&view, &settings),
        Vec::new(),
    ))
}

pub(super) fn page(
    _: &AppState,
    query: &Query,
    (form, c, incomplete, filled): CoverageResult,
) -> AppResult<String> {
    let form = form.presenting(query);
    Ok(CoveragePage {
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
    .render()?)
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

pub(super) fn twin((_, coverage, _, filled): CoverageResult) -> CoverageTwin {
    CoverageTwin { coverage, filled }
}

pub(super) fn artifact(item: &str, (_, c, _, filled): &CoverageResult) -> AppResult<Response> {
    match item {
        "map.svg" => Ok(svg_response(
            "component-map.svg",
            charts::map::component_map_imputed(c, filled),
        )),
        "spreads.svg" => Ok(svg_response(
            "indicator-spreads.svg",
            charts::map::spreads(c),
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
