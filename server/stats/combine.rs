//! Combining estimates from M completed (multiply imputed) data sets by Rubin's rules.
//!
//! For a scalar estimand with completed-data estimates q_1..q_M and their variances
//! u_1..u_M (Rubin 1987, ch. 3; van Buuren 2018, section 2.3):
//!
//!   q̄ = mean(q_m),  W = mean(u_m),  B = sum (q_m - q̄)² / (M - 1),
//!   T = W + (1 + 1/M) B,
//!   r = (1 + 1/M) B / W (relative increase in variance), λ = (1 + 1/M) B / T.
//!
//! Degrees of freedom by Barnard & Rubin (1999) with complete-data degrees of freedom
//! ν_com (for a model of n countries with k coefficients, n − k):
//!
//!   ν_old = (M − 1) / λ²,  ν_obs = (ν_com + 1) / (ν_com + 3) ν_com (1 − λ),
//!   ν = ν_old ν_obs / (ν_old + ν_obs),
//!
//! with λ held at no less than 1e-4 in these formulas (as R's `mice` does) so that an
//! estimand the imputations do not move gets ν ≈ ν_obs rather than a division by zero.
//! The fraction of missing information is γ = (r + 2 / (ν + 3)) / (r + 1) (Rubin 1987,
//! eq. 3.1.10, with ν for the large-sample ν_old as in `mice::pool`).
//!
//! An estimand without within-imputation variance (W = 0: a quantity computed exactly on
//! each completed frame, such as the planner's expected objective) has r = ∞ and γ = 1
//! when the imputations disagree (all its uncertainty comes from the missing values) and
//! r = 0 when they agree; with ν_com = ∞ it then gets ν = M − 1.

use serde::Serialize;

use super::regression::student;

#[derive(Debug, Clone, PartialEq, thiserror::Error)]
pub enum CombineError {
    #[error("Rubin's rules need at least two imputations, not {0}")]
    TooFewImputations(usize),
    #[error("{estimates} estimates but {variances} variances")]
    Lengths { estimates: usize, variances: usize },
    #[error("an estimate or variance is not a finite number (imputation {0})")]
    NotFinite(usize),
    #[error("the complete-data degrees of freedom must be positive, not {0}")]
    DegreesOfFreedom(f64),
}

/// One scalar estimand combined over the imputations.
#[derive(Debug, Clone, Serialize)]
pub struct Pooled {
    pub estimate: f64,
    /// Mean within-imputation variance W.
    pub within: f64,
    /// Between-imputation variance B.
    pub between: f64,
    /// Total variance T = W + (1 + 1/M) B.
    pub total: f64,
    pub se: f64,
    /// Barnard-Rubin degrees of freedom.
    pub df: f64,
    /// Relative increase in variance due to missing values, r.
    pub riv: f64,
    /// Proportion of the total variance due to missing values, λ.
    pub lambda: f64,
    /// Fraction of missing information γ.
    pub fmi: f64,
    /// 95% interval q̄ ± t_{ν, 0.975} √T.
    pub ci95_low: f64,
    pub ci95_high: f64,
    pub imputations: usize,
}

/// Rubin's rules for one scalar (see the module comment). `df_complete` is ν_com; pass
/// `f64::INFINITY` for a large-sample estimand (then ν = ν_old).
pub fn pool(
    estimates: &[f64],
    variances: &[f64],
    df_complete: f64,
) -> Result<Pooled, CombineError> {
    let m = estimates.len();
    if variances.len() != m {
        return Err(CombineError::Lengths {
            estimates: m,
            variances: variances.len(),
        });
    }
    if m < 2 {
        return Err(CombineError::TooFewImputations(m));
    }
    if df_complete.is_nan() || df_complete <= 0.0 {
        return Err(CombineError::DegreesOfFreedom(df_complete));
    }
    for (i, (q, u)) in estimates.iter().zip(variances).enumerate() {
        if !q.is_finite() || !u.is_finite() || *u < 0.0 {
            return Err(CombineError::NotFinite(i + 1));
        }
    }
    let mf = m as f64;
    let qbar = estimates.iter().sum::<f64>() / mf;
    let within = variances.iter().sum::<f64>() / mf;
    let between = estimates.iter().map(|q| (q - qbar).powi(2)).sum::<f64>() / (mf - 1.0);
    let inflated = (1.0 + 1.0 / mf) * between;
    let total = within + inflated;
    // With no variance at all (every imputation agrees and none has sampling variance)
    // nothing is lost to the missing values: r = 0 rather than 0/0.
    let riv = if within > 0.0 {
        inflated / within
    } else if inflated > 0.0 {
        f64::INFINITY
    } else {
        0.0
    };
    let lambda = if total > 0.0 { inflated / total } else { 0.0 };
    let df = barnard_rubin(mf, lambda, df_complete);
    let fmi = if riv.is_finite() {
        (riv + 2.0 / (df + 3.0)) / (riv + 1.0)
    } else {
        1.0
    };
    let se = total.sqrt();
    let q = if df.is_finite() {
        student::upper_quantile(0.975, df)
    } else {
        super::normal::quantile(0.975)
    };
    Ok(Pooled {
        estimate: qbar,
        within,
        between,
        total,
        se,
        df,
        riv,
        lambda,
        fmi,
        ci95_low: qbar - q * se,
        ci95_high: qbar + q * se,
        imputations: m,
    })
}

