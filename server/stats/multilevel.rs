//! Random-intercept (two-level) models: respondents i nested in countries j.
//!
//! Linear: y_ij = x_ij'b + u_j + e_ij, u_j ~ N(0, tau^2), e_ij ~ N(0, sigma^2), fitted by
//! restricted (REML; Patterson & Thompson 1971) or full maximum likelihood. With
//! theta = tau^2 / sigma^2 the covariance of country j is V_j = sigma^2 (I + theta 11'), whose
//! inverse is (I - w_j 11') / sigma^2 with w_j = theta / (1 + n_j theta) and whose log
//! determinant is n_j log sigma^2 + log(1 + n_j theta). Every quantity of the likelihood is
//! therefore a function of the totals X'X, X'y, y'y and of each country's n_j, X_j'1 and
//! 1'y_j, gathered in one pass over the respondents. For fixed theta, with
//! M = X'X - sum_j w_j (X_j'1)(X_j'1)', r = X'y - sum_j w_j (X_j'1)(1'y_j), b = M^-1 r and
//! RSS = y'y - sum_j w_j (1'y_j)^2 - r'b, the profiled deviances are (Bates et al. 2015,
//! "Fitting linear mixed-effects models using lme4", J. Stat. Softw. 67(1), eqs. 34 and 41)
//!
//!   ML:   -2 l(theta)   = N (1 + log(2 pi RSS / N)) + sum_j log(1 + n_j theta)
//!   REML: -2 l_R(theta) = (N - p)(1 + log(2 pi RSS / (N - p))) + sum_j log(1 + n_j theta)
//!                         + log det M,
//!
//! minimised over rho = sqrt(theta) >= 0 (a grid, then golden-section search). Then
//! sigma^2 = RSS / N (ML) or RSS / (N - p) (REML), Var(b) = sigma^2 M^-1 (conditional on
//! theta, as lme4 reports), the conditional modes u_j = w_j (1'y_j - (X_j'1)'b) and their
//! conditional variances sigma^2 w_j.
//!
//! Logistic: logit P(y_ij = 1) = x_ij'b + u_j. The marginal likelihood of country j,
//! the integral over u of prod_i p(y_ij | u) N(u; 0, tau^2), is approximated by Laplace's
//! method around the conditional mode (as lme4's default, nAGQ = 1) or by adaptive
//! Gauss-Hermite quadrature with k nodes centred on the mode and scaled by its curvature
//! (Pinheiro & Bates 1995, J. Comput. Graph. Stat. 4, 12-35; Liu & Pierce 1994). The
//! approximate log-likelihood is maximised over (b, log tau) jointly by damped Newton steps
//! (the Laplace gradient analytic, its Hessian by differences of the gradient); standard
//! errors of b come from the inverse of that Hessian (as lme4's vcov with use.hessian).
//!
//! Design weights within countries (optional): pseudo-maximum likelihood with each
//! country's weights scaled to sum to its effective sample size (sum w)^2 / sum w^2
//! (Pfeffermann, Skinner, Holmes, Goldstein & Rasbash 1998, JRSS B 60, 23-40, scaling
//! method 2). Each respondent's log-likelihood contribution is multiplied by its scaled
//! weight; standard errors are then model-based on the pseudo-likelihood, an approximation
//! (the fit says so in `weighted`).

use ndarray::{Array1, Array2, ArrayView2};

use crate::stats::linalg;

#[derive(Debug, Clone, PartialEq, thiserror::Error)]
pub enum MultilevelError {
    #[error("{0}")]
    Shape(String),
    #[error("a value is missing or not finite (row {0}); drop or fix incomplete rows")]
    NotFinite(usize),
    #[error("a multilevel model needs at least two countries with respondents; found {0}")]
    TooFewGroups(usize),
    #[error("the predictors are collinear or constant: the fixed effects are not estimable")]
    Singular,
    #[error("weights must be positive and finite (row {0})")]
    Weight(usize),
    #[error("a logistic outcome must be 0 or 1 (row {0})")]
    NotBinary(usize),
    #[error("the number of quadrature nodes must be between 1 and 25, not {0}")]
    Nodes(usize),
}

/// Linear estimation criterion.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Criterion {
    Reml,
    Ml,
}

impl Criterion {
    pub fn as_str(self) -> &'static str {
        match self {
            Criterion::Reml => "REML",
            Criterion::Ml => "ML",
        }
    }
}

/// Respondent data of a two-level model: design `x` (n x p, the intercept a column of it),
/// outcome `y`, country index `group` in `0..n_groups`, optional design weights.
#[derive(Debug, Clone, Copy)]
pub struct Data<'a> {
    pub x: ArrayView2<'a, f64>,
    pub y: &'a [f64],
    pub group: &'a [usize],
    pub n_groups: usize,
    pub weight: Option<&'a [f64]>,
}

/// A fitted random-intercept model (linear or logistic).
#[derive(Debug, Clone, PartialEq)]
pub struct MultilevelFit {
    pub coef: Vec<f64>,
    /// Standard errors of `coef`; NaN where not estimable.
    pub se: Vec<f64>,
    /// Covariance of `coef` (p x p).
    pub cov: Array2<f64>,
    /// Country-level standard deviation tau.
    pub country_sd: f64,
    /// Residual standard deviation sigma (linear only).
    pub residual_sd: Option<f64>,
    /// Log-likelihood (REML criterion / -2 for REML; approximate for the logistic model).
    pub log_likelihood: f64,
    /// Intraclass correlation tau^2 / (tau^2 + sigma^2) (linear only).
    pub icc: Option<f64>,
    /// Conditional mode of each country's effect (0 for a country without respondents).
    pub modes: Vec<f64>,
    /// Conditional variance of each mode (tau^2 for a country without respondents).
    pub mode_variance: Vec<f64>,
    /// Approximate sampling variance of log tau (NaN where tau is on the boundary 0).
    pub log_sd_variance: f64,
    pub n: usize,
    /// Countries with at least one respondent.
    pub groups: usize,
    pub converged: bool,
    /// The country-level variance is estimated at its boundary, 0 (lme4 calls such a fit
    /// singular): tau = 0, the modes 0, and the fixed effects those of the model without
    /// country effects.
    pub at_boundary: bool,
    /// Iterations of the outer search (logistic: Newton steps over (b, log tau); linear:
    /// golden-section steps over rho).
    pub iterations: usize,
    /// Design weights were used (pseudo-likelihood; approximate).
    pub weighted: bool,
}

/// What a fit at the boundary says, for users.
pub const BOUNDARY_NOTE: &str =
    "the country-level variance is estimated at its boundary, 0: the data show no variation between countries beyond what the predictors explain, so the model reduces to one without country effects";

