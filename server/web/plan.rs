//! The recruitment-planner page: ranked candidates, the plan against its baselines, the
//! plan on the coverage map, and a what-if view of hypothetical joiners.

use askama::Template;
use axum::response::Response;

use super::context::{resolve_page, Query as PageQuery, SettingsForm};
use super::error::{AppError, AppResult};
use super::format::Fmt;
use super::handlers::Computation;
use super::state::AppState;
use super::{csv_response, svg_response};
use crate::analysis::cautions::{Caution, STANDING};
use crate::analysis::coverage::{coverage, CoverageReport};
use crate::analysis::imputed::ImputedPlan;
use crate::analysis::limits;
use crate::analysis::participation::{incomplete_for, IncompleteCountries};
use crate::analysis::planner::{plan_for, Feasibility, ObjectiveKind, Plan, PlanSettings};
use crate::charts;
use crate::csv_out::{cell, csv_text};

/// Bootstrap replicates on the page unless the query asks otherwise (the command line
/// uses [`crate::analysis::planner::DEFAULT_REPLICATES`]).
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
    objective: &'static str,
    objective_choices: [(&'static str, &'static str); 3],
    path_chart: String,
    map_chart: String,
    plan_query: String,
    project_offers_support: bool,
    plan_has_support: bool,
    random_plan_draws: usize,
    incomplete: Option<IncompleteCountries>,
    /// Under multiple imputation: the plan's expected objective per imputation, combined.
    imputed: Option<ImputedPlan>,
    cautions: &'a [Caution],
}

impl PlanPage<'_> {
    /// The analysis settings as hidden fields, so the plan forms keep them.
    fn plan_hidden(&self) -> Vec<(String, String)> {
        form_urlencoded::parse(self.form.query.as_bytes())
            .map(|(k, v)| (k.into_owned(), v.into_owned()))
            .collect()
    }
}

/// The planner's settings from the page's query, validated once. `budget` and
/// `cost_budget` are alternatives: an empty field counts as absent, and giving both is a
/// bad request (the planner says so).
pub fn plan_settings(query: &PageQuery) -> AppResult<PlanSettings> {
    let get = |key: &str| {
        query
            .iter()
            .rev()
            .find(|(k, _)| k == key)
            .map(|(_, v)| v.trim().to_string())
            .filter(|v| !v.is_empty())
    };
    let cost_budget = get("cost_budget")
        .map(|v| {
            v.parse::<f64>()
                .ok()
                .filter(|b| b.is_finite())
                .ok_or_else(|| {
                    AppError::BadRequest(format!("cost_budget must be a number, not '{v}'"))
                })
        })
        .transpose()?;
    let budget = get("budget")
        .map(|v| {
            v.parse::<usize>()
                .map_err(|_| {
                    AppError::BadRequest(format!(
                        "budget must be a whole number of countries, not '{v}'"
                    ))
                })
                .and_then(|b| {
                    limits::check("budget", b, limits::MAX_PLAN_BUDGET)
                        .map_err(AppError::BadRequest)
                })
        })
        .transpose()?;
    let objective = match get("objective") {
        None => ObjectiveKind::default(),
        Some(v) => ObjectiveKind::parse(&v).ok_or_else(|| {
            AppError::BadRequest(format!(
                "objective must be effective-n, largest-smd or feasibility, not '{v}'"
            ))
        })?,
    };
    Ok(PlanSettings {
        budget,
        cost_budget,
        cost_column: get("cost_column"),
        feasibility: get("feasibility").map_or(Feasibility::Auto, |v| Feasibility::parse(&v)),
        objective,
        replicates: match get("replicates") {
            None => PAGE_REPLICATES,
            Some(v) => v
                .parse::<usize>()
                .ok()
                .filter(|r| *r <= limits::MAX_PLAN_REPLICATES)
                .ok_or_else(|| {
                    AppError::BadRequest(format!(
                        "replicates must be a whole number up to {}, not '{v}'",
                        limits::MAX_PLAN_REPLICATES
                    ))
                })?,
        },
        joiners: query
            .iter()
            .filter(|(k, v)| k == "joiner" && !v.trim().is_empty())
            .map(|(_, v)| v.trim().to_string())
            .collect(),
        support: match get("support").as_deref() {
            None | Some("offer") => true,
            Some("none") => false,
            Some(v) => {
                return Err(AppError::BadRequest(format!(
                    "support must be 'offer' or 'none', not '{v}'"
                )))
            }
        },
        ..PlanSettings::default()
    })
}

