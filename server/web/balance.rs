//! The balance page: SMDs and variance ratios before and after each weighting method.

use askama::Template;
use axum::response::Response;

use super::context::{resolve_page, Query, SettingsForm};
use super::error::{AppError, AppResult};
use super::format::Fmt;
use super::handlers::Computation;
use super::state::AppState;
use super::{csv_response, svg_response};
use crate::analysis::balance::{compare, BalanceComparison};
use crate::analysis::cautions::{Caution, STANDING};
use crate::analysis::imputed::{self, BalanceSpread};
use crate::charts;
use crate::csv_out::{cell, csv_text};

#[derive(Template)]
#[template(path = "balance.html")]
struct BalancePage<'a> {
    page: &'static str,
    nav_query: String,
    form: SettingsForm,
    f: Fmt,
    b: &'a BalanceComparison,
    chart: String,
    cautions: &'a [Caution],
    /// Each participant's share of the total without weighting.
    equal_share: f64,
    before_max: Option<f64>,
    /// Per row, (SMD, variance ratio) after each method.
    cells: Vec<Vec<(Option<f64>, Option<f64>)>>,
    /// Under multiple imputation: the spread of the diagnostics over the imputations.
    imputed: Option<&'a BalanceSpread>,
    /// Per method (aligned with `b.methods`): the effective number's range, in words.
    eff_range: Vec<String>,
}

/// The balance page's result: the comparison and, under multiple imputation, the
/// spread over the imputations (the JSON twin shows both, flattened).
#[derive(Debug, Clone, serde::Serialize)]
pub struct BalanceResult {
    #[serde(flatten)]
    pub b: BalanceComparison,
    #[serde(flatten, skip_serializing_if = "Option::is_none")]
    pub imputed: Option<BalanceSpread>,
}

impl BalancePage<'_> {
    /// The range of method `k`'s effective number over the imputations, if any.
    fn eff_range_of(&self, k: &usize) -> Option<&str> {
        self.eff_range
            .get(*k)
            .map(String::as_str)
            .filter(|r| !r.is_empty())
    }
}

/// The comparison is light work; the page, its twin and its downloads share it.
pub(super) const COMPUTATION: Computation<(SettingsForm, BalanceResult)> =
    Computation::light(compute);

fn compute(state: &AppState, query: &Query) -> AppResult<(SettingsForm, BalanceResult)> {
    let (project, settings, view, form) = resolve_page(state, query, "/balance")?;
    let result = if imputed::wanted(&settings) {
        let r = imputed::compare(Some(&project), &view, &settings)?;
        BalanceResult {
            b: r.comparison,
            imputed: Some(r.spread),
        }
    } else {
        BalanceResult {
            b: compare(&view, &settings)?,
            imputed: None,
        }
    };
    Ok((form, result))
}

pub(super) fn page(
    _: &AppState,
    query: &Query,
    (form, result): (SettingsForm, BalanceResult),
) -> AppResult<String> {
    let b = &result.b;
    let form = form.presenting(query);
    let eff_range = result.imputed.as_ref().map_or_else(Vec::new, |s| {
        s.effective_n_spread
            .iter()
            .map(|e| e.map_or_else(String::new, |e| format!("{:.1} to {:.1}", e.min, e.max)))
            .collect()
    });
    let cells = (0..b.rows.len())
        .map(|i| {
            b.methods
                .iter()
                .map(|m| (m.smd_after[i], m.variance_ratio_after[i]))
                .collect()
        })
        .collect();
    Ok(BalancePage {
        equal_share: 1.0 / b.n_participants.max(1) as f64,
        before_max: Some(b.max_abs_smd_before),
        cells,
        page: "balance",
        nav_query: form.query.clone(),
        form,
        f: Fmt,
        chart: charts::balance::smd_dots(b),
        b,
        cautions: &STANDING,
        imputed: result.imputed.as_ref(),
        eff_range,
    }
    .render()?)
}

pub(super) fn artifact(
    item: &str,
    (_, result): &(SettingsForm, BalanceResult),
) -> AppResult<Response> {
    let b = &result.b;
    match item {
        "smd.svg" => Ok(svg_response(
            "balance-smd.svg",
            charts::balance::smd_dots(b),
        )),
        "table.csv" => Ok(csv_response("balance.csv", table_csv(b))),
        _ => Err(AppError::NotFound(format!(
            "no {item} here; try smd.svg or table.csv"
        ))),
    }
}

/// One row per indicator: before weighting, then SMD and variance ratio after each method.
pub fn table_csv(b: &BalanceComparison) -> String {
    let mut header = vec![
        "covariate".to_string(),
        "label".into(),
        "universe_mean".into(),
        "participant_mean".into(),
        "smd_before".into(),
        "variance_ratio_before".into(),
    ];
    for m in &b.methods {
        header.push(format!("smd_after_{}", m.kind.as_str()));
        header.push(format!("variance_ratio_after_{}", m.kind.as_str()));
    }
    let header_refs: Vec<&str> = header.iter().map(String::as_str).collect();
    let rows = b.rows.iter().enumerate().map(|(i, r)| {
        let mut row = vec![
            r.covariate.clone(),
            r.label.clone(),
            cell(Some(r.universe_mean)),
            cell(Some(r.participant_mean)),
            cell(r.smd_before),
            cell(r.variance_ratio_before),
        ];
        for m in &b.methods {
            row.push(cell(m.smd_after[i]));
            row.push(cell(m.variance_ratio_after[i]));
        }
        row
    });
    csv_text(&header_refs, rows)
}