fn check(data: &Data) -> Result<(), MultilevelError> {
    let (n, p) = data.x.dim();
    if data.y.len() != n || data.group.len() != n {
        return Err(MultilevelError::Shape(format!(
            "x has {n} rows but y has {} and group {}",
            data.y.len(),
            data.group.len()
        )));
    }
    if let Some(w) = data.weight {
        if w.len() != n {
            return Err(MultilevelError::Shape(format!(
                "x has {n} rows but the weights {}",
                w.len()
            )));
        }
        if let Some(i) = w.iter().position(|v| !(v.is_finite() && *v > 0.0)) {
            return Err(MultilevelError::Weight(i));
        }
    }
    if p == 0 || n <= p {
        return Err(MultilevelError::Shape(format!(
            "{n} respondents are too few for {p} fixed effects"
        )));
    }
    if let Some(i) = data.group.iter().position(|&g| g >= data.n_groups) {
        return Err(MultilevelError::Shape(format!(
            "row {i}: country index out of range"
        )));
    }
    if let Some(i) = data.y.iter().position(|v| !v.is_finite()) {
        return Err(MultilevelError::NotFinite(i));
    }
    if let Some(s) = data.x.as_slice() {
        if let Some(k) = s.iter().position(|v| !v.is_finite()) {
            return Err(MultilevelError::NotFinite(k / p));
        }
    } else if let Some((i, _)) = data.x.indexed_iter().find(|(_, v)| !v.is_finite()) {
        return Err(MultilevelError::NotFinite(i.0));
    }
    Ok(())
}

/// Each country's weights scaled to sum to its effective sample size (Pfeffermann et al.
/// 1998, method 2): w* = w sum(w) / sum(w^2) within the country.
pub fn scaled_weights(weight: &[f64], group: &[usize], n_groups: usize) -> Vec<f64> {
    let mut s1 = vec![0.0; n_groups];
    let mut s2 = vec![0.0; n_groups];
    for (w, &g) in weight.iter().zip(group) {
        s1[g] += w;
        s2[g] += w * w;
    }
    weight
        .iter()
        .zip(group)
        .map(|(w, &g)| w * s1[g] / s2[g])
        .collect()
}

/// Sufficient statistics of the linear random-intercept model.
struct LinearSums {
    p: usize,
    xtx: Array2<f64>,
    xty: Array1<f64>,
    yty: f64,
    /// Per country: weighted count, X_j'1 (p), 1'y_j.
    n: Vec<f64>,
    sx: Array2<f64>,
    sy: Vec<f64>,
    total: f64,
}

impl LinearSums {
    fn gather(data: &Data, weight: Option<&[f64]>) -> LinearSums {
        let (nrow, p) = data.x.dim();
        let g = data.n_groups;
        let mut xtx = Array2::<f64>::zeros((p, p));
        let mut xty = Array1::<f64>::zeros(p);
        let mut yty = 0.0;
        let mut n = vec![0.0; g];
        let mut sx = Array2::<f64>::zeros((g, p));
        let mut sy = vec![0.0; g];
        let mut row = vec![0.0; p];
        for i in 0..nrow {
            let w = weight.map_or(1.0, |w| w[i]);
            for (k, r) in row.iter_mut().enumerate() {
                *r = data.x[[i, k]];
            }
            let y = data.y[i];
            let gi = data.group[i];
            n[gi] += w;
            sy[gi] += w * y;
            yty += w * y * y;
            for a in 0..p {
                let wa = w * row[a];
                sx[[gi, a]] += wa;
                xty[a] += wa * y;
                for b in 0..=a {
                    xtx[[a, b]] += wa * row[b];
                }
            }
        }
        for a in 0..p {
            for b in 0..a {
                xtx[[b, a]] = xtx[[a, b]];
            }
        }
        let total = n.iter().sum();
        LinearSums {
            p,
            xtx,
            xty,
            yty,
            n,
            sx,
            sy,
            total,
        }
    }

    /// (M, r, b, RSS) at theta; `None` when M is singular.
    fn solve(&self, theta: f64) -> Option<(Array2<f64>, Array1<f64>, f64)> {
        let p = self.p;
        let mut m = self.xtx.clone();
        let mut r = self.xty.clone();
        let mut rss0 = self.yty;
        for j in 0..self.n.len() {
            if self.n[j] == 0.0 {
                continue;
            }
            let w = theta / (1.0 + self.n[j] * theta);
            let sx = self.sx.row(j);
            for a in 0..p {
                r[a] -= w * sx[a] * self.sy[j];
                for b in 0..p {
                    m[[a, b]] -= w * sx[a] * sx[b];
                }
            }
            rss0 -= w * self.sy[j] * self.sy[j];
        }
        let b = linalg::solve_spd(m.view(), r.view()).ok()?;
        let rss = rss0 - r.dot(&b);
        Some((m, b, rss.max(0.0)))
    }

    fn deviance(&self, rho: f64, criterion: Criterion) -> f64 {
        let theta = rho * rho;
        let Some((m, _, rss)) = self.solve(theta) else {
            return f64::INFINITY;
        };
        let log_l: f64 = self
            .n
            .iter()
            .filter(|n| **n > 0.0)
            .map(|n| (1.0 + n * theta).ln())
            .sum();
        let two_pi = 2.0 * std::f64::consts::PI;
        match criterion {
            Criterion::Ml => {
                let n = self.total;
                n * (1.0 + (two_pi * rss / n).ln()) + log_l
            }
            Criterion::Reml => {
                let df = self.total - self.p as f64;
                let log_det = linalg::log_det_spd(m.view()).unwrap_or(f64::INFINITY);
                df * (1.0 + (two_pi * rss / df).ln()) + log_l + log_det
            }
        }
    }
}

/// Minimises a function of one variable on [0, inf): a coarse log grid, then golden-section
/// search between the grid neighbours of the best point. Returns (argmin, min, converged,
/// golden-section iterations).
fn minimise_nonnegative(f: impl Fn(f64) -> f64) -> (f64, f64, bool, usize) {
    let mut grid = vec![0.0];
    grid.extend((-16..=16).map(|k| 10f64.powf(k as f64 / 4.0)));
    let values: Vec<f64> = grid.iter().map(|&r| f(r)).collect();
    let (best, _) =
        values.iter().enumerate().fold(
            (0, f64::INFINITY),
            |(bi, bv), (i, &v)| {
                if v < bv {
                    (i, v)
                } else {
                    (bi, bv)
                }
            },
        );
    if !values[best].is_finite() {
        return (f64::NAN, f64::NAN, false, 0);
    }
    let mut lo = if best == 0 { 0.0 } else { grid[best - 1] };
    let mut hi = if best + 1 < grid.len() {
        grid[best + 1]
    } else {
        grid[best]
    };
    let phi = (5f64.sqrt() - 1.0) / 2.0;
    let mut c = hi - phi * (hi - lo);
    let mut d = lo + phi * (hi - lo);
    let (mut fc, mut fd) = (f(c), f(d));
    let mut iterations = 0;
    while (hi - lo) > 1e-11 * (1.0 + hi) && iterations < 200 {
        if fc < fd {
            hi = d;
            d = c;
            fd = fc;
            c = hi - phi * (hi - lo);
            fc = f(c);
        } else {
            lo = c;
            c = d;
            fc = fd;
            d = lo + phi * (hi - lo);
            fd = f(d);
        }
        iterations += 1;
    }
    let mut x = (lo + hi) / 2.0;
    let mut fx = f(x);
    // The boundary: a variance ratio of zero can be the optimum.
    let f0 = values[0];
    if f0 <= fx {
        x = 0.0;
        fx = f0;
    }
    (x, fx, best + 1 < grid.len() && iterations < 200, iterations)
}

