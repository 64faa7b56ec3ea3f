//! Small dense linear algebra around the Cholesky decomposition.

use ndarray::{Array1, Array2, ArrayView1, ArrayView2};

#[derive(Debug, Clone, PartialEq, thiserror::Error)]
pub enum LinalgError {
    /// The matrix is singular or nearly so: typically collinear or constant columns.
    #[error("the matrix is singular or nearly so (collinear or constant columns)")]
    Singular,
}

/// Relative pivot size below which a matrix counts as singular.
const PIVOT_TOLERANCE: f64 = 1e-13;

/// Lower Cholesky factor L of a symmetric positive-definite A (A = L L').
pub fn cholesky(a: ArrayView2<f64>) -> Result<Array2<f64>, LinalgError> {
    if a.nrows() == 0 {
        return Ok(Array2::zeros((0, 0)));
    }
    let max_diag = a.diag().iter().fold(0.0f64, |m, &d| m.max(d.abs()));
    lower_factor(a, PIVOT_TOLERANCE * max_diag).ok_or(LinalgError::Singular)
}

/// The Cholesky-Banachiewicz recurrence (Golub & Van Loan, Matrix Computations, 4.2.5):
/// l_jj = sqrt(a_jj - sum_{k<j} l_jk^2), l_ij = (a_ij - sum_{k<j} l_ik l_jk) / l_jj for
/// i > j, reading the lower triangle of A; `None` as soon as a diagonal element l_jj is
/// not finite or l_jj^2 is not above `floor` (a pivot that is not positive, or too small
/// to trust: the rest of the factor would not be used). Rows are kept contiguous so that
/// each sum is a dot product of two row prefixes ([`dot`]; the small factorisations of
/// the fits' Newton steps run thousands of times per bootstrap, and the over-identified
/// balancing fit's halvings often stop at a nearly singular one).
fn lower_factor(a: ArrayView2<f64>, floor: f64) -> Option<Array2<f64>> {
    let n = a.nrows();
    if a.ncols() != n {
        return None;
    }
    let mut l = vec![0.0; n * n];
    for i in 0..n {
        let (done, rest) = l.split_at_mut(i * n);
        let row_i = &mut rest[..n];
        for j in 0..i {
            let row_j = &done[j * n..j * n + j];
            let s = dot(&row_i[..j], row_j);
            row_i[j] = (a[[i, j]] - s) / done[j * n + j];
        }
        let d = a[[i, i]] - dot(&row_i[..i], &row_i[..i]);
        if d.is_nan() || d <= 0.0 {
            return None;
        }
        let lii = d.sqrt();
        if !lii.is_finite() || lii * lii <= floor {
            return None;
        }
        row_i[i] = lii;
    }
    Array2::from_shape_vec((n, n), l).ok()
}

/// The dot product of two equally long slices, summed in four interleaved partial sums:
/// the additions of one long chain wait on each other, four chains overlap (the
/// factorisations and solves of the Newton steps are made of such short products).
fn dot(a: &[f64], b: &[f64]) -> f64 {
    debug_assert_eq!(a.len(), b.len());
    let mut acc = [0.0f64; 4];
    let (a4, b4) = (a.chunks_exact(4), b.chunks_exact(4));
    let (ra, rb) = (a4.remainder(), b4.remainder());
    for (x, y) in a4.zip(b4) {
        acc[0] += x[0] * y[0];
        acc[1] += x[1] * y[1];
        acc[2] += x[2] * y[2];
        acc[3] += x[3] * y[3];
    }
    let tail: f64 = ra.iter().zip(rb).map(|(x, y)| x * y).sum();
    (acc[0] + acc[1]) + (acc[2] + acc[3]) + tail
}

