//! Weights that make participants stand for the whole eligible universe.
//!
//! Conventions: `t[i]` says whether unit i took part; weight vectors are aligned with all
//! units and are zero for non-participants. [`normalise`] scales participants' weights to
//! sum to the number of eligible units.

use ndarray::{Array1, Array2, ArrayView2, Axis};

use super::binary::logistic;
use super::linalg;
use super::newton;

#[derive(Debug, Clone, PartialEq, thiserror::Error)]
pub enum WeightError {
    #[error("no unit took part, so there is nothing to weight")]
    NoParticipants,
    /// A balance target that participants cannot reach with positive weights.
    #[error("{reason}")]
    Infeasible { column: usize, reason: String },
    #[error("the balance equations are singular: some indicators are constant among participants or collinear")]
    Singular,
    #[error("a propensity is not strictly between 0 and 1 (unit {0}); weights would be infinite")]
    DegeneratePropensity(usize),
    /// A starting point (or curvature) whose size does not match the design's columns.
    #[error("the fit's start has {given} values but the design has {expected} columns")]
    StartSize { given: usize, expected: usize },
    /// Unit counts that are not one positive, finite count per unit.
    #[error("the fit was given {given} unit counts for {expected} units, or a count that is not positive")]
    CountsSize { given: usize, expected: usize },
}

/// Inverse-probability weights w_i = T_i / p_i (Horvitz & Thompson 1952; Rosenbaum 1987):
/// each participant stands for 1/p_i units of the universe.
pub fn inverse_probability(p: &[f64], t: &[bool]) -> Result<Vec<f64>, WeightError> {
    if !t.iter().any(|&v| v) {
        return Err(WeightError::NoParticipants);
    }
    p.iter()
        .zip(t)
        .enumerate()
        .map(|(i, (&pi, &ti))| match (ti, pi > 0.0 && pi <= 1.0) {
            (false, _) => Ok(0.0),
            (true, true) => Ok(1.0 / pi),
            (true, false) => Err(WeightError::DegeneratePropensity(i)),
        })
        .collect()
}

/// Stabilised inverse-probability weights w_i = T_i P(T=1) / p_i (Robins, Hernán &
/// Brumback 2000). After [`normalise`] they equal the plain ones; the factor matters only
/// for unnormalised weights, whose mean it brings near 1.
pub fn stabilised_inverse_probability(p: &[f64], t: &[bool]) -> Result<Vec<f64>, WeightError> {
    let share = t.iter().filter(|&&v| v).count() as f64 / t.len().max(1) as f64;
    Ok(inverse_probability(p, t)?
        .into_iter()
        .map(|w| w * share)
        .collect())
}

/// Caps participants' weights at their `q` quantile (Potter 1990's trimming; Lee, Lessler
/// & Stuart 2011 for propensity weights), leaving the total to [`normalise`].
pub fn trim(weights: &[f64], t: &[bool], q: f64) -> Vec<f64> {
    let participant: Vec<f64> = weights
        .iter()
        .zip(t)
        .filter(|(_, &ti)| ti)
        .map(|(&w, _)| w)
        .collect();
    let Some(cap) = super::describe::quantile(&participant, q) else {
        return weights.to_vec();
    };
    weights.iter().map(|&w| w.min(cap)).collect()
}

/// Scales weights so that they sum to `total` (the number of eligible units).
pub fn normalise(weights: &[f64], total: f64) -> Vec<f64> {
    let sum: f64 = weights.iter().sum();
    if sum <= 0.0 {
        return weights.to_vec();
    }
    weights.iter().map(|w| w * total / sum).collect()
}

/// The result of a covariate-balancing propensity score fit.
#[derive(Debug, Clone)]
pub struct CbpsFit {
    pub coef: Array1<f64>,
    pub propensity: Vec<f64>,
    pub converged: bool,
    pub iterations: usize,
    /// Largest absolute balance condition (mean over units) at the solution.
    pub max_imbalance: f64,
    /// Columns whose balance condition no weighting of participants can meet: every
    /// participant has the same value and the universe mean differs (e.g. a category level
    /// without participants).
    pub unreachable: Vec<usize>,
    /// The over-identified fit ended where it started (no step lowered the criterion), so
    /// its weights are those of the starting logit.
    pub stayed_at_start: bool,
}

/// Columns of `x` whose universe mean participants cannot reproduce with any positive
/// weights because they all share one value that differs from it.
pub fn unreachable_columns(x: ArrayView2<f64>, t: &[bool]) -> Vec<usize> {
    let n = t.len() as f64;
    (0..x.ncols())
        .filter(|&j| {
            let column = x.column(j);
            let mut participants = column.iter().zip(t).filter(|(_, &ti)| ti).map(|(v, _)| *v);
            let Some(first) = participants.next() else {
                return false;
            };
            let size = column
                .iter()
                .fold(0.0f64, |m, v| m.max(v.abs()))
                .max(1e-300);
            let constant = participants.all(|v| (v - first).abs() <= 1e-12 * size);
            let mean = column.sum() / n;
            constant && (mean - first).abs() > 1e-9 * size
        })
        .collect()
}

/// Just-identified covariate-balancing propensity score (Imai & Ratkovic 2014, JRSS B 76,
/// eq. 7-8, with the universe as the target): a logit p_i = 1/(1+exp(-x_i'b)) whose b
/// solves the balance conditions sum_i (T_i / p_i - 1) x_i = 0, x with an intercept, so the
/// participants weighted by 1/p reproduce the universe's totals of every column exactly.
///
/// The conditions are the gradient of the convex function
/// f(b) = sum_i [T_i exp(-x_i'b) + (1 - T_i) x_i'b], minimised by Newton's method with
/// step halving ([`newton::halving_step`]). A solution exists only if the universe means lie inside the convex hull of
/// the participants' rows reachable with weights 1/p of at least 1 (each participant stands
/// at least for itself); otherwise the iterations diverge and the fit is reported as not
/// converged.
pub fn cbps_just_identified(x: ArrayView2<f64>, t: &[bool]) -> Result<CbpsFit, WeightError> {
    just_identified(x, t, &vec![1.0; t.len()])
}

/// [`cbps_just_identified`] on units that stand for `counts[i]` identical units each (a
/// bootstrap draw's distinct countries with how often each was drawn): every sum over
/// units weights its rows by their counts, so the solution is that of the rows written
/// out, at the cost of the distinct ones.
pub fn cbps_just_identified_counted(
    x: ArrayView2<f64>,
    t: &[bool],
    counts: &[f64],
) -> Result<CbpsFit, WeightError> {
    if !crate::stats::bootstrap::are_unit_counts(counts, t.len()) {
        return Err(WeightError::CountsSize {
            given: counts.len(),
            expected: t.len(),
        });
    }
    just_identified(x, t, counts)
}