/// Fits the linear random-intercept model by REML or ML (see the module comment).
pub fn fit_linear(data: &Data, criterion: Criterion) -> Result<MultilevelFit, MultilevelError> {
    check(data)?;
    let scaled = data
        .weight
        .map(|w| scaled_weights(w, data.group, data.n_groups));
    let sums = LinearSums::gather(data, scaled.as_deref());
    let groups = sums.n.iter().filter(|n| **n > 0.0).count();
    if groups < 2 {
        return Err(MultilevelError::TooFewGroups(groups));
    }
    if linalg::cholesky(sums.xtx.view()).is_err() {
        return Err(MultilevelError::Singular);
    }
    let (rho, dev, converged, iterations) = minimise_nonnegative(|r| sums.deviance(r, criterion));
    if !dev.is_finite() {
        return Err(MultilevelError::Singular);
    }
    let theta = rho * rho;
    let (m, coef, rss) = sums.solve(theta).ok_or(MultilevelError::Singular)?;
    let p = sums.p;
    let df = match criterion {
        Criterion::Ml => sums.total,
        Criterion::Reml => sums.total - p as f64,
    };
    let sigma2 = rss / df;
    let minv = linalg::inverse_spd(m.view()).map_err(|_| MultilevelError::Singular)?;
    let cov = minv * sigma2;
    let se = (0..p).map(|k| cov[[k, k]].max(0.0).sqrt()).collect();
    let tau2 = theta * sigma2;
    let mut modes = vec![0.0; data.n_groups];
    let mut mode_variance = vec![tau2; data.n_groups];
    for j in 0..data.n_groups {
        if sums.n[j] > 0.0 {
            let w = theta / (1.0 + sums.n[j] * theta);
            let fitted: f64 = sums.sx.row(j).dot(&coef);
            modes[j] = w * (sums.sy[j] - fitted);
            mode_variance[j] = sigma2 * w;
        }
    }
    // Sampling variance of log tau from the curvature of the profiled deviance in log rho
    // (sigma held at its estimate): an approximation used only for prediction intervals.
    let log_sd_variance = if rho > 0.0 {
        let h = 1e-3;
        let f = |s: f64| sums.deviance(s.exp(), criterion) / 2.0;
        let s0 = rho.ln();
        let curvature = (f(s0 + h) - 2.0 * f(s0) + f(s0 - h)) / (h * h);
        if curvature > 0.0 {
            1.0 / curvature
        } else {
            f64::NAN
        }
    } else {
        f64::NAN
    };
    Ok(MultilevelFit {
        coef: coef.to_vec(),
        se,
        cov,
        country_sd: tau2.sqrt(),
        residual_sd: Some(sigma2.sqrt()),
        log_likelihood: -dev / 2.0,
        icc: Some(if tau2 + sigma2 > 0.0 {
            tau2 / (tau2 + sigma2)
        } else {
            f64::NAN
        }),
        modes,
        mode_variance,
        log_sd_variance,
        n: data.y.len(),
        groups,
        converged,
        at_boundary: rho == 0.0,
        iterations,
        weighted: data.weight.is_some(),
    })
}

/// Gauss-Hermite nodes and weights for the integral of exp(-z^2) f(z) (Newton's method on
/// the orthonormal Hermite recurrence; Press et al., Numerical Recipes, 2nd ed., sec. 4.5).
pub fn gauss_hermite(k: usize) -> (Vec<f64>, Vec<f64>) {
    let mut x = vec![0.0; k];
    let mut w = vec![0.0; k];
    let pim4 = std::f64::consts::PI.powf(-0.25);
    let n = k as f64;
    let mut z = 0.0f64;
    for i in 0..k.div_ceil(2) {
        z = match i {
            0 => (2.0 * n + 1.0).sqrt() - 1.85575 * (2.0 * n + 1.0).powf(-1.0 / 6.0),
            1 => z - 1.14 * n.powf(0.426) / z,
            2 => 1.86 * z - 0.86 * x[0],
            3 => 1.91 * z - 0.91 * x[1],
            _ => 2.0 * z - x[i - 2],
        };
        let mut pp = 1.0;
        for _ in 0..100 {
            let mut p1 = pim4;
            let mut p2 = 0.0;
            for j in 1..=k {
                let p3 = p2;
                p2 = p1;
                let jf = j as f64;
                p1 = z * (2.0 / jf).sqrt() * p2 - ((jf - 1.0) / jf).sqrt() * p3;
            }
            pp = (2.0 * n).sqrt() * p2;
            let z1 = z;
            z = z1 - p1 / pp;
            if (z - z1).abs() <= 1e-14 {
                break;
            }
        }
        x[i] = z;
        x[k - 1 - i] = -z;
        w[i] = 2.0 / (pp * pp);
        w[k - 1 - i] = w[i];
    }
    if k % 2 == 1 {
        x[k / 2] = 0.0;
    }
    (x, w)
}

/// Respondents sorted by country for the logistic model's per-country integrals, those of
/// a country with the same row of the design merged into one.
///
/// Every sum of the logistic model over a country's respondents (the conditional log
/// density g(u), its derivatives in u, the Laplace gradient and Hessian, the quadrature's
/// integrands, the fit at tau = 0) has the terms w_i (y_i eta_i - log(1 + e^eta_i)),
/// w_i (y_i - p_i) x_i and w_i p_i (1 - p_i) x_i x_i', linear in w_i and w_i y_i for a
/// given row x_i. Rows with the same x in the same country therefore enter exactly as one
/// row of weight W = sum w_i and outcome sum w_i y_i / W (a share, not 0 or 1): the same
/// likelihood and the same estimates up to the order of summation, at the cost of the
/// distinct rows. Survey predictors such as age in years, sex and education levels repeat
/// many times within a country (the demo's 2,000 respondents per country-wave have a few
/// hundred distinct rows); where rows hardly repeat, merging stops after [`MERGE_PROBE`] rows.
struct Grouped {
    p: usize,
    /// Row-major design in country order, one row per distinct row of the country.
    x: Vec<f64>,
    /// The weighted share of 1s among the merged respondents.
    y: Vec<f64>,
    /// The merged respondents' total weight.
    w: Vec<f64>,
    /// Country j's rows are start[j]..start[j + 1].
    start: Vec<usize>,
}

impl Grouped {
    fn new(data: &Data, weight: Option<&[f64]>) -> Grouped {
        let (n, p) = data.x.dim();
        let g = data.n_groups;
        let mut members: Vec<Vec<usize>> = vec![Vec::new(); g];
        for (i, &gi) in data.group.iter().enumerate() {
            members[gi].push(i);
        }
        let mut start = Vec::with_capacity(g + 1);
        let (mut x, mut wy, mut w) = (Vec::new(), Vec::new(), Vec::new());
        // Distinct rows of the country at hand: the bits of a row to its merged index.
        let mut seen: std::collections::HashMap<Vec<u64>, usize, RowHash> =
            std::collections::HashMap::with_hasher(RowHash);
        let mut key = Vec::with_capacity(p);
        for rows in &members {
            start.push(w.len());
            seen.clear();
            for (read, &i) in rows.iter().enumerate() {
                let wi = weight.map_or(1.0, |wt| wt[i]);
                // Rows that hardly repeat (continuous predictors) are not worth a lookup
                // each: once most of a country's first rows were new, the rest go in as
                // they are (a row may then stand twice, which changes nothing).
                let merging = read < MERGE_PROBE || seen.len() * 2 <= MERGE_PROBE;
                let known = if merging {
                    key.clear();
                    key.extend(data.x.row(i).iter().map(|v| v.to_bits()));
                    seen.get(&key).copied()
                } else {
                    None
                };
                let merged = match known {
                    Some(r) => r,
                    None => {
                        let r = w.len();
                        if merging {
                            seen.insert(key.clone(), r);
                        }
                        x.extend(data.x.row(i).iter());
                        wy.push(0.0);
                        w.push(0.0);
                        r
                    }
                };
                wy[merged] += wi * data.y[i];
                w[merged] += wi;
            }
        }
        start.push(w.len());
        debug_assert_eq!(x.len(), w.len() * p);
        debug_assert!(w.len() <= n);
        // Weights are positive (checked before), so every merged total is.
        let y = wy.iter().zip(&w).map(|(a, b)| a / b).collect();
        Grouped { p, x, y, w, start }
    }
}

