//! Respondent-level regressions pooled over countries: weighted least squares and weighted
//! logistic regression, with standard errors clustered by country (CR1), the wild cluster
//! bootstrap, and the Heckman two-step with the inverse Mills ratio.

use ndarray::{Array1, Array2, ArrayView1, ArrayView2, ShapeBuilder};

use super::binary::logistic;
use super::linalg;
use super::normal;

#[derive(Debug, Clone, Copy, PartialEq, Eq, serde::Serialize, serde::Deserialize)]
#[serde(rename_all = "kebab-case")]
pub enum Kind {
    /// Linear model, least squares.
    Linear,
    /// Logistic model for a 0/1 outcome, maximum likelihood.
    Logistic,
}

impl Kind {
    pub fn parse(s: &str) -> Option<Kind> {
        match s {
            "linear" => Some(Kind::Linear),
            "logistic" => Some(Kind::Logistic),
            _ => None,
        }
    }
    pub fn as_str(self) -> &'static str {
        match self {
            Kind::Linear => "linear",
            Kind::Logistic => "logistic",
        }
    }
}

#[derive(Debug, Clone, PartialEq, thiserror::Error)]
pub enum RegressionError {
    #[error(
        "there are {n} respondents but {k} terms; the model needs more respondents than terms"
    )]
    TooFew { n: usize, k: usize },
    #[error("the design is singular: a predictor is constant or a combination of the others")]
    Singular,
    #[error("clustered standard errors need at least two clusters (countries); there is {0}")]
    OneCluster(usize),
    #[error("a logistic model's outcome must be 0 or 1; found {0}")]
    NotBinary(f64),
    #[error("weights must be positive and finite; found {0}")]
    BadWeight(f64),
    #[error("the inputs do not line up (rows of the selection and outcome equations)")]
    Shape,
    #[error("the selection probit did not converge (separation or a near-singular design)")]
    NotConverged,
    #[error("the inputs do not line up: the design has {n} rows but there are {found} {what}")]
    Misaligned {
        n: usize,
        found: usize,
        what: &'static str,
    },
    #[error("there is no term {term} to test: the design has {k} terms")]
    NoSuchTerm { term: usize, k: usize },
}

/// A fitted regression with CR1 cluster-robust standard errors.
#[derive(Debug, Clone, serde::Serialize)]
pub struct RegressionFit {
    pub coef: Vec<f64>,
    pub se: Vec<f64>,
    #[serde(skip)]
    pub cov: Array2<f64>,
    #[serde(skip)]
    pub bread: Array2<f64>,
    pub n: usize,
    pub clusters: usize,
    pub converged: bool,
    pub iterations: usize,
}

/// Sums, over rows i, w_i x_i x_i' (lower triangle), v_i x_i and a scalar s_i, split across
/// rayon's pool; `weights(i, x_i)` gives (w_i, v_i, s_i). Works on the contiguous rows of
/// `x` directly, since this is the inner loop of every fit on millions of respondents.
fn accumulate<F>(x: ArrayView2<f64>, weights: F) -> (Array2<f64>, Array1<f64>, f64)
where
    F: Fn(usize, &[f64]) -> (f64, f64, f64) + Sync,
{
    let (n, k) = x.dim();
    let standard = x.as_standard_layout();
    let flat = standard.as_slice().unwrap_or(&[]);
    // Rows in blocks: each block sums into its own accumulators on rayon's pool, and the
    // blocks are added up in a fixed order (the same result on every run).
    use rayon::prelude::*;
    let block = if n < 20_000 { n.max(1) } else { 8192 };
    let parts: Vec<(Vec<f64>, Vec<f64>, f64)> = (0..n.div_ceil(block))
        .into_par_iter()
        .map(|b| {
            let mut m = vec![0.0; k * k];
            let mut v = vec![0.0; k];
            let mut total = 0.0;
            for i in (b * block)..((b + 1) * block).min(n) {
                let row = &flat[i * k..(i + 1) * k];
                let (w, wy, extra) = weights(i, row);
                total += extra;
                for a in 0..k {
                    let wa = w * row[a];
                    v[a] += wy * row[a];
                    let m_row = &mut m[a * k..a * k + a + 1];
                    for (b, cell) in m_row.iter_mut().enumerate() {
                        *cell += wa * row[b];
                    }
                }
            }
            (m, v, total)
        })
        .collect();
    let mut m = vec![0.0; k * k];
    let mut v = vec![0.0; k];
    let mut s = 0.0;
    for (hm, hv, ht) in parts {
        m.iter_mut().zip(hm).for_each(|(a, b)| *a += b);
        v.iter_mut().zip(hv).for_each(|(a, b)| *a += b);
        s += ht;
    }
    (
        Array2::from_shape_vec((k, k), m).unwrap_or_else(|_| Array2::zeros((k, k))),
        Array1::from(v),
        s,
    )
}

/// Adds w x x' (lower triangle) and wy x to the accumulators.
#[inline]
fn add_outer(m: &mut Array2<f64>, v: &mut Array1<f64>, x: ArrayView1<f64>, w: f64, wy: f64) {
    let k = x.len();
    for a in 0..k {
        let wa = w * x[a];
        v[a] += wy * x[a];
        for b in 0..=a {
            m[[a, b]] += wa * x[b];
        }
    }
}

fn symmetrise(m: &mut Array2<f64>) {
    let k = m.nrows();
    for a in 0..k {
        for b in 0..a {
            m[[b, a]] = m[[a, b]];
        }
    }
}

/// Least squares by Householder QR of sqrt(w) X (Golub & Van Loan 2013, alg. 5.3.2), which
/// keeps full precision on ill-conditioned designs such as NIST's Longley data. Returns the
/// coefficients and R^-1 R^-T = (X'WX)^-1.
pub fn weighted_least_squares(
    x: ArrayView2<f64>,
    y: &[f64],
    w: Option<&[f64]>,
) -> Result<(Array1<f64>, Array2<f64>), RegressionError> {
    let (n, k) = x.dim();
    if n <= k {
        return Err(RegressionError::TooFew { n, k });
    }
    // Column-major storage, so that every column the reflections walk down is one
    // contiguous slice (the same operations in the same order as on rows, only faster).
    let mut a = Array2::<f64>::zeros((n, k).f());
    a.assign(&x);
    let mut b = Array1::from(y.to_vec());
    if let Some(w) = w {
        let roots: Vec<f64> = w.iter().map(|v| v.sqrt()).collect();
        for mut column in a.columns_mut() {
            for (v, s) in column.iter_mut().zip(&roots) {
                *v *= s;
            }
        }
        for (v, s) in b.iter_mut().zip(&roots) {
            *v *= s;
        }
    }
    let scale: Vec<f64> = (0..k)
        .map(|j| a.column(j).iter().fold(0.0f64, |m, v| m.max(v.abs())))
        .collect();
    let b = b.as_slice_mut().ok_or(RegressionError::Singular)?;
    for j in 0..k {
        // Householder reflection zeroing a[j+1.., j].
        let v: Vec<f64> = {
            let column = a.column(j);
            let column = column.as_slice().ok_or(RegressionError::Singular)?;
            column[j..].to_vec()
        };
        let norm = v.iter().map(|t| t * t).sum::<f64>().sqrt();
        if norm <= 1e-13 * scale[j].max(1e-300) * (n as f64).sqrt() {
            return Err(RegressionError::Singular);
        }
        let alpha = if v[0] > 0.0 { -norm } else { norm };
        let mut v = v;
        v[0] -= alpha;
        let vnorm2: f64 = v.iter().map(|t| t * t).sum();
        if vnorm2 == 0.0 {
            continue;
        }
        let reflect = |target: &mut [f64]| {
            let dot: f64 = v.iter().zip(target.iter()).map(|(p, q)| p * q).sum();
            let f = 2.0 * dot / vnorm2;
            for (t, p) in target.iter_mut().zip(&v) {
                *t -= f * p;
            }
        };
        for c in j..k {
            let mut column = a.column_mut(c);
            let column = column.as_slice_mut().ok_or(RegressionError::Singular)?;
            reflect(&mut column[j..]);
        }
        reflect(&mut b[j..]);
    }
    let b = Array1::from(b.to_vec());
    // Back substitution R beta = Q'b, and R^-1.
    let mut r_inv = Array2::<f64>::zeros((k, k));
    for c in 0..k {
        r_inv[[c, c]] = 1.0 / a[[c, c]];
        for r in (0..c).rev() {
            let s: f64 = (r + 1..=c).map(|t| a[[r, t]] * r_inv[[t, c]]).sum();
            r_inv[[r, c]] = -s / a[[r, r]];
        }
    }
    let qtb = b.slice(ndarray::s![..k]).to_owned();
    let beta = r_inv.dot(&qtb);
    let bread = r_inv.dot(&r_inv.t());
    Ok((beta, bread))
}