/// Barnard & Rubin (1999) degrees of freedom (λ floored at 1e-4, as in `mice`).
pub fn barnard_rubin(m: f64, lambda: f64, df_complete: f64) -> f64 {
    let lambda = lambda.max(1e-4);
    let old = (m - 1.0) / (lambda * lambda);
    if df_complete.is_infinite() {
        return old;
    }
    let obs = (df_complete + 1.0) / (df_complete + 3.0) * df_complete * (1.0 - lambda);
    old * obs / (old + obs)
}

/// A diagnostic that is not an estimate (an SMD, an effective number of countries, a
/// weight): its mean over the imputations and its range.
#[derive(Debug, Clone, Copy, Serialize, PartialEq)]
pub struct Spread {
    pub mean: f64,
    pub min: f64,
    pub max: f64,
}

/// Mean and range of the finite values; `None` when there are none.
pub fn spread(values: &[f64]) -> Option<Spread> {
    let finite: Vec<f64> = values.iter().copied().filter(|v| v.is_finite()).collect();
    if finite.is_empty() {
        return None;
    }
    Some(Spread {
        mean: finite.iter().sum::<f64>() / finite.len() as f64,
        min: finite.iter().copied().fold(f64::INFINITY, f64::min),
        max: finite.iter().copied().fold(f64::NEG_INFINITY, f64::max),
    })
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Hand-computed example (from the formulas above): q = 1, 2, 3; u = 1 each.
    #[test]
    fn small_example() {
        let p = pool(&[1.0, 2.0, 3.0], &[1.0, 1.0, 1.0], 10.0).unwrap();
        assert!((p.estimate - 2.0).abs() < 1e-12);
        assert!((p.between - 1.0).abs() < 1e-12);
        assert!((p.total - (1.0 + 4.0 / 3.0)).abs() < 1e-12);
        assert!(pool(&[1.0], &[1.0], 10.0).is_err());
        assert!(pool(&[1.0, 2.0], &[1.0], 10.0).is_err());
        assert!(pool(&[1.0, f64::NAN], &[1.0, 1.0], 10.0).is_err());
    }

    /// No within-imputation variance (from the formulas above): q = 1, 2, 3 with u = 0
    /// gives T = (1 + 1/3) B = 4/3, λ = γ = 1 and ν = M − 1 = 2 for ν_com = ∞; identical
    /// estimates give T = 0 and r = 0.
    #[test]
    fn no_within_imputation_variance() {
        let p = pool(&[1.0, 2.0, 3.0], &[0.0; 3], f64::INFINITY).unwrap();
        assert!((p.total - 4.0 / 3.0).abs() < 1e-12);
        assert!((p.df - 2.0).abs() < 1e-9, "{}", p.df);
        assert_eq!(p.fmi, 1.0);
        assert!(p.ci95_low < 1.0 && p.ci95_high > 3.0);
        let same = pool(&[2.0; 4], &[0.0; 4], f64::INFINITY).unwrap();
        assert_eq!(same.total, 0.0);
        assert_eq!(same.riv, 0.0);
        assert!(same.fmi < 1e-6);
        assert_eq!((same.ci95_low, same.ci95_high), (2.0, 2.0));
    }
}
