//! `gapwise multilevel`: a random-intercept model of a respondent outcome with the country
//! as the grouping level (stats::multilevel does the numerics).

use std::path::Path;

use serde::Serialize;

use crate::analysis::microdata::{read_regression_file, MicrodataError};
use crate::stats::multilevel::{self, Criterion, Data, MultilevelError, MultilevelFit};

/// Linear or logistic outcome model.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Kind {
    Linear,
    Logistic,
}

impl Kind {
    pub fn parse(text: &str) -> Option<Kind> {
        match text {
            "linear" => Some(Kind::Linear),
            "logistic" => Some(Kind::Logistic),
            _ => None,
        }
    }
}

/// A random-intercept fit's estimates as results show them: the model, its fixed effects
/// and the two standard deviations. `gapwise multilevel` and the projection page both
/// report these (flattened into their JSON, so the keys stand where they always stood).
#[derive(Debug, Clone, Serialize)]
pub struct RandomInterceptSummary {
    /// "linear" or "logistic" (a binary outcome).
    pub kind: &'static str,
    /// Intercept first.
    pub terms: Vec<String>,
    pub coef: Vec<f64>,
    /// Model-based standard errors (null where not estimable).
    pub se: Vec<f64>,
    /// Standard deviation of the country effects (tau).
    pub country_sd: f64,
    /// Residual standard deviation (null for the logistic model).
    pub residual_sd: Option<f64>,
}

impl RandomInterceptSummary {
    /// The summary of `fit`, a model of `kind` whose coefficients are those of `terms`.
    pub fn new(kind: Kind, terms: Vec<String>, fit: &MultilevelFit) -> RandomInterceptSummary {
        RandomInterceptSummary {
            kind: match kind {
                Kind::Linear => "linear",
                Kind::Logistic => "logistic",
            },
            terms,
            coef: fit.coef.clone(),
            se: fit.se.clone(),
            country_sd: fit.country_sd,
            residual_sd: fit.residual_sd,
        }
    }
}

/// The result of `gapwise multilevel`.
#[derive(Debug, Clone, Serialize)]
pub struct MultilevelReport {
    #[serde(flatten)]
    pub fit: RandomInterceptSummary,
    /// Intraclass correlation (null for the logistic model).
    pub icc: Option<f64>,
    /// REML: the restricted log-likelihood; Laplace / quadrature: its approximation.
    pub log_likelihood: f64,
    /// "REML", "ML", "Laplace" or "adaptive Gauss-Hermite (k nodes)".
    pub method: String,
    pub n: usize,
    pub countries: usize,
    pub dropped: usize,
    pub converged: bool,
    /// The country SD is estimated at its boundary, 0 (said in `note`).
    pub at_boundary: bool,
    /// Iterations of the outer search (see `MultilevelFit::iterations`).
    pub iterations: usize,
    /// Countries in order, with their conditional modes and conditional variances.
    pub country_codes: Vec<String>,
    pub modes: Vec<f64>,
    pub mode_variance: Vec<f64>,
    /// Set when the country SD is at its boundary, 0, and when design weights were used
    /// (the standard errors are then approximate).
    pub note: Option<String>,
}

/// Options of one multilevel fit.
#[derive(Debug, Clone)]
pub struct Request<'a> {
    pub outcome: &'a str,
    pub predictors: &'a [String],
    pub country: &'a str,
    pub weight: Option<&'a str>,
    pub kind: Kind,
    pub ml: bool,
    /// Quadrature nodes for the logistic model (1 = Laplace).
    pub nodes: usize,
}

fn model_error(e: MultilevelError) -> MicrodataError {
    MicrodataError::Request(format!("the multilevel model cannot be fitted: {e}"))
}

/// Reads the file and fits the model.
pub fn multilevel_file(path: &Path, req: &Request) -> Result<MultilevelReport, MicrodataError> {
    if req.predictors.is_empty() {
        return Err(MicrodataError::Request(
            "name at least one predictor (--predictors a,b,c)".to_string(),
        ));
    }
    if req.ml && req.kind == Kind::Logistic {
        return Err(MicrodataError::Request(
            "--ml applies to the linear model; the logistic one is always maximum likelihood (Laplace or quadrature)".to_string(),
        ));
    }
    let data = read_regression_file(path, req.outcome, req.predictors, req.country, req.weight)?;
    let input = Data {
        x: data.x.view(),
        y: &data.y,
        group: &data.cluster,
        n_groups: data.clusters.len(),
        weight: data.weight.as_deref(),
    };
    let (fit, method) = match req.kind {
        Kind::Linear => {
            let criterion = if req.ml {
                Criterion::Ml
            } else {
                Criterion::Reml
            };
            (
                multilevel::fit_linear(&input, criterion).map_err(model_error)?,
                criterion.as_str().to_string(),
            )
        }
        Kind::Logistic => {
            let method = if req.nodes <= 1 {
                "Laplace".to_string()
            } else {
                format!("adaptive Gauss-Hermite ({} nodes)", req.nodes)
            };
            (
                multilevel::fit_logistic(&input, req.nodes).map_err(model_error)?,
                method,
            )
        }
    };
    let mut terms = vec!["intercept".to_string()];
    terms.extend(req.predictors.iter().cloned());
    let notes: Vec<&str> = [
        fit.at_boundary.then_some(multilevel::BOUNDARY_NOTE),
        fit.weighted.then_some(
            "design weights by pseudo-likelihood, scaled to each country's effective sample size: estimates and standard errors are approximate",
        ),
    ]
    .into_iter()
    .flatten()
    .collect();
    Ok(MultilevelReport {
        fit: RandomInterceptSummary::new(req.kind, terms, &fit),
        icc: fit.icc,
        log_likelihood: fit.log_likelihood,
        method,
        n: fit.n,
        countries: fit.groups,
        dropped: data.dropped,
        converged: fit.converged,
        at_boundary: fit.at_boundary,
        iterations: fit.iterations,
        country_codes: data.clusters,
        modes: fit.modes,
        mode_variance: fit.mode_variance,
        note: (!notes.is_empty()).then(|| notes.join("; ")),
    })
}
