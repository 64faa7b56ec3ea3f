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

/// The convex hull of points in the plane, counter-clockwise, by Andrew's monotone chain
/// (Andrew 1979, Inf. Process. Lett. 9, 216-219). Fewer than three distinct points give
/// the distinct points themselves (a segment or a point).
pub fn convex_hull(points: &[(f64, f64)]) -> Vec<(f64, f64)> {
    let mut p: Vec<(f64, f64)> = points
        .iter()
        .copied()
        .filter(|(x, y)| x.is_finite() && y.is_finite())
        .collect();
    p.sort_by(|a, b| a.0.total_cmp(&b.0).then(a.1.total_cmp(&b.1)));
    p.dedup();
    if p.len() < 3 {
        return p;
    }
    let cross = |o: (f64, f64), a: (f64, f64), b: (f64, f64)| {
        (a.0 - o.0) * (b.1 - o.1) - (a.1 - o.1) * (b.0 - o.0)
    };
    let mut hull: Vec<(f64, f64)> = Vec::with_capacity(2 * p.len());
    for pass in 0..2 {
        let start = hull.len();
        let iter: Box<dyn Iterator<Item = &(f64, f64)>> = if pass == 0 {
            Box::new(p.iter())
        } else {
            Box::new(p.iter().rev())
        };
        for &q in iter {
            while hull.len() >= start + 2
                && cross(hull[hull.len() - 2], hull[hull.len() - 1], q) <= 0.0
            {
                hull.pop();
            }
            hull.push(q);
        }
        hull.pop();
    }
    hull
}

/// Whether `q` lies inside or on the convex polygon `hull` (counter-clockwise, from
/// [`convex_hull`]), with a relative tolerance for points on an edge. A hull of fewer than
/// three points contains nothing but its own points.
pub fn inside_hull(hull: &[(f64, f64)], q: (f64, f64)) -> bool {
    if hull.len() < 3 {
        return hull.contains(&q);
    }
    let scale = hull
        .iter()
        .fold(1e-12f64, |m, p| m.max(p.0.abs()).max(p.1.abs()));
    (0..hull.len()).all(|i| {
        let (a, b) = (hull[i], hull[(i + 1) % hull.len()]);
        (b.0 - a.0) * (q.1 - a.1) - (b.1 - a.1) * (q.0 - a.0) >= -1e-12 * scale * scale
    })
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn hull_of_a_square_with_inner_points() {
        // Common practice: a unit square with points inside and on an edge.
        let pts = [
            (0.0, 0.0),
            (1.0, 0.0),
            (1.0, 1.0),
            (0.0, 1.0),
            (0.5, 0.5),
            (0.5, 0.0),
            (0.2, 0.7),
        ];
        let hull = convex_hull(&pts);
        assert_eq!(hull.len(), 4, "{hull:?}");
        assert!(inside_hull(&hull, (0.3, 0.3)));
        assert!(inside_hull(&hull, (1.0, 0.5)));
        assert!(!inside_hull(&hull, (1.01, 0.5)));
        assert!(!inside_hull(&hull, (-0.5, -0.5)));
        // Collinear points: a segment contains nothing else.
        let line = convex_hull(&[(0.0, 0.0), (1.0, 1.0), (2.0, 2.0)]);
        assert!(!inside_hull(&line, (0.5, 0.6)));
    }
}