/// A country's first rows from which [`Grouped`] judges whether merging pays: when more
/// than half of them were distinct, the country's later rows are not looked up.
const MERGE_PROBE: usize = 1024;

/// A hasher for rows of the design as their bits: the multiply-rotate step of rustc's
/// FxHasher per 64-bit word and MurmurHash3's 64-bit finaliser (common practice), much
/// cheaper than the default hasher for short keys that no adversary chooses (a collision
/// only costs a comparison). The finaliser matters: a small whole number's bits sit in the
/// high end of its word, and the table indexes by the low end.
#[derive(Clone, Copy, Default)]
struct RowHash;

impl std::hash::BuildHasher for RowHash {
    type Hasher = RowHasher;
    fn build_hasher(&self) -> RowHasher {
        RowHasher(0)
    }
}

struct RowHasher(u64);

impl RowHasher {
    fn add(&mut self, word: u64) {
        self.0 = (self.0.rotate_left(5) ^ word).wrapping_mul(0x517c_c1b7_2722_0a95);
    }
}

impl std::hash::Hasher for RowHasher {
    fn finish(&self) -> u64 {
        let mut h = self.0;
        h ^= h >> 33;
        h = h.wrapping_mul(0xff51_afd7_ed55_8ccd);
        h ^= h >> 33;
        h = h.wrapping_mul(0xc4ce_b9fe_1a85_ec53);
        h ^ (h >> 33)
    }
    fn write(&mut self, bytes: &[u8]) {
        for chunk in bytes.chunks(8) {
            let mut word = [0u8; 8];
            word[..chunk.len()].copy_from_slice(chunk);
            self.add(u64::from_le_bytes(word));
        }
    }
    fn write_u64(&mut self, v: u64) {
        self.add(v);
    }
}

/// p = 1 / (1 + e^-eta) and log(1 + e^eta) from one exponential.
#[inline]
fn logistic_parts(eta: f64) -> (f64, f64) {
    let t = (-eta.abs()).exp();
    if eta >= 0.0 {
        (1.0 / (1.0 + t), eta + t.ln_1p())
    } else {
        (t / (1.0 + t), t.ln_1p())
    }
}

/// One country's contribution at (b, tau).
struct Country {
    mode: f64,
    curvature: f64,
    log_lik: f64,
    /// Laplace gradient over (b, log tau), when asked.
    grad: Vec<f64>,
    /// Approximate Hessian of g at the mode over (b, log tau) (row-major), when asked.
    hess: Vec<f64>,
}

/// The per-country work of the logistic model.
struct Logistic<'a> {
    data: &'a Grouped,
    nodes: (Vec<f64>, Vec<f64>),
    agq: usize,
}

impl Logistic<'_> {
    /// Conditional log density g(u) = sum_i w_i (y_i eta_i - log(1 + e^eta_i)) - u^2 / (2 tau^2)
    /// of one country's rows with the fixed part `eta0`.
    fn g(&self, eta0: &[f64], y: &[f64], w: &[f64], u: f64, tau2: f64) -> f64 {
        let mut s = 0.0;
        for ((e, yi), wi) in eta0.iter().zip(y).zip(w) {
            let eta = e + u;
            s += wi * (yi * eta - logistic_parts(eta).1);
        }
        s - u * u / (2.0 * tau2)
    }

    /// Newton's method for the mode of g (concave), warm-started; each pass gives g, its
    /// first two derivatives at the current point.
    fn country(
        &self,
        j: usize,
        beta: &[f64],
        tau2: f64,
        start: f64,
        want: bool,
        want_hess: bool,
    ) -> Country {
        let d = self.data;
        let p = d.p;
        let (a, b) = (d.start[j], d.start[j + 1]);
        let y = &d.y[a..b];
        let w = &d.w[a..b];
        let eta0: Vec<f64> = (a..b)
            .map(|r| {
                d.x[r * p..(r + 1) * p]
                    .iter()
                    .zip(beta)
                    .map(|(x, c)| x * c)
                    .sum::<f64>()
            })
            .collect();
        let pass = |u: f64| -> (f64, f64, f64) {
            let mut gu = -u * u / (2.0 * tau2);
            let mut d1 = -u / tau2;
            let mut h = 1.0 / tau2;
            for ((e, yi), wi) in eta0.iter().zip(y).zip(w) {
                let eta = e + u;
                let (pr, l1p) = logistic_parts(eta);
                gu += wi * (yi * eta - l1p);
                d1 += wi * (yi - pr);
                h += wi * pr * (1.0 - pr);
            }
            (gu, d1, h)
        };
        let mut u = start;
        let (mut gu, mut d1, mut h) = pass(u);
        for _ in 0..100 {
            let mut step = d1 / h;
            if step.abs() < 1e-10 * (1.0 + u.abs()) {
                break;
            }
            let mut accepted = false;
            for _ in 0..40 {
                let trial = pass(u + step);
                if trial.0 >= gu - 1e-12 * gu.abs().max(1.0) {
                    u += step;
                    (gu, d1, h) = trial;
                    accepted = true;
                    break;
                }
                step /= 2.0;
            }
            if !accepted {
                break;
            }
        }
        let log_lik = if self.agq <= 1 {
            gu - 0.5 * (tau2 * h).ln()
        } else {
            // Adaptive Gauss-Hermite: integral ~ sqrt(2/h) sum_k w_k e^{z_k^2} e^{G(u + sqrt(2/h) z_k)}
            // with G = g - log(2 pi tau^2) / 2.
            let scale = (2.0 / h).sqrt();
            let terms: Vec<f64> = self
                .nodes
                .0
                .iter()
                .zip(&self.nodes.1)
                .map(|(z, wk)| wk.ln() + z * z + self.g(&eta0, y, w, u + scale * z, tau2) - gu)
                .collect();
            let mx = terms.iter().cloned().fold(f64::NEG_INFINITY, f64::max);
            let sum: f64 = terms.iter().map(|t| (t - mx).exp()).sum();
            gu + mx + sum.ln() + scale.ln() - 0.5 * (2.0 * std::f64::consts::PI * tau2).ln()
        };
        let mut grad = Vec::new();
        let mut hess = Vec::new();
        if want {
            let k = p + 1;
            let mut sqx = vec![0.0; p];
            let mut svx = vec![0.0; p];
            let mut score = vec![0.0; p];
            let mut vxx = vec![0.0; p * p];
            let mut sq = 0.0;
            for (i, r) in (a..b).enumerate() {
                let row = &d.x[r * p..(r + 1) * p];
                let pr = logistic_parts(eta0[i] + u).0;
                let wi = w[i];
                let v = wi * pr * (1.0 - pr);
                let q = v * (1.0 - 2.0 * pr);
                let resid = wi * (y[i] - pr);
                sq += q;
                for m in 0..p {
                    sqx[m] += q * row[m];
                    svx[m] += v * row[m];
                    score[m] += resid * row[m];
                    if want_hess {
                        let vm = v * row[m];
                        for l in 0..=m {
                            vxx[m * p + l] += vm * row[l];
                        }
                    }
                }
            }
            grad = vec![0.0; k];
            for m in 0..p {
                let du = -svx[m] / h;
                let dh = sqx[m] + sq * du;
                grad[m] = score[m] - 0.5 * dh / h;
            }
            let du_ds = 2.0 * u / (tau2 * h);
            let dh_ds = -2.0 / tau2 + sq * du_ds;
            grad[p] = u * u / tau2 - 1.0 - 0.5 * dh_ds / h;
            // Hessian of g(u-hat(b, s); b, s), leaving out the curvature term's derivatives.
            hess = vec![0.0; k * k];
            for m in 0..p {
                for l in 0..=m {
                    let v = -vxx[m * p + l] + svx[m] * svx[l] / h;
                    hess[m * k + l] = v;
                    hess[l * k + m] = v;
                }
                let c = -svx[m] * du_ds;
                hess[m * k + p] = c;
                hess[p * k + m] = c;
            }
            hess[p * k + p] = 4.0 * u * u / (tau2 * tau2 * h) - 2.0 * u * u / tau2;
        }
        Country {
            mode: u,
            curvature: h,
            log_lik,
            grad,
            hess,
        }
    }

    /// Approximate log-likelihood at params = (b, log tau), updating the modes (warm start);
    /// with `gradient`, also the Laplace gradient, and with `hessian` an approximate Hessian.
    fn evaluate_full(
        &self,
        params: &[f64],
        modes: &mut [f64],
        curvature: &mut [f64],
        gradient: Option<&mut [f64]>,
        hessian: Option<&mut Array2<f64>>,
    ) -> f64 {
        use rayon::prelude::*;
        let d = self.data;
        let p = d.p;
        let k = p + 1;
        let beta = &params[..p];
        let tau2 = (2.0 * params[p]).exp();
        let want = gradient.is_some() || hessian.is_some();
        let want_hess = hessian.is_some();
        let results: Vec<Option<Country>> = (0..modes.len())
            .into_par_iter()
            .map(|j| {
                (d.start[j + 1] > d.start[j])
                    .then(|| self.country(j, beta, tau2, modes[j], want, want_hess))
            })
            .collect();
        let mut total = 0.0;
        let mut grad = vec![0.0; k];
        let mut hess = Array2::<f64>::zeros((k, k));
        for (j, c) in results.into_iter().enumerate() {
            let Some(c) = c else { continue };
            modes[j] = c.mode;
            curvature[j] = c.curvature;
            total += c.log_lik;
            if want {
                for m in 0..k {
                    grad[m] += c.grad[m];
                    for l in 0..k {
                        hess[[m, l]] += c.hess[m * k + l];
                    }
                }
            }
        }
        if let Some(g) = gradient {
            g.copy_from_slice(&grad);
        }
        if let Some(h) = hessian {
            *h = hess;
        }
        total
    }

    fn evaluate(
        &self,
        params: &[f64],
        modes: &mut [f64],
        curvature: &mut [f64],
        gradient: Option<&mut [f64]>,
    ) -> f64 {
        self.evaluate_full(params, modes, curvature, gradient, None)
    }
}

