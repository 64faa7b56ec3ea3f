//! Principal components of standardised indicators.

use linfa_linalg::eigh::Eigh;
use ndarray::{Array1, Array2, ArrayView2, Axis};

#[derive(Debug, Clone)]
pub struct Components {
    /// Eigenvalues of the correlation matrix, descending (variances of the components).
    pub eigenvalues: Vec<f64>,
    /// Share of the total variance explained by each component.
    pub explained: Vec<f64>,
    /// `loadings[[j, c]]`: weight of indicator j in component c (unit-length columns).
    pub loadings: Array2<f64>,
    /// `scores[[i, c]]`: unit i's value on component c.
    pub scores: Array2<f64>,
}

#[derive(Debug, Clone, PartialEq, thiserror::Error)]
pub enum PcaError {
    #[error("principal components need at least two units and two indicators")]
    TooSmall,
    #[error("indicator {0} does not vary, so it cannot be standardised")]
    Constant(usize),
    #[error("the eigen decomposition failed")]
    Decomposition,
}

/// Principal components of the correlation matrix (Jolliffe 2002, ch. 2): columns are
/// standardised with the n - 1 standard deviation, R = Z'Z / (n - 1) is decomposed as
/// R = V diag(l) V', scores are Z V. Signs are fixed so that each component's largest
/// absolute loading is positive (components are defined only up to sign).
pub fn principal_components(x: ArrayView2<f64>) -> Result<Components, PcaError> {
    let (n, p) = x.dim();
    if n < 2 || p < 2 {
        return Err(PcaError::TooSmall);
    }
    let mean = x.mean_axis(Axis(0)).ok_or(PcaError::TooSmall)?;
    let mut z = &x - &mean;
    for (j, mut column) in z.axis_iter_mut(Axis(1)).enumerate() {
        let sd = (column.iter().map(|v| v * v).sum::<f64>() / (n - 1) as f64).sqrt();
        if sd.is_nan() || sd <= 0.0 {
            return Err(PcaError::Constant(j));
        }
        column /= sd;
    }
    let r = z.t().dot(&z) / (n - 1) as f64;
    let (values, vectors) = r.eigh().map_err(|_| PcaError::Decomposition)?;
    let mut order: Vec<usize> = (0..p).collect();
    order.sort_by(|&a, &b| values[b].total_cmp(&values[a]));
    let eigenvalues: Vec<f64> = order.iter().map(|&c| values[c].max(0.0)).collect();
    let total: f64 = eigenvalues.iter().sum();
    let mut loadings = Array2::<f64>::zeros((p, p));
    for (k, &c) in order.iter().enumerate() {
        let mut v: Array1<f64> = vectors.column(c).to_owned();
        let largest = v
            .iter()
            .fold(0.0f64, |m, &x| if x.abs() > m.abs() { x } else { m });
        if largest < 0.0 {
            v *= -1.0;
        }
        loadings.column_mut(k).assign(&v);
    }
    let scores = z.dot(&loadings);
    Ok(Components {
        explained: eigenvalues.iter().map(|l| l / total).collect(),
        eigenvalues,
        loadings,
        scores,
    })
}
