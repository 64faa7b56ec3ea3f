//! The self-contained meeting report: one HTML file with inline CSS and SVG, nothing
//! fetched from anywhere, printable on A4 and Letter. Written by `gapwise report` and by
//! the report button (`/report`), with the settings of the page it was asked from.

use std::sync::Arc;

use askama::Template;
use axum::extract::{Query, State};
use axum::http::header;
use axum::response::{IntoResponse, Response};

use super::context::{self, Query as PageQuery};
use super::error::{AppError, AppResult};
use super::format::Fmt;
use super::handlers::Computation;
use super::impact::{impact_query, impact_settings, side_by_side, Cell};
use super::plan::{plan_query, plan_settings};
use super::state::AppState;
use crate::analysis::cautions::{Caution, STANDING};
use crate::analysis::impact::{ImpactReport, ImpactSettings, Shares};
use crate::analysis::limits;
use crate::analysis::participation::Coefficient;
use crate::analysis::planner::{Plan, PlanSettings};
use crate::analysis::projection::{ProjectionReport, ProjectionSettings};
use crate::analysis::report::{report, report_with, Parts, Report, ReportSettings, Waves};
use crate::analysis::settings::{model_label, Settings};
use crate::charts;
use crate::project::{Project, WaveView};

/// Our stylesheet, inlined so the report stands alone.
const CSS: &str = include_str!("../../static/gapwise.css");

/// The report's country bootstrap replicates of the impact section unless asked
/// otherwise: fewer than the impact page's 199, so that a report of several waves stays
/// quick (its reproducibility block says so).
pub const REPORT_IMPACT_REPLICATES: usize = 49;

/// One wave's section, with its charts and tables drawn.
struct WaveSection<'a> {
    w: &'a crate::analysis::report::WaveReport,
    coefficients: Vec<Coefficient>,
    impact_table: Vec<(String, Vec<Cell>)>,
    propensity_chart: String,
    smd_chart: String,
    map_chart: String,
    plan_chart: String,
    pooled_chart: String,
    /// The projection's map of predicted country means (empty without a projection).
    projection_chart: String,
}

/// One setting, in words, for the settings and reproducibility blocks.
struct SettingRow {
    name: &'static str,
    value: String,
}

#[derive(Template)]
#[template(path = "report.html")]
struct ReportPage<'a> {
    r: &'a Report,
    f: Fmt,
    css: &'static str,
    cautions: &'a [Caution],
    coverage_chart: String,
    sections: Vec<WaveSection<'a>>,
    waves_text: String,
    setting_rows: Vec<SettingRow>,
    report_query: String,
    command_line: String,
}

/// Reads every setting of the report from a query string (a page's, or the command
/// line's options under the same names): the analysis settings, `waves` (`3,4` or `all`),
/// the planner's keys and the impact view's keys, each parsed by its page's own parser.
pub fn report_settings(project: &Project, query: &PageQuery) -> AppResult<ReportSettings> {
    let settings = context::normalised_settings(project, query)?;
    let waves = query
        .iter()
        .rev()
        .find(|(k, _)| k == "waves")
        .map(|(_, v)| Waves::parse(v))
        .transpose()
        .map_err(AppError::BadRequest)?
        .unwrap_or(Waves::One);
    let plan = plan_settings(query)?;
    let impact = if project.microdata.is_some() && project.manifest.microdata.is_some() {
        let mut imp = impact_settings(project, query)?;
        // In the report `replicates` is the planner's; the impact section's pipeline
        // bootstrap has its own key and a smaller default, to keep the report quick.
        imp.replicates = match query.iter().rev().find(|(k, _)| k == "impact_replicates") {
            None => REPORT_IMPACT_REPLICATES,
            Some((_, v)) => v
                .trim()
                .parse::<usize>()
                .ok()
                .filter(|r| *r <= limits::MAX_PIPELINE_REPLICATES)
                .ok_or_else(|| {
                    AppError::BadRequest(format!(
                        "impact_replicates must be a whole number up to {}, not '{v}'",
                        limits::MAX_PIPELINE_REPLICATES
                    ))
                })?,
        };
        Some(imp)
    } else {
        None
    };
    Ok(ReportSettings {
        settings,
        waves,
        plan,
        impact,
    })
}

