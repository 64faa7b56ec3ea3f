//! The impact page: the same respondent-level model and pooled estimate, unweighted, under
//! each country weighting, and with the inverse Mills ratio.

use std::sync::Arc;

use askama::Template;
use axum::extract::{Query, State};
use axum::response::{Html, Response};

use super::context::{resolve_page, Choice, Query as PageQuery, SettingsForm};
use super::error::{AppError, AppResult};
use super::format::Fmt;
use super::handlers::Computation;
use super::state::AppState;
use super::{csv_response, svg_response};
use crate::analysis::cautions::{Caution, STANDING};
use crate::analysis::impact::{impact, ImpactReport, ImpactSettings, Shares};
use crate::analysis::impact_bootstrap;
use crate::analysis::imputed::ImpactCombination;
use crate::analysis::limits;
use crate::analysis::participation::{incomplete_for, IncompleteCountries};
use crate::charts;
use crate::csv_out::{cell, csv_text};
use crate::project::Project;
use crate::stats::regression::Kind;

#[derive(Template)]
#[template(path = "impact.html")]
struct ImpactPage<'a> {
    page: &'static str,
    nav_query: String,
    form: SettingsForm,
    f: Fmt,
    r: &'a ImpactReport,
    outcomes: Vec<Choice>,
    predictors: Vec<Choice>,
    families: Vec<Choice>,
    /// Country indicators offered for the two-step outcome equation.
    country_choices: Vec<Choice>,
    /// Country shares: equal, or proportional to a population column.
    shares: Vec<Choice>,
    impact_query: String,
    incomplete: Option<IncompleteCountries>,
    pooled_chart: String,
    coefficient_chart: String,
    cautions: &'a [Caution],
    /// Per term, one cell per variant.
    table: Vec<(String, Vec<Cell>)>,
    /// Sensitivity to an unmeasured cause of taking part (web::impact_bounds).
    bounds: super::impact_bounds::Section,
    /// Under multiple imputation: each correction's estimates per imputation, combined.
    imputed: Option<ImpactCombination>,
    imputation_rows: Vec<ImputationRow>,
}

/// One estimate's line in the imputation table: combined, then imputation by imputation
/// (estimate, standard error).
struct ImputationLine {
    label: String,
    combined: Option<crate::stats::combine::Pooled>,
    each: Vec<Option<(f64, f64)>>,
}

/// One correction under multiple imputation: its pooled mean and its coefficients.
struct ImputationRow {
    label: String,
    pooled: ImputationLine,
    terms: Vec<ImputationLine>,
}

fn imputation_rows(r: &ImpactReport, c: &ImpactCombination) -> Vec<ImputationRow> {
    r.variants
        .iter()
        .zip(&c.combination)
        .map(|(v, k)| ImputationRow {
            label: v.label.clone(),
            pooled: ImputationLine {
                label: "pooled mean".to_string(),
                combined: k.pooled.clone(),
                each: k
                    .imputations
                    .iter()
                    .map(|i| i.pooled.map(|p| (p.estimate, p.se)))
                    .collect(),
            },
            terms: k
                .coef
                .iter()
                .enumerate()
                .map(|(j, combined)| ImputationLine {
                    label: r
                        .term_labels
                        .get(j)
                        .or(r.terms.get(j))
                        .cloned()
                        .unwrap_or_default(),
                    combined: combined.clone(),
                    each: k
                        .imputations
                        .iter()
                        .map(|i| {
                            i.coef
                                .get(j)
                                .copied()
                                .flatten()
                                .zip(i.se.get(j).copied().flatten())
                        })
                        .collect(),
                })
                .collect(),
        })
        .collect()
}

/// How many of a variant's pipeline bootstrap replicates failed, and why, in words.
pub(crate) fn failure_text(v: &crate::analysis::impact::Variant) -> String {
    let b = &v.bootstrap;
    if let Some(note) = &b.bootstrap_note {
        return note.clone();
    }
    if b.bootstrap_replicates == 0 {
        return "not run".to_string();
    }
    if b.bootstrap_failed == 0 {
        return format!("none of {}", b.bootstrap_replicates);
    }
    format!(
        "{} of {}: {}",
        b.bootstrap_failed,
        b.bootstrap_replicates,
        b.bootstrap_failures
            .iter()
            .map(|f| format!("{} × {}", f.count, f.label))
            .collect::<Vec<_>>()
            .join("; ")
    )
}