fn just_identified(x: ArrayView2<f64>, t: &[bool], counts: &[f64]) -> Result<CbpsFit, WeightError> {
    if !t.iter().any(|&v| v) {
        return Err(WeightError::NoParticipants);
    }
    let rows = t.len();
    let count = |i: usize| counts[i];
    let n: f64 = counts.iter().sum();
    let k = x.ncols();
    let objective = |b: &Array1<f64>| -> f64 {
        let eta = x.dot(b);
        (0..rows)
            .map(|i| count(i) * if t[i] { (-eta[i]).exp() } else { eta[i] })
            .sum()
    };
    let mut b = Array1::<f64>::zeros(k);
    let took: f64 = (0..rows).filter(|&i| t[i]).map(count).sum();
    let share = took / n;
    b[0] = (share / (1.0 - share).max(1e-12)).ln();
    let mut iterations = 0;
    let mut converged = false;
    let mut f = objective(&b);
    for _ in 0..200 {
        iterations += 1;
        let eta = x.dot(&b);
        // gradient of f = -sum (T e^{-eta} - (1 - T)) x = -g; Hessian = sum T e^{-eta} x x'.
        let mut g = Array1::<f64>::zeros(k);
        let mut w = Array1::<f64>::zeros(rows);
        for i in 0..rows {
            let e = if t[i] { (-eta[i]).exp() } else { 0.0 };
            let coefficient = e - f64::from(u8::from(!t[i]));
            g.scaled_add(count(i) * coefficient, &x.row(i));
            w[i] = count(i) * e;
        }
        if g.iter().all(|v| v.abs() < 1e-12 * n) {
            converged = true;
            break;
        }
        let h = linalg::weighted_cross_product(x, w.view());
        // A singular Hessian here means the iterations are running off (some participants'
        // weights 1/p are being pushed to their floor of 1): no solution.
        let Ok(step) = linalg::solve_spd(h.view(), g.view()) else {
            break;
        };
        // Near the solution the decrease falls below the rounding of f itself; accept
        // steps that do not increase f beyond that rounding (a maximisation of -f).
        let floor = -(f + 1e-12 * f.abs().max(1.0));
        let Some((candidate, fc, _)) = newton::halving_step(&b, &step, floor, |c| {
            let fc = objective(c);
            Some((fc, -fc))
        }) else {
            break;
        };
        b = candidate;
        f = fc;
    }
    let propensity: Vec<f64> = x.dot(&b).iter().map(|&e| logistic(e)).collect();
    let max_imbalance = balance_conditions(x, t, counts, &propensity)
        .iter()
        .fold(0.0f64, |m, v| m.max(v.abs()));
    let unreachable = unreachable_columns(x, t);
    Ok(CbpsFit {
        coef: b,
        propensity,
        converged: converged && unreachable.is_empty(),
        iterations,
        max_imbalance,
        unreachable,
        stayed_at_start: false,
    })
}

/// Mean balance conditions (1/n) sum_i c_i (T_i/p_i - 1) x_i over rows standing for c_i
/// units each (n = sum of the counts).
fn balance_conditions(x: ArrayView2<f64>, t: &[bool], counts: &[f64], p: &[f64]) -> Array1<f64> {
    let n: f64 = counts.iter().sum();
    let mut g = Array1::<f64>::zeros(x.ncols());
    for (i, row) in x.axis_iter(Axis(0)).enumerate() {
        let c = if t[i] { 1.0 / p[i] } else { 0.0 } - 1.0;
        g.scaled_add(counts[i] * c / n, &row);
    }
    g
}

/// Over-identified covariate-balancing propensity score (Imai & Ratkovic 2014, section
/// 2.2): generalised method of moments on the logit score conditions (T_i - p_i) x_i and
/// the balance conditions (T_i/p_i - 1) x_i together,
/// minimising Q(b) = g(b)' S(b)^-1 g(b) with g the mean of the stacked conditions and S their
/// covariance under the model, S = (1/n) sum_i [[p(1-p), 1-p], [1-p, (1-p)/p]] (x) x_i x_i'
/// (continuously updated, as in the paper). Started from the just-identified solution
/// when it exists, else from `start` (the logit); see [`cbps_over_identified_from`].
///
/// Q has several local minima (the two sets of conditions differ per unit only by the
/// factor 1/p_i, so S is close to singular); the estimate is the one reached by descent
/// from that start.
pub fn cbps_over_identified(
    x: ArrayView2<f64>,
    t: &[bool],
    start: &Array1<f64>,
) -> Result<CbpsFit, WeightError> {
    if !t.iter().any(|&v| v) {
        return Err(WeightError::NoParticipants);
    }
    let just = cbps_just_identified(x, t)
        .ok()
        .filter(|f| f.converged)
        .map(|f| f.coef);
    cbps_over_identified_from(x, t, just.as_ref().unwrap_or(start))
}

/// Steps of the over-identified fit below which it counts as converged (largest change
/// of a coefficient on the standardised scale).
pub const GMM_STEP_TOLERANCE: f64 = 1e-8;
/// Newton steps below which the over-identified fit is close enough to a strict minimum
/// to trust its gradient over the rounding of the criterion.
const GMM_NEAR: f64 = 1e-4;
/// Newton iterations before the over-identified fit gives up.
const GMM_MAX_ITERATIONS: usize = 100;

/// The over-identified fit of [`cbps_over_identified`] started exactly at `b0` (bootstrap
/// draws start from the full sample's solution, so that each finds the minimum that
/// corresponds to it).
///
/// Minimised by Newton's method on the analytic gradient
/// dQ/db = 2 J'a - a'(dS/db)a (a = S^-1 g, J = dg/db) and the analytic Hessian of
/// [`gmm_hessian`], made positive definite by a growing multiple of the identity where
/// it is not (Nocedal & Wright 2006, Numerical Optimization, section 3.4, from memory),
/// and steps halved until Q does not rise beyond its
/// rounding ([`newton::halving_step`]; within 1e-10 of Q once the steps are small at a
/// positive-definite Hessian, where Q's rounding exceeds its change). Converged when the Newton step of a positive-definite
/// Hessian (a strict local minimum) moves no coefficient by more than
/// [`GMM_STEP_TOLERANCE`]. A column no weighting of participants can balance
/// ([`unreachable_columns`]) leaves Q without a finite minimiser (it falls forever as that
/// column's coefficient runs off), so the fit does not start and reports that it stayed at
/// `b0`.
pub fn cbps_over_identified_from(
    x: ArrayView2<f64>,
    t: &[bool],
    b0: &Array1<f64>,
) -> Result<CbpsFit, WeightError> {
    cbps_over_identified_counted_from(x, t, &vec![1.0; t.len()], b0)
}

/// [`cbps_over_identified_from`] on units that stand for `counts[i]` identical units each
/// (a bootstrap draw's distinct countries with how often each was drawn): every sum over
/// units is a sum over these rows weighted by their counts, n = sum of the counts, so the
/// criterion, its minimum and the propensities are those of the draw with its repeated
/// rows written out, at the cost of the distinct rows only.
pub fn cbps_over_identified_counted_from(
    x: ArrayView2<f64>,
    t: &[bool],
    counts: &[f64],
    b0: &Array1<f64>,
) -> Result<CbpsFit, WeightError> {
    if !t.iter().any(|&v| v) {
        return Err(WeightError::NoParticipants);
    }
    if b0.len() != x.ncols() {
        return Err(WeightError::StartSize {
            given: b0.len(),
            expected: x.ncols(),
        });
    }
    if !crate::stats::bootstrap::are_unit_counts(counts, t.len()) {
        return Err(WeightError::CountsSize {
            given: counts.len(),
            expected: t.len(),
        });
    }
    let problem = GmmProblem::new(x.view(), t, counts);
    gmm_fit(&problem, b0)
}

