//! The recruitment-planner page: ranked candidates, the plan against its baselines, the
//! plan on the coverage map, and a what-if view of hypothetical joiners.

use std::sync::Arc;

use askama::Template;
use axum::extract::{Path, Query, State};
use axum::response::{Html, Response};
use axum::Json;

use super::context::{off_thread_heavy, resolve, Query as PageQuery, SettingsForm};
use super::error::{AppError, AppResult};
use super::format::Fmt;
use super::state::AppState;
use super::{csv_response, svg_response};
use crate::analysis::cautions::{Caution, STANDING};
use crate::analysis::coverage::{coverage, CoverageReport};
use crate::analysis::planner::{plan, Feasibility, Plan, PlanSettings};
use crate::charts;
use crate::csv_out::{cell, csv_text};

/// Bootstrap replicates on the page unless the query asks otherwise (the command line
/// uses 200).
const PAGE_REPLICATES: usize = 100;

#[derive(Template)]
#[template(path = "plan.html")]
struct PlanPage<'a> {
    page: &'static str,
    nav_query: String,
    form: SettingsForm,
    f: Fmt,
    p: &'a Plan,
    budget: String,
    cost_budget: String,
    feasibility: String,
    feasibility_choices: Vec<(String, String)>,
    path_chart: String,
    map_chart: String,
    plan_query: String,
    cautions: &'a [Caution],
}

impl PlanPage<'_> {
    /// The analysis settings as hidden fields, so the plan forms keep them.
    fn plan_hidden(&self) -> Vec<(String, String)> {
        self.form
            .query
            .split('&')
            .filter_map(|kv| kv.split_once('='))
            .map(|(k, v)| (k.to_string(), percent_decode(v)))
            .collect()
    }
}

fn percent_decode(s: &str) -> String {
    let bytes = s.as_bytes();
    let mut out = Vec::with_capacity(bytes.len());
    let mut i = 0;
    while i < bytes.len() {
        if bytes[i] == b'%' && i + 2 < bytes.len() {
            if let Ok(b) = u8::from_str_radix(&s[i + 1..i + 3], 16) {
                out.push(b);
                i += 3;
                continue;
            }
        }
        out.push(if bytes[i] == b'+' { b' ' } else { bytes[i] });
        i += 1;
    }
    String::from_utf8_lossy(&out).to_string()
}

/// Reads the planner's keys from the query string.
pub fn plan_settings(query: &PageQuery, view_cost: Option<&str>) -> AppResult<PlanSettings> {
    let get = |key: &str| {
        query
            .iter()
            .rev()
            .find(|(k, _)| k == key)
            .map(|(_, v)| v.trim().to_string())
            .filter(|v| !v.is_empty())
    };
    let number = |key: &str| -> AppResult<Option<f64>> {
        get(key)
            .map(|v| {
                v.parse::<f64>()
                    .map_err(|_| AppError::BadRequest(format!("{key} must be a number, not '{v}'")))
            })
            .transpose()
    };
    let cost_budget = number("cost_budget")?;
    let budget = get("budget")
        .map(|v| {
            v.parse::<usize>().map_err(|_| {
                AppError::BadRequest(format!(
                    "budget must be a whole number of countries, not '{v}'"
                ))
            })
        })
        .transpose()?;
    Ok(PlanSettings {
        budget: if cost_budget.is_some() {
            None
        } else {
            budget.or(Some(5))
        },
        cost_budget,
        cost_column: get("cost_column").or_else(|| cost_budget.and(view_cost.map(str::to_string))),
        feasibility: match get("feasibility") {
            None => Feasibility::Model,
            Some(v) if v == "model" => Feasibility::Model,
            Some(v) => Feasibility::Column(v),
        },
        replicates: match get("replicates") {
            None => PAGE_REPLICATES,
            Some(v) => v
                .parse::<usize>()
                .ok()
                .filter(|r| *r <= 2000)
                .ok_or_else(|| {
                    AppError::BadRequest(format!(
                        "replicates must be a whole number up to 2000, not '{v}'"
                    ))
                })?,
        },
        joiners: query
            .iter()
            .filter(|(k, _)| k == "joiner")
            .map(|(_, v)| v.clone())
            .collect(),
        ..PlanSettings::default()
    })
}

fn compute(state: &AppState, query: &PageQuery) -> AppResult<(SettingsForm, Plan, CoverageReport)> {
    let (project, settings, view) = resolve(state, query)?;
    let form = SettingsForm::new("/plan", &project, &settings);
    let ps = plan_settings(query, view.cost_column.as_deref())?;
    let p = plan(&view, &settings, &ps).map_err(|e| AppError::BadRequest(e.to_string()))?;
    Ok((form, p, coverage(&view)))
}