/// Fits the logistic random-intercept model by the Laplace approximation (`nodes` = 1) or
/// adaptive Gauss-Hermite quadrature with `nodes` points (see the module comment).
pub fn fit_logistic(data: &Data, nodes: usize) -> Result<MultilevelFit, MultilevelError> {
    check(data)?;
    if !(1..=25).contains(&nodes) {
        return Err(MultilevelError::Nodes(nodes));
    }
    if let Some(i) = data.y.iter().position(|v| *v != 0.0 && *v != 1.0) {
        return Err(MultilevelError::NotBinary(i));
    }
    let p = data.x.ncols();
    let scaled = data
        .weight
        .map(|w| scaled_weights(w, data.group, data.n_groups));
    let grouped = Grouped::new(data, scaled.as_deref());
    let groups = (0..data.n_groups)
        .filter(|&j| grouped.start[j + 1] > grouped.start[j])
        .count();
    if groups < 2 {
        return Err(MultilevelError::TooFewGroups(groups));
    }
    // Starting values and the boundary: the ordinary logistic regression, which is the
    // model at tau = 0; log tau starts at log 0.5.
    // X'X of every respondent's row (unweighted): singular exactly when the predictors are
    // collinear or constant.
    let xtx = data.x.t().dot(&data.x);
    if linalg::cholesky(xtx.view()).is_err() {
        return Err(MultilevelError::Singular);
    }
    let zero = at_zero(&grouped);
    // The boundary tau = 0 is a local maximum of the profile when its slope there is not
    // positive; the search then stops as soon as it heads there and the boundary is no
    // worse than where it stands.
    let boundary = (zero.converged && zero.tau2_score <= 0.0).then_some(zero.log_lik);
    let beta = zero.beta.clone();
    let laplace = Logistic {
        data: &grouped,
        nodes: (vec![0.0], vec![std::f64::consts::PI.sqrt()]),
        agq: 1,
    };
    let mut params: Vec<f64> = beta.iter().copied().chain([0.5f64.ln()]).collect();
    let mut modes = vec![0.0; data.n_groups];
    let mut curvature = vec![0.0; data.n_groups];
    // The approximate Hessian comes with every gradient evaluation of the Newton phase and
    // is kept, with the gradient, for the next step at the same point. It leaves out the
    // derivatives of the curvature term, which matter most in log tau: its row and column
    // of log tau come instead from a forward difference of the analytic gradient (one
    // evaluation more per step; without it the steps in log tau overshoot by up to a
    // factor two near the optimum and the search creeps, sign alternating).
    type Cached = (Vec<f64>, Array2<f64>, Vec<f64>);
    let cached: std::cell::RefCell<Cached> =
        std::cell::RefCell::new((Vec::new(), Array2::zeros((p + 1, p + 1)), Vec::new()));
    let approximate = |prm: &[f64], modes: &mut [f64], curv: &mut [f64]| {
        let (mut h, g0) = {
            let c = cached.borrow();
            if c.0.as_slice() == prm {
                (c.1.clone(), c.2.clone())
            } else {
                drop(c);
                let mut h = Array2::<f64>::zeros((p + 1, p + 1));
                let mut g0 = vec![0.0; p + 1];
                laplace.evaluate_full(prm, modes, curv, Some(&mut g0), Some(&mut h));
                (h, g0)
            }
        };
        let step = 1e-4 * (1.0 + prm[p].abs());
        let mut shifted = prm.to_vec();
        shifted[p] += step;
        let mut g1 = vec![0.0; p + 1];
        laplace.evaluate(&shifted, modes, curv, Some(&mut g1));
        for m in 0..=p {
            let d = (g1[m] - g0[m]) / step;
            h[[p, m]] = d;
            h[[m, p]] = d;
        }
        h
    };
    let with_hessian =
        |prm: &[f64], modes: &mut [f64], curv: &mut [f64], grad: Option<&mut [f64]>| {
            let Some(grad) = grad else {
                return laplace.evaluate(prm, modes, curv, None);
            };
            let mut h = Array2::<f64>::zeros((p + 1, p + 1));
            let v = laplace.evaluate_full(prm, modes, curv, Some(&mut *grad), Some(&mut h));
            *cached.borrow_mut() = (prm.to_vec(), h, grad.to_vec());
            v
        };
    let ascent = newton(
        &mut params,
        with_hessian,
        Some(&approximate),
        boundary,
        &mut modes,
        &mut curvature,
    );
    if ascent.at_boundary {
        // Every quadrature rule is exact at tau = 0 (the integrand is a point mass).
        return Ok(boundary_fit(
            &zero,
            &grouped,
            data,
            groups,
            ascent.iterations,
        ));
    }
    let (params, converged) = (ascent.params, ascent.converged);
    if nodes == 1 {
        return finish(
            &laplace,
            params,
            (converged, ascent.iterations),
            &mut modes,
            &mut curvature,
            data,
            groups,
            |prm: &[f64], modes: &mut [f64], curv: &mut [f64], grad: Option<&mut [f64]>| {
                laplace.evaluate(prm, modes, curv, grad)
            },
        );
    }
    // Adaptive quadrature: start from the Laplace optimum, gradient by central differences.
    let quad = Logistic {
        data: &grouped,
        nodes: gauss_hermite(nodes),
        agq: nodes,
    };
    let numeric = |prm: &[f64], modes: &mut [f64], curv: &mut [f64], grad: Option<&mut [f64]>| {
        let value = quad.evaluate(prm, modes, curv, None);
        if let Some(g) = grad {
            let mut q = prm.to_vec();
            for k in 0..prm.len() {
                let h = 1e-5 * (1.0 + prm[k].abs());
                q[k] = prm[k] + h;
                let up = quad.evaluate(&q, modes, curv, None);
                q[k] = prm[k] - h;
                let down = quad.evaluate(&q, modes, curv, None);
                q[k] = prm[k];
                g[k] = (up - down) / (2.0 * h);
            }
            quad.evaluate(prm, modes, curv, None);
        }
        value
    };
    let mut start = params;
    let quadrature = newton(&mut start, numeric, None, None, &mut modes, &mut curvature);
    finish(
        &quad,
        quadrature.params,
        (
            quadrature.converged && converged,
            ascent.iterations + quadrature.iterations,
        ),
        &mut modes,
        &mut curvature,
        data,
        groups,
        numeric,
    )
}