/// Runs Newton's method from `b0` unless a column cannot be balanced, and reports the fit.
fn gmm_fit(problem: &GmmProblem, b0: &Array1<f64>) -> Result<CbpsFit, WeightError> {
    let (x, t) = (problem.x, problem.t);
    let unreachable = unreachable_columns(x, t);
    let descent = if unreachable.is_empty() {
        gmm_newton(problem, b0)
    } else {
        GmmDescent::at(b0)
    };
    let propensity: Vec<f64> = x.dot(&descent.coef).iter().map(|&e| logistic(e)).collect();
    let max_imbalance = balance_conditions(x, t, problem.counts, &propensity)
        .iter()
        .fold(0.0f64, |m, v| m.max(v.abs()));
    let stayed_at_start = !descent.converged && !descent.moved;
    Ok(CbpsFit {
        coef: descent.coef,
        propensity,
        converged: descent.converged,
        iterations: descent.iterations,
        max_imbalance,
        unreachable,
        stayed_at_start,
    })
}

/// Where Newton's method on the GMM criterion ended.
struct GmmDescent {
    coef: Array1<f64>,
    converged: bool,
    iterations: usize,
    /// At least one step was taken.
    moved: bool,
}

impl GmmDescent {
    /// Not yet moved from `start`.
    fn at(start: &Array1<f64>) -> GmmDescent {
        GmmDescent {
            coef: start.clone(),
            converged: false,
            iterations: 0,
            moved: false,
        }
    }
}

fn gmm_newton(problem: &GmmProblem, b0: &Array1<f64>) -> GmmDescent {
    let mut b = b0.clone();
    let mut out = GmmDescent::at(&b);
    let Some(mut point) = gmm_point(problem, &b).filter(|p| p.q.is_finite()) else {
        return out;
    };
    for iteration in 1..=GMM_MAX_ITERATIONS {
        out.iterations = iteration;
        let units = point.loadings(problem.x);
        let grad = gmm_gradient(problem, &point, &units);
        let hessian = gmm_hessian(problem, &point, &units);
        let Some((step, positive_definite)) = modified_newton_step(&hessian, &grad) else {
            break;
        };
        let largest = step.iter().fold(0.0f64, |m, v| m.max(v.abs()));
        if positive_definite && largest < GMM_STEP_TOLERANCE {
            out.converged = true;
            break;
        }
        // A maximisation of -Q: accept the first halving at which Q does not rise beyond
        // its rounding. Close to a strict minimum Q changes by less than its own rounding
        // (S is nearly singular, so Q carries far more than one unit of rounding), and the
        // full step of the accurate gradient is taken unless Q rises clearly.
        let Some((candidate, next)) = gmm_halving(
            problem,
            &b,
            &step,
            point.q,
            positive_definite && largest < GMM_NEAR,
        ) else {
            break;
        };
        b = candidate;
        point = next;
        out.moved = true;
    }
    out.coef = b;
    out
}

/// A Newton step halved until the criterion Q does not rise beyond its rounding (a
/// maximisation of -Q); `near` a strict minimum, where Q changes by less than its own
/// rounding, the allowance is wider. The new point and the criterion's pieces there (only Q
/// judges a halving; the gradient waits for the accepted one), or `None` when no halving
/// is accepted.
fn gmm_halving(
    problem: &GmmProblem,
    b: &Array1<f64>,
    step: &Array1<f64>,
    q: f64,
    near: bool,
) -> Option<(Array1<f64>, GmmPoint)> {
    let slack = if near { 1e-10 } else { 1e-14 };
    let floor = -(q + slack * q.abs());
    // Halvings stop once the step would move no coefficient by more than the convergence
    // tolerance: such a move cannot make progress that counts, and on draws stuck in the
    // criterion's rounding the remaining halvings were most of the bootstrap's work.
    let largest = step.iter().fold(0.0f64, |m, v| m.max(v.abs()));
    let halvings = if largest > GMM_STEP_TOLERANCE {
        ((largest / GMM_STEP_TOLERANCE).log2().floor() as usize + 1).min(newton::MAX_HALVINGS)
    } else {
        1
    };
    newton::halving_step_to(b, step, floor, halvings, |c| {
        let point = gmm_point(problem, c).filter(|p| p.q.is_finite())?;
        let minus_q = -point.q;
        Some((point, minus_q))
    })
    .map(|(candidate, point, _)| (candidate, point))
}

/// The Newton step -H^-1 g of a minimisation, with H + mu I in place of H when H is not
/// positive definite (mu grown tenfold from 1e-8 times H's largest diagonal element until
/// the Cholesky factorisation succeeds); also whether H itself was positive definite.
fn modified_newton_step(h: &Array2<f64>, g: &Array1<f64>) -> Option<(Array1<f64>, bool)> {
    let minus_g = -g;
    if let Ok(step) = linalg::solve_spd(h.view(), minus_g.view()) {
        return Some((step, true));
    }
    let size = h
        .diag()
        .iter()
        .fold(0.0f64, |m, v| m.max(v.abs()))
        .max(1e-300);
    let mut mu = 1e-8 * size;
    while mu <= 1e8 * size {
        let mut damped = h.clone();
        damped.diag_mut().mapv_inplace(|v| v + mu);
        if let Ok(step) = linalg::solve_spd(damped.view(), minus_g.view()) {
            return Some((step, false));
        }
        mu *= 10.0;
    }
    None
}

/// The continuously updated GMM criterion at one point b: with eta = Xb and
/// p = logistic(eta) (clamped to [1e-12, 1 - 1e-12]), the moments g = (1/n) sum_i
/// [psi1_i x_i; psi2_i x_i], psi1 = t - p (the logit's score), psi2 = t/p - 1 (balance),
/// their covariance S = (1/n) sum_i [v11 v12; v12 v22]_i (x) x_i x_i' with v11 = p(1-p),
/// v12 = 1 - p, v22 = (1-p)/p (Imai & Ratkovic 2014, section 2.2), Q = g'S^-1 g.
struct GmmPoint {
    p: Vec<f64>,
    /// Lower Cholesky factor of S.
    s_factor: Array2<f64>,
    q: f64,
    /// [a1; a2] = S^-1 g.
    a: Array1<f64>,
}

/// Per unit, u_i = a1'x_i and r_i = a2'x_i of a [`GmmPoint`]: the gradient and the Hessian
/// need them, the halvings that only judge Q do not.
struct UnitLoadings {
    u: Array1<f64>,
    r: Array1<f64>,
}

impl GmmPoint {
    fn loadings(&self, x: ArrayView2<f64>) -> UnitLoadings {
        let k = x.ncols();
        UnitLoadings {
            u: x.dot(&self.a.slice(ndarray::s![..k])),
            r: x.dot(&self.a.slice(ndarray::s![k..])),
        }
    }
}