/// CR1 cluster-robust covariance (Liang & Zeger 1986; Cameron & Miller 2015, eq. 11 and
/// the small-sample factor c = G/(G-1) (N-1)/(N-K) of their section VI.B):
/// V = c B (sum_g u_g u_g') B with B the bread and u_g the cluster's summed scores.
pub fn cluster_covariance(bread: &Array2<f64>, scores: &Array2<f64>, n: usize) -> Array2<f64> {
    let (g, k) = scores.dim();
    let meat = scores.t().dot(scores);
    let c = (g as f64 / (g as f64 - 1.0)) * ((n as f64 - 1.0) / (n as f64 - k as f64));
    bread.dot(&meat).dot(bread) * c
}

/// Summed score contributions s_i x_i per cluster, with `score(i, x_i)` giving s_i: one
/// pass over the rows in blocks on rayon's pool, each block with its own per-cluster sums,
/// added up in a fixed order (the same result on every run).
fn cluster_scores<F>(x: ArrayView2<f64>, cluster: &[usize], groups: usize, score: F) -> Array2<f64>
where
    F: Fn(usize, &[f64]) -> f64 + Sync,
{
    use rayon::prelude::*;
    let (n, k) = x.dim();
    let standard = x.as_standard_layout();
    let flat = standard.as_slice().unwrap_or(&[]);
    let block = if n < 20_000 { n.max(1) } else { 16_384 };
    let parts: Vec<Vec<f64>> = (0..n.div_ceil(block))
        .into_par_iter()
        .map(|b| {
            let mut u = vec![0.0; groups * k];
            for i in (b * block)..((b + 1) * block).min(n) {
                let row = &flat[i * k..(i + 1) * k];
                let s = score(i, row);
                let ug = &mut u[cluster[i] * k..(cluster[i] + 1) * k];
                for (a, v) in ug.iter_mut().zip(row) {
                    *a += s * v;
                }
            }
            u
        })
        .collect();
    let mut u = vec![0.0; groups * k];
    for part in parts {
        u.iter_mut().zip(part).for_each(|(a, b)| *a += b);
    }
    Array2::from_shape_vec((groups, k), u).unwrap_or_else(|_| Array2::zeros((groups, k)))
}

/// x_i' beta for one row.
#[inline]
fn row_dot(row: &[f64], beta: &[f64]) -> f64 {
    row.iter().zip(beta).map(|(a, b)| a * b).sum()
}

/// The logistic function and log(1 + exp(eta)) from one exponential, t = exp(-|eta|), with
/// the same branches as [`logistic`] and the log-likelihood's softplus. The softplus takes
/// the logarithm of the denominator 1 + t that p already needs rather than `ln_1p(t)`:
/// with t in (0, 1] the two differ by at most an absolute rounding of 1 + t (about 1e-16),
/// far inside the slack of 1e-12 relative the step halving allows the log-likelihood, and
/// the logarithm costs about half as much (the log-likelihood is needed only to accept
/// steps; the estimates, information and scores do not use it).
#[inline]
fn logistic_and_softplus(eta: f64) -> (f64, f64) {
    if eta >= 0.0 {
        let d = 1.0 + (-eta).exp();
        (1.0 / d, eta + d.ln())
    } else {
        let t = eta.exp();
        let d = 1.0 + t;
        (t / d, d.ln())
    }
}

/// Fits the model with clustered standard errors. `cluster[i]` is respondent i's cluster
/// index in `0..G`; `w` are analytic weights (as weighted least squares takes them).
///
/// Gaussian: weighted least squares, scores w_i e_i x_i. Binomial: weighted logistic
/// regression by Newton-Raphson, score w_i (y_i - p_i) x_i, information X' diag(w p (1-p)) X.
pub fn fit(
    x: ArrayView2<f64>,
    y: &[f64],
    w: Option<&[f64]>,
    cluster: &[usize],
    kind: Kind,
) -> Result<RegressionFit, RegressionError> {
    let (n, k) = x.dim();
    if n <= k {
        return Err(RegressionError::TooFew { n, k });
    }
    if let Some(bad) = w.and_then(|w| w.iter().find(|v| !(v.is_finite() && **v > 0.0))) {
        return Err(RegressionError::BadWeight(*bad));
    }
    let (groups, distinct) = counted_clusters(cluster)?;
    let weight = |i: usize| w.map_or(1.0, |w| w[i]);
    let (beta, bread, u, converged, iterations) = match kind {
        Kind::Linear => {
            let (beta, bread) = weighted_least_squares(x, y, w)?;
            let b = beta.to_vec();
            let u = cluster_scores(x, cluster, groups, |i, row| {
                weight(i) * (y[i] - row_dot(row, &b))
            });
            (beta, bread, u, true, 1)
        }
        Kind::Logistic => {
            if let Some(bad) = y.iter().find(|v| **v != 0.0 && **v != 1.0) {
                return Err(RegressionError::NotBinary(*bad));
            }
            // The per-cluster scores come from the Newton loop's last pass at the estimate.
            let (beta, bread, u, converged, iterations) =
                logistic_newton(x, y, w, Some((cluster, groups)))?;
            let u = u.unwrap_or_else(|| Array2::zeros((groups, k)));
            (beta, bread, u, converged, iterations)
        }
    };
    Ok(RegressionFit::clustered(
        &beta, bread, &u, n, distinct, converged, iterations,
    ))
}

/// The number of clusters G (labels run `0..G`, up to the last one used) and how many of
/// them have rows; fewer than two clusters with rows give no clustered errors.
fn counted_clusters(cluster: &[usize]) -> Result<(usize, usize), RegressionError> {
    let groups = cluster.iter().max().map_or(0, |m| m + 1);
    let mut seen = vec![false; groups];
    cluster.iter().for_each(|&c| seen[c] = true);
    let distinct = seen.iter().filter(|&&s| s).count();
    if distinct < 2 {
        return Err(RegressionError::OneCluster(distinct));
    }
    Ok((groups, distinct))
}

impl RegressionFit {
    /// The fit at estimate `beta` with inverse information `bread` and per-cluster scores
    /// `u` (one row a cluster): CR1 covariance and standard errors over `n` rows in
    /// `clusters` clusters, with the solver's convergence and iterations.
    fn clustered(
        beta: &Array1<f64>,
        bread: Array2<f64>,
        u: &Array2<f64>,
        n: usize,
        clusters: usize,
        converged: bool,
        iterations: usize,
    ) -> RegressionFit {
        let cov = cluster_covariance(&bread, u, n);
        RegressionFit {
            coef: beta.to_vec(),
            se: cov.diag().iter().map(|v| v.max(0.0).sqrt()).collect(),
            cov,
            bread,
            n,
            clusters,
            converged,
            iterations,
        }
    }
}

/// What [`logistic_newton`] returns.
type LogisticNewton = (Array1<f64>, Array2<f64>, Option<Array2<f64>>, bool, usize);