/// The query string that asks for this report again (`/report?...`): every setting,
/// percent-encoded by `form_urlencoded`; read back by [`report_settings`] it gives the
/// same settings.
pub fn report_query(rs: &ReportSettings) -> String {
    let mut parts = vec![rs.settings.to_query(), plan_query(&rs.plan)];
    if let Some(imp) = &rs.impact {
        parts.push(report_impact_query(imp));
    }
    if let Some(w) = rs.waves.as_query_value() {
        parts.push(
            form_urlencoded::Serializer::new(String::new())
                .append_pair("waves", &w)
                .finish(),
        );
    }
    parts.retain(|p| !p.is_empty());
    parts.join("&")
}

/// The impact keys of the report's query: as the impact page's, with the pipeline
/// bootstrap under `impact_replicates` (the report's `replicates` is the planner's).
fn report_impact_query(imp: &ImpactSettings) -> String {
    let page: Vec<(String, String)> = form_urlencoded::parse(impact_query(imp).as_bytes())
        .into_owned()
        .collect();
    let mut q = form_urlencoded::Serializer::new(String::new());
    for (k, v) in &page {
        q.append_pair(
            if k == "replicates" {
                "impact_replicates"
            } else {
                k
            },
            v,
        );
    }
    q.finish()
}

/// The command line that writes the same report (`gapwise report PROJECT ...`), each
/// value quoted for a POSIX shell where it needs quoting.
pub fn command_line(rs: &ReportSettings) -> String {
    let s = &rs.settings;
    let mut args: Vec<String> = vec!["gapwise".into(), "report".into(), "PROJECT".into()];
    let mut flag = |name: &str, value: &str| {
        args.push(format!("--{name}"));
        args.push(shell_word(value));
    };
    match &rs.waves {
        Waves::One => {
            if let Some(w) = s.wave {
                flag("wave", &w.to_string());
            }
        }
        other => flag("waves", &other.as_query_value().unwrap_or_default()),
    }
    flag("model", s.model.as_str());
    flag("weighting", s.weighting.as_str());
    if let Some(c) = &s.covariates {
        flag("covariates", &c.join(","));
    }
    if let Some(c) = &s.factors {
        flag("categorical", &c.join(","));
    }
    if let Some(t) = s.trim {
        flag("trim", &t.to_string());
    }
    flag("missing", s.missing.as_str());
    flag("seed", &s.seed.to_string());
    let p = &rs.plan;
    if let Some(b) = p.budget {
        flag("budget", &b.to_string());
    }
    if let Some(b) = p.cost_budget {
        flag("cost-budget", &b.to_string());
    }
    if let Some(c) = &p.cost_column {
        flag("cost-column", c);
    }
    flag("feasibility", p.feasibility.as_str());
    flag("objective", p.objective.as_str());
    flag("replicates", &p.replicates.to_string());
    if !p.joiners.is_empty() {
        flag("joiners", &p.joiners.join(","));
    }
    if let Some(imp) = &rs.impact {
        flag("outcome", &imp.outcome);
        flag("predictors", &imp.predictors.join(","));
        flag("kind", imp.kind.as_str());
        if !imp.country_indicators.is_empty() {
            flag("country-indicators", &imp.country_indicators.join(","));
        }
        if let Shares::Population(c) = &imp.shares {
            flag("population", c);
        }
        flag("impact-replicates", &imp.replicates.to_string());
        flag("wild-replicates", &imp.wild_replicates.to_string());
    }
    if s.match_variances {
        args.push("--variances".into());
    }
    args.join(" ")
}

/// A word as a POSIX shell reads it: bare when it holds only safe characters, else in
/// single quotes (with `'` written as `'\''`).
fn shell_word(value: &str) -> String {
    let safe = !value.is_empty()
        && value
            .chars()
            .all(|c| c.is_ascii_alphanumeric() || "-_.,:/+=@%".contains(c));
    if safe {
        value.to_string()
    } else {
        format!("'{}'", value.replace('\'', "'\\''"))
    }
}