/// Derivatives with respect to eta of one unit's psi and v of [`GmmPoint`].
struct UnitDerivatives {
    dpsi1: f64,
    dpsi2: f64,
    dv11: f64,
    dv12: f64,
    dv22: f64,
}

impl UnitDerivatives {
    fn at(p: f64, t: f64) -> Self {
        let dp = p * (1.0 - p);
        UnitDerivatives {
            dpsi1: -dp,
            dpsi2: -t * (1.0 - p) / p,
            dv11: dp * (1.0 - 2.0 * p),
            dv12: -dp,
            dv22: -(1.0 - p) / p,
        }
    }
}

/// The data of one over-identified fit, with its rows' pair products (the criterion forms
/// three weighted cross-products of X per evaluation and the Hessian three more), and how
/// many units each row stands for (every sum over units weights its rows by these).
struct GmmProblem<'a> {
    x: ArrayView2<'a, f64>,
    t: &'a [bool],
    counts: &'a [f64],
    /// The number of units, sum of the counts.
    n: f64,
    pairs: linalg::RowPairs,
}

impl<'a> GmmProblem<'a> {
    fn new(x: ArrayView2<'a, f64>, t: &'a [bool], counts: &'a [f64]) -> Self {
        GmmProblem {
            x,
            t,
            counts,
            n: counts.iter().sum(),
            pairs: linalg::RowPairs::new(x),
        }
    }
}

fn gmm_point(problem: &GmmProblem, b: &Array1<f64>) -> Option<GmmPoint> {
    let (x, t, counts) = (problem.x, problem.t, problem.counts);
    let n = t.len();
    let k = x.ncols();
    let nf = problem.n;
    let p: Vec<f64> = x
        .dot(b)
        .iter()
        .map(|&e| logistic(e).clamp(1e-12, 1.0 - 1e-12))
        .collect();
    // Columns v11, v12, v22 of S's blocks, placed straight into S = [B11 B12; B12 B22]
    // (B12 is symmetric). S first: where it is singular the point has no criterion, and
    // the moments are not needed.
    let mut v = Array2::<f64>::zeros((n, 3));
    for (i, mut row) in v.rows_mut().into_iter().enumerate() {
        let (p, count) = (p[i], counts[i]);
        row[0] = count * p * (1.0 - p) / nf;
        row[1] = count * (1.0 - p) / nf;
        row[2] = count * (1.0 - p) / p / nf;
    }
    let sums = problem.pairs.sums(v.view());
    let mut s = Array2::<f64>::zeros((2 * k, 2 * k));
    problem.pairs.place(&sums, 0, &mut s, 0, 0);
    problem.pairs.place(&sums, 1, &mut s, 0, k);
    problem.pairs.place(&sums, 1, &mut s, k, 0);
    problem.pairs.place(&sums, 2, &mut s, k, k);
    let s_factor = linalg::cholesky(s.view()).ok()?;
    let tf = |i: usize| f64::from(u8::from(t[i]));
    let score: Array1<f64> = (0..n).map(|i| counts[i] * (tf(i) - p[i]) / nf).collect();
    let balance: Array1<f64> = (0..n)
        .map(|i| counts[i] * (tf(i) / p[i] - 1.0) / nf)
        .collect();
    let mut g = Array1::<f64>::zeros(2 * k);
    g.slice_mut(ndarray::s![..k]).assign(&x.t().dot(&score));
    g.slice_mut(ndarray::s![k..]).assign(&x.t().dot(&balance));
    let a = linalg::cholesky_solve(&s_factor, g.view());
    let q = g.dot(&a);
    Some(GmmPoint { p, s_factor, q, a })
}

/// The criterion Q of [`GmmPoint`] at b and its gradient
/// dQ/db = 2 J'a - a'(dS/db)a = (1/n) sum_i [2 (u dpsi1 + r dpsi2) - (dv11 u^2 +
/// 2 dv12 u r + dv22 r^2)]_i x_i (derivatives with respect to eta_i); Q is infinite where
/// S is singular.
#[cfg(test)]
fn gmm_objective(x: ArrayView2<f64>, t: &[bool], b: &Array1<f64>) -> (f64, Array1<f64>) {
    let ones = vec![1.0; t.len()];
    let problem = GmmProblem::new(x.view(), t, &ones);
    match gmm_point(&problem, b) {
        Some(point) => (point.q, gmm_gradient(&problem, &point, &point.loadings(x))),
        None => (f64::INFINITY, Array1::zeros(x.ncols())),
    }
}

/// The gradient of [`gmm_objective`] at a point.
fn gmm_gradient(problem: &GmmProblem, point: &GmmPoint, units: &UnitLoadings) -> Array1<f64> {
    let (x, t) = (problem.x, problem.t);
    let nf = problem.n;
    let per_unit: Array1<f64> = (0..t.len())
        .map(|i| {
            let d = UnitDerivatives::at(point.p[i], f64::from(u8::from(t[i])));
            let (u, r) = (units.u[i], units.r[i]);
            let j_term = u * d.dpsi1 + r * d.dpsi2;
            let s_term = d.dv11 * u * u + 2.0 * d.dv12 * u * r + d.dv22 * r * r;
            problem.counts[i] * (2.0 * j_term - s_term) / nf
        })
        .collect();
    x.t().dot(&per_unit)
}

/// The analytic Hessian of the GMM criterion at b (derived here by differentiating the
/// gradient of [`gmm_objective`] once more; checked against differences of the gradient
/// in the tests): with da/db_j = S^-1 m_j, m_j = dg/db_j - (dS/db_j) a,
///
///   H = 2 M'S^-1 M + (1/n) sum_i c_i x_i x_i',
///   M = (1/n) sum_i [(dpsi1 - dv11 u - dv12 r) x_i x_i'; (dpsi2 - dv12 u - dv22 r) x_i x_i'],
///   c = 2 (u d2psi1 + r d2psi2) - (d2v11 u^2 + 2 d2v12 u r + d2v22 r^2),
///
/// second derivatives with respect to eta: d2psi1 = -p(1-p)(1-2p), d2psi2 = t(1-p)/p,
/// d2v11 = p(1-p)(1-6p+6p^2), d2v12 = -p(1-p)(1-2p), d2v22 = (1-p)/p. It costs about two
/// evaluations of the criterion where forward differences cost k + 1.
fn gmm_hessian(problem: &GmmProblem, point: &GmmPoint, units: &UnitLoadings) -> Array2<f64> {
    let (x, t) = (problem.x, problem.t);
    let (n, k) = (t.len(), x.ncols());
    // Columns: the weights of M's two blocks and of the second-derivative term c.
    let mut weights = Array2::<f64>::zeros((n, 3));
    for i in 0..n {
        let nf = problem.n / problem.counts[i];
        let (p, ti) = (point.p[i], f64::from(u8::from(t[i])));
        let d = UnitDerivatives::at(p, ti);
        let (u, r) = (units.u[i], units.r[i]);
        weights[[i, 0]] = (d.dpsi1 - d.dv11 * u - d.dv12 * r) / nf;
        weights[[i, 1]] = (d.dpsi2 - d.dv12 * u - d.dv22 * r) / nf;
        let dp = p * (1.0 - p);
        let (d2psi1, d2psi2) = (-dp * (1.0 - 2.0 * p), ti * (1.0 - p) / p);
        let (d2v11, d2v12, d2v22) = (
            dp * (1.0 - 6.0 * p + 6.0 * p * p),
            -dp * (1.0 - 2.0 * p),
            (1.0 - p) / p,
        );
        weights[[i, 2]] = (2.0 * (u * d2psi1 + r * d2psi2)
            - (d2v11 * u * u + 2.0 * d2v12 * u * r + d2v22 * r * r))
            / nf;
    }
    let sums = problem.pairs.weighted(weights.view());
    let mut m = Array2::<f64>::zeros((2 * k, k));
    m.slice_mut(ndarray::s![..k, ..]).assign(&sums[0]);
    m.slice_mut(ndarray::s![k.., ..]).assign(&sums[1]);
    // M'S^-1 M = (L^-1 M)'(L^-1 M) with S = L L'.
    let half = linalg::forward_substitute(&point.s_factor, m.view());
    let h = 2.0 * half.t().dot(&half) + &sums[2];
    let ht = h.t().to_owned();
    (h + ht) * 0.5
}

