//! `gapwise fit`: the participation model, the weights and the balance they achieve, with
//! an outcome's inverse-probability mean and its sensitivity bounds on request.

use std::fmt::Write as _;

use super::text_table::Column::{Left, Right};
use super::text_table::TextTable;
use super::universe::{load_universe, UniverseSource};
use super::{emit, emit_json, opt};
use crate::analysis::imputed::ImputedFit;
use crate::analysis::participation::{self, FitReport};
use crate::analysis::selection_bounds::OutcomeSummary;
use crate::analysis::Settings;
use crate::project::WaveView;

/// `gapwise fit`: the participation model, the weights and the balance they achieve.
/// `outcome`: a column and the Λ values of its sensitivity bounds (`--outcome`,
/// `--sensitivity`).
pub fn fit(
    source: &UniverseSource,
    mut settings: Settings,
    outcome: Option<(&str, &[f64])>,
    json: bool,
) -> i32 {
    let view = match load_universe(source, &mut settings) {
        Ok(v) => v,
        Err(message) => {
            eprintln!("{message}");
            return 1;
        }
    };
    let summary = match outcome.map(|o| outcome_summary(source, &view, &settings, o)) {
        None => None,
        Some(Ok(s)) => Some(s),
        Some(Err(message)) => {
            eprintln!("{message}");
            return 1;
        }
    };
    if crate::analysis::imputed::wanted(&settings) {
        return fit_imputed(source, &view, &settings, summary.as_ref(), json);
    }
    match participation::fit(&view, &settings) {
        Ok(mut report) => {
            if !source.is_project() {
                report.wave = None;
            }
            if json {
                #[derive(serde::Serialize)]
                struct WithOutcome<'a> {
                    #[serde(flatten)]
                    report: &'a FitReport,
                    #[serde(skip_serializing_if = "Option::is_none")]
                    outcome: Option<&'a OutcomeSummary>,
                }
                emit_json(&WithOutcome {
                    report: &report,
                    outcome: summary.as_ref(),
                });
            } else {
                let mut text = fit_text(&report);
                if let Some(s) = &summary {
                    text.push_str(&outcome_text(s, &settings));
                }
                emit(&text);
            }
            0
        }
        Err(e) => {
            eprintln!("{e}");
            1
        }
    }
}

/// The outcome's inverse-probability mean and bounds (`--outcome COLUMN`, `--sensitivity`).
fn outcome_summary(
    source: &UniverseSource,
    view: &WaveView,
    settings: &Settings,
    (column, lambdas): (&str, &[f64]),
) -> Result<OutcomeSummary, String> {
    let project = source.project_if_any();
    crate::analysis::selection_bounds::outcome_summary(
        project.as_ref(),
        view,
        settings,
        column,
        lambdas,
    )
    .map_err(|message| format!("--outcome {column}: {message}"))
}

/// `gapwise fit --missing impute`: the fit on every completed frame, combined.
fn fit_imputed(
    source: &UniverseSource,
    view: &WaveView,
    settings: &Settings,
    summary: Option<&OutcomeSummary>,
    json: bool,
) -> i32 {
    let project = source.project_if_any();
    let result = crate::progress::during("imputing and fitting", json, || {
        crate::analysis::imputed::fit(project.as_ref(), view, settings)
    });
    match result {
        Ok(mut r) => {
            if !source.is_project() {
                r.report.wave = None;
            }
            if json {
                #[derive(serde::Serialize)]
                struct WithOutcome<'a> {
                    #[serde(flatten)]
                    fit: &'a ImputedFit,
                    #[serde(skip_serializing_if = "Option::is_none")]
                    outcome: Option<&'a OutcomeSummary>,
                }
                emit_json(&WithOutcome {
                    fit: &r,
                    outcome: summary,
                });
            } else {
                emit(&imputed_fit_text(&r, summary));
            }
            0
        }
        Err(e) => {
            eprintln!("{e}");
            1
        }
    }
}

