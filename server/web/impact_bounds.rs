//! The impact page's sensitivity section: bounds of the pooled inverse-probability mean
//! under an unmeasured cause of taking part (the marginal sensitivity model), with its
//! JSON twin and downloads.

use std::sync::Arc;

use axum::response::Response;

use super::context::{resolve, Query as PageQuery, BOUNDS_KEYS};
use super::error::{AppError, AppResult};
use super::handlers::Computation;
use super::impact::impact_settings;
use super::state::AppState;
use super::{csv_response, svg_response};
use crate::analysis::selection_bounds::{
    selection_bounds, BoundsSettings, Reference, SelectionBounds, DEFAULT_REPLICATES, LAMBDA_GRID,
    MAX_REPLICATES,
};
use crate::charts;
use crate::csv_out::{cell, csv_text};

/// Reads `reference` (zero, unweighted or a number; default unweighted) and
/// `bounds_bootstrap` (replicates, default [`DEFAULT_REPLICATES`]) besides the impact keys.
pub fn bounds_settings(
    project: &crate::project::Project,
    query: &PageQuery,
) -> AppResult<BoundsSettings> {
    let imp = impact_settings(project, query)?;
    let get = |key: &str| {
        // The last non-empty value: the form sends the choice and the number box.
        query
            .iter()
            .rev()
            .find(|(k, v)| k == key && !v.trim().is_empty())
            .map(|(_, v)| v.trim().to_string())
    };
    let reference = match get("reference") {
        None => Reference::Unweighted,
        Some(v) => Reference::parse(&v)?,
    };
    let replicates = match get("bounds_bootstrap") {
        None => DEFAULT_REPLICATES,
        Some(v) => v
            .parse::<usize>()
            .ok()
            .filter(|r| *r <= MAX_REPLICATES)
            .ok_or_else(|| {
                AppError::BadRequest(format!(
                    "bounds_bootstrap must be a whole number up to {MAX_REPLICATES}, not '{v}'"
                ))
            })?,
    };
    Ok(BoundsSettings {
        outcome: imp.outcome,
        shares: imp.shares,
        lambdas: LAMBDA_GRID.to_vec(),
        reference,
        replicates,
        level: 0.95,
    })
}

/// The bounds' bootstrap is heavy work.
pub(super) const COMPUTATION: Computation<SelectionBounds> = Computation::heavy(compute);

fn compute(state: &AppState, query: &PageQuery) -> AppResult<SelectionBounds> {
    let (project, settings, view) = resolve(state, query)?;
    let bs = bounds_settings(&project, query)?;
    Ok(selection_bounds(Some(&project), &view, &settings, &bs)?)
}

/// What the impact page shows of the bounds (see `impact_bounds.html`).
pub struct Section {
    pub result: Option<SelectionBounds>,
    pub error: Option<String>,
    pub chart: String,
    /// The page's query without the section's own keys, as hidden form fields.
    pub hidden: Vec<(String, String)>,
    /// The whole query, for the twin and the downloads.
    pub query: String,
    /// The reference box's current text and choice.
    pub reference_kind: &'static str,
    pub reference_number: String,
}

/// Computes (or takes from the cache) the section for the page's query.
pub async fn section(state: &Arc<AppState>, query: &PageQuery) -> Section {
    let result = COMPUTATION.result(state, query).await;
    let (result, error) = match result {
        Ok(r) => (Some(r), None),
        Err(e) => (None, Some(e.to_string())),
    };
    let (reference_kind, reference_number) =
        match result.as_ref().map(|r| &r.bounds_settings.reference) {
            Some(Reference::Zero) => ("zero", String::new()),
            Some(Reference::Number(v)) => ("number", v.to_string()),
            _ => ("unweighted", String::new()),
        };
    let mut q = form_urlencoded::Serializer::new(String::new());
    q.extend_pairs(query.iter().map(|(k, v)| (k.as_str(), v.as_str())));
    Section {
        chart: result
            .as_ref()
            .map_or_else(String::new, charts::selection_bounds::bounds),
        hidden: query
            .iter()
            .filter(|(k, _)| !BOUNDS_KEYS.contains(&k.as_str()))
            .cloned()
            .collect(),
        query: q.finish(),
        result,
        error,
        reference_kind,
        reference_number,
    }
}

pub(super) fn artifact(item: &str, r: &SelectionBounds) -> AppResult<Response> {
    match item {
        "bounds.svg" => Ok(svg_response(
            "sensitivity-bounds.svg",
            charts::selection_bounds::bounds(r),
        )),
        "bounds.csv" => Ok(csv_response(
            "sensitivity-bounds.csv",
            csv_text(
                &[
                    "lambda",
                    "lower",
                    "upper",
                    "interval_low",
                    "interval_high",
                    "weighted_mean",
                    "reference",
                    "breakdown_lambda",
                ],
                r.rows.iter().map(|b| {
                    vec![
                        b.lambda.to_string(),
                        cell(Some(b.lower)),
                        cell(Some(b.upper)),
                        cell(b.interval_low),
                        cell(b.interval_high),
                        cell(Some(r.weighted_mean)),
                        cell(Some(r.reference_value)),
                        cell(r.breakdown),
                    ]
                }),
            ),
        )),
        _ => Err(AppError::NotFound(format!(
            "no {item} here; try bounds.svg or bounds.csv"
        ))),
    }
}