/// The result of entropy balancing.
#[derive(Debug, Clone)]
pub struct EntropyFit {
    /// Aligned with all units; zero for non-participants; sums to 1 over participants.
    pub weights: Vec<f64>,
    pub converged: bool,
    pub iterations: usize,
    /// Largest |weighted participant moment - target| / scale at the solution.
    pub max_gap: f64,
}

/// Entropy balancing (Hainmueller 2012, Political Analysis 20, eq. 1-4): participant
/// weights w_i = q_i exp(-lambda'c_i) / sum_j q_j exp(-lambda'c_j), closest to the base
/// weights q in Kullback-Leibler divergence, such that sum_i w_i c_i = m exactly. `lambda`
/// minimises the convex dual log sum_i q_i exp(-lambda'(c_i - m)), by Newton's method
/// with step halving (the paper's algorithm). Columns are scaled by `scale` (use the
/// universe standard deviations) for conditioning; `targets` are the universe moments.
///
/// Before iterating, each target is checked against the participants' range: a target
/// outside it (or on its edge) cannot be met by positive weights, and the error names the
/// column and says why.
pub fn entropy_balance(
    c: ArrayView2<f64>,
    t: &[bool],
    targets: &[f64],
    scale: &[f64],
    base: Option<&[f64]>,
) -> Result<EntropyFit, WeightError> {
    let participants: Vec<usize> = (0..t.len()).filter(|&i| t[i]).collect();
    if participants.is_empty() {
        return Err(WeightError::NoParticipants);
    }
    let k = c.ncols();
    for j in 0..k {
        let (lo, hi) = participants
            .iter()
            .fold((f64::INFINITY, f64::NEG_INFINITY), |(lo, hi), &i| {
                (lo.min(c[[i, j]]), hi.max(c[[i, j]]))
            });
        let tol = 1e-9 * scale[j].max(1e-300);
        if targets[j] < lo - tol
            || targets[j] > hi + tol
            || ((hi - lo) < tol && (targets[j] - lo).abs() > tol)
        {
            let side = if targets[j] < lo {
                "below every participant's value"
            } else {
                "above every participant's value"
            };
            return Err(WeightError::Infeasible {
                column: j,
                reason: format!("the target {:.4} lies {side} (participants range from {lo:.4} to {hi:.4}), so no positive weights of participants can reach it", targets[j]),
            });
        }
        if (targets[j] - lo).abs() <= tol || (targets[j] - hi).abs() <= tol {
            if (hi - lo) < tol {
                continue; // constant among participants and equal to the target: already balanced
            }
            return Err(WeightError::Infeasible {
                column: j,
                reason: format!("the target {:.4} sits on the edge of the participants' range ({lo:.4} to {hi:.4}); only weights concentrated on the edge countries could reach it", targets[j]),
            });
        }
    }
    // Centred, scaled moment matrix of participants; constant columns dropped from the
    // optimisation (they are balanced whatever the weights).
    let active: Vec<usize> = (0..k)
        .filter(|&j| {
            let first = c[[participants[0], j]];
            participants
                .iter()
                .any(|&i| (c[[i, j]] - first).abs() > 1e-12 * scale[j].max(1e-300))
        })
        .collect();
    let np = participants.len();
    let ka = active.len();
    let mut d = Array2::<f64>::zeros((np, ka));
    for (r, &i) in participants.iter().enumerate() {
        for (a, &j) in active.iter().enumerate() {
            d[[r, a]] = (c[[i, j]] - targets[j]) / scale[j].max(1e-300);
        }
    }
    let q: Vec<f64> = participants
        .iter()
        .map(|&i| base.map_or(1.0, |b| b[i]))
        .collect();
    let solution = entropy_dual(d.view(), &q, None, 200);
    let (w, iterations) = (solution.weights, solution.iterations);
    let mut converged = solution.converged;
    let gaps = d.t().dot(&Array1::from(w.clone()));
    let max_gap = gaps.iter().fold(0.0f64, |m, v| m.max(v.abs()));
    converged = converged || max_gap < 1e-10;
    if !converged {
        let worst = gaps
            .iter()
            .enumerate()
            .fold((0, 0.0f64), |(bj, bv), (a, v)| {
                if v.abs() > bv {
                    (a, v.abs())
                } else {
                    (bj, bv)
                }
            })
            .0;
        return Err(WeightError::Infeasible {
            column: active.get(worst).copied().unwrap_or(0),
            reason: "the targets are each within the participants' range but cannot all be met at once (the participants' combinations of indicators do not surround the universe's); drop this indicator or one correlated with it".to_string(),
        });
    }
    let mut weights = vec![0.0; t.len()];
    for (r, &i) in participants.iter().enumerate() {
        weights[i] = w[r];
    }
    Ok(EntropyFit {
        weights,
        converged,
        iterations,
        max_gap,
    })
}

/// The solution of the entropy-balancing dual.
#[derive(Debug, Clone)]
pub struct DualSolution {
    pub lambda: Array1<f64>,
    /// Sum to 1, aligned with the rows of `d`.
    pub weights: Vec<f64>,
    pub converged: bool,
    pub iterations: usize,
}

/// Newton's method on the entropy-balancing dual L(lambda) = log sum_r q_r exp(-lambda'd_r),
/// d the moment rows already centred at their targets (and scaled); see
/// [`entropy_balance`]. The gradient is -sum w_r d_r, the Hessian the w-weighted covariance
/// of d. Starts from `start` (a warm start from a neighbouring problem) or zero. A warm
/// start far from this problem's solution can stall Newton's first steps (every halving
/// refused); whether the targets can be met must not depend on where the search started,
/// so such a start is followed by a search from zero before the dual counts as unsolved.
pub fn entropy_dual(
    d: ArrayView2<f64>,
    q: &[f64],
    start: Option<&Array1<f64>>,
    max_iter: usize,
) -> DualSolution {
    let warm = entropy_dual_from(d, q, start, max_iter);
    if warm.converged || start.is_none() {
        return warm;
    }
    entropy_dual_from(d, q, None, max_iter)
}