/// L^-1 B for the lower factor L and a matrix B of right-hand sides, by forward
/// substitution row by row: M'A^-1 M = (L^-1 M)'(L^-1 M) needs only this half of a solve.
pub fn forward_substitute(l: &Array2<f64>, b: ArrayView2<f64>) -> Array2<f64> {
    let (n, c) = b.dim();
    let mut y = b.as_standard_layout().into_owned();
    let lower = l.as_standard_layout();
    let (Some(ys), Some(ls)) = (y.as_slice_mut(), lower.as_slice()) else {
        return Array2::zeros((n, c));
    };
    for i in 0..n {
        let (done, rest) = ys.split_at_mut(i * c);
        let row = &mut rest[..c];
        for j in 0..i {
            let lij = ls[i * n + j];
            if lij != 0.0 {
                for (r, v) in row.iter_mut().zip(&done[j * c..(j + 1) * c]) {
                    *r -= lij * v;
                }
            }
        }
        let lii = ls[i * n + i];
        for r in row.iter_mut() {
            *r /= lii;
        }
    }
    y
}

/// Solves L L' x = b given the lower factor L: forward substitution by rows of L, then
/// back substitution by columns of L' (rows of L again), so that every pass reads L
/// contiguously.
pub fn cholesky_solve(l: &Array2<f64>, b: ArrayView1<f64>) -> Array1<f64> {
    let n = b.len();
    let lower = l.as_standard_layout();
    let Some(ls) = lower.as_slice() else {
        return Array1::from_elem(n, f64::NAN);
    };
    let mut y: Vec<f64> = b.to_vec();
    for i in 0..n {
        let row = &ls[i * n..i * n + i];
        y[i] = (y[i] - dot(row, &y[..i])) / ls[i * n + i];
    }
    // L' x = y: x_i = (y_i - sum_{k>i} l_ki x_k) / l_ii, with each solved x_i taken out of
    // the remaining right-hand sides along row i of L.
    for i in (0..n).rev() {
        let xi = y[i] / ls[i * n + i];
        y[i] = xi;
        let row = &ls[i * n..i * n + i];
        for (yk, lik) in y[..i].iter_mut().zip(row) {
            *yk -= lik * xi;
        }
    }
    Array1::from_vec(y)
}

/// Solves A x = b for symmetric positive-definite A.
pub fn solve_spd(a: ArrayView2<f64>, b: ArrayView1<f64>) -> Result<Array1<f64>, LinalgError> {
    Ok(cholesky_solve(&cholesky(a)?, b))
}

/// Inverse of a symmetric positive-definite matrix.
pub fn inverse_spd(a: ArrayView2<f64>) -> Result<Array2<f64>, LinalgError> {
    let l = cholesky(a)?;
    let n = a.nrows();
    let mut inv = Array2::<f64>::zeros((n, n));
    let mut e = Array1::<f64>::zeros(n);
    for j in 0..n {
        e.fill(0.0);
        e[j] = 1.0;
        inv.column_mut(j).assign(&cholesky_solve(&l, e.view()));
    }
    // Symmetrise against rounding.
    let t = inv.t().to_owned();
    Ok((inv + t) * 0.5)
}

/// log |A| for symmetric positive-definite A.
pub fn log_det_spd(a: ArrayView2<f64>) -> Result<f64, LinalgError> {
    Ok(2.0 * cholesky(a)?.diag().iter().map(|d| d.ln()).sum::<f64>())
}

/// X' diag(w) X.
pub fn weighted_cross_product(x: ArrayView2<f64>, w: ArrayView1<f64>) -> Array2<f64> {
    let mut xw = x.to_owned();
    for (mut row, &wi) in xw.rows_mut().into_iter().zip(w.iter()) {
        row *= wi;
    }
    x.t().dot(&xw)
}

/// Each row's products x_ia x_ib (a <= b) as one n × k(k+1)/2 matrix, so that
/// X' diag(w) X for several weight vectors w at once is a single matrix product P'W
/// (for fits that form such sums many times over the same X, e.g. the over-identified
/// covariate-balancing fit: it halves the arithmetic and avoids a copy of X per sum).
pub struct RowPairs {
    k: usize,
    pairs: Array2<f64>,
}