/// The planner's own keys as an encoded query string (appended to the settings' query):
/// read back by [`plan_settings`] it gives the same settings.
pub fn plan_query(ps: &PlanSettings) -> String {
    let mut q = form_urlencoded::Serializer::new(String::new());
    if let Some(b) = ps.budget {
        q.append_pair("budget", &b.to_string());
    }
    if let Some(b) = ps.cost_budget {
        q.append_pair("cost_budget", &b.to_string());
    }
    if let Some(c) = &ps.cost_column {
        q.append_pair("cost_column", c);
    }
    if ps.feasibility != Feasibility::Auto {
        q.append_pair("feasibility", ps.feasibility.as_str());
    }
    if ps.objective != ObjectiveKind::default() {
        q.append_pair("objective", ps.objective.as_str());
    }
    q.append_pair("replicates", &ps.replicates.to_string());
    if !ps.support {
        q.append_pair("support", "none");
    }
    for j in &ps.joiners {
        q.append_pair("joiner", j);
    }
    q.finish()
}

/// What the plan page shows: the form, the plan, the coverage map's positions, the
/// warning when leaving out incomplete countries changed who is analysed, and under
/// multiple imputation the whole imputed result (the plan's expected objective on every
/// completed frame, combined).
pub(crate) type PlanResult = (
    SettingsForm,
    Plan,
    CoverageReport,
    Option<IncompleteCountries>,
    Option<ImputedPlan>,
);

/// The planner, with its bootstrap of each pick, is heavy work.
pub(super) const COMPUTATION: Computation<PlanResult> = Computation::heavy(compute);

pub(crate) fn compute(state: &AppState, query: &PageQuery) -> AppResult<PlanResult> {
    let (project, settings, view, form) = resolve_page(state, query, "/plan")?;
    let ps = plan_settings(query)?;
    // Under multiple imputation: the plan of the first completed frame, with how often the
    // other imputations' plans agree (in its notes).
    if crate::analysis::imputed::wanted(&settings) {
        let r = crate::analysis::imputed::plan(Some(&project), &view, &settings, &ps)
            .map_err(AppError::BadRequest)?;
        let mut p = r.plan.clone();
        let agreement = r
            .pick_agreement
            .iter()
            .map(|(id, share)| format!("{id} {:.0}%", 100.0 * share))
            .collect::<Vec<_>>()
            .join(", ");
        p.notes.insert(
            1,
            format!(
                "Share of the {} imputations whose own plan picks each country of this plan: {agreement}{}",
                r.imputation.imputations,
                r.objective_spread.map_or_else(String::new, |s| format!(
                    "; the plans' expected objective ranges from {:.3} to {:.3} (mean {:.3})",
                    s.min, s.max, s.mean
                ))
            ),
        );
        // The map of the first completed frame (the plan's), as on the coverage page.
        let c = crate::analysis::imputed::coverage(Some(&project), &view, &settings)?;
        return Ok((form, p, c.coverage, None, Some(r)));
    }
    let p = plan_for(&project, &view, &settings, &ps)?;
    Ok((
        form,
        p,
        coverage(&view),
        incomplete_for(&view, &settings),
        None,
    ))
}

/// The plan on the map; under multiple imputation the countries with filled values crossed.
fn map(p: &Plan, c: &CoverageReport, imputed: Option<&ImputedPlan>) -> String {
    let planned: Vec<String> = p.steps.iter().map(|s| s.id.clone()).collect();
    let filled = imputed.map_or(&[][..], |i| &i.imputation.countries_filled[..]);
    charts::map::component_map_marked_imputed(c, &planned, &p.plan.joiners, filled)
}

