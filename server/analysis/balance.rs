//! Balance before and after every weighting method, side by side, with plain-language
//! sentences for the largest differences.

use serde::Serialize;

use super::design::{self, Design};
use super::participation::{self, AnalysisError, BalanceRow, FittedModel};
use super::settings::{Settings, WeightingKind};
use crate::project::WaveView;
use crate::stats::describe;

/// One weighting method's outcome on the balance page.
#[derive(Debug, Clone, Serialize)]
pub struct MethodBalance {
    pub kind: WeightingKind,
    pub label: &'static str,
    /// Why the method could not weight, if it could not.
    pub error: Option<String>,
    pub effective_n: Option<f64>,
    pub max_weight_share: Option<f64>,
    pub cv: Option<f64>,
    pub warnings: Vec<String>,
    /// Aligned with `BalanceComparison::rows`.
    pub smd_after: Vec<Option<f64>>,
    pub variance_ratio_after: Vec<Option<f64>>,
    pub max_abs_smd: Option<f64>,
    /// The weights leave the largest |SMD| worse than no weighting.
    pub worse_than_none: bool,
    /// The method returned another method's weights (named here).
    pub fell_back_to: Option<&'static str>,
}

#[derive(Debug, Clone, Serialize)]
pub struct BalanceComparison {
    pub wave: i64,
    pub settings: Settings,
    pub n_eligible: usize,
    pub n_participants: usize,
    pub missing_note: String,
    /// Balance before weighting and after the chosen method (as `gapwise fit` reports it).
    pub rows: Vec<BalanceRow>,
    pub methods: Vec<MethodBalance>,
    /// Index into `methods` of the settings' method.
    pub chosen: usize,
    pub max_abs_smd_before: f64,
    pub sentences: Vec<String>,
    pub model_warnings: Vec<String>,
    /// Set when leaving out incomplete countries dropped participants or non-participants.
    pub incomplete: Option<participation::IncompleteCountries>,
    #[serde(skip_serializing_if = "Option::is_none")]
    pub missing_caveat: Option<String>,
}

/// Compares every weighting method on one wave.
pub fn compare(view: &WaveView, settings: &Settings) -> Result<BalanceComparison, AnalysisError> {
    let design = design::build(view, settings)?;
    let model = participation::fit_model(&design, settings.model, false)?;
    let methods: Vec<MethodBalance> = WeightingKind::ALL
        .iter()
        .map(|&kind| method_balance(&design, settings, &model, kind))
        .collect();
    let chosen = WeightingKind::ALL
        .iter()
        .position(|&k| k == settings.weighting)
        .unwrap_or(0);
    let chosen_weights = participation::weigh(&design, settings, &model)
        .ok()
        .map(|w| w.weights);
    let no_weights: Vec<f64> = design
        .participated
        .iter()
        .map(|&t| f64::from(u8::from(t)))
        .collect();
    let mut rows =
        participation::balance_table(&design, chosen_weights.as_deref().unwrap_or(&no_weights));
    if chosen_weights.is_none() {
        for r in &mut rows {
            r.smd_after = None;
            r.variance_ratio_after = None;
        }
    }
    let max_abs_smd_before = rows
        .iter()
        .filter_map(|r| r.smd_before)
        .fold(0.0f64, |m, v| m.max(v.abs()));
    Ok(BalanceComparison {
        wave: view.wave,
        settings: settings.clone(),
        n_eligible: design.n(),
        n_participants: design.n_participants(),
        missing_note: participation::missing_note(&design, settings),
        incomplete: participation::incomplete_countries(&design),
        missing_caveat: participation::missing_caveat(settings),
        sentences: sentences(&design, &rows),
        rows,
        methods,
        chosen,
        max_abs_smd_before,
        model_warnings: model.report.warnings.clone(),
    })
}

fn method_balance(
    design: &Design,
    settings: &Settings,
    model: &FittedModel,
    kind: WeightingKind,
) -> MethodBalance {
    let s = Settings {
        weighting: kind,
        ..settings.clone()
    };
    match participation::weigh(design, &s, model) {
        Ok(w) => {
            let rows = participation::balance_table(design, &w.weights);
            let smd_after: Vec<Option<f64>> = rows.iter().map(|r| r.smd_after).collect();
            MethodBalance {
                kind,
                label: kind.label(),
                error: None,
                worse_than_none: w.report.worse_than_none,
                fell_back_to: w.report.fell_back_to,
                effective_n: Some(w.report.effective_n),
                max_weight_share: Some(w.report.max_weight_share),
                cv: Some(w.report.cv),
                warnings: w.report.warnings,
                max_abs_smd: Some(
                    smd_after
                        .iter()
                        .flatten()
                        .fold(0.0f64, |m, v| m.max(v.abs())),
                ),
                smd_after,
                variance_ratio_after: rows.iter().map(|r| r.variance_ratio_after).collect(),
            }
        }
        Err(e) => MethodBalance {
            kind,
            label: kind.label(),
            error: Some(e.to_string()),
            effective_n: None,
            max_weight_share: None,
            cv: None,
            warnings: Vec::new(),
            smd_after: vec![None; design.balance.len()],
            variance_ratio_after: vec![None; design.balance.len()],
            max_abs_smd: None,
            worse_than_none: false,
            fell_back_to: None,
        },
    }
}

/// Sentences for the three largest unweighted differences: medians for numeric
/// indicators, shares for category levels.
fn sentences(design: &Design, rows: &[BalanceRow]) -> Vec<String> {
    let mut order: Vec<usize> = (0..rows.len())
        .filter(|&i| rows[i].smd_before.is_some())
        .collect();
    order.sort_by(|&a, &b| {
        rows[b]
            .smd_before
            .unwrap_or(0.0)
            .abs()
            .total_cmp(&rows[a].smd_before.unwrap_or(0.0).abs())
    });
    order
        .into_iter()
        .take(3)
        .map(|i| {
            let col = &design.balance[i];
            if col.is_level {
                format!(
                    "{} makes up {:.0}% of participants but {:.0}% of the eligible universe.",
                    col.label,
                    100.0 * rows[i].participant_mean,
                    100.0 * rows[i].universe_mean
                )
            } else {
                let participants: Vec<f64> = col
                    .values
                    .iter()
                    .zip(&design.participated)
                    .filter(|(_, &t)| t)
                    .map(|(&v, _)| v)
                    .collect();
                let median_p = describe::median(&participants).unwrap_or(f64::NAN);
                let median_u = describe::median(&col.values).unwrap_or(f64::NAN);
                format!(
                    "Participants' median {} is {}; the eligible universe's is {}.",
                    lower_first(&col.label),
                    readable(median_p),
                    readable(median_u)
                )
            }
        })
        .collect()
}

fn lower_first(s: &str) -> String {
    let mut c = s.chars();
    match c.next() {
        Some(f) if c.clone().next().is_some_and(char::is_lowercase) => {
            f.to_lowercase().collect::<String>() + c.as_str()
        }
        Some(f) => f.to_string() + c.as_str(),
        None => String::new(),
    }
}

/// A number rounded for reading aloud: two significant decimals at most.
pub fn readable(x: f64) -> String {
    if !x.is_finite() {
        return "unknown".to_string();
    }
    let digits = if x.abs() >= 100.0 {
        0
    } else if x.abs() >= 10.0 {
        1
    } else {
        2
    };
    let s = format!("{x:.digits$}");
    if s.contains('.') {
        s.trim_end_matches('0').trim_end_matches('.').to_string()
    } else {
        s
    }
}