impl ImpactPage<'_> {
    fn failures(&self, v: &crate::analysis::impact::Variant) -> String {
        failure_text(v)
    }

    /// Every analysis setting of the first form (wave, model, weighting, trimming, missing
    /// values, indicators, seed) as hidden fields, so that the model form keeps them.
    fn settings_hidden(&self) -> Vec<(String, String)> {
        form_urlencoded::parse(self.form.query.as_bytes())
            .into_owned()
            .collect()
    }
}

/// One cell of the side-by-side table.
pub(crate) struct Cell {
    pub(crate) main: String,
    pub(crate) detail: String,
    pub(crate) class: &'static str,
}

/// The side-by-side table: coefficient, standard error and p-value per term and variant,
/// flagged where the sign or the 5% verdict differs from the unweighted model.
pub(crate) fn side_by_side(r: &ImpactReport) -> Vec<(String, Vec<Cell>)> {
    let f = Fmt;
    r.term_labels
        .iter()
        .enumerate()
        .map(|(j, t)| {
            let cells = r
                .variants
                .iter()
                .map(|v| match v.coef.get(j) {
                    Some(c) => {
                        let p = match &v.p_bootstrap {
                            Some(b) => format!(" p*={}", f.o3(&b.get(j).copied())),
                            None => format!(" p={}", f.o3(&v.p_cluster.get(j).copied())),
                        };
                        let boot = match v.bootstrap.bootstrap_se.get(j).copied().flatten() {
                            Some(b) => format!(" [b.s.e. {}]", f.n3(&b)),
                            None => String::new(),
                        };
                        Cell {
                            main: f.n3(c),
                            detail: format!("({}){p}{boot}", f.o3(&v.se.get(j).copied())),
                            class: if v.sign_changed.get(j).copied().unwrap_or(false) {
                                "flag-sign"
                            } else if v.verdict_changed.get(j).copied().unwrap_or(false) {
                                "flag-verdict"
                            } else {
                                ""
                            },
                        }
                    }
                    None => Cell {
                        main: String::new(),
                        detail: if j == 0 && v.error.is_some() {
                            "not estimated (see the pooled means)".to_string()
                        } else {
                            String::new()
                        },
                        class: "note",
                    },
                })
                .collect();
            (t.clone(), cells)
        })
        .collect()
}