/// Every setting in words (the settings block).
fn setting_rows(r: &Report) -> Vec<SettingRow> {
    let rs = &r.request;
    let s = &rs.settings;
    let row = |name, value: String| SettingRow { name, value };
    let mut rows = vec![
        row("Participation model", model_label(s.model).to_string()),
        row("Weighting", s.weighting.label().to_string()),
        row(
            "Numeric indicators",
            s.covariates
                .as_ref()
                .map_or("all numeric indicators".to_string(), |c| list_or_none(c)),
        ),
        row(
            "Categorical indicators",
            s.factors
                .as_ref()
                .map_or("all categorical indicators".to_string(), |c| {
                    list_or_none(c)
                }),
        ),
        row(
            "Trimming",
            s.trim.map_or("none".to_string(), |t| {
                format!("weights capped at the {} percentile", Fmt.ordinal(&t))
            }),
        ),
        row("Missing values", s.missing.as_str().to_string()),
        row(
            "Entropy balancing matches variances",
            if s.match_variances { "yes" } else { "no" }.to_string(),
        ),
        row("Seed of every random draw", s.seed.to_string()),
    ];
    let p = &rs.plan;
    rows.push(row(
        "Recruitment budget",
        match (p.budget, p.cost_budget) {
            (_, Some(b)) => format!("total cost {b}"),
            (Some(k), None) => format!("{k} countries"),
            (None, None) => format!(
                "{} countries (the default)",
                crate::analysis::planner::DEFAULT_PLAN_SIZE
            ),
        },
    ));
    rows.push(row(
        "Cost column",
        p.cost_column
            .clone()
            .unwrap_or_else(|| "the project's [recruitment] cost, if any".to_string()),
    ));
    rows.push(row(
        "Chance of joining",
        match &p.feasibility {
            crate::analysis::planner::Feasibility::Auto => {
                "auto (the project's feasibility column, else the participation model)".to_string()
            }
            crate::analysis::planner::Feasibility::Model => {
                "the participation model, leave-one-out".to_string()
            }
            crate::analysis::planner::Feasibility::History => {
                "the programme's history (earlier waves, past participation)".to_string()
            }
            crate::analysis::planner::Feasibility::Column(c) => format!("column {c}"),
        },
    ));
    rows.push(row(
        "Support",
        if p.support {
            "weighed where the project prices it (under a cost budget)".to_string()
        } else {
            "invitations only".to_string()
        },
    ));
    rows.push(row("Plan objective", p.objective.as_str().to_string()));
    rows.push(row(
        "Bootstrap replicates of the plan",
        p.replicates.to_string(),
    ));
    rows.push(row("What-if joiners", list_or_none(&p.joiners)));
    if let Some(imp) = &rs.impact {
        rows.push(row("Outcome", imp.outcome.clone()));
        rows.push(row("Predictors", list_or_none(&imp.predictors)));
        rows.push(row("Respondent-level model", imp.kind.as_str().to_string()));
        rows.push(row(
            "Country indicators in the two-step equation",
            list_or_none(&imp.country_indicators),
        ));
        rows.push(row(
            "Countries count",
            match &imp.shares {
                Shares::Equal => "each country by its weight".to_string(),
                Shares::Population(c) => format!("weight × population ({c})"),
            },
        ));
        rows.push(row(
            "Country bootstrap replicates of the impact section (the whole pipeline)",
            if imp.replicates == 0 {
                "0: not run".to_string()
            } else if imp.replicates == REPORT_IMPACT_REPLICATES {
                format!(
                    "{} (fewer than the impact page's {}, to keep the report quick; seed {})",
                    imp.replicates,
                    crate::analysis::impact_bootstrap::DEFAULT_REPLICATES,
                    rs.settings.seed
                )
            } else {
                format!("{} (seed {})", imp.replicates, rs.settings.seed)
            },
        ));
        rows.push(row(
            "Wild cluster bootstrap replicates",
            imp.wild_replicates.to_string(),
        ));
    }
    if let Some(ps) = &r.projection_settings {
        rows.push(row(
            "Projection",
            format!(
                "outcome {}; respondent predictors: {}",
                ps.outcome,
                list_or_none(&ps.predictors)
            ),
        ));
    }
    rows
}

fn list_or_none(items: &[String]) -> String {
    if items.is_empty() {
        "none".to_string()
    } else {
        items.join(", ")
    }
}