/// Weighted logistic regression by Newton-Raphson from zero, with step halving; returns
/// the estimate, the inverse information, the per-cluster scores sum_{i in g} w_i (y_i -
/// p_i) x_i at the estimate (when `clusters` gives each row's cluster and their number),
/// convergence and iterations. The scores come from the last pass at the estimate, so
/// the clustered errors (CR1) need no pass of their own.
fn logistic_newton(
    x: ArrayView2<f64>,
    y: &[f64],
    w: Option<&[f64]>,
    clusters: Option<(&[usize], usize)>,
) -> Result<LogisticNewton, RegressionError> {
    let k = x.ncols();
    // The rows as one contiguous row-major slice (copied only if `x` is not laid out so).
    let standard = x.as_standard_layout();
    let flat = standard.as_slice().unwrap_or(&[]);
    // One pass over the respondents gives the information, the score, the log-likelihood
    // and the per-cluster scores at beta.
    let pass = |beta: &Array1<f64>| logistic_sums(flat, k, y, w, beta.as_slice(), clusters);
    let mut beta = Array1::<f64>::zeros(k);
    let (mut info, mut g, mut ll, mut u) = pass(&beta);
    let mut converged = false;
    let mut iterations = 0;
    while iterations < 100 {
        let scale = info
            .diag()
            .iter()
            .fold(0.0f64, |a, v| a.max(*v))
            .max(1e-300);
        if g.iter().all(|v| v.abs() < 1e-9 * scale.sqrt().max(1.0)) {
            converged = true;
            break;
        }
        iterations += 1;
        let step =
            linalg::solve_spd(info.view(), g.view()).map_err(|_| RegressionError::Singular)?;
        let floor = ll - 1e-12 * ll.abs();
        let step_taken = super::newton::halving_step(&beta, &step, floor, |candidate| {
            let (ic, gc, lc, uc) = pass(candidate);
            Some(((ic, gc, lc, uc), lc))
        });
        let moved = step_taken.is_some();
        let t = match step_taken {
            Some((candidate, (ic, gc, lc, uc), t)) => {
                beta = candidate;
                info = ic;
                g = gc;
                ll = lc;
                u = uc;
                t
            }
            None => super::newton::exhausted_factor(),
        };
        if !moved || step.iter().all(|v| (v * t).abs() < 1e-12) {
            converged = step.iter().all(|v| (v * t).abs() < 1e-8);
            break;
        }
    }
    let bread = linalg::inverse_spd(info.view()).map_err(|_| RegressionError::Singular)?;
    Ok((beta, bread, u, converged, iterations))
}

/// The information X' diag(w p (1-p)) X, the score X' diag(w) (y - p), the
/// log-likelihood sum_i w_i (y_i eta_i - log(1 + exp(eta_i))) and, with `clusters`, the
/// per-cluster scores, all at `beta`, in one parallel pass over the rows (row-major, k
/// wide). A `beta` that is not k long, or rows that do not match, give zeros and a NaN
/// log-likelihood, which no step accepts. Rows go in tasks of 16,384, each with its own per-cluster sums,
/// and within a task in blocks of 8,192 with their own information, score and
/// log-likelihood; tasks and blocks are added up in a fixed order, so the result is the
/// same on every run (and the same sums in the same order as separate passes for the
/// information and for the cluster scores would make).
fn logistic_sums(
    flat: &[f64],
    k: usize,
    y: &[f64],
    w: Option<&[f64]>,
    beta: Option<&[f64]>,
    clusters: Option<(&[usize], usize)>,
) -> (Array2<f64>, Array1<f64>, f64, Option<Array2<f64>>) {
    use rayon::prelude::*;
    let n = y.len();
    let beta = beta.unwrap_or(&[]);
    if k == 0 || beta.len() != k || flat.len() != n * k {
        return (Array2::zeros((k, k)), Array1::zeros(k), f64::NAN, None);
    }
    let (block, task) = if n < 20_000 {
        (n.max(1), n.max(1))
    } else {
        (8192, 16_384)
    };
    let groups = clusters.map_or(0, |(_, g)| g);
    let input = BlockInput { flat, y, w, beta };
    let parts: Vec<(Vec<BlockSums>, Vec<f64>)> = (0..n.div_ceil(task))
        .into_par_iter()
        .map(|t| {
            let mut u = vec![0.0; groups * k];
            let start = t * task;
            let end = (start + task).min(n);
            let blocks = (start..end)
                .step_by(block)
                .map(|b| {
                    let rows = b..(b + block).min(end);
                    let cluster_scores = clusters.map(|(c, _)| (c, u.as_mut_slice()));
                    logistic_block(&input, k, rows, cluster_scores)
                })
                .collect();
            (blocks, u)
        })
        .collect();
    let mut m = vec![0.0; k * k];
    let mut v = vec![0.0; k];
    let mut ll = 0.0;
    let mut u = vec![0.0; groups * k];
    for (blocks, part_u) in parts {
        for (hm, hv, hl) in blocks {
            m.iter_mut().zip(hm).for_each(|(a, b)| *a += b);
            v.iter_mut().zip(hv).for_each(|(a, b)| *a += b);
            ll += hl;
        }
        u.iter_mut().zip(part_u).for_each(|(a, b)| *a += b);
    }
    let mut info = Array2::from_shape_vec((k, k), m).unwrap_or_else(|_| Array2::zeros((k, k)));
    symmetrise(&mut info);
    let u = clusters.map(|_| {
        Array2::from_shape_vec((groups, k), u).unwrap_or_else(|_| Array2::zeros((groups, k)))
    });
    (info, Array1::from(v), ll, u)
}

/// One block's information (lower triangle, row-major k x k), score and log-likelihood.
type BlockSums = (Vec<f64>, Vec<f64>, f64);

/// [`logistic_block_k`] for the common widths, so that the compiler unrolls the loops over
/// the k columns (the inner loop of every logistic fit on millions of respondents); any
/// other width takes the same code with k unknown.
fn logistic_block(
    input: &BlockInput,
    k: usize,
    rows: std::ops::Range<usize>,
    clusters: Option<(&[usize], &mut [f64])>,
) -> BlockSums {
    macro_rules! widths {
        ($($k:literal)*) => {
            match k {
                $($k => logistic_block_k::<$k>(input, rows, clusters),)*
                _ => logistic_block_body(input, k, rows, clusters),
            }
        };
    }
    widths!(1 2 3 4 5 6 7 8 9 10 11 12)
}

/// What every block of one logistic pass reads: the rows (contiguous, row-major), the
/// outcome, the weights and the coefficients.
#[derive(Clone, Copy)]
struct BlockInput<'a> {
    flat: &'a [f64],
    y: &'a [f64],
    w: Option<&'a [f64]>,
    beta: &'a [f64],
}

fn logistic_block_k<const K: usize>(
    input: &BlockInput,
    rows: std::ops::Range<usize>,
    clusters: Option<(&[usize], &mut [f64])>,
) -> BlockSums {
    logistic_block_body(input, K, rows, clusters)
}

/// The sums of [`logistic_sums`] over `rows`, adding each row's w_i (y_i - p_i) x_i into
/// its cluster's row of `clusters.1` as it goes. The same operations in the same order
/// as [`accumulate`] and [`cluster_scores`] with the weights of the logistic fit, but in
/// two sweeps over each run of [`RUN`] rows: first every row's linear predictor,
/// probability and weights (rows independent of each other, so the processor overlaps
/// their exponentials, logarithms and divisions), then the sums of products.
#[inline(always)]
fn logistic_block_body(
    input: &BlockInput,
    k: usize,
    rows: std::ops::Range<usize>,
    mut clusters: Option<(&[usize], &mut [f64])>,
) -> BlockSums {
    let BlockInput { flat, y, w, beta } = *input;
    // On the stack for the unrolled widths, so that the sums can stay in registers.
    let mut m_stack = [0.0f64; 144];
    let mut m_heap;
    let m: &mut [f64] = if k * k <= m_stack.len() {
        &mut m_stack[..k * k]
    } else {
        m_heap = vec![0.0; k * k];
        &mut m_heap
    };
    let mut v = vec![0.0; k];
    let mut total = 0.0;
    let beta = &beta[..k];
    // At beta = 0 (the first pass) every p is 1/2: no exponential or logarithm per row.
    let at_zero = beta.iter().all(|b| *b == 0.0);
    let (p0, softplus0) = logistic_and_softplus(0.0);
    let mut hws = [0.0f64; RUN];
    let mut wys = [0.0f64; RUN];
    let mut run_start = rows.start;
    while run_start < rows.end {
        let run_end = (run_start + RUN).min(rows.end);
        let run_rows = &flat[run_start * k..run_end * k];
        let ys = &y[run_start..run_end];
        for (r, (row, &yi)) in run_rows.chunks_exact(k).zip(ys).enumerate() {
            let row = &row[..k];
            let (e, p, softplus) = if at_zero {
                (0.0, p0, softplus0)
            } else {
                let e = row_dot(row, beta);
                let (p, softplus) = logistic_and_softplus(e);
                (e, p, softplus)
            };
            let wi = w.map_or(1.0, |w| w[run_start + r]);
            hws[r] = wi * p * (1.0 - p);
            wys[r] = wi * (yi - p);
            total += wi * (yi * e - softplus);
        }
        for (r, row) in run_rows.chunks_exact(k).enumerate() {
            let row = &row[..k];
            let (hw, wy) = (hws[r], wys[r]);
            for a in 0..k {
                let wa = hw * row[a];
                v[a] += wy * row[a];
                let m_row = &mut m[a * k..a * k + a + 1];
                for (b, cell) in m_row.iter_mut().enumerate() {
                    *cell += wa * row[b];
                }
            }
            if let Some((cluster, u)) = clusters.as_mut() {
                let c = cluster[run_start + r];
                let ug = &mut u[c * k..(c + 1) * k];
                for (a, x) in ug.iter_mut().zip(row) {
                    *a += wy * x;
                }
            }
        }
        run_start = run_end;
    }
    (m.to_vec(), v, total)
}

