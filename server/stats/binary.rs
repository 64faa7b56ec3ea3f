//! Binary-response models of participation: logit (maximum likelihood, started by
//! linfa-logistic), Firth's penalised logit, and probit. Pure functions over ndarray.
//!
//! Every model is fitted on the design matrix as given (the caller standardises columns
//! for conditioning and maps coefficients back); the first column is the intercept.

use linfa::prelude::*;
use linfa_logistic::LogisticRegression;
use ndarray::{Array1, Array2, ArrayView1, ArrayView2, Axis};

use super::linalg::{self, LinalgError};
use super::normal;

/// The link between the linear predictor and the probability of taking part.
#[derive(Debug, Clone, Copy, PartialEq, Eq, serde::Serialize, serde::Deserialize)]
#[serde(rename_all = "kebab-case")]
pub enum ModelKind {
    /// Logistic regression by maximum likelihood.
    Logit,
    /// Logistic regression with Firth's (1993) penalty.
    Firth,
    /// Probit regression by maximum likelihood.
    Probit,
}

impl ModelKind {
    pub fn as_str(self) -> &'static str {
        match self {
            ModelKind::Logit => "logit",
            ModelKind::Firth => "firth",
            ModelKind::Probit => "probit",
        }
    }

    pub fn parse(s: &str) -> Option<ModelKind> {
        match s {
            "logit" => Some(ModelKind::Logit),
            "firth" => Some(ModelKind::Firth),
            "probit" => Some(ModelKind::Probit),
            _ => None,
        }
    }

    /// Probability for a linear predictor.
    pub fn probability(self, eta: f64) -> f64 {
        match self {
            ModelKind::Logit | ModelKind::Firth => logistic(eta),
            ModelKind::Probit => normal::cdf(eta),
        }
    }
}