/// [`entropy_dual`]'s Newton search from one start.
fn entropy_dual_from(
    d: ArrayView2<f64>,
    q: &[f64],
    start: Option<&Array1<f64>>,
    max_iter: usize,
) -> DualSolution {
    let (np, ka) = d.dim();
    // The weights and the dual at lambda, and each row's lambda'd_r (for `RiseTest`).
    let weights_at = |lambda: &Array1<f64>| -> (Array1<f64>, f64, Array1<f64>) {
        let z = d.dot(lambda);
        let shift = z.iter().fold(f64::NEG_INFINITY, |m, &v| m.max(-v));
        let raw: Array1<f64> = (0..np).map(|r| q[r] * (-z[r] - shift).exp()).collect();
        let sum = raw.sum();
        (raw / sum, sum.ln() + shift, z)
    };
    let log_q: Vec<f64> = q.iter().map(|v| v.ln()).collect();
    let largest_d = d.iter().fold(0.0f64, |m, v| m.max(v.abs()));
    let mut lambda = start
        .filter(|l| l.len() == ka)
        .cloned()
        .unwrap_or_else(|| Array1::zeros(ka));
    let (mut w, mut dual, mut z) = weights_at(&lambda);
    let mut converged = ka == 0;
    let mut iterations = 0;
    while !converged && iterations < max_iter {
        iterations += 1;
        let mean = d.t().dot(&w);
        if mean.iter().all(|v| v.abs() < 1e-12) {
            converged = true;
            break;
        }
        let cov = linalg::weighted_cross_product(d, w.view()) - outer(&mean);
        // When the weights concentrate on few rows (for example under very unequal base
        // weights) the Hessian can be numerically singular; a small ridge, grown until
        // the Cholesky factorisation succeeds, keeps Newton's direction a descent one
        // (Levenberg 1944) without changing the solution.
        let scale = cov.diag().iter().fold(0.0f64, |m, v| m.max(*v)).max(1e-300);
        let mut step = linalg::solve_spd(cov.view(), mean.view()).ok();
        let mut ridge = 1e-12 * scale;
        while step.is_none() && ridge <= 1e-2 * scale {
            let mut damped = cov.clone();
            damped.diag_mut().mapv_inplace(|v| v + ridge);
            step = linalg::solve_spd(damped.view(), mean.view()).ok();
            ridge *= 100.0;
        }
        let Some(step) = step else {
            break;
        };
        // The dual is minimised: a maximisation of its negative, steps accepted while the
        // dual does not rise beyond its rounding.
        let floor = -(dual + 1e-12 * dual.abs().max(1.0));
        let mut rises = RiseTest {
            z: &z,
            z_full: None,
            log_q: &log_q,
            limit: -floor,
            slack: 1e-8 * (1.0 + dual.abs() + largest_d * (l1(&lambda) + l1(&step))),
        };
        // The full step (t = 1, tried first) is evaluated and gives lambda'd_r there for
        // the quick test of the shorter ones.
        let Some((candidate, (wc, dc, zc), _)) =
            newton::halving_step_told(&lambda, &step, floor, newton::MAX_HALVINGS, |c, t| {
                if rises.clearly(t) {
                    return None;
                }
                let (wc, dc, zc) = weights_at(c);
                if t == 1.0 {
                    rises.z_full = Some(zc.clone());
                }
                Some(((wc, dc, zc), -dc))
            })
        else {
            break;
        };
        lambda = candidate;
        w = wc;
        dual = dc;
        z = zc;
    }
    if !converged {
        converged = d.t().dot(&w).iter().all(|v| v.abs() < 1e-10);
    }
    DualSolution {
        lambda,
        weights: w.to_vec(),
        converged,
        iterations,
    }
}

/// A quick test of a shortened Newton step of [`entropy_dual`] that spares most refused
/// halvings their weights: the dual is at least each row's own term, log q_r - lambda'd_r,
/// and lambda'd_r at lambda + t step is (1 - t) z_r + t z'_r from its values z at lambda
/// and z' at the full step. A trial at which some row's term alone exceeds the accepted
/// level by far more than any rounding would be refused anyway, so it is refused unseen.
struct RiseTest<'a> {
    z: &'a Array1<f64>,
    /// lambda'd_r at the full step, once evaluated.
    z_full: Option<Array1<f64>>,
    log_q: &'a [f64],
    /// The largest dual a trial may have to be accepted.
    limit: f64,
    /// Far above the rounding of the dual and of lambda'd_r at any trial.
    slack: f64,
}

impl RiseTest<'_> {
    /// Whether the dual at lambda + t step certainly exceeds the limit.
    fn clearly(&self, t: f64) -> bool {
        let Some(z_full) = &self.z_full else {
            return false;
        };
        let lowest = self
            .z
            .iter()
            .zip(z_full.iter())
            .zip(self.log_q)
            .fold(f64::NEG_INFINITY, |m, ((z, f), lq)| {
                m.max(lq - ((1.0 - t) * z + t * f))
            });
        lowest.is_finite() && lowest > self.limit + self.slack
    }
}

fn l1(v: &Array1<f64>) -> f64 {
    v.iter().map(|x| x.abs()).sum()
}

fn outer(v: &Array1<f64>) -> Array2<f64> {
    let n = v.len();
    Array2::from_shape_fn((n, n), |(a, b)| v[a] * v[b])
}

/// The result of raking.
#[derive(Debug, Clone)]
pub struct RakeFit {
    pub weights: Vec<f64>,
    pub converged: bool,
    pub iterations: usize,
    /// Largest |weighted participant share - target share| over every margin and level.
    pub max_gap: f64,
}

/// Raking by iterative proportional fitting (Deming & Stephan 1940): participants'
/// weights are multiplied, margin after margin, by target share / current share of each
/// level, until every margin matches to 1e-10 or 1,000 sweeps pass. `margins[m][i]` is
/// unit i's level on margin m; targets are each margin's level shares in the universe.
/// A level with a positive target but no participant cannot be represented: error.
pub fn rake(
    margins: &[Vec<usize>],
    targets: &[Vec<f64>],
    t: &[bool],
) -> Result<RakeFit, WeightError> {
    if !t.iter().any(|&v| v) {
        return Err(WeightError::NoParticipants);
    }
    for (m, (levels, shares)) in margins.iter().zip(targets).enumerate() {
        for (level, &share) in shares.iter().enumerate() {
            let present = levels.iter().zip(t).any(|(&l, &ti)| ti && l == level);
            if share > 0.0 && !present {
                return Err(WeightError::Infeasible {
                    column: m,
                    reason: format!("level {level} has {:.1}% of the universe but no participant, so no weighting of participants can represent it", 100.0 * share),
                });
            }
        }
    }
    let mut w: Vec<f64> = t.iter().map(|&ti| f64::from(u8::from(ti))).collect();
    let mut iterations = 0;
    let mut max_gap = f64::INFINITY;
    while iterations < 1000 {
        iterations += 1;
        for (levels, shares) in margins.iter().zip(targets) {
            let total: f64 = w.iter().sum();
            let mut current = vec![0.0; shares.len()];
            for (i, &l) in levels.iter().enumerate() {
                current[l] += w[i] / total;
            }
            for (i, &l) in levels.iter().enumerate() {
                if w[i] > 0.0 && current[l] > 0.0 {
                    w[i] *= shares[l] / current[l];
                }
            }
        }
        max_gap = margin_gap(margins, targets, &w);
        if max_gap < 1e-10 {
            break;
        }
    }
    let total: f64 = w.iter().sum();
    Ok(RakeFit {
        weights: w.iter().map(|v| v / total).collect(),
        converged: max_gap < 1e-10,
        iterations,
        max_gap,
    })
}