#[allow(clippy::too_many_arguments)]
fn finish(
    model: &Logistic,
    params: Vec<f64>,
    (converged, iterations): (bool, usize),
    modes: &mut [f64],
    curvature: &mut [f64],
    data: &Data,
    groups: usize,
    objective: impl Fn(&[f64], &mut [f64], &mut [f64], Option<&mut [f64]>) -> f64,
) -> Result<MultilevelFit, MultilevelError> {
    let p = model.data.p;
    let log_likelihood = objective(&params, modes, curvature, None);
    let hessian = numeric_hessian(&params, &objective, modes, curvature, model.agq > 1);
    objective(&params, modes, curvature, None);
    let info = -&hessian;
    let tau = params[p].exp();
    let (cov, log_sd_variance) = match linalg::inverse_spd(info.view()) {
        Ok(inv) => {
            let cov = inv.slice(ndarray::s![..p, ..p]).to_owned();
            (cov, inv[[p, p]])
        }
        Err(_) => {
            // tau at or near the boundary: condition on tau for the fixed effects.
            let sub = info.slice(ndarray::s![..p, ..p]).to_owned();
            match linalg::inverse_spd(sub.view()) {
                Ok(inv) => (inv, f64::NAN),
                Err(_) => (Array2::from_elem((p, p), f64::NAN), f64::NAN),
            }
        }
    };
    let se = standard_errors(&cov);
    let tau2 = tau * tau;
    let mut mode_variance = vec![tau2; data.n_groups];
    for j in 0..data.n_groups {
        if model.data.start[j + 1] > model.data.start[j] {
            mode_variance[j] = 1.0 / curvature[j];
        }
    }
    Ok(MultilevelFit {
        coef: params[..p].to_vec(),
        se,
        cov,
        country_sd: tau,
        residual_sd: None,
        log_likelihood,
        icc: None,
        modes: modes.to_vec(),
        mode_variance,
        log_sd_variance,
        n: data.y.len(),
        groups,
        converged,
        at_boundary: false,
        iterations,
        weighted: data.weight.is_some(),
    })
}

/// The logistic model at tau = 0: the ordinary (weighted) logistic regression.
struct AtZero {
    beta: Array1<f64>,
    /// Its log-likelihood, the limit of the Laplace (and of every quadrature)
    /// approximation as tau -> 0.
    log_lik: f64,
    /// Its information -d^2 l / db db' at `beta`.
    info: Array2<f64>,
    /// The slope of the log-likelihood in tau^2 at tau = 0 and `beta`, which is the slope
    /// of the profile there (the envelope theorem, `beta` maximising at tau = 0).
    tau2_score: f64,
    converged: bool,
}

/// Fits [`AtZero`] by Newton's method (steps clamped to 5 against separation), the sums
/// gathered per country in parallel. The slope in tau^2 at 0 is the score of a variance
/// component, sum_j (S_j^2 - I_j) / 2 with S_j = sum_i w_i (y_ij - p_ij) and
/// I_j = sum_i w_i p_ij (1 - p_ij) (Lin 1997, "Variance component testing in generalised
/// linear models with random effects", Biometrika 84, 309-326): expanding a country's
/// Laplace term g(u-hat) - log(tau^2 h) / 2 to first order in tau^2 gives the same
/// l0_j + tau^2 (S_j^2 - I_j) / 2 as the exact integral.
fn at_zero(d: &Grouped) -> AtZero {
    use rayon::prelude::*;
    let p = d.p;
    let groups = d.start.len() - 1;
    /// One country's sums at beta: log-likelihood, score (p), lower triangle of the
    /// information (p x p, row-major), S_j and I_j.
    struct CountrySums {
        ll: f64,
        score: Vec<f64>,
        info: Vec<f64>,
        s: f64,
        v: f64,
    }
    let sums = |beta: &Array1<f64>| -> (f64, Array1<f64>, Array2<f64>, f64) {
        let parts: Vec<CountrySums> = (0..groups)
            .into_par_iter()
            .map(|j| {
                let mut ll = 0.0;
                let mut score = vec![0.0; p];
                let mut info = vec![0.0; p * p];
                let (mut s, mut v) = (0.0, 0.0);
                for r in d.start[j]..d.start[j + 1] {
                    let row = &d.x[r * p..(r + 1) * p];
                    let eta: f64 = row.iter().zip(beta.iter()).map(|(x, c)| x * c).sum();
                    let (pr, l1p) = logistic_parts(eta);
                    let w = d.w[r];
                    ll += w * (d.y[r] * eta - l1p);
                    let resid = w * (d.y[r] - pr);
                    let var = w * pr * (1.0 - pr);
                    s += resid;
                    v += var;
                    for a in 0..p {
                        score[a] += resid * row[a];
                        let va = var * row[a];
                        for b in 0..=a {
                            info[a * p + b] += va * row[b];
                        }
                    }
                }
                CountrySums {
                    ll,
                    score,
                    info,
                    s,
                    v,
                }
            })
            .collect();
        let mut ll = 0.0;
        let mut score = Array1::<f64>::zeros(p);
        let mut info = Array2::<f64>::zeros((p, p));
        let mut tau2_score = 0.0;
        for c in parts {
            ll += c.ll;
            tau2_score += (c.s * c.s - c.v) / 2.0;
            for a in 0..p {
                score[a] += c.score[a];
                for b in 0..=a {
                    info[[a, b]] += c.info[a * p + b];
                }
            }
        }
        for a in 0..p {
            for b in 0..a {
                info[[b, a]] = info[[a, b]];
            }
        }
        (ll, score, info, tau2_score)
    };
    let mut beta = Array1::<f64>::zeros(p);
    let mut converged = false;
    let (mut ll, mut score, mut info, mut tau2_score) = sums(&beta);
    for _ in 0..50 {
        let Ok(step) = linalg::solve_spd(info.view(), score.view()) else {
            break;
        };
        if step.iter().any(|v| !v.is_finite()) {
            break;
        }
        let step = step.mapv(|v| v.clamp(-5.0, 5.0));
        beta += &step;
        (ll, score, info, tau2_score) = sums(&beta);
        if step
            .iter()
            .all(|s| s.abs() < 1e-10 * (1.0 + beta.iter().fold(0.0f64, |m, b| m.max(b.abs()))))
        {
            converged = ll.is_finite() && beta.iter().all(|b| b.is_finite());
            break;
        }
    }
    AtZero {
        beta,
        log_lik: ll,
        info,
        tau2_score,
        converged,
    }
}