/// Renders a report as one HTML document.
pub fn render_report(r: &Report) -> Result<String, String> {
    let sections = r
        .sections
        .iter()
        .map(|w| {
            let planned: Vec<String> = w
                .plan
                .as_ref()
                .map(|p| p.steps.iter().map(|s| s.id.clone()).collect())
                .unwrap_or_default();
            let joiners: Vec<String> = w
                .plan
                .as_ref()
                .map(|p| p.plan.joiners.clone())
                .unwrap_or_default();
            let impact = w.impact.as_ref().and_then(|i| i.as_ref().ok());
            WaveSection {
                coefficients: w
                    .fit
                    .as_ref()
                    .map(|f| f.model.coefficients.clone())
                    .unwrap_or_default(),
                impact_table: impact.map(side_by_side).unwrap_or_default(),
                propensity_chart: w
                    .fit
                    .as_ref()
                    .map(charts::model::propensity_vs_weight)
                    .unwrap_or_default(),
                smd_chart: w
                    .balance
                    .as_ref()
                    .map(charts::balance::smd_dots)
                    .unwrap_or_default(),
                map_chart: charts::map::component_map_marked_imputed(
                    &w.coverage,
                    &planned,
                    &joiners,
                    &w.coverage_filled,
                ),
                plan_chart: w.plan.as_ref().map(charts::plan::paths).unwrap_or_default(),
                pooled_chart: impact.map(charts::impact::pooled).unwrap_or_default(),
                projection_chart: match &w.projection {
                    Some(Ok(p)) => charts::projection::component_map(p),
                    _ => String::new(),
                },
                w,
            }
        })
        .collect();
    let page = ReportPage {
        f: Fmt,
        css: CSS,
        cautions: &STANDING,
        coverage_chart: charts::coverage::coverage_by_group(&r.overview),
        sections,
        waves_text: r
            .waves
            .iter()
            .map(i64::to_string)
            .collect::<Vec<_>>()
            .join(", "),
        setting_rows: setting_rows(r),
        report_query: report_query(&r.request),
        command_line: command_line(&r.request),
        r,
    };
    page.render()
        .map_err(|e| format!("the report template failed: {e}"))
}

/// Builds and renders the report of a project, every part computed here (the command
/// line).
pub fn render(project: &Project, request: &ReportSettings) -> Result<String, String> {
    render_report(&report(project, request)?)
}

/// The report's heavier parts taken from the pages' result cache: the same query keys the
/// pages use, so a plan, impact view or projection already shown is not computed again.
struct CachedParts<'a> {
    state: &'a AppState,
    query: &'a PageQuery,
}

impl CachedParts<'_> {
    /// The wave's analysis settings as query pairs, followed by the raw pairs of `own`.
    fn sub_query(&self, settings: &Settings, own: &[&str]) -> PageQuery {
        let mut q: PageQuery = settings
            .to_pairs()
            .into_iter()
            .map(|(k, v)| (k.to_string(), v))
            .collect();
        q.extend(
            self.query
                .iter()
                .filter(|(k, _)| own.contains(&k.as_str()))
                .cloned(),
        );
        q
    }
}

impl Parts for CachedParts<'_> {
    fn plan(
        &self,
        _: &Project,
        _: &WaveView,
        settings: &Settings,
        _: &PlanSettings,
    ) -> Result<Plan, String> {
        let q = self.sub_query(settings, &context::PLAN_KEYS);
        context::cached(self.state, &q, super::plan::compute)
            .map(|r| r.1.clone())
            .map_err(|e| e.to_string())
    }

    fn impact(
        &self,
        _: &Project,
        _: &WaveView,
        settings: &Settings,
        imp: &ImpactSettings,
    ) -> Result<ImpactReport, String> {
        // The impact page's own query for these settings, so that the report and the
        // page share one cached result when they ask the same.
        let mut q = self.sub_query(settings, &[]);
        q.extend(form_urlencoded::parse(impact_query(imp).as_bytes()).into_owned());
        context::cached(self.state, &q, super::impact::compute)
            .map(|r| r.1.clone())
            .map_err(|e| e.to_string())
    }

    fn projection(
        &self,
        _: &Project,
        _: &WaveView,
        settings: &Settings,
        ps: &ProjectionSettings,
    ) -> Result<ProjectionReport, String> {
        let mut q = self.sub_query(settings, &[]);
        q.extend(form_urlencoded::parse(super::projection::own_query(ps).as_bytes()).into_owned());
        context::cached(self.state, &q, super::projection::compute)
            .map(|r| r.1.clone())
            .map_err(|e| e.to_string())
    }
}

