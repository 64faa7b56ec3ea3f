//! Weights that make participants stand for the whole eligible universe.
//!
//! Conventions: `t[i]` says whether unit i took part; weight vectors are aligned with all
//! units and are zero for non-participants. [`normalise`] scales participants' weights to
//! sum to the number of eligible units.

use ndarray::{Array1, Array2, ArrayView2, Axis};

use super::binary::logistic;
use super::linalg;

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
/// step halving. A solution exists only if the universe means lie inside the convex hull of
/// the participants' rows reachable with weights 1/p of at least 1 (each participant stands
/// at least for itself); otherwise the iterations diverge and the fit is reported as not
/// converged.
pub fn cbps_just_identified(x: ArrayView2<f64>, t: &[bool]) -> Result<CbpsFit, WeightError> {
    if !t.iter().any(|&v| v) {
        return Err(WeightError::NoParticipants);
    }
    let n = t.len();
    let k = x.ncols();
    let objective = |b: &Array1<f64>| -> f64 {
        let eta = x.dot(b);
        (0..n)
            .map(|i| if t[i] { (-eta[i]).exp() } else { eta[i] })
            .sum()
    };
    let mut b = Array1::<f64>::zeros(k);
    let share = t.iter().filter(|&&v| v).count() as f64 / n as f64;
    b[0] = (share / (1.0 - share).max(1e-12)).ln();
    let mut iterations = 0;
    let mut converged = false;
    let mut f = objective(&b);
    for _ in 0..200 {
        iterations += 1;
        let eta = x.dot(&b);
        // gradient of f = -sum (T e^{-eta} - (1 - T)) x = -g; Hessian = sum T e^{-eta} x x'.
        let mut g = Array1::<f64>::zeros(k);
        let mut w = Array1::<f64>::zeros(n);
        for i in 0..n {
            let e = if t[i] { (-eta[i]).exp() } else { 0.0 };
            let coefficient = e - f64::from(u8::from(!t[i]));
            g.scaled_add(coefficient, &x.row(i));
            w[i] = e;
        }
        if g.iter().all(|v| v.abs() < 1e-12 * n as f64) {
            converged = true;
            break;
        }
        let h = linalg::weighted_cross_product(x, w.view());
        // A singular Hessian here means the iterations are running off (some participants'
        // weights 1/p are being pushed to their floor of 1): no solution.
        let Ok(step) = linalg::solve_spd(h.view(), g.view()) else {
            break;
        };
        let mut s = 1.0;
        let mut moved = false;
        for _ in 0..50 {
            let candidate = &b + &(&step * s);
            let fc = objective(&candidate);
            // Near the solution the decrease falls below the rounding of f itself; accept
            // steps that do not increase f beyond that rounding.
            if fc.is_finite() && fc <= f + 1e-12 * f.abs().max(1.0) {
                b = candidate;
                f = fc;
                moved = true;
                break;
            }
            s *= 0.5;
        }
        if !moved {
            break;
        }
    }
    let propensity: Vec<f64> = x.dot(&b).iter().map(|&e| logistic(e)).collect();
    let max_imbalance = balance_conditions(x, t, &propensity)
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

/// Mean balance conditions (1/n) sum_i (T_i/p_i - 1) x_i.
fn balance_conditions(x: ArrayView2<f64>, t: &[bool], p: &[f64]) -> Array1<f64> {
    let n = t.len() as f64;
    let mut g = Array1::<f64>::zeros(x.ncols());
    for (i, row) in x.axis_iter(Axis(0)).enumerate() {
        let c = if t[i] { 1.0 / p[i] } else { 0.0 } - 1.0;
        g.scaled_add(c / n, &row);
    }
    g
}

/// Over-identified covariate-balancing propensity score (Imai & Ratkovic 2014, section
/// 2.2): generalised method of moments on the logit score conditions (T_i - p_i) x_i and
/// the balance conditions (T_i/p_i - 1) x_i together,
/// minimising Q(b) = g(b)' S(b)^-1 g(b) with g the mean of the stacked conditions and S their
/// covariance under the model, S = (1/n) sum_i [[p(1-p), 1-p], [1-p, (1-p)/p]] (x) x_i x_i'
/// (continuously updated, as in the paper). Minimised by BFGS with the analytic gradient
/// dQ/db = 2 J'a - a'(dS/db)a, a = S^-1 g, J = dg/db; started from the just-identified
/// solution when it exists, else from `start`.
pub fn cbps_over_identified(
    x: ArrayView2<f64>,
    t: &[bool],
    start: &Array1<f64>,
) -> Result<CbpsFit, WeightError> {
    if !t.iter().any(|&v| v) {
        return Err(WeightError::NoParticipants);
    }
    let objective = |b: &Array1<f64>| gmm_objective(x, t, b);
    let just = cbps_just_identified(x, t)
        .ok()
        .filter(|f| f.converged)
        .map(|f| f.coef);
    let b0 = just.unwrap_or_else(|| start.clone());
    let (coef, converged, iterations) = bfgs(&objective, b0.clone(), 500, 1e-8);
    let propensity: Vec<f64> = x.dot(&coef).iter().map(|&e| logistic(e)).collect();
    let max_imbalance = balance_conditions(x, t, &propensity)
        .iter()
        .fold(0.0f64, |m, v| m.max(v.abs()));
    // BFGS returns its start when no step lowers the criterion; that is a solution only
    // if the gradient already vanishes there.
    let (q0, g0) = objective(&b0);
    let optimal_at_start = q0.is_finite() && g0.iter().all(|v| v.abs() < 1e-8);
    let stayed_at_start = !optimal_at_start && (&coef - &b0).iter().all(|d| *d == 0.0);
    Ok(CbpsFit {
        coef,
        propensity,
        converged: converged && !stayed_at_start,
        iterations,
        max_imbalance,
        unreachable: unreachable_columns(x, t),
        stayed_at_start,
    })
}

/// The continuously updated GMM criterion of [`cbps_over_identified`] and its gradient.
fn gmm_objective(x: ArrayView2<f64>, t: &[bool], b: &Array1<f64>) -> (f64, Array1<f64>) {
    let n = t.len();
    let k = x.ncols();
    let nf = n as f64;
    let p: Vec<f64> = x
        .dot(b)
        .iter()
        .map(|&e| logistic(e).clamp(1e-12, 1.0 - 1e-12))
        .collect();
    let tf: Vec<f64> = t.iter().map(|&v| f64::from(u8::from(v))).collect();
    let score: Array1<f64> = (0..n).map(|i| (tf[i] - p[i]) / nf).collect();
    let balance: Array1<f64> = (0..n).map(|i| (tf[i] / p[i] - 1.0) / nf).collect();
    let mut g = Array1::<f64>::zeros(2 * k);
    g.slice_mut(ndarray::s![..k]).assign(&x.t().dot(&score));
    g.slice_mut(ndarray::s![k..]).assign(&x.t().dot(&balance));
    let v11: Array1<f64> = p.iter().map(|p| p * (1.0 - p) / nf).collect();
    let v12: Array1<f64> = p.iter().map(|p| (1.0 - p) / nf).collect();
    let v22: Array1<f64> = p.iter().map(|p| (1.0 - p) / p / nf).collect();
    let mut s = Array2::<f64>::zeros((2 * k, 2 * k));
    let s12 = linalg::weighted_cross_product(x, v12.view());
    s.slice_mut(ndarray::s![..k, ..k])
        .assign(&linalg::weighted_cross_product(x, v11.view()));
    s.slice_mut(ndarray::s![..k, k..]).assign(&s12);
    s.slice_mut(ndarray::s![k.., ..k]).assign(&s12);
    s.slice_mut(ndarray::s![k.., k..])
        .assign(&linalg::weighted_cross_product(x, v22.view()));
    let Ok(a) = linalg::solve_spd(s.view(), g.view()) else {
        return (f64::INFINITY, Array1::zeros(k));
    };
    let q = g.dot(&a);
    // u_i = a1'x_i, r_i = a2'x_i; derivatives of p, v11, v12, v22 with respect to eta.
    let u = x.dot(&a.slice(ndarray::s![..k]));
    let r = x.dot(&a.slice(ndarray::s![k..]));
    let per_unit: Array1<f64> = (0..n)
        .map(|i| {
            let pi = p[i];
            let dp = pi * (1.0 - pi);
            let j_term = dp * u[i] + tf[i] * (1.0 - pi) / pi * r[i];
            let dv11 = dp * (1.0 - 2.0 * pi);
            let dv12 = -dp;
            let dv22 = -(1.0 - pi) / pi;
            let s_term = dv11 * u[i] * u[i] + 2.0 * dv12 * u[i] * r[i] + dv22 * r[i] * r[i];
            (-2.0 * j_term - s_term) / nf
        })
        .collect();
    (q, x.t().dot(&per_unit))
}

/// BFGS with backtracking (Nocedal & Wright 2006, alg. 6.1) on a function returning its
/// value and gradient. Returns the minimiser, whether the gradient fell below `tol`, and
/// the iterations used.
/// A function returning its value and gradient.
type ValueAndGradient<'a> = &'a dyn Fn(&Array1<f64>) -> (f64, Array1<f64>);

fn bfgs(
    f: ValueAndGradient<'_>,
    x0: Array1<f64>,
    max_iter: usize,
    tol: f64,
) -> (Array1<f64>, bool, usize) {
    let k = x0.len();
    let mut x = x0;
    let (mut fx, mut g) = f(&x);
    let mut h_inv = Array2::<f64>::eye(k);
    for it in 0..max_iter {
        if g.iter().all(|v| v.abs() < tol) {
            return (x, true, it);
        }
        let mut direction = -h_inv.dot(&g);
        if direction.dot(&g) >= 0.0 {
            h_inv = Array2::eye(k);
            direction = -g.clone();
        }
        let mut step = 1.0;
        let mut accepted = None;
        for _ in 0..60 {
            let candidate = &x + &(&direction * step);
            let (fc, gc) = f(&candidate);
            if fc.is_finite() && fc <= fx + 1e-4 * step * direction.dot(&g) + 1e-14 * fx.abs() {
                accepted = Some((candidate, fc, gc));
                break;
            }
            step *= 0.5;
        }
        let Some((x_new, f_new, g_new)) = accepted else {
            return (x, g.iter().all(|v| v.abs() < tol.sqrt()), it);
        };
        let s = &x_new - &x;
        let y = &g_new - &g;
        let sy = s.dot(&y);
        if sy > 1e-300 {
            let rho = 1.0 / sy;
            let hy = h_inv.dot(&y);
            let yhy = y.dot(&hy);
            // H+ = H - rho (s y'H + H y s') + (rho^2 y'Hy + rho) s s'
            for a in 0..k {
                for b in 0..k {
                    h_inv[[a, b]] += -rho * (s[a] * hy[b] + hy[a] * s[b])
                        + (rho * rho * yhy + rho) * s[a] * s[b];
                }
            }
        }
        x = x_new;
        fx = f_new;
        g = g_new;
    }
    let converged = g.iter().all(|v| v.abs() < tol);
    (x, converged, max_iter)
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
/// of d. Starts from `start` (a warm start from a neighbouring problem) or zero.
pub fn entropy_dual(
    d: ArrayView2<f64>,
    q: &[f64],
    start: Option<&Array1<f64>>,
    max_iter: usize,
) -> DualSolution {
    let (np, ka) = d.dim();
    let weights_at = |lambda: &Array1<f64>| -> (Array1<f64>, f64) {
        let z = d.dot(lambda);
        let shift = z.iter().fold(f64::NEG_INFINITY, |m, &v| m.max(-v));
        let raw: Array1<f64> = (0..np).map(|r| q[r] * (-z[r] - shift).exp()).collect();
        let sum = raw.sum();
        (raw / sum, sum.ln() + shift)
    };
    let mut lambda = start
        .filter(|l| l.len() == ka)
        .cloned()
        .unwrap_or_else(|| Array1::zeros(ka));
    let (mut w, mut dual) = weights_at(&lambda);
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
        let mut s = 1.0;
        let mut moved = false;
        for _ in 0..60 {
            let candidate = &lambda + &(&step * s);
            let (wc, dc) = weights_at(&candidate);
            if dc.is_finite() && dc <= dual + 1e-12 * dual.abs().max(1.0) {
                lambda = candidate;
                w = wc;
                dual = dc;
                moved = true;
                break;
            }
            s *= 0.5;
        }
        if !moved {
            break;
        }
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

    #[test]
    fn gmm_gradient_matches_central_differences() {
        // Common practice: check an analytic gradient against finite differences.
        let mut rng = crate::stats::random::Rng::new(3);
        let n = 40;
        let x = Array2::from_shape_fn((n, 3), |(_, j)| if j == 0 { 1.0 } else { rng.normal() });
        let t: Vec<bool> = (0..n)
            .map(|i| rng.bernoulli(logistic(0.3 + 0.8 * x[[i, 1]])))
            .collect();
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