/// Reads the impact keys; defaults: the first survey variable as outcome, the next three as
/// predictors, a linear model.
pub fn impact_settings(project: &Project, query: &PageQuery) -> AppResult<ImpactSettings> {
    let roles = project.manifest.microdata.as_ref().ok_or_else(|| {
        AppError::NotFound("this project has no microdata, so there is no impact view".to_string())
    })?;
    let get = |key: &str| {
        query
            .iter()
            .rev()
            .find(|(k, _)| k == key)
            .map(|(_, v)| v.trim().to_string())
            .filter(|v| !v.is_empty())
    };
    let default_outcome = project
        .manifest
        .default_outcome()
        .unwrap_or_default()
        .to_string();
    let outcome = get("outcome").unwrap_or(default_outcome);
    // The outcome is never its own predictor (a form may still carry it ticked from the
    // previous outcome).
    let ticked: Vec<String> = query
        .iter()
        .filter(|(k, v)| k == "predictor" && *v != outcome)
        .map(|(_, v)| v.clone())
        .collect();
    let predictors = if ticked.is_empty() && !query.iter().any(|(k, _)| k == "outcome") {
        roles
            .variables
            .iter()
            .filter(|v| **v != outcome)
            .take(3)
            .cloned()
            .collect()
    } else {
        ticked
    };
    // `kind` (the command line's --kind); `family`, its older name, is still read. The
    // last of either wins, as for every other key.
    let kind_value = query
        .iter()
        .rev()
        .find(|(k, _)| k == "kind" || k == "family")
        .map(|(_, v)| v.trim().to_string())
        .filter(|v| !v.is_empty());
    let kind = match kind_value.as_deref() {
        None => Kind::Linear,
        Some(f) => Kind::parse(f).ok_or_else(|| {
            AppError::BadRequest(format!(
                "kind (the model) must be linear or logistic, not '{f}'"
            ))
        })?,
    };
    let shares = match (get("shares").as_deref(), get("population")) {
        (Some(s), _) if s.starts_with("population:") => {
            Shares::Population(s["population:".len()..].to_string())
        }
        (None | Some("equal"), _) => Shares::Equal,
        (Some("population"), Some(col)) => Shares::Population(col),
        (Some("population"), None) => {
            return Err(AppError::BadRequest(
                "population shares need population=COLUMN".to_string(),
            ))
        }
        (Some(other), _) => {
            return Err(AppError::BadRequest(format!(
                "shares must be equal or population, not '{other}'"
            )))
        }
    };
    let whole = |key: &str, value: String, limit: usize| -> AppResult<usize> {
        value
            .parse::<usize>()
            .ok()
            .filter(|r| *r <= limit)
            .ok_or_else(|| {
                AppError::BadRequest(format!(
                    "{key} must be a whole number up to {limit}, not '{value}'"
                ))
            })
    };
    // `bootstrap` is the older name of `wild_replicates`.
    let wild_replicates = match get("wild_replicates")
        .map(|v| ("wild_replicates", v))
        .or_else(|| get("bootstrap").map(|v| ("bootstrap", v)))
    {
        None => 399,
        Some((key, v)) => whole(key, v, limits::MAX_BOOTSTRAP_REPLICATES)?,
    };
    let replicates = match get("replicates") {
        None => impact_bootstrap::DEFAULT_REPLICATES,
        Some(v) => whole("replicates", v, limits::MAX_PIPELINE_REPLICATES)?,
    };
    let country_indicators = query
        .iter()
        .filter(|(k, _)| k == "country_indicator")
        .map(|(_, v)| v.trim().to_string())
        .filter(|v| !v.is_empty())
        .collect();
    Ok(ImpactSettings {
        outcome,
        predictors,
        kind,
        country_indicators,
        shares,
        replicates,
        wild_replicates,
    })
}

/// What the impact page shows: the form, the result, the warning when leaving out
/// incomplete countries changed who is analysed, and under multiple imputation the
/// combination with each imputation's estimates.
pub(crate) type ImpactResult = (
    SettingsForm,
    ImpactReport,
    Option<IncompleteCountries>,
    Option<ImpactCombination>,
);

/// Every correction with its bootstraps is heavy work.
pub(super) const COMPUTATION: Computation<ImpactResult> = Computation::heavy(compute);

pub(crate) fn compute(state: &AppState, query: &PageQuery) -> AppResult<ImpactResult> {
    let (project, settings, view, form) = resolve_page(state, query, "/impact")?;
    let imp = impact_settings(&project, query)?;
    // Under multiple imputation: every correction on each completed frame, combined by
    // Rubin's rules (the notes say so); nobody is left out, so nothing is incomplete.
    if crate::analysis::imputed::wanted(&settings) {
        let r = crate::analysis::imputed::impact(&project, &view, &settings, &imp)
            .map_err(AppError::BadRequest)?;
        return Ok((form, r.report, None, Some(r.combined)));
    }
    let r = impact(&project, &view, &settings, &imp)?;
    Ok((form, r, incomplete_for(&view, &settings), None))
}

/// The impact keys of a query that reproduces `imp` (percent-encoded, so that names with
/// `&`, `=`, `+` or spaces survive the round trip).
pub fn impact_query(imp: &ImpactSettings) -> String {
    let mut q = form_urlencoded::Serializer::new(String::new());
    q.append_pair("outcome", &imp.outcome);
    q.append_pair("kind", imp.kind.as_str());
    for p in &imp.predictors {
        q.append_pair("predictor", p);
    }
    for c in &imp.country_indicators {
        q.append_pair("country_indicator", c);
    }
    if let Shares::Population(c) = &imp.shares {
        q.append_pair("shares", "population");
        q.append_pair("population", c);
    }
    q.append_pair("replicates", &imp.replicates.to_string());
    q.append_pair("wild_replicates", &imp.wild_replicates.to_string());
    q.finish()
}