/// Rows per sweep of [`logistic_block_body`]: their weights stay in the first-level cache.
const RUN: usize = 128;

/// Draws one multiplier per cluster: Rademacher +-1, or Webb's (2014) six-point
/// distribution when there are fewer than 12 clusters.
fn cluster_multipliers(rng: &mut crate::stats::random::Rng, clusters: usize) -> Vec<f64> {
    let webb = [
        -(1.5f64.sqrt()),
        -1.0,
        -(0.5f64.sqrt()),
        0.5f64.sqrt(),
        1.0,
        1.5f64.sqrt(),
    ];
    (0..clusters)
        .map(|_| {
            if clusters < 12 {
                webb[rng.below(6)]
            } else if rng.bernoulli(0.5) {
                1.0
            } else {
                -1.0
            }
        })
        .collect()
}

/// Respondents clustered in countries, as the bootstrap tests take them: the design x
/// (n x k, intercept included), the outcome y, optional weights w and each row's cluster
/// (0..G). Made by [`ClusteredData::new`] only, so that every part has one entry per row.
#[derive(Debug, Clone, Copy)]
pub struct ClusteredData<'a> {
    x: ArrayView2<'a, f64>,
    y: &'a [f64],
    w: Option<&'a [f64]>,
    cluster: &'a [usize],
}

impl<'a> ClusteredData<'a> {
    /// Checks that y, w (where given) and cluster have one entry per row of x.
    pub fn new(
        x: ArrayView2<'a, f64>,
        y: &'a [f64],
        w: Option<&'a [f64]>,
        cluster: &'a [usize],
    ) -> Result<ClusteredData<'a>, RegressionError> {
        let n = x.nrows();
        let parts = [
            (y.len(), "outcomes"),
            (w.map_or(n, <[f64]>::len), "weights"),
            (cluster.len(), "cluster indices"),
        ];
        match parts.into_iter().find(|&(found, _)| found != n) {
            Some((found, what)) => Err(RegressionError::Misaligned { n, found, what }),
            None => Ok(ClusteredData { x, y, w, cluster }),
        }
    }
}

/// A bootstrap test of H0: beta_term = 0 on `data` (term 0 the intercept), with
/// `replicates` draws from the generator seeded by `seed`.
#[derive(Debug, Clone, Copy)]
pub struct TermTest<'a> {
    data: ClusteredData<'a>,
    term: usize,
    replicates: usize,
    seed: u64,
}

impl<'a> TermTest<'a> {
    /// Checks that `term` is a column of the design.
    pub fn new(
        data: ClusteredData<'a>,
        term: usize,
        replicates: usize,
        seed: u64,
    ) -> Result<TermTest<'a>, RegressionError> {
        let k = data.x.ncols();
        if term >= k {
            return Err(RegressionError::NoSuchTerm { term, k });
        }
        Ok(TermTest {
            data,
            term,
            replicates,
            seed,
        })
    }
}

/// Wild score bootstrap p-value for H0: beta_j = 0 in a weighted logistic model (Kline &
/// Santos 2012, the score-based wild bootstrap; Roodman et al. 2019 for clusters). The
/// model is fitted with the null imposed (x_j left out); its per-cluster scores S_g =
/// sum_i w_i (y_i - p~_i) x_i and information H = X' diag(w p~ (1-p~)) X give the statistic
/// t = (H^-1 S)_j / sqrt((H^-1 V H^-1)_jj), V = c sum_g S_g S_g' (c the CR1 factor). Each
/// replicate multiplies S_g by one draw v_g per cluster (Rademacher, or Webb's six points
/// below 12 clusters); the p-value is (1 + #{|t*| >= |t|}) / (B + 1) (Davison & Hinkley
/// 1997, eq. 4.11), never 0. No refits are needed. j is the test's term.
pub fn score_cluster_bootstrap(test: &TermTest) -> Result<f64, RegressionError> {
    let ClusteredData { x, y, w, cluster } = test.data;
    let (j, replicates, seed) = (test.term, test.replicates, test.seed);
    let (n, k) = x.dim();
    let keep: Vec<usize> = (0..k).filter(|&c| c != j).collect();
    let restricted_x = x.select(ndarray::Axis(1), &keep);
    let (restricted, _, _, _, _) = logistic_newton(restricted_x.view(), y, w, None)?;
    let eta = restricted_x.dot(&restricted);
    let weight = |i: usize| w.map_or(1.0, |w| w[i]);
    let p: Vec<f64> = eta.iter().map(|&e| logistic(e)).collect();
    let (mut h, _, _) = accumulate(x, |i, _| (weight(i) * p[i] * (1.0 - p[i]), 0.0, 0.0));
    symmetrise(&mut h);
    let h_inv = linalg::inverse_spd(h.view()).map_err(|_| RegressionError::Singular)?;
    let groups = cluster.iter().max().map_or(0, |m| m + 1);
    let scores = cluster_scores(x, cluster, groups, |i, _| weight(i) * (y[i] - p[i]));
    let present: Vec<usize> = (0..groups)
        .filter(|&g| scores.row(g).iter().any(|v| *v != 0.0))
        .collect();
    let g = present.len() as f64;
    let c = (g / (g - 1.0).max(1.0)) * ((n as f64 - 1.0) / (n as f64 - k as f64));
    // Project each cluster's score onto coefficient j: a_g = (H^-1 S_g)_j.
    let a: Vec<f64> = present
        .iter()
        .map(|&gi| h_inv.row(j).dot(&scores.row(gi)))
        .collect();
    let statistic = |v: &[f64]| -> f64 {
        let num: f64 = a.iter().zip(v).map(|(ag, vg)| ag * vg).sum();
        let var: f64 = c * a
            .iter()
            .zip(v)
            .map(|(ag, vg)| (ag * vg).powi(2))
            .sum::<f64>();
        if var > 0.0 {
            num / var.sqrt()
        } else {
            0.0
        }
    };
    let observed = statistic(&vec![1.0; a.len()]);
    let mut rng = crate::stats::random::Rng::new(seed);
    let mut exceed = 0usize;
    for _ in 0..replicates {
        let v = cluster_multipliers(&mut rng, a.len());
        if statistic(&v).abs() >= observed.abs() - 1e-12 {
            exceed += 1;
        }
    }
    Ok(bootstrap_p(exceed, replicates))
}

/// Wild cluster bootstrap p-value for H0: beta_j = 0 in a linear model, with the null
/// imposed (Cameron, Gelbach & Miller 2008, "WCR"): residuals u~ and fitted values y~ of
/// the model without x_j; for each replicate, y* = y~ + v_g u~ with one draw v_g per
/// cluster (Rademacher +-1, or Webb's six-point distribution with fewer than 12 clusters,
/// Webb 2014), the full model is refitted and t* = b*_j / se*_j (CR1). The p-value is
/// (1 + #{|t*| >= |t|}) / (B + 1) (Davison & Hinkley 1997, eq. 4.11), never 0. Refits use per-cluster sums, so a replicate costs O(G k^2). j is the test's term.
pub fn wild_cluster_bootstrap(test: &TermTest) -> Result<f64, RegressionError> {
    let sums = ClusterSums::new(&test.data)?;
    sums.wild_p(test.term, test.replicates, test.seed)
}

/// [`wild_cluster_bootstrap`] for every term at once: the respondents are read once into
/// per-cluster sums, then each term costs O(G k^2) per replicate. Each term uses the same
/// seed, so its p-value equals the one-term function's.
pub fn wild_cluster_bootstrap_terms(
    data: &ClusteredData,
    replicates: usize,
    seed: u64,
) -> Result<Vec<f64>, RegressionError> {
    let sums = ClusterSums::new(data)?;
    (0..data.x.ncols())
        .map(|j| sums.wild_p(j, replicates, seed))
        .collect()
}

/// A linear model's data as per-cluster sums (M_g = X_g'W X_g, b_g = X_g'W y_g), with the
/// full fit by QR for the observed statistic.
struct ClusterSums {
    full: RegressionFit,
    m: Vec<Array2<f64>>,
    b: Vec<Array1<f64>>,
    present: Vec<usize>,
    n: usize,
    k: usize,
}

