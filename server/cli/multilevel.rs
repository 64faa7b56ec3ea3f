//! `gapwise multilevel`: a random-intercept model with countries as the second level.

use std::fmt::Write as _;
use std::path::Path;

use super::finish;
use crate::analysis::multilevel::{multilevel_file, MultilevelReport, Request};

/// Arguments of `gapwise multilevel`.
pub struct MultilevelArgs<'a> {
    pub outcome: &'a str,
    pub predictors: &'a [String],
    pub country: &'a str,
    pub kind: crate::analysis::multilevel::Kind,
    pub ml: bool,
    pub weight: Option<&'a str>,
    pub nodes: usize,
}

/// `gapwise multilevel`: a random-intercept model with countries as the second level.
pub fn multilevel(path: &Path, a: &MultilevelArgs, json: bool) -> i32 {
    let request = Request {
        outcome: a.outcome,
        predictors: a.predictors,
        country: a.country,
        weight: a.weight,
        kind: a.kind,
        ml: a.ml,
        nodes: a.nodes,
    };
    let result = crate::progress::during("reading the respondents and fitting", json, || {
        multilevel_file(path, &request)
    });
    finish(result, json, |r| multilevel_text(r, a.outcome))
}

/// The readable form of a random-intercept fit.
fn multilevel_text(r: &MultilevelReport, outcome: &str) -> String {
    let fit = &r.fit;
    let mut out = format!(
        "{} random-intercept model of {} ({}): {} respondents in {} countries ({} rows with missing values left out){}\n",
        fit.kind,
        outcome,
        r.method,
        r.n,
        r.countries,
        r.dropped,
        if r.converged { "" } else { "; NOT CONVERGED" }
    );
    let _ = writeln!(out, "  {:<28} {:>14} {:>14}", "term", "coefficient", "s.e.");
    for ((t, c), s) in fit.terms.iter().zip(&fit.coef).zip(&fit.se) {
        let _ = writeln!(out, "  {t:<28} {c:>14.6} {s:>14.6}");
    }
    let _ = writeln!(out, "  country SD {:.6}", fit.country_sd);
    if let (Some(s), Some(icc)) = (fit.residual_sd, r.icc) {
        let _ = writeln!(out, "  residual SD {s:.6}; intraclass correlation {icc:.4}");
    }
    let _ = writeln!(out, "  log-likelihood {:.4}", r.log_likelihood);
    if let Some(n) = &r.note {
        let _ = writeln!(out, "note: {n}");
    }
    out
}