pub(super) fn page(
    state: &AppState,
    query: &PageQuery,
    (form, p, c, incomplete, imputed): PlanResult,
) -> AppResult<String> {
    let form = form.presenting(query);
    let project = state.project();
    let mut feasibility_choices = vec![
        (
            "auto".to_string(),
            match &project.manifest.recruitment.feasibility {
                Some(col) => format!("the project's column {col}"),
                None => "the participation model (the project names no column)".to_string(),
            },
        ),
        (
            "model".to_string(),
            "the participation model (leave-one-out)".to_string(),
        ),
        (
            "history".to_string(),
            "the programme's history (earlier waves, past participation)".to_string(),
        ),
    ];
    if let Some(col) = &project.manifest.recruitment.feasibility {
        feasibility_choices.push((col.clone(), format!("column {col}")));
    }
    Ok(PlanPage {
        page: "plan",
        nav_query: form.query.clone(),
        budget: p.plan.budget.map(|b| b.to_string()).unwrap_or_default(),
        cost_budget: p
            .plan
            .cost_budget
            .map(|b| b.to_string())
            .unwrap_or_default(),
        feasibility: p.plan.feasibility.as_str().to_string(),
        feasibility_choices,
        objective: p.plan.objective.as_str(),
        objective_choices: [
            ("effective-n", "the expected effective number of countries"),
            ("largest-smd", "a small expected largest |SMD|"),
            ("feasibility", "the chance that balance is feasible"),
        ],
        project_offers_support: project.manifest.recruitment.support_cost.is_some()
            && project.manifest.recruitment.support_chance.is_some(),
        plan_has_support: p.candidates.iter().any(|r| r.support_cost.is_some())
            && p.plan.cost_budget.is_some(),
        random_plan_draws: crate::analysis::planner::baselines::OUTCOMES_PER_RANDOM_PLAN,
        path_chart: charts::plan::paths(&p),
        map_chart: map(&p, &c, imputed.as_ref()),
        plan_query: plan_query(&p.plan),
        incomplete,
        imputed,
        form,
        f: Fmt,
        p: &p,
        cautions: &STANDING,
    }
    .render()?)
}

/// The plan twin: the plan, or under multiple imputation the imputed result (the plan
/// with the expected objective per imputation and combined), as `gapwise plan --json`.
#[derive(serde::Serialize)]
#[serde(untagged)]
pub enum PlanTwin {
    Plan(Box<Plan>),
    Imputed(Box<ImputedPlan>),
}

pub(super) fn twin((_, p, _, _, imputed): PlanResult) -> PlanTwin {
    match imputed {
        Some(i) => PlanTwin::Imputed(Box::new(i)),
        None => PlanTwin::Plan(Box::new(p)),
    }
}