impl ClusterSums {
    fn new(data: &ClusteredData) -> Result<ClusterSums, RegressionError> {
        let ClusteredData { x, y, w, cluster } = *data;
        let (n, k) = x.dim();
        let full = fit(x, y, w, cluster, Kind::Linear)?;
        let groups = cluster.iter().max().map_or(0, |m| m + 1);
        let mut m = vec![Array2::<f64>::zeros((k, k)); groups];
        let mut b = vec![Array1::<f64>::zeros(k); groups];
        for i in 0..n {
            let g = cluster[i];
            let wi = w.map_or(1.0, |w| w[i]);
            add_outer(&mut m[g], &mut b[g], x.row(i), wi, wi * y[i]);
        }
        m.iter_mut().for_each(symmetrise);
        let present = (0..groups)
            .filter(|&g| m[g][[0, 0]] != 0.0 || b[g].iter().any(|v| *v != 0.0))
            .collect();
        Ok(ClusterSums {
            full,
            m,
            b,
            present,
            n,
            k,
        })
    }

    /// The wild cluster bootstrap p-value of term j (see [`wild_cluster_bootstrap`]).
    fn wild_p(&self, j: usize, replicates: usize, seed: u64) -> Result<f64, RegressionError> {
        let (k, full) = (self.k, &self.full);
        let t_observed = full.coef[j] / full.se[j];
        // The model without x_j from the same sums: (sum M)[keep, keep] b~ = (sum b)[keep].
        let keep: Vec<usize> = (0..k).filter(|&c| c != j).collect();
        let total_m = self
            .present
            .iter()
            .fold(Array2::<f64>::zeros((k, k)), |a, &g| a + &self.m[g]);
        let total_b = self
            .present
            .iter()
            .fold(Array1::<f64>::zeros(k), |a, &g| a + &self.b[g]);
        let sub_m = total_m
            .select(ndarray::Axis(0), &keep)
            .select(ndarray::Axis(1), &keep);
        let sub_b = total_b.select(ndarray::Axis(0), &keep);
        let restricted = if keep.is_empty() {
            Array1::zeros(0)
        } else {
            linalg::solve_spd(sub_m.view(), sub_b.view()).map_err(|_| RegressionError::Singular)?
        };
        let mut restricted_full = Array1::<f64>::zeros(k);
        for (r, &c) in keep.iter().enumerate() {
            restricted_full[c] = restricted[r];
        }
        // Per cluster: X_g'W y~_g and X_g'W u~_g.
        let c: Vec<Array1<f64>> = self.m.iter().map(|m| m.dot(&restricted_full)).collect();
        let d: Vec<Array1<f64>> = self.b.iter().zip(&c).map(|(b, c)| b - c).collect();
        let sum_c = self
            .present
            .iter()
            .fold(Array1::<f64>::zeros(k), |a, &g| a + &c[g]);
        // Only the t of term j is needed: with e_j'B the bread's row j, cluster g's score
        // u_g = c_g + v_g d_g - M_g beta enters the CR1 variance of b_j through
        // e_j'B u_g = alpha_g + v_g delta_g - rho_g'beta, with alpha_g = e_j'B c_g,
        // delta_g = e_j'B d_g and rho_g = M_g B e_j fixed across replicates, so a replicate
        // costs O(G k) rather than the full covariance's O(G k^2) with its temporaries.
        let bread = &full.bread;
        let row_j = bread.row(j);
        let present = &self.present;
        let alpha: Vec<f64> = present.iter().map(|&g| row_j.dot(&c[g])).collect();
        let delta: Vec<f64> = present.iter().map(|&g| row_j.dot(&d[g])).collect();
        let rho: Vec<f64> = present
            .iter()
            .flat_map(|&g| self.m[g].dot(&row_j).to_vec())
            .collect();
        let d_flat: Vec<f64> = present.iter().flat_map(|&g| d[g].to_vec()).collect();
        let bread_flat: Vec<f64> = bread.iter().copied().collect();
        let (gf, nf) = (present.len() as f64, self.n as f64);
        let cr1 = (gf / (gf - 1.0)) * ((nf - 1.0) / (nf - k as f64));
        let mut rng = crate::stats::random::Rng::new(seed);
        let mut exceed = 0usize;
        let (mut rhs, mut beta) = (vec![0.0; k], vec![0.0; k]);
        for _ in 0..replicates {
            let v = cluster_multipliers(&mut rng, present.len());
            rhs.copy_from_slice(sum_c.as_slice().unwrap_or(&[]));
            for (dg, &vg) in d_flat.chunks_exact(k).zip(&v) {
                for (r, dv) in rhs.iter_mut().zip(dg) {
                    *r += vg * dv;
                }
            }
            for (b, bread_row) in beta.iter_mut().zip(bread_flat.chunks_exact(k)) {
                *b = bread_row.iter().zip(&rhs).map(|(p, q)| p * q).sum();
            }
            let meat_jj: f64 = (0..present.len())
                .map(|r| {
                    let rho_beta: f64 = rho[r * k..(r + 1) * k]
                        .iter()
                        .zip(&beta)
                        .map(|(p, q)| p * q)
                        .sum();
                    let score = alpha[r] + v[r] * delta[r] - rho_beta;
                    score * score
                })
                .sum();
            let t = beta[j] / (meat_jj * cr1).max(0.0).sqrt();
            if t.abs() >= t_observed.abs() - 1e-12 {
                exceed += 1;
            }
        }
        Ok(bootstrap_p(exceed, replicates))
    }
}

/// A weighted linear model's respondents as per-cluster sufficient statistics: M_g =
/// X_g'W_g X_g, b_g = X_g'W_g y_g and the row count n_g. Weights that are a per-cluster
/// factor times fixed base weights (country weights spread over design weights) only
/// rescale M_g and b_g, so every weighting's fit, CR1 errors and wild cluster bootstrap
/// follow from one pass over the respondents ([`LinearSums::scaled`]).
#[derive(Debug, Clone)]
pub struct LinearSums {
    m: Vec<Array2<f64>>,
    b: Vec<Array1<f64>>,
    rows: Vec<usize>,
}

impl LinearSums {
    /// One parallel pass over the rows (in blocks summed in a fixed order).
    pub fn new(x: ArrayView2<f64>, y: &[f64], w: Option<&[f64]>, cluster: &[usize]) -> Self {
        use rayon::prelude::*;
        let (n, k) = x.dim();
        let groups = cluster.iter().max().map_or(0, |m| m + 1);
        let standard = x.as_standard_layout();
        let flat = standard.as_slice().unwrap_or(&[]);
        let block = if n < 20_000 { n.max(1) } else { 16_384 };
        let empty = || {
            (
                vec![Array2::<f64>::zeros((k, k)); groups],
                vec![Array1::<f64>::zeros(k); groups],
                vec![0usize; groups],
            )
        };
        let parts: Vec<_> = (0..n.div_ceil(block))
            .into_par_iter()
            .map(|blk| {
                let (mut m, mut b, mut rows) = empty();
                for i in (blk * block)..((blk + 1) * block).min(n) {
                    let g = cluster[i];
                    let wi = w.map_or(1.0, |w| w[i]);
                    let row = ArrayView1::from(&flat[i * k..(i + 1) * k]);
                    add_outer(&mut m[g], &mut b[g], row, wi, wi * y[i]);
                    rows[g] += 1;
                }
                (m, b, rows)
            })
            .collect();
        let (mut m, mut b, mut rows) = empty();
        for (pm, pb, pr) in parts {
            for g in 0..groups {
                m[g] += &pm[g];
                b[g] += &pb[g];
                rows[g] += pr[g];
            }
        }
        m.iter_mut().for_each(symmetrise);
        LinearSums { m, b, rows }
    }

    /// The sums under weights `factor[g]` times the base weights; clusters whose factor is
    /// not positive (or not a number) are left out, as rows without weight are.
    pub fn scaled(&self, factor: &[f64]) -> LinearSums {
        let kept = |g: usize| factor.get(g).copied().filter(|f| *f > 0.0);
        let scale = |g: usize| kept(g).unwrap_or(0.0);
        LinearSums {
            m: self
                .m
                .iter()
                .enumerate()
                .map(|(g, m)| m * scale(g))
                .collect(),
            b: self
                .b
                .iter()
                .enumerate()
                .map(|(g, b)| b * scale(g))
                .collect(),
            rows: (0..self.rows.len())
                .map(|g| if kept(g).is_some() { self.rows[g] } else { 0 })
                .collect(),
        }
    }