/// Standard errors from the diagonal of a covariance: NaN where a variance is negative
/// or not a number (the covariance was not estimable there).
fn standard_errors(cov: &Array2<f64>) -> Vec<f64> {
    (0..cov.nrows())
        .map(|k| {
            let v = cov[[k, k]];
            if v.is_finite() && v >= 0.0 {
                v.sqrt()
            } else {
                f64::NAN
            }
        })
        .collect()
}

/// The fit at the boundary tau = 0: the ordinary logistic regression, whose information is
/// the Laplace approximation's in b there (its cross terms with tau vanish, the
/// likelihood being even in tau); every country's mode and conditional variance 0.
fn boundary_fit(
    zero: &AtZero,
    grouped: &Grouped,
    data: &Data,
    groups: usize,
    iterations: usize,
) -> MultilevelFit {
    let p = grouped.p;
    let cov = linalg::inverse_spd(zero.info.view())
        .unwrap_or_else(|_| Array2::from_elem((p, p), f64::NAN));
    let se = standard_errors(&cov);
    MultilevelFit {
        coef: zero.beta.to_vec(),
        se,
        cov,
        country_sd: 0.0,
        residual_sd: None,
        log_likelihood: zero.log_lik,
        icc: None,
        modes: vec![0.0; data.n_groups],
        mode_variance: vec![0.0; data.n_groups],
        log_sd_variance: f64::NAN,
        n: data.y.len(),
        groups,
        converged: zero.converged,
        at_boundary: true,
        iterations,
        weighted: data.weight.is_some(),
    }
}

/// Where a Newton search ended.
struct Ascent {
    params: Vec<f64>,
    converged: bool,
    /// Stopped at the boundary tau = 0 (see [`newton`]).
    at_boundary: bool,
    iterations: usize,
}

/// An approximate Hessian at the parameters (for Newton steps).
type Approximate<'a> = dyn Fn(&[f64], &mut [f64], &mut [f64]) -> Array2<f64> + 'a;

type Objective<'a> = dyn Fn(&[f64], &mut [f64], &mut [f64], Option<&mut [f64]>) -> f64 + 'a;

/// Hessian by differences of the gradient: central (steps 1e-4), or forward (steps 1e-5,
/// half the evaluations) where the gradient is analytic and so accurate enough.
fn numeric_hessian(
    params: &[f64],
    objective: &Objective,
    modes: &mut [f64],
    curvature: &mut [f64],
    central: bool,
) -> Array2<f64> {
    let k = params.len();
    let mut h = Array2::<f64>::zeros((k, k));
    let mut q = params.to_vec();
    let mut gu = vec![0.0; k];
    let mut gd = vec![0.0; k];
    let mut g0 = vec![0.0; k];
    if !central {
        objective(params, modes, curvature, Some(&mut g0));
    }
    for a in 0..k {
        let step = if central { 1e-4 } else { 1e-5 } * (1.0 + params[a].abs());
        q[a] = params[a] + step;
        objective(&q, modes, curvature, Some(&mut gu));
        q[a] = params[a];
        if !central {
            for b in 0..k {
                h[[a, b]] = (gu[b] - g0[b]) / step;
            }
            continue;
        }
        q[a] = params[a] - step;
        objective(&q, modes, curvature, Some(&mut gd));
        q[a] = params[a];
        for b in 0..k {
            h[[a, b]] = (gu[b] - gd[b]) / (2.0 * step);
        }
    }
    // Symmetrise.
    for a in 0..k {
        for b in 0..a {
            let m = (h[[a, b]] + h[[b, a]]) / 2.0;
            h[[a, b]] = m;
            h[[b, a]] = m;
        }
    }
    h
}