fn margin_gap(margins: &[Vec<usize>], targets: &[Vec<f64>], w: &[f64]) -> f64 {
    let total: f64 = w.iter().sum();
    let mut gap = 0.0f64;
    for (levels, shares) in margins.iter().zip(targets) {
        let mut current = vec![0.0; shares.len()];
        for (i, &l) in levels.iter().enumerate() {
            current[l] += w[i] / total;
        }
        for (c, s) in current.iter().zip(shares) {
            gap = gap.max((c - s).abs());
        }
    }
    gap
}

#[cfg(test)]
mod tests {
    use super::*;
    use ndarray::array;

    #[test]
    fn stabilised_weights_differ_only_in_scale() {
        // Robins, Hernan & Brumback (2000): the factor P(T=1) brings the participants' mean
        // weight near 1; after normalisation the two versions coincide.
        let p = [0.2, 0.5, 0.8, 0.4];
        let t = [true, true, false, true];
        let plain = normalise(&inverse_probability(&p, &t).unwrap(), 4.0);
        let stable = normalise(&stabilised_inverse_probability(&p, &t).unwrap(), 4.0);
        for (a, b) in plain.iter().zip(&stable) {
            assert!((a - b).abs() < 1e-12);
        }
        assert_eq!(
            stabilised_inverse_probability(&p, &t).unwrap()[1],
            0.75 / 0.5
        );
    }

    #[test]
    fn raking_matches_a_two_way_table() {
        // Deming & Stephan's idea on a 2x2 toy: margins reproduced exactly (common practice).
        let a = vec![0, 0, 1, 1, 0];
        let b = vec![0, 1, 0, 1, 1];
        let t = vec![true, true, true, true, false];
        let fit = rake(&[a, b], &[vec![0.6, 0.4], vec![0.3, 0.7]], &t).unwrap();
        assert!(fit.converged);
        let share = |level: usize, m: &[usize]| {
            fit.weights
                .iter()
                .zip(m)
                .filter(|(_, &l)| l == level)
                .map(|(w, _)| w)
                .sum::<f64>()
        };
        assert!((share(0, &[0, 0, 1, 1, 0]) - 0.6).abs() < 1e-10);
        assert!((share(1, &[0, 1, 0, 1, 1]) - 0.7).abs() < 1e-10);
    }

    /// n simulated units: an intercept and k - 1 standard normal columns, taking part with
    /// probability logistic(index(row)).
    fn simulated(
        seed: u64,
        n: usize,
        k: usize,
        index: impl Fn(&[f64]) -> f64,
    ) -> (Array2<f64>, Vec<bool>) {
        let mut rng = crate::stats::random::Rng::new(seed);
        let x = Array2::from_shape_fn((n, k), |(_, j)| if j == 0 { 1.0 } else { rng.normal() });
        let t = x
            .rows()
            .into_iter()
            .map(|r| rng.bernoulli(logistic(index(&r.to_vec()))))
            .collect();
        (x, t)
    }

    #[test]
    fn counted_rows_fit_as_the_rows_written_out() {
        // Common practice: a frequency-weighted criterion equals the criterion on the
        // repeated rows, so both fits reach the same minimum from the same start.
        let (x, t) = simulated(11, 60, 3, |r| 0.2 + 0.9 * r[1] - 0.5 * r[2]);
        let rows: Vec<usize> = (0..60).map(|i| (i * 7 + i / 5) % 60).collect();
        let draw = crate::stats::bootstrap::DrawCounts::of(&rows, 60).expect("in range");
        assert!(
            draw.clusters.len() < rows.len(),
            "the draw repeats some rows"
        );
        let written_out = x.select(Axis(0), &rows);
        let t_out: Vec<bool> = rows.iter().map(|&r| t[r]).collect();
        let distinct = x.select(Axis(0), &draw.clusters);
        let t_distinct: Vec<bool> = draw.clusters.iter().map(|&r| t[r]).collect();
        let start = cbps_just_identified(written_out.view(), &t_out)
            .unwrap()
            .coef;
        let full = cbps_over_identified_from(written_out.view(), &t_out, &start).unwrap();
        let counted =
            cbps_over_identified_counted_from(distinct.view(), &t_distinct, &draw.counts, &start)
                .unwrap();
        assert!(full.converged, "{full:?}");
        assert!(counted.converged);
        assert_eq!(full.coef.len(), counted.coef.len());
        for (a, b) in full.coef.iter().zip(counted.coef.iter()) {
            assert!((a - b).abs() < 1e-7, "{a} vs {b}");
        }
        let expanded = draw.expand(&counted.propensity);
        assert_eq!(expanded.len(), full.propensity.len());
        for (a, b) in full.propensity.iter().zip(&expanded) {
            assert!((a - b).abs() < 1e-8);
        }
        assert!((full.max_imbalance - counted.max_imbalance).abs() < 1e-8);
        // The just-identified fit likewise.
        let exact = cbps_just_identified(written_out.view(), &t_out).unwrap();
        let exact_counted =
            cbps_just_identified_counted(distinct.view(), &t_distinct, &draw.counts).unwrap();
        assert!(exact.converged && exact_counted.converged);
        assert_eq!(exact.coef.len(), exact_counted.coef.len());
        for (a, b) in exact.coef.iter().zip(exact_counted.coef.iter()) {
            assert!((a - b).abs() < 1e-8, "{a} vs {b}");
        }
        assert!(cbps_just_identified_counted(distinct.view(), &t_distinct, &[1.0]).is_err());
        assert!(
            cbps_over_identified_counted_from(distinct.view(), &t_distinct, &[1.0], &start)
                .is_err()
        );
    }

    #[test]
    fn gmm_gradient_matches_central_differences() {
        // Common practice: check an analytic gradient against finite differences.
        let (x, t) = simulated(3, 40, 3, |r| 0.3 + 0.8 * r[1]);
        let b = array![0.2, 0.5, -0.3];
        let (_, grad) = gmm_objective(x.view(), &t, &b);
        for j in 0..3 {
            let mut up = b.clone();
            let mut down = b.clone();
            up[j] += 1e-6;
            down[j] -= 1e-6;
            let numeric =
                (gmm_objective(x.view(), &t, &up).0 - gmm_objective(x.view(), &t, &down).0) / 2e-6;
            assert!(
                (numeric - grad[j]).abs() < 1e-6 * numeric.abs().max(1.0),
                "{j}: {numeric} vs {}",
                grad[j]
            );
        }
    }