pub async fn page(
    State(state): State<Arc<AppState>>,
    Query(query): Query<PageQuery>,
) -> AppResult<Html<String>> {
    // The sensitivity bounds are a result of their own: computed beside the corrections.
    let (result, bounds) = tokio::join!(
        COMPUTATION.result(&state, &query),
        super::impact_bounds::section(&state, &query)
    );
    let (form, r, incomplete, imputed) = result?;
    let form = form.presenting(&query);
    let project = state.project();
    let variables = super::context::microdata_variables(&project);
    let indicators = &project.manifest.indicators.numeric;
    let html = ImpactPage {
        page: "impact",
        nav_query: form.query.clone(),
        outcomes: variables
            .iter()
            .map(|v| Choice {
                value: v.clone(),
                label: project.manifest.label(v).into_owned(),
                selected: *v == r.impact.outcome,
            })
            .collect(),
        predictors: variables
            .iter()
            .filter(|v| **v != r.impact.outcome)
            .map(|v| Choice {
                value: v.clone(),
                label: project.manifest.label(v).into_owned(),
                selected: r.impact.predictors.contains(v),
            })
            .chain(indicators.iter().map(|c| Choice {
                value: c.clone(),
                label: format!("{} (country)", project.manifest.label(c)),
                selected: r.impact.predictors.contains(c),
            }))
            .collect(),
        country_choices: indicators
            .iter()
            .map(|c| Choice {
                value: c.clone(),
                label: project.manifest.label(c).to_string(),
                selected: r.impact.country_indicators.contains(c),
            })
            .collect(),
        shares: std::iter::once(Choice {
            value: "equal".into(),
            label: "each country by its weight".into(),
            selected: r.impact.shares == Shares::Equal,
        })
        .chain(
            // The declared population column; without one, any numeric indicator (read as
            // a count of people).
            indicators
                .iter()
                .filter(|c| {
                    project
                        .manifest
                        .population
                        .as_ref()
                        .is_none_or(|p| &p.column == *c)
                })
                .map(|c| Choice {
                    value: format!("population:{c}"),
                    label: format!("weight × population ({})", project.manifest.label(c)),
                    selected: r.impact.shares == Shares::Population(c.clone()),
                }),
        )
        .collect(),
        families: [
            (Kind::Linear, "Linear (least squares)"),
            (Kind::Logistic, "Logistic (0/1 outcome)"),
        ]
        .into_iter()
        .map(|(k, l)| Choice {
            value: k.as_str().into(),
            label: l.into(),
            selected: r.impact.kind == k,
        })
        .collect(),
        impact_query: impact_query(&r.impact),
        incomplete,
        table: side_by_side(&r),
        pooled_chart: charts::impact::pooled(&r),
        coefficient_chart: charts::impact::coefficients(&r),
        form,
        f: Fmt,
        r: &r,
        cautions: &STANDING,
        bounds,
        imputation_rows: imputed
            .as_ref()
            .map(|c| imputation_rows(&r, c))
            .unwrap_or_default(),
        imputed,
    }
    .render()?;
    Ok(Html(html))
}

/// The impact twin: the report and, under multiple imputation, the combination with
/// each imputation's estimates (flattened beside it, as `gapwise impact --json`).
#[derive(serde::Serialize)]
pub struct ImpactTwin {
    #[serde(flatten)]
    report: ImpactReport,
    #[serde(flatten)]
    imputed: Option<ImpactCombination>,
}

pub(super) fn twin((_, report, _, imputed): ImpactResult) -> ImpactTwin {
    ImpactTwin { report, imputed }
}