    /// The sums of the model with the first column only (the intercept: a weighted mean).
    pub fn first_column(&self) -> LinearSums {
        LinearSums {
            m: self
                .m
                .iter()
                .map(|m| m.slice(ndarray::s![..1, ..1]).to_owned())
                .collect(),
            b: self
                .b
                .iter()
                .map(|b| b.slice(ndarray::s![..1]).to_owned())
                .collect(),
            rows: self.rows.clone(),
        }
    }

    /// Weighted least squares from the normal equations (sum M) beta = sum b, with CR1
    /// standard errors from the cluster scores u_g = b_g - M_g beta (Cameron & Miller 2015,
    /// eq. 11 and section VI.B, as [`fit`]); G counts clusters up to the last one with
    /// rows, as [`fit`] does.
    pub fn fit(&self) -> Result<RegressionFit, RegressionError> {
        let k = self.b.first().map_or(0, |b| b.len());
        let n: usize = self.rows.iter().sum();
        if n <= k {
            return Err(RegressionError::TooFew { n, k });
        }
        let present: Vec<usize> = (0..self.rows.len()).filter(|&g| self.rows[g] > 0).collect();
        if present.len() < 2 {
            return Err(RegressionError::OneCluster(present.len()));
        }
        let groups = present.last().map_or(0, |g| g + 1);
        let total_m = present
            .iter()
            .fold(Array2::<f64>::zeros((k, k)), |a, &g| a + &self.m[g]);
        let total_b = present
            .iter()
            .fold(Array1::<f64>::zeros(k), |a, &g| a + &self.b[g]);
        let beta = linalg::solve_spd(total_m.view(), total_b.view())
            .map_err(|_| RegressionError::Singular)?;
        let bread = linalg::inverse_spd(total_m.view()).map_err(|_| RegressionError::Singular)?;
        let mut u = Array2::<f64>::zeros((groups, k));
        for &g in &present {
            u.row_mut(g).assign(&(&self.b[g] - &self.m[g].dot(&beta)));
        }
        Ok(RegressionFit::clustered(
            &beta,
            bread,
            &u,
            n,
            present.len(),
            true,
            1,
        ))
    }

    /// [`wild_cluster_bootstrap_terms`] from the sums, with their fit.
    pub fn wild_bootstrap_terms(
        &self,
        full: &RegressionFit,
        replicates: usize,
        seed: u64,
    ) -> Result<Vec<f64>, RegressionError> {
        let k = full.coef.len();
        let present: Vec<usize> = (0..self.rows.len())
            .filter(|&g| self.m[g][[0, 0]] != 0.0 || self.b[g].iter().any(|v| *v != 0.0))
            .collect();
        let sums = ClusterSums {
            full: full.clone(),
            m: self.m.clone(),
            b: self.b.clone(),
            present,
            n: full.n,
            k,
        };
        (0..k).map(|j| sums.wild_p(j, replicates, seed)).collect()
    }
}

/// Bootstrap p-value (1 + #{|t*| >= |t|}) / (B + 1) (Davison & Hinkley 1997, eq. 4.11):
/// the observed statistic counts as one of the B + 1 draws, so it is never 0.
pub fn bootstrap_p(exceed: usize, replicates: usize) -> f64 {
    (1.0 + exceed as f64) / (replicates as f64 + 1.0)
}

/// Student's t distribution with `df` degrees of freedom, for cluster-robust inference with
/// few clusters (t with G - 1 degrees of freedom: Cameron & Miller 2015, section VI.C).
pub mod student {
    /// Regularised incomplete beta function I_x(a, b) by the continued fraction of
    /// Numerical Recipes (Press et al. 2007, section 6.4; modified Lentz's method).
    pub fn incomplete_beta(a: f64, b: f64, x: f64) -> f64 {
        if x <= 0.0 {
            return 0.0;
        }
        if x >= 1.0 {
            return 1.0;
        }
        let ln_front = libm::lgamma(a + b) - libm::lgamma(a) - libm::lgamma(b)
            + a * x.ln()
            + b * (1.0 - x).ln();
        if x < (a + 1.0) / (a + b + 2.0) {
            ln_front.exp() * continued_fraction(a, b, x) / a
        } else {
            1.0 - ln_front.exp() * continued_fraction(b, a, 1.0 - x) / b
        }
    }

    fn continued_fraction(a: f64, b: f64, x: f64) -> f64 {
        const TINY: f64 = 1e-300;
        let (qab, qap, qam) = (a + b, a + 1.0, a - 1.0);
        let mut c = 1.0;
        let mut d = 1.0 - qab * x / qap;
        if d.abs() < TINY {
            d = TINY;
        }
        d = 1.0 / d;
        let mut h = d;
        for m in 1..=10_000 {
            let m = f64::from(m);
            let m2 = 2.0 * m;
            // One step of the modified Lentz recurrence: the factor it multiplies h by.
            let mut lentz = |aa: f64| {
                d = 1.0 + aa * d;
                if d.abs() < TINY {
                    d = TINY;
                }
                c = 1.0 + aa / c;
                if c.abs() < TINY {
                    c = TINY;
                }
                d = 1.0 / d;
                d * c
            };
            h *= lentz(m * (b - m) * x / ((qam + m2) * (a + m2)));
            let delta = lentz(-(a + m) * (qab + m) * x / ((a + m2) * (qap + m2)));
            h *= delta;
            if (delta - 1.0).abs() < 1e-16 {
                break;
            }
        }
        h
    }

    /// Two-sided p-value P(|T| >= |t|) = I_{df/(df+t^2)}(df/2, 1/2).
    pub fn two_sided_p(t: f64, df: f64) -> f64 {
        if !t.is_finite() || df <= 0.0 {
            return f64::NAN;
        }
        incomplete_beta(0.5 * df, 0.5, df / (df + t * t))
    }

    /// Quantile q with P(T <= q) = p, for p in (0.5, 1): bisection on the distribution
    /// function to full double precision.
    pub fn upper_quantile(p: f64, df: f64) -> f64 {
        if !(0.5..1.0).contains(&p) || df <= 0.0 {
            return f64::NAN;
        }
        let target = 2.0 * (1.0 - p);
        let (mut lo, mut hi) = (0.0f64, 1.0f64);
        while two_sided_p(hi, df) > target {
            hi *= 2.0;
            if hi > 1e300 {
                return f64::INFINITY;
            }
        }
        for _ in 0..200 {
            let mid = 0.5 * (lo + hi);
            if two_sided_p(mid, df) > target {
                lo = mid;
            } else {
                hi = mid;
            }
            if hi - lo <= 1e-15 * hi {
                break;
            }
        }
        0.5 * (lo + hi)
    }
}

/// Inference on each coefficient from cluster-robust standard errors with t(G - 1)
/// (Cameron & Miller 2015, section VI.C; statsmodels' `use_t=True` with clusters).
#[derive(Debug, Clone, serde::Serialize)]
pub struct TInference {
    pub df: usize,
    /// Two-sided p-values; `None` where the standard error is not estimable.
    pub p: Vec<Option<f64>>,
    pub ci95_low: Vec<Option<f64>>,
    pub ci95_high: Vec<Option<f64>>,
}

/// t statistics b / se with G - 1 degrees of freedom, p-values and 95% intervals.
pub fn t_inference(coef: &[f64], se: &[f64], clusters: usize) -> TInference {
    let df = clusters.saturating_sub(1);
    let q = student::upper_quantile(0.975, df as f64);
    let ok = |s: f64| s.is_finite() && s > 0.0;
    TInference {
        df,
        p: coef
            .iter()
            .zip(se)
            .map(|(b, s)| ok(*s).then(|| student::two_sided_p(b / s, df as f64)))
            .collect(),
        ci95_low: coef
            .iter()
            .zip(se)
            .map(|(b, s)| ok(*s).then(|| b - q * s))
            .collect(),
        ci95_high: coef
            .iter()
            .zip(se)
            .map(|(b, s)| ok(*s).then(|| b + q * s))
            .collect(),
    }
}