    #[test]
    fn gmm_hessian_matches_differences_of_the_gradient() {
        // Common practice: check an analytic Hessian against central differences of the
        // (already checked) analytic gradient, at points near and away from a minimum.
        let (x, t) = simulated(5, 60, 4, |r| -0.2 + 0.9 * r[1] - 0.5 * r[3]);
        for b in [array![0.1, 0.6, -0.2, 0.3], array![-0.4, 1.2, 0.5, -0.8]] {
            let ones = vec![1.0; t.len()];
            let problem = GmmProblem::new(x.view(), &t, &ones);
            let point = gmm_point(&problem, &b).expect("S regular");
            let h = gmm_hessian(&problem, &point, &point.loadings(x.view()));
            assert_eq!(h.dim(), (4, 4));
            for j in 0..4 {
                let step = 1e-5;
                let (mut up, mut down) = (b.clone(), b.clone());
                up[j] += step;
                down[j] -= step;
                let column = (gmm_objective(x.view(), &t, &up).1
                    - gmm_objective(x.view(), &t, &down).1)
                    / (2.0 * step);
                for i in 0..4 {
                    let scale = column[i].abs().max(1e-3);
                    assert!(
                        (h[[i, j]] - column[i]).abs() < 1e-5 * scale.max(1.0),
                        "({i},{j}): {} vs {}",
                        h[[i, j]],
                        column[i]
                    );
                }
            }
        }
    }

    /// The NSW sample of tests/fixtures/nsw.csv: treated as participants, the eight
    /// indicators standardised (n - 1 divisor) with an intercept.
    fn nsw() -> (Array2<f64>, Vec<bool>) {
        let text = std::fs::read_to_string(
            std::path::Path::new(env!("CARGO_MANIFEST_DIR")).join("tests/fixtures/nsw.csv"),
        )
        .unwrap();
        let rows: Vec<Vec<f64>> = text
            .lines()
            .skip(1)
            .map(|l| l.split(',').skip(1).map(|c| c.parse().unwrap()).collect())
            .collect();
        assert_eq!(rows.len(), 445);
        let n = rows.len();
        let mut x = Array2::<f64>::ones((n, 9));
        for j in 1..9 {
            let col: Vec<f64> = rows.iter().map(|r| r[j]).collect();
            let m = col.iter().sum::<f64>() / n as f64;
            let sd = (col.iter().map(|v| (v - m).powi(2)).sum::<f64>() / (n - 1) as f64).sqrt();
            for i in 0..n {
                x[[i, j]] = (col[i] - m) / sd;
            }
        }
        (x, rows.iter().map(|r| r[0] == 1.0).collect())
    }

    fn gmm_reference() -> serde_json::Value {
        serde_json::from_str(
            &std::fs::read_to_string(
                std::path::Path::new(env!("CARGO_MANIFEST_DIR"))
                    .join("tests/fixtures/gmm_reference.json"),
            )
            .unwrap(),
        )
        .unwrap()
    }

    fn floats(v: &serde_json::Value) -> Vec<f64> {
        v.as_array()
            .unwrap()
            .iter()
            .map(|x| x.as_f64().unwrap())
            .collect()
    }

    #[test]
    fn gmm_matches_scipy_on_nsw() {
        // tests/fixtures/make_gmm_fixture.py: scipy's BFGS and a Newton polish of the same
        // criterion (Imai & Ratkovic 2014, section 2.2) from the just-identified solution.
        let (x, t) = nsw();
        let reference = gmm_reference();
        let coef = floats(&reference["coef_standardised"]);
        let start = super::super::binary::fit(super::super::binary::ModelKind::Logit, x.view(), &t)
            .unwrap()
            .coef;
        let fit = cbps_over_identified(x.view(), &t, &start).unwrap();
        assert!(fit.converged && !fit.stayed_at_start);
        assert_eq!(fit.coef.len(), coef.len());
        for (a, b) in fit.coef.iter().zip(&coef) {
            assert!((a - b).abs() < 1e-6, "{a} vs {b}");
        }
        let (q, _) = gmm_objective(x.view(), &t, &fit.coef);
        let q_ref = reference["criterion"].as_f64().unwrap();
        assert!((q - q_ref).abs() < 1e-12, "{q} vs {q_ref}");
        let w = normalise(
            &inverse_probability(&fit.propensity, &t).unwrap(),
            t.len() as f64,
        );
        let w_ref = floats(&reference["weights"]);
        assert_eq!(w.len(), w_ref.len());
        for (a, b) in w.iter().zip(&w_ref) {
            assert!((a - b).abs() < 1e-6 * b.abs().max(1.0), "{a} vs {b}");
        }
        // Warm starts near the solution return to it (the basin's minimum), in a few
        // Newton steps.
        let mut rng = crate::stats::random::Rng::new(11);
        for _ in 0..5 {
            let near: Array1<f64> = fit.coef.iter().map(|b| b + 0.02 * rng.normal()).collect();
            let again = cbps_over_identified_from(x.view(), &t, &near).unwrap();
            assert!(
                again.converged && again.iterations < 15,
                "{}",
                again.iterations
            );
            for (a, b) in again.coef.iter().zip(&fit.coef) {
                assert!((a - b).abs() < 1e-7);
            }
        }
        // Started at the solution: converged at once, without moving.
        let at = cbps_over_identified_from(x.view(), &t, &fit.coef).unwrap();
        assert!(at.converged && !at.stayed_at_start && at.iterations == 1);
    }

    #[test]
    fn gmm_without_a_finite_minimiser_stays_at_its_start() {
        // Column 2 is 1 only for non-participants: no weighting of participants balances it,
        // so Q has no finite minimiser (common practice: report, do not chase infinity).
        let x = array![
            [1.0, -1.0, 0.0],
            [1.0, 0.5, 0.0],
            [1.0, 1.2, 0.0],
            [1.0, -0.3, 1.0],
            [1.0, 0.8, 1.0],
            [1.0, -0.6, 0.0]
        ];
        let t = [true, true, false, false, false, true];
        let start = array![0.1, 0.2, -0.5];
        let fit = cbps_over_identified_from(x.view(), &t, &start).unwrap();
        assert_eq!(fit.unreachable, vec![2]);
        assert!(fit.stayed_at_start && !fit.converged);
        assert_eq!(fit.coef, start);
        assert_eq!(
            cbps_over_identified_from(x.view(), &t, &array![0.0]).unwrap_err(),
            WeightError::StartSize {
                given: 1,
                expected: 3
            }
        );
    }

    #[test]
    fn entropy_balance_reports_unreachable_target() {
        let c = array![[1.0], [2.0], [3.0], [10.0]];
        let t = [true, true, true, false];
        let err = entropy_balance(c.view(), &t, &[4.0], &[1.0], None).unwrap_err();
        assert!(
            matches!(err, WeightError::Infeasible { column: 0, .. }),
            "{err:?}"
        );
        let fit = entropy_balance(c.view(), &t, &[2.5], &[1.0], None).unwrap();
        let mean: f64 = fit
            .weights
            .iter()
            .zip(c.column(0))
            .map(|(w, x)| w * x)
            .sum();
        assert!((mean - 2.5).abs() < 1e-10);
    }
}