/// The outcome's lines below a fit: its mean and, for each Λ, its bounds.
fn outcome_text(s: &OutcomeSummary, settings: &Settings) -> String {
    let mut text = String::new();
    let _ = writeln!(
        text,
        "\n{}: inverse-probability mean {:.4} ({} model, untrimmed)",
        s.column,
        s.weighted_mean,
        settings.model.as_str()
    );
    for b in &s.bounds {
        let _ = writeln!(
            text,
            "  Λ = {:<6} bounds {:.4} to {:.4}",
            b.lambda, b.lower, b.upper
        );
    }
    if !s.bounds.is_empty() {
        let _ = writeln!(text, "  (Λ: an odds ratio on taking part, not on the outcome; the bounds hold for inverse-probability-type weights)");
    }
    text
}

/// The readable form of a fit combined over imputations.
fn imputed_fit_text(r: &ImputedFit, summary: Option<&OutcomeSummary>) -> String {
    let mut text = fit_text(&r.report);
    let _ = writeln!(
        text,
        "\nCombined over {} imputations (seed {}; Rubin's rules, Barnard-Rubin df from complete-data {:.0}):",
        r.imputation.imputations, r.imputation.seed, r.df_complete
    );
    for (j, term) in r.report.model.terms.iter().enumerate() {
        let _ = writeln!(
            text,
            "  {term:<28} df {:>8}  missing information {:>6}",
            opt(r.df.get(j).copied().flatten(), 1),
            opt(r.fraction_missing_information.get(j).copied().flatten(), 3)
        );
    }
    if let Some(s) = summary {
        let _ = writeln!(
            text,
            "\n{}: inverse-probability mean {:.4} on the incomplete frame (not imputed)",
            s.column, s.weighted_mean
        );
    }
    let _ = writeln!(text, "caution: {}", r.imputation.caution);
    text
}

/// The readable form of a fit.
pub fn fit_text(r: &FitReport) -> String {
    let mut out = String::new();
    let wave = r.wave.map(|w| format!("wave {w}: ")).unwrap_or_default();
    let _ = writeln!(
        out,
        "{wave}{} eligible, {} took part; {}",
        r.n_eligible, r.n_participants, r.missing_note
    );
    if let Some(inc) = &r.incomplete {
        let _ = writeln!(out, "warning: {}", inc.warning);
    }
    if let Some(caveat) = &r.missing_caveat {
        let _ = writeln!(out, "note: {caveat}");
    }
    let m = &r.model;
    let _ = writeln!(
        out,
        "\n{} model (log-likelihood {:.4}, {}converged; AUC {}, leave-one-out AUC {})",
        crate::analysis::settings::model_label(m.kind),
        m.log_likelihood,
        if m.converged { "" } else { "NOT " },
        opt(m.auc, 3),
        opt(m.auc_loo, 3)
    );
    const COEFFICIENTS: TextTable = TextTable {
        indent: "  ",
        columns: &[
            Left("term", 34),
            Right("coefficient", 12),
            Right("std. error", 12),
        ],
    };
    COEFFICIENTS.push_header(&mut out);
    for c in &m.coefficients {
        let number =
            |x: Option<f64>| x.map_or_else(|| "not estimable".to_string(), |v| format!("{v:.5}"));
        COEFFICIENTS.push_line(&mut out, &[&c.term, &number(c.coef), &number(c.se)]);
    }
    for w in &m.warnings {
        let _ = writeln!(out, "  warning: {w}");
    }
    let wr = &r.weighting;
    let _ = writeln!(
        out,
        "\n{} weights: effective number of countries {:.1} of {}, largest weight {:.1}% of the total, CV {:.3}",
        wr.kind.as_str(),
        wr.effective_n,
        r.n_participants,
        100.0 * wr.max_weight_share,
        wr.cv
    );
    for w in &wr.warnings {
        let _ = writeln!(out, "  warning: {w}");
    }
    const BALANCE: TextTable = TextTable {
        indent: "  ",
        columns: &[
            Left("balance", 34),
            Right("SMD before", 10),
            Right("SMD after", 10),
            Right("VR before", 10),
            Right("VR after", 10),
        ],
    };
    out.push('\n');
    BALANCE.push_header(&mut out);
    for b in &r.balance {
        BALANCE.push_line(
            &mut out,
            &[
                &b.covariate,
                &opt(b.smd_before, 3),
                &opt(b.smd_after, 3),
                &opt(b.variance_ratio_before, 2),
                &opt(b.variance_ratio_after, 2),
            ],
        );
    }
    out
}
