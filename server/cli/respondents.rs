//! `gapwise pooled` and `gapwise two-step`: respondent-level regressions read from a
//! file, with standard errors that allow for countries (clustering) or for the selection
//! step (the two-step correction).

use std::fmt::Write as _;
use std::path::Path;

use super::{finish, opt};
use crate::analysis::microdata::{PooledReport, TwoStepColumns, TwoStepReport};

/// `gapwise pooled`: a pooled regression with CR1 cluster-robust standard errors and
/// t(G - 1) p-values and intervals.
pub fn pooled(
    path: &Path,
    outcome: &str,
    predictors: &[String],
    country: &str,
    design_weight: Option<&str>,
    kind: crate::stats::regression::Kind,
    json: bool,
) -> i32 {
    let result = crate::progress::during("reading the respondents and fitting", json, || {
        crate::analysis::microdata::pooled_file(
            path,
            outcome,
            predictors,
            country,
            design_weight,
            kind,
        )
    });
    finish(result, json, |r| pooled_text(r, outcome))
}

/// `gapwise two-step`: the Heckman two-step estimator with corrected standard errors.
pub fn two_step(path: &Path, columns: &TwoStepColumns, json: bool) -> i32 {
    let result = crate::progress::during("reading the respondents and fitting", json, || {
        crate::analysis::microdata::two_step_file(path, columns)
    });
    finish(result, json, two_step_text)
}

fn pooled_text(r: &PooledReport, outcome: &str) -> String {
    let mut out = format!(
        "{} model of {outcome}: {} respondents in {} countries ({} rows with missing values left out)\n",
        r.kind.as_str(), r.n, r.clusters, r.dropped
    );
    let _ = writeln!(
        out,
        "  {:<28} {:>14} {:>14} {:>10} {:>28}",
        "term",
        "coefficient",
        "country s.e.",
        format!("p, t({})", r.df),
        "95% interval, t"
    );
    for (j, t) in r.terms.iter().enumerate() {
        let interval = match (r.ci95_low[j], r.ci95_high[j]) {
            (Some(l), Some(h)) => format!("{l:.6} to {h:.6}"),
            _ => "not estimable".to_string(),
        };
        let _ = writeln!(
            out,
            "  {t:<28} {:>14.6} {:>14.6} {:>10} {interval:>28}",
            r.coef[j],
            r.se[j],
            opt(r.p[j], 4),
        );
    }
    out
}

fn two_step_text(r: &TwoStepReport) -> String {
    let mut out = format!(
        "Two-step selection model: {} rows, {} selected{}\n\nSelection (probit)\n",
        r.n,
        r.n_selected,
        r.clusters
            .map_or(String::new(), |g| format!(", {g} countries"))
    );
    let _ = writeln!(out, "  {:<28} {:>14} {:>14}", "term", "coefficient", "s.e.");
    for ((t, c), s) in r
        .selection
        .terms
        .iter()
        .zip(&r.selection.coef)
        .zip(&r.selection.se)
    {
        let _ = writeln!(out, "  {t:<28} {c:>14.6} {s:>14.6}");
    }
    let _ = writeln!(
        out,
        "\nOutcome (least squares with the inverse Mills ratio, lambda)\n  {:<28} {:>14} {:>14} {:>14}",
        "term",
        "coefficient",
        if r.clusters.is_some() { "s.e. (M-T)" } else { "s.e. (two-step)" },
        "s.e. ignoring step 1"
    );
    let unc = r.outcome.se_uncorrected.clone().unwrap_or_default();
    for (j, t) in r.outcome.terms.iter().enumerate() {
        let _ = writeln!(
            out,
            "  {t:<28} {:>14.6} {:>14.6} {:>14}",
            r.outcome.coef[j],
            r.outcome.se[j],
            opt(unc.get(j).copied(), 6)
        );
    }
    let _ = writeln!(out, "\nrho {:.4}, sigma {:.4}", r.rho, r.sigma);
    for n in &r.notes {
        let _ = writeln!(out, "note: {n}");
    }
    out
}