/// What the two-step estimator needs. The selection equation has one row per selection
/// unit (a respondent, or a country); the outcome equation has one row per observed
/// outcome, each belonging to a selected unit.
pub struct TwoStepInput<'a> {
    /// Selection predictors with the intercept column, one row per unit.
    pub z: ArrayView2<'a, f64>,
    pub selected: &'a [bool],
    /// Outcome predictors with the intercept column, one row per outcome row.
    pub x: ArrayView2<'a, f64>,
    pub y: &'a [f64],
    /// Weights of the outcome rows (analytic weights; `None` for 1).
    pub w: Option<&'a [f64]>,
    /// The selection unit of each outcome row (must be a selected unit).
    pub unit: &'a [usize],
    /// The cluster of each selection unit, in 0..G; `None`: Heckman's (1979) formula,
    /// which needs one unweighted outcome row per selected unit.
    pub cluster: Option<&'a [usize]>,
    /// The selection probit of `selected` on `z`, when the caller has fitted it already
    /// (several outcome equations on one selection, or a bootstrap that starts from it);
    /// `None`: fitted here. Either way it must have converged.
    pub probit: Option<&'a super::binary::BinaryFit>,
}

/// A fitted two-step selection model.
#[derive(Debug, Clone)]
pub struct TwoStepFit {
    pub selection_coef: Vec<f64>,
    /// Probit standard errors (clustered when clusters are given).
    pub selection_se: Vec<f64>,
    /// Outcome coefficients, the inverse Mills ratio's last.
    pub coef: Vec<f64>,
    /// Standard errors that account for the estimated first step.
    pub se: Vec<f64>,
    /// Least-squares standard errors that take the Mills ratio as known (clustered when
    /// clusters are given).
    pub se_uncorrected: Vec<f64>,
    /// The corrected covariance of `coef`.
    pub cov: Array2<f64>,
    pub rho: f64,
    pub sigma: f64,
    /// Selection units and selected units.
    pub n: usize,
    pub n_selected: usize,
    /// Outcome rows.
    pub n_outcome: usize,
    pub clusters: Option<usize>,
    /// Each selection unit's inverse Mills ratio phi(z'g) / Phi(z'g).
    pub lambda: Vec<f64>,
}

/// The Heckman (1979) two-step estimator: a probit of selection on `z`, the inverse Mills
/// ratio lambda_i = phi(z_i'g) / Phi(z_i'g), and (weighted) least squares of y on
/// x* = [x, lambda] among the selected (Wooldridge 2010, section 19.6.1; Wooldridge,
/// Introductory Econometrics, section 17.5).
///
/// With delta_i = lambda_i (lambda_i + z_i'g), b_l the ratio's coefficient and
/// C = sum_i w_i x*_i b_l delta_i z_i' (the derivative of the outcome scores in g):
/// sigma^2 = e'We / sum w + b_l^2 mean_w(delta), rho = b_l / sigma.
///
/// Without clusters, Heckman's (1979) covariance as Greene (Econometric Analysis, 7th ed.,
/// eq. 19-25) writes it: V = (X*'X*)^-1 [sigma^2 X*'(I - rho^2 D)X* + C V_g C'] (X*'X*)^-1,
/// D = diag(delta), V_g the probit's inverse information.
///
/// With clusters, the Murphy & Topel (1985) correction in its cluster-robust form (stacked
/// estimating equations; Hardin 2002): u_g = sum_{i in g} w_i x*_i e_i + C V_g s_g, with
/// s_g the cluster's summed probit scores; V = c A^-1 (sum_g u_g u_g') A^-1, A = X*'WX*,
/// c = G/(G-1) (N-1)/(N-K) over the N outcome rows and K outcome terms (CR1). The probit's
/// own standard errors are then CR1-clustered too: c1 V_g (sum_g s_g s_g') V_g with
/// c1 = G/(G-1) (n-1)/(n-p).
pub fn heckman_two_step(input: &TwoStepInput) -> Result<TwoStepFit, RegressionError> {
    let TwoStepInput {
        z,
        selected,
        x,
        y,
        w,
        unit,
        cluster,
        probit,
    } = *input;
    let (n, p) = z.dim();
    let (rows, k) = x.dim();
    if selected.len() != n || y.len() != rows || unit.len() != rows {
        return Err(RegressionError::Shape);
    }
    if unit.iter().any(|&u| u >= n || !selected[u]) {
        return Err(RegressionError::Shape);
    }
    if let Some(c) = cluster {
        if c.len() != n {
            return Err(RegressionError::Shape);
        }
    } else if w.is_some() || rows != selected.iter().filter(|s| **s).count() {
        return Err(RegressionError::Shape);
    }
    if let Some(bad) = w.and_then(|w| w.iter().find(|v| !(v.is_finite() && **v > 0.0))) {
        return Err(RegressionError::BadWeight(*bad));
    }
    if rows <= k + 1 {
        return Err(RegressionError::TooFew { n: rows, k: k + 1 });
    }
    let fitted;
    let probit = match probit {
        Some(given) => given,
        None => {
            fitted = super::binary::fit(super::binary::ModelKind::Probit, z, selected)
                .map_err(|_| RegressionError::Singular)?;
            &fitted
        }
    };
    if !probit.converged {
        return Err(RegressionError::NotConverged);
    }
    let index = z.dot(&probit.coef);
    let lambda: Vec<f64> = index.iter().map(|&c| normal::inverse_mills(c)).collect();
    let delta: Vec<f64> = lambda
        .iter()
        .zip(index.iter())
        .map(|(l, c)| l * (l + c))
        .collect();
    // Probit score of each unit: lambda(c) z for the selected, -lambda(-c) z for the others.
    let score_unit: Vec<f64> = (0..n)
        .map(|i| {
            if selected[i] {
                lambda[i]
            } else {
                -normal::inverse_mills(-index[i])
            }
        })
        .collect();
    let mut xs = Array2::<f64>::zeros((rows, k + 1));
    for ((mut out, row), &u) in xs.rows_mut().into_iter().zip(x.rows()).zip(unit) {
        for (o, v) in out.iter_mut().zip(row) {
            *o = *v;
        }
        out[k] = lambda[u];
    }
    let (beta, bread) = weighted_least_squares(xs.view(), y, w)?;
    let weight = |r: usize| w.map_or(1.0, |w| w[r]);
    let fitted = xs.dot(&beta);
    let e: Vec<f64> = (0..rows).map(|r| y[r] - fitted[r]).collect();
    let b_l = beta[k];
    let sum_w: f64 = (0..rows).map(weight).sum();
    let sse: f64 = (0..rows).map(|r| weight(r) * e[r] * e[r]).sum();
    let mean_delta: f64 = (0..rows).map(|r| weight(r) * delta[unit[r]]).sum::<f64>() / sum_w;
    let sigma2 = sse / sum_w + b_l * b_l * mean_delta;
    let sigma = sigma2.sqrt();
    let rho = b_l / sigma;
    // C = sum_r w_r x*_r b_l delta_r z_r' = b_l sum_u delta_u (sum_{r in u} w_r x*_r) z_u':
    // delta and z are the unit's, so each unit's weighted row sum is formed first and
    // multiplied out once per unit rather than once per respondent.
    let mut unit_sums = Array2::<f64>::zeros((n, k + 1));
    for (r, (row, &u)) in xs.rows().into_iter().zip(unit).enumerate() {
        let wr = weight(r);
        for (o, v) in unit_sums.row_mut(u).iter_mut().zip(row) {
            *o += wr * v;
        }
    }
    let mut c = Array2::<f64>::zeros((k + 1, p));
    for (u, sums) in unit_sums.rows().into_iter().enumerate() {
        if !selected[u] {
            continue;
        }
        let f = b_l * delta[u];
        let zu = z.row(u);
        for a in 0..=k {
            let xa = f * sums[a];
            for b in 0..p {
                c[[a, b]] += xa * zu[b];
            }
        }
    }
    let vg = &probit.cov;
    let (cov, cov_uncorrected, selection_cov, clusters) = match cluster {
        None => {
            // Heckman (1979), Greene eq. 19-25.
            let mut middle = Array2::<f64>::zeros((k + 1, k + 1));
            for r in 0..rows {
                let f = sigma2 - b_l * b_l * delta[unit[r]];
                for a in 0..=k {
                    for b in 0..=k {
                        middle[[a, b]] += f * xs[[r, a]] * xs[[r, b]];
                    }
                }
            }
            middle = middle + c.dot(vg).dot(&c.t());
            let cov = bread.dot(&middle).dot(&bread);
            let s2 = sse / (rows as f64 - (k + 1) as f64);
            (cov, &bread * s2, vg.clone(), None)
        }
        Some(cl) => {
            let (groups, distinct) = counted_clusters(cl)?;
            let mut s1 = Array2::<f64>::zeros((groups, p));
            for i in 0..n {
                s1.row_mut(cl[i]).scaled_add(score_unit[i], &z.row(i));
            }
            let mut s2 = Array2::<f64>::zeros((groups, k + 1));
            for (r, (row, &u)) in xs.rows().into_iter().zip(unit).enumerate() {
                let f = weight(r) * e[r];
                for (o, v) in s2.row_mut(cl[u]).iter_mut().zip(row) {
                    *o += f * v;
                }
            }
            let u = &s2 + &s1.dot(vg).dot(&c.t());
            let cov = cluster_covariance(&bread, &u, rows);
            let cov_uncorrected = cluster_covariance(&bread, &s2, rows);
            let selection_cov = cluster_covariance(vg, &s1, n);
            (cov, cov_uncorrected, selection_cov, Some(distinct))
        }
    };
    let sqrt_diag =
        |m: &Array2<f64>| -> Vec<f64> { m.diag().iter().map(|v| v.max(0.0).sqrt()).collect() };
    Ok(TwoStepFit {
        selection_coef: probit.coef.to_vec(),
        selection_se: sqrt_diag(&selection_cov),
        coef: beta.to_vec(),
        se: sqrt_diag(&cov),
        se_uncorrected: sqrt_diag(&cov_uncorrected),
        cov,
        rho,
        sigma,
        n,
        n_selected: selected.iter().filter(|s| **s).count(),
        n_outcome: rows,
        clusters,
        lambda,
    })
}