pub(super) fn artifact(item: &str, (_, r, _, _): &ImpactResult) -> AppResult<Response> {
    match item {
        "pooled.svg" => Ok(svg_response(
            "pooled-estimates.svg",
            charts::impact::pooled(r),
        )),
        "coefficients.svg" => Ok(svg_response(
            "coefficients-by-correction.svg",
            charts::impact::coefficients(r),
        )),
        "table.csv" => {
            let mut rows = Vec::new();
            for v in &r.variants {
                if let Some(p) = &v.pooled {
                    rows.push(vec![
                        v.key.clone(),
                        "pooled mean".to_string(),
                        cell(Some(p.estimate)),
                        cell(Some(p.se)),
                        String::new(),
                        String::new(),
                        cell(p.bootstrap.bootstrap_se),
                        cell(p.bootstrap.bootstrap_ci95_low),
                        cell(p.bootstrap.bootstrap_ci95_high),
                        v.bootstrap.bootstrap_failed.to_string(),
                        String::new(),
                        String::new(),
                    ]);
                }
                for (j, c) in v.coef.iter().enumerate() {
                    rows.push(vec![
                        v.key.clone(),
                        r.terms.get(j).cloned().unwrap_or_default(),
                        cell(Some(*c)),
                        cell(v.se.get(j).copied()),
                        cell(v.p_cluster.get(j).copied()),
                        cell(v.p_bootstrap.as_ref().and_then(|b| b.get(j).copied())),
                        cell(v.bootstrap.bootstrap_se.get(j).copied().flatten()),
                        cell(v.bootstrap.bootstrap_ci95_low.get(j).copied().flatten()),
                        cell(v.bootstrap.bootstrap_ci95_high.get(j).copied().flatten()),
                        v.bootstrap.bootstrap_failed.to_string(),
                        u8::from(v.sign_changed.get(j).copied().unwrap_or(false)).to_string(),
                        u8::from(v.verdict_changed.get(j).copied().unwrap_or(false)).to_string(),
                    ]);
                }
            }
            Ok(csv_response(
                "impact.csv",
                csv_text(
                    &[
                        "variant",
                        "term",
                        "estimate",
                        "cluster_se",
                        "p_cluster",
                        "p_wild_bootstrap",
                        "bootstrap_se",
                        "bootstrap_ci95_low",
                        "bootstrap_ci95_high",
                        "bootstrap_failed",
                        "sign_changed",
                        "verdict_changed",
                    ],
                    rows,
                ),
            ))
        }
        _ => Err(AppError::NotFound(format!(
            "no {item} here; try pooled.svg, coefficients.svg or table.csv"
        ))),
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn impact_settings_survive_the_query_round_trip() {
        // Common practice: the settings written into page links read back unchanged, also
        // for names that need percent-encoding.
        let dir = std::path::Path::new(env!("CARGO_MANIFEST_DIR")).join("demo-data");
        let project = Project::load(&dir).expect("demo project");
        let imp = ImpactSettings {
            outcome: "trust_parliament".to_string(),
            predictors: vec!["age".to_string(), "a&b=c d+e".to_string()],
            kind: Kind::Logistic,
            country_indicators: vec!["log_gdp_pc".to_string()],
            shares: Shares::Population("log_population".to_string()),
            replicates: 49,
            wild_replicates: 99,
        };
        let query: PageQuery = form_urlencoded::parse(impact_query(&imp).as_bytes())
            .map(|(k, v)| (k.into_owned(), v.into_owned()))
            .collect();
        assert_eq!(impact_settings(&project, &query).expect("settings"), imp);
        // The model's key is `kind`, as on the command line; `family` is still read.
        let written = impact_query(&imp);
        assert!(written.contains("kind=logistic"), "{written}");
        assert!(!written.contains("family"), "{written}");
        let parse =
            |q: &str| -> PageQuery { form_urlencoded::parse(q.as_bytes()).into_owned().collect() };
        for q in [
            "family=logistic",
            "kind=logistic",
            "family=linear&kind=logistic",
        ] {
            assert_eq!(
                impact_settings(&project, &parse(q)).expect(q).kind,
                Kind::Logistic,
                "{q}"
            );
        }
        assert_eq!(
            impact_settings(&project, &parse("kind=logistic&family=linear"))
                .unwrap()
                .kind,
            Kind::Linear
        );
        let bad = impact_settings(&project, &parse("kind=poisson")).unwrap_err();
        assert_eq!(bad.status().as_u16(), 400);
        assert!(bad.to_string().contains("linear or logistic"), "{bad}");
    }
}