impl RowPairs {
    pub fn new(x: ArrayView2<f64>) -> Self {
        let (n, k) = x.dim();
        let m = k * (k + 1) / 2;
        let mut pairs = Array2::<f64>::zeros((n, m));
        for (row, mut out) in x.rows().into_iter().zip(pairs.rows_mut()) {
            let mut c = 0;
            for a in 0..k {
                for b in a..k {
                    out[c] = row[a] * row[b];
                    c += 1;
                }
            }
        }
        RowPairs { k, pairs }
    }

    /// X' diag(w_c) X for every column w_c of `w` (n × c), in column order.
    pub fn weighted(&self, w: ArrayView2<f64>) -> Vec<Array2<f64>> {
        let sums = self.sums(w);
        let k = self.k;
        (0..w.ncols())
            .map(|c| {
                let mut out = Array2::<f64>::zeros((k, k));
                self.place(&sums, c, &mut out, 0, 0);
                out
            })
            .collect()
    }

    /// The pair sums sum_i w_ic x_ia x_ib of every column c of `w` (n × c), one column of
    /// k(k+1)/2 pairs each: one matrix product for all of them.
    pub fn sums(&self, w: ArrayView2<f64>) -> Array2<f64> {
        self.pairs.t().dot(&w)
    }

    /// Writes column `c` of [`RowPairs::sums`] as the symmetric k × k matrix X' diag(w_c) X
    /// into `out` with its top-left corner at (`row`, `col`), so that a fit can assemble a
    /// matrix of such blocks without a copy per block.
    pub fn place(
        &self,
        sums: &Array2<f64>,
        c: usize,
        out: &mut Array2<f64>,
        row: usize,
        col: usize,
    ) {
        let k = self.k;
        let column = sums.column(c);
        let mut i = 0;
        for a in 0..k {
            for b in a..k {
                out[[row + a, col + b]] = column[i];
                out[[row + b, col + a]] = column[i];
                i += 1;
            }
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use ndarray::array;

    #[test]
    fn row_pairs_give_the_weighted_cross_products() {
        // Common practice: against the direct X' diag(w) X.
        let x = array![
            [1.0, 2.0, -1.0],
            [1.0, 0.5, 3.0],
            [1.0, -1.5, 0.25],
            [1.0, 4.0, 2.0]
        ];
        let w = array![[0.5, 1.0], [2.0, -1.0], [1.5, 0.0], [0.25, 3.0]];
        let sums = RowPairs::new(x.view()).weighted(w.view());
        assert_eq!(sums.len(), 2);
        for (c, sum) in sums.iter().enumerate() {
            // The definition, sum_i w_i x_ia x_ib, written out.
            let definition = Array2::from_shape_fn((3, 3), |(a, b)| {
                (0..4)
                    .map(|i| w[[i, c]] * x[[i, a]] * x[[i, b]])
                    .sum::<f64>()
            });
            let direct = weighted_cross_product(x.view(), w.column(c));
            assert_eq!(sum.dim(), (3, 3));
            assert_eq!(direct.dim(), (3, 3));
            for ((a, b), d) in sum.iter().zip(direct.iter()).zip(definition.iter()) {
                assert!((a - d).abs() < 1e-12, "{a} vs {d}");
                assert!((b - d).abs() < 1e-12, "{b} vs {d}");
            }
        }
    }

    /// A 3x3 SPD matrix, L L' with L = [[2,0,0],[6,1,0],[-8,5,3]].
    fn example_spd() -> Array2<f64> {
        array![
            [4.0, 12.0, -16.0],
            [12.0, 37.0, -43.0],
            [-16.0, -43.0, 98.0]
        ]
    }

    #[test]
    fn the_factor_of_a_known_matrix_is_its_known_factor() {
        // Common practice: A = L L' built from a known lower L is factorised back to L;
        // a matrix with a non-positive pivot is refused.
        let l = cholesky(example_spd().view()).unwrap();
        let known = array![[2.0, 0.0, 0.0], [6.0, 1.0, 0.0], [-8.0, 5.0, 3.0]];
        assert_eq!(l.dim(), (3, 3));
        for (a, b) in l.iter().zip(known.iter()) {
            assert!((a - b).abs() < 1e-12, "{a} vs {b}");
        }
        let indefinite = array![[1.0, 2.0], [2.0, 1.0]];
        assert_eq!(cholesky(indefinite.view()), Err(LinalgError::Singular));
        let not_square = Array2::<f64>::zeros((2, 3));
        assert!(lower_factor(not_square.view(), 0.0).is_none());
        // A pivot of 1e-14 against a largest diagonal element of 1 is below the relative
        // tolerance of 1e-13 and refused; one of 1e-12 is kept.
        let nearly = array![[1.0, 1.0], [1.0, 1.0 + 1e-14]];
        assert_eq!(cholesky(nearly.view()), Err(LinalgError::Singular));
        let barely = array![[1.0, 1.0], [1.0, 1.0 + 1e-12]];
        assert!(cholesky(barely.view()).is_ok());
    }

    #[test]
    fn a_larger_known_factor_and_solution_come_back() {
        // Common practice: A = L L' from a known 9 x 9 lower L of small integers (every
        // product and partial sum exact in floating point, so the four-way sums of `dot`
        // reproduce L and x exactly), and b = A x for a known x.
        let n = 9;
        let l = Array2::from_shape_fn((n, n), |(i, j)| match i.cmp(&j) {
            std::cmp::Ordering::Less => 0.0,
            std::cmp::Ordering::Equal => (i + 2) as f64,
            std::cmp::Ordering::Greater => ((i * 3 + j * 5) % 7) as f64 - 3.0,
        });
        let a = l.dot(&l.t());
        assert_eq!(cholesky(a.view()).unwrap(), l);
        let x = Array1::from_shape_fn(n, |i| i as f64 - 4.0);
        assert_eq!(solve_spd(a.view(), a.dot(&x).view()).unwrap(), x);
        let (u, v) = (
            [1.0, 2.0, 3.0, 4.0, 5.0, 6.0, 7.0],
            [7.0, 6.0, 5.0, 4.0, 3.0, 2.0, 1.0],
        );
        assert_eq!(dot(&u, &v), 84.0);
        assert_eq!(dot(&u[..3], &v[..3]), 34.0);
        assert_eq!(dot(&[], &[]), 0.0);
    }

    #[test]
    fn forward_substitution_inverts_the_lower_factor() {
        // Common practice: L (L^-1 B) = B on the factor of a known SPD matrix.
        let a = example_spd();
        let l = cholesky(a.view()).unwrap();
        let b = array![[1.0, -2.0], [0.5, 3.0], [2.0, 0.25]];
        let y = forward_substitute(&l, b.view());
        assert_eq!(y.dim(), (3, 2));
        let back = l.dot(&y);
        for (u, v) in back.iter().zip(b.iter()) {
            assert!((u - v).abs() < 1e-12, "{u} vs {v}");
        }
    }

    #[test]
    fn solves_and_inverts() {
        // A 3x3 SPD example; checked by multiplying back (common practice).
        let a = example_spd();
        let x = solve_spd(a.view(), array![1.0, 2.0, 3.0].view()).unwrap();
        let back = a.dot(&x);
        for (u, v) in back.iter().zip([1.0, 2.0, 3.0]) {
            assert!((u - v).abs() < 1e-9);
        }
        let inv = inverse_spd(a.view()).unwrap();
        let eye = a.dot(&inv);
        for i in 0..3 {
            for j in 0..3 {
                assert!((eye[[i, j]] - f64::from(u8::from(i == j))).abs() < 1e-9);
            }
        }
        // This matrix is L L' with L = [[2,0,0],[6,1,0],[-8,5,3]], so |A| = (2*1*3)^2 = 36.
        assert!((log_det_spd(a.view()).unwrap() - 36f64.ln()).abs() < 1e-12);
        assert_eq!(
            inverse_spd(array![[1.0, 1.0], [1.0, 1.0]].view()),
            Err(LinalgError::Singular)
        );
    }
}