#[cfg(test)]
mod tests {
    use super::student;

    /// Simulated clustered data, seeded: `n` rows, row i in cluster i mod `clusters`; a
    /// design of an intercept and two standard normals (drawn row by row), then the
    /// outcome `intercept` + 0.5 x1 + a standard normal + 0.1 g.
    fn clustered_data(
        seed: u64,
        n: usize,
        clusters: usize,
        intercept: f64,
    ) -> (ndarray::Array2<f64>, Vec<usize>, Vec<f64>) {
        let mut rng = crate::stats::random::Rng::new(seed);
        let x = ndarray::Array2::from_shape_fn(
            (n, 3),
            |(_, c)| if c == 0 { 1.0 } else { rng.normal() },
        );
        let cluster: Vec<usize> = (0..n).map(|i| i % clusters).collect();
        let y = (0..n)
            .map(|i| intercept + 0.5 * x[[i, 1]] + rng.normal() + (cluster[i] as f64) * 0.1)
            .collect();
        (x, cluster, y)
    }

    /// All terms from one pass give each term's one-term p-value exactly (the same sums,
    /// the same seed).
    #[test]
    fn all_terms_at_once_equal_one_term_at_a_time() {
        let n = 400;
        let (x, cluster, y) = clustered_data(11, n, 9, 0.0);
        let w: Vec<f64> = (0..n).map(|i| 0.5 + (i % 3) as f64).collect();
        let data = super::ClusteredData::new(x.view(), &y, Some(&w), &cluster).unwrap();
        let all = super::wild_cluster_bootstrap_terms(&data, 199, 5).unwrap();
        assert_eq!(all.len(), 3);
        for (j, p) in all.iter().enumerate() {
            let test = super::TermTest::new(data, j, 199, 5).unwrap();
            let one = super::wild_cluster_bootstrap(&test).unwrap();
            assert_eq!(*p, one);
            assert!(*p > 0.0 && *p <= 1.0);
        }
    }

    /// Inputs that do not line up, or a term the design does not have, are refused before
    /// any work.
    #[test]
    fn bootstrap_tests_check_their_inputs() {
        use super::{ClusteredData, RegressionError, TermTest};
        let (x, cluster, y) = clustered_data(13, 40, 4, 0.0);
        let w = vec![1.0; 39];
        assert_eq!(
            ClusteredData::new(x.view(), &y, Some(&w), &cluster).unwrap_err(),
            RegressionError::Misaligned {
                n: 40,
                found: 39,
                what: "weights"
            }
        );
        assert!(ClusteredData::new(x.view(), &y[1..], None, &cluster).is_err());
        assert!(ClusteredData::new(x.view(), &y, None, &cluster[1..]).is_err());
        let data = ClusteredData::new(x.view(), &y, None, &cluster).unwrap();
        assert!(TermTest::new(data, 2, 9, 1).is_ok());
        assert_eq!(
            TermTest::new(data, 3, 9, 1).unwrap_err(),
            RegressionError::NoSuchTerm { term: 3, k: 3 }
        );
    }

    #[test]
    fn t_quantiles_match_printed_tables() {
        // Two-sided 5% critical values of t (any statistics textbook's t table, from
        // memory): df 1: 12.706, 9: 2.262, 30: 2.042, 120: 1.980.
        for (df, q) in [(1.0, 12.706), (9.0, 2.262), (30.0, 2.042), (120.0, 1.980)] {
            let got = student::upper_quantile(0.975, df);
            assert!((got - q).abs() < 5e-4, "df {df}: {got} vs {q}");
            assert!((student::two_sided_p(got, df) - 0.05).abs() < 1e-12);
        }
        // df 1 is the Cauchy distribution: P(|T| >= 1) = 1/2 exactly.
        assert!((student::two_sided_p(1.0, 1.0) - 0.5).abs() < 1e-14);
    }

    #[test]
    fn per_cluster_sums_give_the_respondent_fit() {
        use super::{
            fit, wild_cluster_bootstrap_terms, ClusteredData, Kind, LinearSums, RegressionError,
        };
        // Common practice: weights that are a per-cluster factor times base weights only
        // rescale each cluster's sums, so the fit from sums equals the fit on the rows (QR)
        // to rounding, the intercept-only sums give the weighted mean, and a cluster whose
        // factor is 0 is left out as its rows would be.
        let n = 600;
        let (x, cluster, y) = clustered_data(12, n, 10, 1.0);
        let base: Vec<f64> = (0..n).map(|i| 0.5 + (i % 4) as f64).collect();
        let mut factor: Vec<f64> = (0..10).map(|g| 0.2 + g as f64 / 7.0).collect();
        factor[9] = 0.0;
        let keep: Vec<usize> = (0..n).filter(|&i| cluster[i] != 9).collect();
        let xs = x.select(ndarray::Axis(0), &keep);
        let ys: Vec<f64> = keep.iter().map(|&i| y[i]).collect();
        let ws: Vec<f64> = keep.iter().map(|&i| factor[cluster[i]] * base[i]).collect();
        let cs: Vec<usize> = keep.iter().map(|&i| cluster[i]).collect();
        let rows = fit(xs.view(), &ys, Some(&ws), &cs, Kind::Linear).unwrap();
        let sums = LinearSums::new(x.view(), &y, Some(&base), &cluster).scaled(&factor);
        let from_sums = sums.fit().unwrap();
        assert_eq!((from_sums.n, from_sums.clusters), (540, 9));
        assert_eq!(from_sums.coef.len(), 3);
        for j in 0..3 {
            assert!((from_sums.coef[j] - rows.coef[j]).abs() < 1e-10, "coef {j}");
            assert!((from_sums.se[j] - rows.se[j]).abs() < 1e-10, "se {j}");
        }
        let mean = ys.iter().zip(&ws).map(|(a, b)| a * b).sum::<f64>() / ws.iter().sum::<f64>();
        assert!((sums.first_column().fit().unwrap().coef[0] - mean).abs() < 1e-12);
        let rows_data = ClusteredData::new(xs.view(), &ys, Some(&ws), &cs).unwrap();
        let p_rows = wild_cluster_bootstrap_terms(&rows_data, 99, 3).unwrap();
        let p_sums = sums.wild_bootstrap_terms(&from_sums, 99, 3).unwrap();
        assert_eq!(p_rows.len(), p_sums.len());
        for (a, b) in p_rows.iter().zip(&p_sums) {
            assert!((a - b).abs() <= 1.0 / 100.0 + 1e-12, "{a} vs {b}");
        }
        // One cluster with weight left is not enough for clustered errors.
        let one: Vec<f64> = (0..10).map(|g| if g == 0 { 1.0 } else { 0.0 }).collect();
        assert!(matches!(
            LinearSums::new(x.view(), &y, Some(&base), &cluster)
                .scaled(&one)
                .fit(),
            Err(RegressionError::OneCluster(1))
        ));
    }
}