#[derive(Debug, Clone, PartialEq, thiserror::Error)]
pub enum FitError {
    #[error("every unit has the same outcome ({0}); a participation model needs both participants and non-participants")]
    OneClass(&'static str),
    #[error("there are {n} units but {k} parameters; use fewer indicators")]
    TooFewUnits { n: usize, k: usize },
    #[error("the information matrix is singular: some indicators are constant or collinear")]
    Singular,
}

impl From<LinalgError> for FitError {
    fn from(_: LinalgError) -> Self {
        FitError::Singular
    }
}

/// A fitted binary model.
#[derive(Debug, Clone)]
pub struct BinaryFit {
    pub coef: Array1<f64>,
    /// Inverse of the (observed) information matrix at the estimate.
    pub cov: Array2<f64>,
    /// The ordinary log-likelihood at the estimate (also for Firth).
    pub log_likelihood: f64,
    pub converged: bool,
    pub iterations: usize,
    /// Largest absolute element of the (for Firth: modified) score at the estimate.
    pub max_score: f64,
}

impl BinaryFit {
    pub fn se(&self) -> Array1<f64> {
        self.cov.diag().mapv(f64::sqrt)
    }
}

/// Newton iterations stop when the largest score element falls below this.
pub const SCORE_TOLERANCE: f64 = 1e-10;
const MAX_ITERATIONS: usize = 200;

pub fn logistic(eta: f64) -> f64 {
    if eta >= 0.0 {
        1.0 / (1.0 + (-eta).exp())
    } else {
        let e = eta.exp();
        e / (1.0 + e)
    }
}

/// log(1 + exp(x)) without overflow.
fn softplus(x: f64) -> f64 {
    if x > 0.0 {
        x + (-x).exp().ln_1p()
    } else {
        x.exp().ln_1p()
    }
}

/// Fits the chosen model. `x` includes the intercept column.
pub fn fit(kind: ModelKind, x: ArrayView2<f64>, y: &[bool]) -> Result<BinaryFit, FitError> {
    check_inputs(x, y)?;
    match kind {
        ModelKind::Logit => fit_logit(x, y),
        ModelKind::Firth => newton(kind, x, y, None, true, SCORE_TOLERANCE),
        ModelKind::Probit => {
            // Start from the logit solution scaled by 1/1.6 (Amemiya 1981's rule of thumb).
            let start = newton(ModelKind::Logit, x, y, None, false, SCORE_TOLERANCE)
                .ok()
                .filter(|f| f.converged)
                .map(|f| f.coef / 1.6);
            newton(kind, x, y, start, false, SCORE_TOLERANCE)
        }
    }
}

/// Refits from a starting value (used for leave-one-out refits).
pub fn refit(
    kind: ModelKind,
    x: ArrayView2<f64>,
    y: &[bool],
    start: &Array1<f64>,
    tolerance: f64,
) -> Result<BinaryFit, FitError> {
    check_inputs(x, y)?;
    newton(
        kind,
        x,
        y,
        Some(start.clone()),
        kind == ModelKind::Firth,
        tolerance,
    )
}

fn check_inputs(x: ArrayView2<f64>, y: &[bool]) -> Result<(), FitError> {
    if y.iter().all(|&v| v) {
        return Err(FitError::OneClass("all took part"));
    }
    if y.iter().all(|&v| !v) {
        return Err(FitError::OneClass("none took part"));
    }
    if x.nrows() <= x.ncols() {
        return Err(FitError::TooFewUnits {
            n: x.nrows(),
            k: x.ncols(),
        });
    }
    Ok(())
}

/// Logit by maximum likelihood: L-BFGS from linfa-logistic, then Newton-Raphson on the
/// exact log-likelihood until the score is below [`SCORE_TOLERANCE`].
///
/// l(b) = sum_i [y_i x_i'b - log(1 + exp(x_i'b))]; score X'(y - p); information X'WX with
/// W = diag(p(1-p)) (e.g. Greene, Econometric Analysis, ch. 17). linfa-logistic applies an
/// L2 penalty of 1.0 by default (set to zero here) and models the more frequent class, so
/// its signs are flipped when that class is non-participation.
fn fit_logit(x: ArrayView2<f64>, y: &[bool]) -> Result<BinaryFit, FitError> {
    let features = x.slice(ndarray::s![.., 1..]).to_owned();
    let targets = Array1::from_iter(y.iter().copied());
    let dataset = Dataset::new(features, targets);
    let start = LogisticRegression::default()
        .alpha(0.0)
        .gradient_tolerance(1e-8)
        .max_iterations(500)
        .fit(&dataset)
        .ok()
        .map(|model| {
            let sign = if model.labels().pos.class { 1.0 } else { -1.0 };
            let mut coef = Array1::zeros(x.ncols());
            coef[0] = sign * model.intercept();
            for (j, b) in model.params().iter().enumerate() {
                coef[j + 1] = sign * b;
            }
            coef
        })
        .filter(|c| c.iter().all(|v| v.is_finite()));
    newton(ModelKind::Logit, x, y, start, false, SCORE_TOLERANCE)
}

/// Per-unit log-likelihood, score weight s_i (score = X's) and information weight w_i
/// (information = X'WX) at linear predictor eta.
fn unit_terms(kind: ModelKind, eta: f64, y: bool) -> (f64, f64, f64) {
    match kind {
        ModelKind::Logit | ModelKind::Firth => {
            let p = logistic(eta);
            let ll = if y { -softplus(-eta) } else { -softplus(eta) };
            (ll, f64::from(u8::from(y)) - p, p * (1.0 - p))
        }
        ModelKind::Probit => {
            // l = log Phi(q eta), q = 2y - 1; dl/deta = q m(q eta), m = inverse Mills ratio;
            // -d2l/deta2 = m (q eta + m) (e.g. Greene, ch. 17, probit Hessian).
            let q = if y { 1.0 } else { -1.0 };
            let z = q * eta;
            let m = normal::inverse_mills(z);
            (normal::log_cdf(z), q * m, m * (z + m))
        }
    }
}

struct Evaluation {
    log_likelihood: f64,
    /// Objective maximised (log-likelihood, plus 0.5 log|I| for Firth).
    objective: f64,
    score: Array1<f64>,
    information: Array2<f64>,
}

fn evaluate(
    kind: ModelKind,
    x: ArrayView2<f64>,
    y: &[bool],
    beta: &Array1<f64>,
    firth: bool,
) -> Result<Evaluation, FitError> {
    let eta = x.dot(beta);
    let n = y.len();
    let mut ll = 0.0;
    let mut s = Array1::zeros(n);
    let mut w = Array1::zeros(n);
    for i in 0..n {
        let (l, si, wi) = unit_terms(kind, eta[i], y[i]);
        ll += l;
        s[i] = si;
        w[i] = wi;
    }
    let information = linalg::weighted_cross_product(x, w.view());
    let mut objective = ll;
    if firth {
        // Firth (1993); Heinze & Schemper (2002): modified score
        // U*(b) = X'(y - p + h (1/2 - p)), h = diag(W^1/2 X (X'WX)^-1 X' W^1/2),
        // maximising l(b) + 1/2 log|X'WX|.
        objective += 0.5 * linalg::log_det_spd(information.view())?;
        let inverse = linalg::inverse_spd(information.view())?;
        let xa = x.dot(&inverse);
        for i in 0..n {
            let h = w[i] * xa.row(i).dot(&x.row(i));
            s[i] += h * (0.5 - logistic(eta[i]));
        }
    }
    let score = x.t().dot(&s);
    Ok(Evaluation {
        log_likelihood: ll,
        objective,
        score,
        information,
    })
}

fn max_abs(v: ArrayView1<f64>) -> f64 {
    v.iter().fold(0.0f64, |m, x| m.max(x.abs()))
}

/// Newton-Raphson (Fisher scoring for Firth's modified score) with step halving on the
/// objective. Stops when the score is below `tolerance` or after a fixed number of iterations.
fn newton(
    kind: ModelKind,
    x: ArrayView2<f64>,
    y: &[bool],
    start: Option<Array1<f64>>,
    firth: bool,
    tolerance: f64,
) -> Result<BinaryFit, FitError> {
    let k = x.ncols();
    let mut beta = start.unwrap_or_else(|| null_start(kind, y, k));
    // A diverged starting value (e.g. from a separated fit) can make the information
    // singular; start again from the intercept-only value then.
    let mut current = match evaluate(kind, x, y, &beta, firth) {
        Ok(e) => e,
        Err(_) => {
            beta = null_start(kind, y, k);
            evaluate(kind, x, y, &beta, firth)?
        }
    };
    let mut iterations = 0;
    let mut converged = max_abs(current.score.view()) < tolerance;
    while !converged && iterations < MAX_ITERATIONS {
        iterations += 1;
        // Under separation the information degenerates as the estimates run off; stop
        // there and report no convergence rather than fail.
        let Ok(step) = linalg::solve_spd(current.information.view(), current.score.view()) else {
            break;
        };
        let mut t = 1.0;
        let mut accepted = false;
        for _ in 0..40 {
            let candidate = &beta + &(&step * t);
            if let Ok(next) = evaluate(kind, x, y, &candidate, firth) {
                if next.objective.is_finite()
                    && next.objective
                        >= current.objective - 1e-12 * current.objective.abs().max(1.0)
                {
                    beta = candidate;
                    current = next;
                    accepted = true;
                    break;
                }
            }
            t *= 0.5;
        }
        converged = max_abs(current.score.view()) < tolerance;
        if !accepted || max_abs(step.view()) * t < 1e-15 {
            break;
        }
    }
    // Without an invertible information the standard errors are unbounded.
    let cov = linalg::inverse_spd(current.information.view())
        .unwrap_or_else(|_| Array2::from_elem((k, k), f64::INFINITY));
    Ok(BinaryFit {
        coef: beta,
        cov,
        log_likelihood: current.log_likelihood,
        converged,
        iterations,
        max_score: max_abs(current.score.view()),
    })
}

/// Intercept at the logit (or probit) of the participation share, slopes zero.
fn null_start(kind: ModelKind, y: &[bool], k: usize) -> Array1<f64> {
    let share = y.iter().filter(|&&v| v).count() as f64 / y.len() as f64;
    let mut b = Array1::zeros(k);
    b[0] = match kind {
        ModelKind::Probit => normal::quantile(share),
        _ => (share / (1.0 - share)).ln(),
    };
    b
}

/// Fitted probabilities for each row of `x`.
pub fn predict(kind: ModelKind, x: ArrayView2<f64>, coef: &Array1<f64>) -> Vec<f64> {
    x.dot(coef)
        .iter()
        .map(|&eta| kind.probability(eta))
        .collect()
}

/// How a term separates participants from non-participants, if it does.
#[derive(Debug, Clone, PartialEq, serde::Serialize)]
pub struct Separation {
    /// Column index in the design matrix.
    pub term: usize,
    /// `true` for complete separation, `false` for quasi-complete (ties at the boundary).
    pub complete: bool,
    /// Whether participants lie above (`true`) or below the non-participants.
    pub participants_above: bool,
}

/// Finds terms that on their own separate the two groups (Albert & Anderson 1984's
/// complete and quasi-complete separation, checked one column at a time): every
/// participant's value at or beyond every non-participant's.
pub fn separating_terms(x: ArrayView2<f64>, y: &[bool]) -> Vec<Separation> {
    let mut out = Vec::new();
    for (j, column) in x.axis_iter(Axis(1)).enumerate().skip(1) {
        let range = |took: bool| {
            column
                .iter()
                .zip(y)
                .filter(|(_, &t)| t == took)
                .fold((f64::INFINITY, f64::NEG_INFINITY), |(lo, hi), (&v, _)| {
                    (lo.min(v), hi.max(v))
                })
        };
        let (p_lo, p_hi) = range(true);
        let (n_lo, n_hi) = range(false);
        if (p_hi - p_lo).abs() < 1e-300 && (n_hi - n_lo).abs() < 1e-300 && p_lo == n_lo {
            continue; // constant column: collinear with the intercept, not separation
        }
        if p_lo >= n_hi {
            out.push(Separation {
                term: j,
                complete: p_lo > n_hi,
                participants_above: true,
            });
        } else if p_hi <= n_lo {
            out.push(Separation {
                term: j,
                complete: p_hi < n_lo,
                participants_above: false,
            });
        }
    }
    out
}

/// Whether a maximum-likelihood fit shows the signs of separation: fitted probabilities
/// of 0 or 1 to within 1e-8, or a fit that did not converge.
pub fn looks_separated(fit: &BinaryFit, kind: ModelKind, x: ArrayView2<f64>) -> bool {
    !fit.converged
        || predict(kind, x, &fit.coef)
            .iter()
            .any(|&p| !(1e-8..=1.0 - 1e-8).contains(&p))
}

/// Area under the ROC curve: the probability that a random participant has a higher
/// score than a random non-participant, ties counting one half (Hanley & McNeil 1982;
/// the Mann-Whitney statistic divided by n1 n0).
pub fn auc(scores: &[f64], y: &[bool]) -> Option<f64> {
    let mut order: Vec<usize> = (0..scores.len()).collect();
    order.sort_by(|&a, &b| scores[a].total_cmp(&scores[b]));
    // Mid-ranks for ties.
    let mut ranks = vec![0.0; scores.len()];
    let mut i = 0;
    while i < order.len() {
        let mut j = i;
        while j + 1 < order.len() && scores[order[j + 1]] == scores[order[i]] {
            j += 1;
        }
        let mid = (i + j) as f64 / 2.0 + 1.0;
        for &o in &order[i..=j] {
            ranks[o] = mid;
        }
        i = j + 1;
    }
    let n1 = y.iter().filter(|&&t| t).count() as f64;
    let n0 = y.len() as f64 - n1;
    if n1 == 0.0 || n0 == 0.0 {
        return None;
    }
    let rank_sum: f64 = ranks
        .iter()
        .zip(y)
        .filter(|(_, &t)| t)
        .map(|(r, _)| r)
        .sum();
    Some((rank_sum - n1 * (n1 + 1.0) / 2.0) / (n1 * n0))
}

/// Leave-one-out predictions: each unit's probability from the model refitted without it
/// (warm-started at the full fit). `None` for a unit whose refit fails.
pub fn leave_one_out(
    kind: ModelKind,
    x: ArrayView2<f64>,
    y: &[bool],
    full: &BinaryFit,
) -> Vec<Option<f64>> {
    let n = y.len();
    let refit_without = |i: usize| {
        let keep: Vec<usize> = (0..n).filter(|&j| j != i).collect();
        let xs = x.select(Axis(0), &keep);
        let ys: Vec<bool> = keep.iter().map(|&j| y[j]).collect();
        // A looser tolerance suffices: the refits only rank units for the AUC.
        refit(kind, xs.view(), &ys, &full.coef, 1e-7)
            .ok()
            .map(|f| kind.probability(x.row(i).dot(&f.coef)))
    };
    // The refits are independent: share them among the available cores.
    let threads = std::thread::available_parallelism()
        .map_or(1, |t| t.get())
        .min(n.max(1));
    let chunk = n.div_ceil(threads.max(1)).max(1);
    let mut out = vec![None; n];
    std::thread::scope(|scope| {
        let handles: Vec<_> = (0..n)
            .step_by(chunk)
            .map(|start| {
                let refit_without = &refit_without;
                scope.spawn(move || {
                    (start..(start + chunk).min(n))
                        .map(refit_without)
                        .collect::<Vec<_>>()
                })
            })
            .collect();
        for (h, start) in handles.into_iter().zip((0..n).step_by(chunk)) {
            if let Ok(values) = h.join() {
                out[start..start + values.len()].clone_from_slice(&values);
            }
        }
    });
    out
}