/// Maximises `objective` by Newton steps with a Hessian from differences of the gradient,
/// damped (Levenberg) when not negative definite and halved until the value improves.
///
/// `boundary`: the log-likelihood at tau = 0 when that boundary is a local maximum of the
/// profile. In log tau the boundary lies at minus infinity and the gradient there fades
/// like tau^2, so steps toward it never meet the convergence test; instead the search
/// stops at the boundary as soon as its gradient in log tau points there and the
/// boundary's value is at least the current one (as lme4's bounded optimiser stops at
/// theta = 0; Bates et al. 2015, J. Stat. Softw. 67(1), sec. 5).
fn newton(
    params: &mut Vec<f64>,
    objective: impl Fn(&[f64], &mut [f64], &mut [f64], Option<&mut [f64]>) -> f64,
    approximate: Option<&Approximate>,
    boundary: Option<f64>,
    modes: &mut [f64],
    curvature: &mut [f64],
) -> Ascent {
    let k = params.len();
    let mut grad = vec![0.0; k];
    let mut value = objective(params, modes, curvature, Some(&mut grad));
    let mut converged = false;
    let mut iterations = 0;
    for _ in 0..100 {
        if let Some(at_zero) = boundary {
            if grad[k - 1] <= 0.0 && at_zero >= value - 1e-10 * value.abs().max(1.0) {
                return Ascent {
                    params: params.clone(),
                    converged: true,
                    at_boundary: true,
                    iterations,
                };
            }
        }
        iterations += 1;
        let hessian = match approximate {
            Some(f) => f(params, modes, curvature),
            None => {
                let h = numeric_hessian(params, &objective, modes, curvature, true);
                objective(params, modes, curvature, None);
                h
            }
        };
        let neg = -&hessian;
        let g = Array1::from(grad.clone());
        let mut lambda = 0.0;
        let step = loop {
            let mut a = neg.clone();
            let scale = (0..k).map(|i| neg[[i, i]].abs()).fold(1e-8, f64::max);
            for i in 0..k {
                a[[i, i]] += lambda * scale;
            }
            match linalg::solve_spd(a.view(), g.view()) {
                Ok(s) => break s,
                Err(_) => {
                    lambda = if lambda == 0.0 { 1e-6 } else { lambda * 10.0 };
                    if lambda > 1e6 {
                        break g.mapv(|v| v / scale);
                    }
                }
            }
        };
        let mut step: Vec<f64> = step.to_vec();
        // Keep log tau from leaping (tau below e^-12 counts as the boundary).
        let max_step = step.iter().fold(0.0f64, |m, s| m.max(s.abs()));
        if max_step > 3.0 {
            step.iter_mut().for_each(|s| *s *= 3.0 / max_step);
        }
        let decrement: f64 = step.iter().zip(&grad).map(|(s, g)| s * g).sum();
        if decrement.abs() < 1e-10 {
            converged = true;
            break;
        }
        let saved_modes = modes.to_vec();
        let mut improved = false;
        let mut trial = params.clone();
        let mut t = 1.0;
        for _ in 0..30 {
            for i in 0..k {
                trial[i] = params[i] + t * step[i];
            }
            trial[k - 1] = trial[k - 1].max(-12.0);
            let mut gt = vec![0.0; k];
            let vt = objective(&trial, modes, curvature, Some(&mut gt));
            // Accept only what does not fall below the current value beyond rounding: a
            // looser allowance (it was 1e-10 relative) let steps that overshoot by a
            // little be taken back and forth without end.
            if vt.is_finite() && vt >= value - 1e-13 * value.abs().max(1.0) {
                *params = trial.clone();
                value = vt;
                grad = gt;
                improved = true;
                break;
            }
            modes.copy_from_slice(&saved_modes);
            t /= 2.0;
        }
        if !improved {
            converged = grad.iter().all(|g| g.abs() < 1e-4);
            break;
        }
    }
    Ascent {
        params: params.clone(),
        converged,
        at_boundary: false,
        iterations,
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn repeated_rows_of_a_country_merge_into_one_with_the_same_likelihood() {
        // Two countries; rows 0, 1 and 3 of country 0 share x, as do rows 4 and 5 of
        // country 1; row 2 is alone. Merged: country 0 keeps 2 rows, country 1 keeps 1.
        let x = ndarray::array![
            [1.0, 30.0, 0.0],
            [1.0, 30.0, 0.0],
            [1.0, 41.0, 1.0],
            [1.0, 30.0, 0.0],
            [1.0, 30.0, 0.0],
            [1.0, 30.0, 0.0],
        ];
        let y = [1.0, 0.0, 1.0, 1.0, 0.0, 1.0];
        let group = [0usize, 0, 0, 0, 1, 1];
        let weight = [1.0, 2.0, 1.0, 0.5, 1.0, 3.0];
        let data = Data {
            x: x.view(),
            y: &y,
            group: &group,
            n_groups: 2,
            weight: None,
        };
        let merged = Grouped::new(&data, Some(&weight));
        assert_eq!(merged.start, vec![0, 2, 3]);
        assert_eq!(
            merged.x,
            vec![1.0, 30.0, 0.0, 1.0, 41.0, 1.0, 1.0, 30.0, 0.0]
        );
        assert_eq!(merged.w, vec![3.5, 1.0, 4.0]);
        // The weighted shares of 1s: (1 + 0.5) / 3.5, 1, 3 / 4.
        assert_eq!(merged.y, vec![1.5 / 3.5, 1.0, 0.75]);
        // The same rows written out one by one, as before merging.
        let written_out = Grouped {
            p: 3,
            x: [0usize, 1, 2, 3, 4, 5]
                .iter()
                .flat_map(|&i| x.row(i).to_vec())
                .collect(),
            y: y.to_vec(),
            w: weight.to_vec(),
            start: vec![0, 4, 6],
        };
        let beta = [-2.0, 0.05, 0.3];
        for agq in [1usize, 5] {
            let model = |d| Logistic {
                data: d,
                nodes: if agq == 1 {
                    (vec![0.0], vec![std::f64::consts::PI.sqrt()])
                } else {
                    gauss_hermite(agq)
                },
                agq,
            };
            for j in 0..2 {
                let a = model(&merged).country(j, &beta, 0.4, 0.0, true, true);
                let b = model(&written_out).country(j, &beta, 0.4, 0.0, true, true);
                let close = |u: f64, v: f64| (u - v).abs() <= 1e-12 * (1.0 + v.abs());
                assert!(close(a.mode, b.mode) && close(a.curvature, b.curvature));
                assert!(close(a.log_lik, b.log_lik), "{} {}", a.log_lik, b.log_lik);
                assert_eq!(a.grad.len(), b.grad.len());
                assert_eq!(a.hess.len(), b.hess.len());
                assert!(a.grad.iter().zip(&b.grad).all(|(u, v)| close(*u, *v)));
                assert!(a.hess.iter().zip(&b.hess).all(|(u, v)| close(*u, *v)));
            }
        }
        let (a, b) = (at_zero(&merged), at_zero(&written_out));
        assert!((a.log_lik - b.log_lik).abs() < 1e-10);
        assert!(a
            .beta
            .iter()
            .zip(&b.beta)
            .all(|(u, v)| (u - v).abs() < 1e-8));
    }

    #[test]
    fn rows_that_hardly_repeat_stop_being_looked_up() {
        // 1,100 distinct rows, then row 0 ten times more: the first 1,024 rows were all new,
        // so the rest go in as they are (1,110 rows), with the likelihood unchanged.
        let n = 1110;
        let x = Array2::from_shape_fn((n, 2), |(i, j)| {
            if j == 0 {
                1.0
            } else {
                (if i < 1100 { i } else { 0 }) as f64 / 1100.0
            }
        });
        let y: Vec<f64> = (0..n).map(|i| f64::from(u8::from(i % 3 == 0))).collect();
        let group = vec![0usize; n];
        let data = Data {
            x: x.view(),
            y: &y,
            group: &group,
            n_groups: 1,
            weight: None,
        };
        let grouped = Grouped::new(&data, None);
        assert_eq!(grouped.w.len(), n);
        assert!(grouped.w.iter().all(|&w| w == 1.0));
        assert_eq!(grouped.y, y);
        let model = Logistic {
            data: &grouped,
            nodes: (vec![0.0], vec![std::f64::consts::PI.sqrt()]),
            agq: 1,
        };
        let c = model.country(0, &[-0.5, 0.2], 0.3, 0.0, false, false);
        assert!(c.log_lik.is_finite());
    }

    #[test]
    fn gauss_hermite_integrates_moments() {
        // Exact moments of exp(-z^2): sqrt(pi), 0, sqrt(pi)/2, 0, 3 sqrt(pi)/4 (common practice).
        for k in [1usize, 2, 5, 10, 20] {
            let (x, w) = gauss_hermite(k);
            let m = |e: i32| -> f64 { x.iter().zip(&w).map(|(x, w)| w * x.powi(e)).sum() };
            let sp = std::f64::consts::PI.sqrt();
            assert!((m(0) - sp).abs() < 1e-12, "k={k}");
            if k >= 2 {
                assert!((m(2) - sp / 2.0).abs() < 1e-12, "k={k}");
            }
            if k >= 3 {
                assert!((m(4) - 3.0 * sp / 4.0).abs() < 1e-11, "k={k}");
            }
        }
    }

    #[test]
    fn rejects_bad_input() {
        let x = Array2::<f64>::ones((3, 1));
        let data = Data {
            x: x.view(),
            y: &[1.0, 2.0, f64::NAN],
            group: &[0, 1, 1],
            n_groups: 2,
            weight: None,
        };
        assert_eq!(
            fit_linear(&data, Criterion::Reml),
            Err(MultilevelError::NotFinite(2))
        );
        let data = Data {
            y: &[1.0, 2.0, 3.0],
            group: &[0, 0, 0],
            ..data
        };
        assert_eq!(
            fit_linear(&data, Criterion::Reml),
            Err(MultilevelError::TooFewGroups(1))
        );
    }
}