pub(super) fn artifact(item: &str, (_, p, c, _, imputed): &PlanResult) -> AppResult<Response> {
    match item {
        "paths.svg" => Ok(svg_response(
            "recruitment-paths.svg",
            charts::plan::paths(p),
        )),
        "map.svg" => Ok(svg_response(
            "recruitment-map.svg",
            map(p, c, imputed.as_ref()),
        )),
        "plan.csv" => Ok(csv_response(
            "recruitment-plan.csv",
            csv_text(
                &[
                    "step",
                    "code",
                    "name",
                    "supported",
                    "probability",
                    "cost",
                    "support_cost",
                    "support_gain_per_cost",
                    "cumulative_cost",
                    "expected_effective_n",
                    "expected_effective_n_mc_error",
                    "expected_gain",
                    "expected_gain_per_cost",
                    "expected_max_abs_smd",
                    "expected_mean_abs_smd",
                    "feasible_chance",
                    "effective_n_if_all_join",
                    "max_abs_smd_if_all_join",
                    "feasible_if_all_join",
                    "by_exchange",
                    "stability",
                ],
                p.steps.iter().enumerate().map(|(j, s)| {
                    vec![
                        (j + 1).to_string(),
                        s.id.clone(),
                        s.name.clone(),
                        u8::from(s.supported).to_string(),
                        cell(Some(s.probability)),
                        cell(s.cost),
                        cell(s.support_cost),
                        cell(s.support_gain_per_cost),
                        cell(s.cumulative_cost),
                        cell(Some(s.expected_effective_n)),
                        cell(s.expected_effective_n_mc_error),
                        cell(Some(s.expected_gain)),
                        cell(s.expected_gain_per_cost),
                        cell(Some(s.expected_max_abs_smd)),
                        cell(Some(s.expected_mean_abs_smd)),
                        cell(Some(s.feasible_chance)),
                        cell(Some(s.effective_n_if_all_join)),
                        cell(Some(s.max_abs_smd_if_all_join)),
                        u8::from(s.feasible_if_all_join).to_string(),
                        u8::from(s.exchanged).to_string(),
                        cell(s.stability),
                    ]
                }),
            ),
        )),
        "baselines.csv" => Ok(csv_response(
            "recruitment-baselines.csv",
            csv_text(
                &[
                    "rule",
                    "countries",
                    "expected_effective_n_mean",
                    "mc_error",
                    "draws",
                ],
                [
                    &p.baselines.likeliest,
                    &p.baselines.most_different,
                    &p.baselines.random,
                ]
                .into_iter()
                .map(|b| {
                    vec![
                        b.rule.to_string(),
                        b.ids.join(" "),
                        cell(Some(b.expected_effective_n_mean)),
                        cell(b.mc_error),
                        b.draws.to_string(),
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
                    "gain_if_joined",
                    "expected_gain",
                    "expected_gain_per_cost",
                    "distance_to_participants",
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
                        cell(Some(r.distance)),
                        cell(r.stability),
                        u8::from(r.in_plan).to_string(),
                    ]
                }),
            ),
        )),
        _ => Err(AppError::NotFound(format!(
            "no {item} here; try paths.svg, map.svg, plan.csv, baselines.csv or candidates.csv"
        ))),
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn parse(query: &str) -> PlanSettings {
        let pairs: PageQuery = form_urlencoded::parse(query.as_bytes())
            .map(|(k, v)| (k.into_owned(), v.into_owned()))
            .collect();
        plan_settings(&pairs).unwrap()
    }

    #[test]
    fn settings_survive_the_round_trip_through_the_query() {
        let cases = [
            PlanSettings {
                budget: Some(7),
                replicates: 0,
                ..PlanSettings::default()
            },
            PlanSettings {
                budget: None,
                cost_budget: Some(250.5),
                cost_column: Some("cost & fees=%".to_string()),
                feasibility: Feasibility::Column("chance of joining".to_string()),
                objective: ObjectiveKind::LargestSmd,
                replicates: 33,
                joiners: vec!["XAB".to_string(), "X&Y".to_string()],
                ..PlanSettings::default()
            },
            PlanSettings {
                feasibility: Feasibility::Model,
                objective: ObjectiveKind::Feasibility,
                ..PlanSettings::default()
            },
        ];
        for settings in cases {
            let query = plan_query(&settings);
            assert_eq!(parse(&query), settings, "{query}");
        }
        // Values are encoded: no raw '&' or '=' inside a value.
        let q = plan_query(&PlanSettings {
            cost_column: Some("a&b=c".to_string()),
            ..PlanSettings::default()
        });
        assert!(q.contains("cost_column=a%26b%3Dc"), "{q}");
    }

    #[test]
    fn empty_fields_are_absent_and_bad_values_are_refused() {
        let s = parse("budget=&cost_budget=120&feasibility=&replicates=5");
        assert_eq!(s.budget, None);
        assert_eq!(s.cost_budget, Some(120.0));
        assert_eq!(s.feasibility, Feasibility::Auto);
        let bad = |q: &str| {
            let pairs: PageQuery = form_urlencoded::parse(q.as_bytes())
                .map(|(k, v)| (k.into_owned(), v.into_owned()))
                .collect();
            plan_settings(&pairs).is_err()
        };
        assert!(bad("budget=two"));
        assert!(bad("cost_budget=inf"));
        assert!(bad("objective=most"));
        assert!(bad("replicates=99999"));
    }
}