/// The rendered report, as the cache keeps it.
#[derive(Clone, serde::Serialize)]
pub(crate) struct ReportHtml {
    html: String,
    filename: String,
}

/// The download's file name: what and which waves (`gapwise-report-wave4.html`,
/// `gapwise-report-waves3-4.html`).
pub fn report_filename(waves: &[i64]) -> String {
    let list = waves
        .iter()
        .map(i64::to_string)
        .collect::<Vec<_>>()
        .join("-");
    if waves.len() == 1 {
        format!("gapwise-report-wave{list}.html")
    } else {
        format!("gapwise-report-waves{list}.html")
    }
}

fn compute(state: &AppState, query: &PageQuery) -> AppResult<ReportHtml> {
    let project = state.project();
    let request = report_settings(&project, query)?;
    let parts = CachedParts { state, query };
    let r = report_with(&project, &request, &parts).map_err(AppError::BadRequest)?;
    let html = render_report(&r).map_err(AppError::Internal)?;
    Ok(ReportHtml {
        html,
        filename: report_filename(&r.waves),
    })
}

/// The report button: the same document, offered as a download.
pub async fn download(
    State(state): State<Arc<AppState>>,
    Query(query): Query<PageQuery>,
) -> AppResult<Response> {
    let ReportHtml { html, filename } = Computation::heavy(compute).result(&state, &query).await?;
    Ok((
        [
            (header::CONTENT_TYPE, "text/html; charset=utf-8".to_string()),
            (
                header::CONTENT_DISPOSITION,
                format!("attachment; filename=\"{filename}\""),
            ),
        ],
        html,
    )
        .into_response())
}

#[cfg(test)]
mod tests {
    use super::*;

    fn demo() -> Project {
        let dir = std::path::Path::new(env!("CARGO_MANIFEST_DIR")).join("demo-data");
        Project::load(&dir).expect("demo project")
    }

    fn parse(q: &str) -> PageQuery {
        form_urlencoded::parse(q.as_bytes()).into_owned().collect()
    }

    /// Common practice: the report's own link reads back as the same settings, also for
    /// values that need percent-encoding.
    #[test]
    fn report_settings_survive_the_query_round_trip() {
        let project = demo();
        for q in [
            "",
            "wave=3&model=probit&weighting=raking&trim=0.9&outcome=left_right&predictor=age&predictor=log_gdp_pc&budget=3&feasibility=model&joiner=XAB&waves=3,4",
            "missing=median-fill&variances=1&cost_budget=250&objective=largest-smd&waves=all&outcome=turnout&kind=logistic&shares=population&population=log_population&bootstrap=0",
            // The model's older key is still read.
            "outcome=turnout&family=logistic&bootstrap=0",
        ] {
            let first = report_settings(&project, &parse(q)).expect(q);
            let again = report_settings(&project, &parse(&report_query(&first))).expect(q);
            assert_eq!(first, again, "{q}");
        }
        let older = report_settings(&project, &parse("outcome=turnout&family=logistic")).unwrap();
        let kind = older.impact.as_ref().map(|i| i.kind);
        assert_eq!(kind, Some(crate::stats::regression::Kind::Logistic));
        assert!(report_query(&older).contains("kind=logistic"));
        let rs = report_settings(&project, &parse("waves=3,4&outcome=left_right")).unwrap();
        assert_eq!(rs.waves, Waves::These(vec![3, 4]));
        assert!(report_settings(&project, &parse("waves=three")).is_err());
    }

    #[test]
    fn shell_words_are_quoted_when_needed() {
        assert_eq!(shell_word("left_right"), "left_right");
        assert_eq!(shell_word("a b"), "'a b'");
        assert_eq!(shell_word("it's"), "'it'\\''s'");
        assert_eq!(shell_word(""), "''");
    }
}