fn map(p: &Plan, c: &CoverageReport) -> String {
    let planned: Vec<String> = p.steps.iter().map(|s| s.id.clone()).collect();
    charts::map::component_map_marked(c, &planned, &p.plan.joiners)
}

/// The planner's own keys as a query string (appended to the settings' query).
fn plan_query(ps: &PlanSettings) -> String {
    let mut parts = Vec::new();
    if let Some(b) = ps.budget {
        parts.push(format!("budget={b}"));
    }
    if let Some(b) = ps.cost_budget {
        parts.push(format!("cost_budget={b}"));
    }
    if let Feasibility::Column(c) = &ps.feasibility {
        parts.push(format!("feasibility={c}"));
    }
    for j in &ps.joiners {
        parts.push(format!("joiner={j}"));
    }
    parts.join("&")
}

pub async fn page(
    State(state): State<Arc<AppState>>,
    Query(query): Query<PageQuery>,
) -> AppResult<Html<String>> {
    let (form, p, c) = off_thread_heavy(&state, &query, compute).await?;
    let project = state.project();
    let mut feasibility_choices =
        vec![("model".to_string(), "the participation model".to_string())];
    if let Some(col) = &project.manifest.recruitment.feasibility {
        feasibility_choices.push((col.clone(), format!("column {col}")));
    }
    let html = PlanPage {
        page: "plan",
        nav_query: form.query.clone(),
        budget: p.plan.budget.map(|b| b.to_string()).unwrap_or_default(),
        cost_budget: p
            .plan
            .cost_budget
            .map(|b| b.to_string())
            .unwrap_or_default(),
        feasibility: match &p.plan.feasibility {
            Feasibility::Model => "model".to_string(),
            Feasibility::Column(c) => c.clone(),
        },
        feasibility_choices,
        path_chart: charts::plan::paths(&p),
        map_chart: map(&p, &c),
        plan_query: plan_query(&p.plan),
        form,
        f: Fmt,
        p: &p,
        cautions: &STANDING,
    }
    .render()?;
    Ok(Html(html))
}

pub async fn json(
    State(state): State<Arc<AppState>>,
    Query(query): Query<PageQuery>,
) -> AppResult<Json<Plan>> {
    Ok(Json(off_thread_heavy(&state, &query, compute).await?.1))
}

pub async fn artifact(
    State(state): State<Arc<AppState>>,
    Path(item): Path<String>,
    Query(query): Query<PageQuery>,
) -> AppResult<Response> {
    let (_, p, c) = off_thread_heavy(&state, &query, compute).await?;
    match item.as_str() {
        "paths.svg" => Ok(svg_response(
            "recruitment-paths.svg",
            charts::plan::paths(&p),
        )),
        "map.svg" => Ok(svg_response("recruitment-map.svg", map(&p, &c))),
        "plan.csv" => Ok(csv_response(
            "recruitment-plan.csv",
            csv_text(
                &[
                    "step",
                    "code",
                    "name",
                    "effective_n",
                    "mean_abs_smd",
                    "max_abs_smd",
                    "feasible",
                    "gain",
                    "probability",
                    "expected_gain",
                    "cost",
                    "cumulative_cost",
                    "stability",
                ],
                p.steps.iter().enumerate().map(|(j, s)| {
                    vec![
                        (j + 1).to_string(),
                        s.id.clone(),
                        s.name.clone(),
                        cell(Some(s.effective_n)),
                        cell(Some(s.mean_abs_smd)),
                        cell(Some(s.max_abs_smd)),
                        u8::from(s.feasible).to_string(),
                        cell(Some(s.gain)),
                        cell(Some(s.probability)),
                        cell(Some(s.expected_gain)),
                        cell(s.cost),
                        cell(s.cumulative_cost),
                        cell(s.stability),
                    ]
                }),
            ),
        )),
        "candidates.csv" => Ok(csv_response(
            "recruitment-candidates.csv",
            csv_text(
                &[
                    "code",
                    "name",
                    "group",
                    "probability",
                    "cost",
                    "effective_n_if_joined",
                    "gain",
                    "expected_gain",
                    "expected_gain_per_cost",
                    "stability",
                    "in_plan",
                ],
                p.candidates.iter().map(|r| {
                    vec![
                        r.id.clone(),
                        r.name.clone(),
                        r.group.clone().unwrap_or_default(),
                        cell(Some(r.probability)),
                        cell(r.cost),
                        cell(Some(r.if_joined.effective_n)),
                        cell(Some(r.gain)),
                        cell(Some(r.expected_gain)),
                        cell(r.expected_gain_per_cost),
                        cell(r.stability),
                        u8::from(r.in_plan).to_string(),
                    ]
                }),
            ),
        )),
        _ => Err(AppError::NotFound(format!(
            "no {item} here; try paths.svg, map.svg, plan.csv or candidates.csv"
        ))),
    }
}
