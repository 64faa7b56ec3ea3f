//! The balance of one set of participants: the effective number of countries after entropy
//! balancing the set to the eligible universe's means (0 when no positive weights of the
//! set reach them: "infeasible"), and the set's unweighted imbalance (mean and largest
//! |SMD| over the chosen indicators).

use std::sync::RwLock;

use ndarray::{Array1, Array2, ArrayView1, ArrayView2};
use serde::Serialize;

use crate::analysis::design::{self, Design};
use crate::stats::{balance, weights};

/// Balance of one set of participants.
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct SetMetrics {
    /// Kish's effective number after entropy balancing to the universe; 0 when infeasible.
    pub effective_n: f64,
    pub mean_abs_smd: f64,
    pub max_abs_smd: f64,
    pub feasible: bool,
}

/// The numbers every evaluation needs, built once from the design.
pub struct Evaluator {
    /// Entropy-balancing moments (non-reference levels), centred at the universe means and
    /// scaled by the universe standard deviations; one row per unit.
    pub moments: Array2<f64>,
    /// Balance columns for |SMD| (all levels): values, universe mean, universe sd.
    pub smd_columns: Vec<(Vec<f64>, f64, f64)>,
    /// Directions v that separated an infeasible set strictly from the targets (see
    /// [`separates`]), kept to recognise other sets as infeasible without a solve.
    separations: RwLock<Vec<Array1<f64>>>,
}

/// Separating directions kept per evaluator (the search meets few distinct ones).
const KEPT_SEPARATIONS: usize = 16;

/// A set counts as strictly separated by v when every member's row r has r'v above this
/// share of |v|: then every mean of positive weights lies at least that far from the
/// targets (0 after centring), above the 1e-10 per moment that the dual solver's
/// convergence test allows, so the solver could not have converged.
const SEPARATION_MARGIN: f64 = 1e-8;

/// Whether every row of `d` lies strictly on the positive side of the direction `v`, by
/// [`SEPARATION_MARGIN`]: the targets (0) are outside the rows' convex hull, so no
/// positive weights reproduce them (Farkas' lemma; e.g. Boyd & Vandenberghe 2004, Convex
/// Optimization, section 2.5.1, from memory).
fn separates(d: ArrayView2<f64>, v: ArrayView1<f64>) -> bool {
    let size = v.dot(&v).sqrt();
    size.is_finite()
        && size > 0.0
        && d.outer_iter()
            .all(|row| row.dot(&v) > SEPARATION_MARGIN * size)
}

impl Evaluator {
    pub fn new(design: &Design) -> Evaluator {
        let n = design.n();
        let reference: Vec<String> = design
            .margins
            .iter()
            .filter_map(|m| m.levels.first().map(|l| format!("{}={}", m.name, l)))
            .collect();
        let eb: Vec<&design::BalanceColumn> = design
            .balance
            .iter()
            .filter(|b| !reference.contains(&b.name))
            .collect();
        let mut moments = Array2::<f64>::zeros((n, eb.len()));
        for (j, col) in eb.iter().enumerate() {
            let mean = col.values.iter().sum::<f64>() / n as f64;
            let sd = (col.values.iter().map(|v| (v - mean).powi(2)).sum::<f64>() / n as f64).sqrt();
            let sd = if sd > 0.0 { sd } else { 1.0 };
            for (i, v) in col.values.iter().enumerate() {
                moments[[i, j]] = (v - mean) / sd;
            }
        }
        let all = vec![1.0; n];
        let smd_columns = design
            .balance
            .iter()
            .map(|col| {
                let mean = balance::weighted_mean(&col.values, &all).unwrap_or(0.0);
                let sd = if col.is_level {
                    (mean * (1.0 - mean)).sqrt()
                } else {
                    balance::weighted_variance(&col.values, &all)
                        .unwrap_or(0.0)
                        .sqrt()
                };
                (col.values.clone(), mean, sd)
            })
            .collect();
        Evaluator {
            moments,
            smd_columns,
            separations: RwLock::new(Vec::new()),
        }
    }

    /// Balance of the set of units `members`, warm-starting the dual at `start`.
    pub fn evaluate(
        &self,
        members: &[usize],
        start: Option<&Array1<f64>>,
    ) -> (SetMetrics, Option<Array1<f64>>) {
        let k = self.moments.ncols();
        // Unweighted SMDs of the members.
        let mut total = 0.0;
        let mut largest = 0.0f64;
        let mut counted = 0;
        for (values, mean, sd) in &self.smd_columns {
            if *sd <= 0.0 {
                continue;
            }
            let m = members.iter().map(|&i| values[i]).sum::<f64>() / members.len().max(1) as f64;
            let smd = ((m - mean) / sd).abs();
            total += smd;
            largest = largest.max(smd);
            counted += 1;
        }
        let mean_abs_smd = if counted > 0 {
            total / counted as f64
        } else {
            0.0
        };
        // Feasibility: every target (0 after centring) strictly inside the members' range.
        // The members' rows, copied row by row (`select` takes several times as long on
        // rows this short, and this runs for every set the search judges).
        let mut d = Array2::<f64>::zeros((members.len(), k));
        for (mut row, &i) in d.rows_mut().into_iter().zip(members) {
            row.assign(&self.moments.row(i));
        }
        // Each moment's range over the members in one pass along the rows (as they lie
        // in memory; the evaluation is the search's inner loop).
        let mut lo = vec![f64::INFINITY; k];
        let mut hi = vec![f64::NEG_INFINITY; k];
        for row in d.outer_iter() {
            for ((l, h), &v) in lo.iter_mut().zip(hi.iter_mut()).zip(row.iter()) {
                *l = l.min(v);
                *h = h.max(v);
            }
        }
        let inside = lo.iter().zip(&hi).all(|(&lo, &hi)| {
            lo < -1e-9 && hi > 1e-9 || (hi - lo).abs() < 1e-12 && lo.abs() < 1e-9
        });
        let infeasible = SetMetrics {
            effective_n: 0.0,
            mean_abs_smd,
            max_abs_smd: largest,
            feasible: false,
        };
        if !inside || members.is_empty() {
            return (infeasible, None);
        }
        // A direction that separated another set may separate this one too: then the
        // solve could only fail, and is skipped (the figures are the same).
        let separated = self
            .separations
            .read()
            .is_ok_and(|known| known.iter().any(|v| separates(d.view(), v.view())));
        if separated {
            return (infeasible, None);
        }
        let q = vec![1.0; members.len()];
        let solution = weights::entropy_dual(d.view(), &q, start, 60);
        if !solution.converged {
            // Where the targets lie outside the hull, the dual's minimiser runs off along
            // a separating direction, and the weighted mean approaches the hull's point
            // nearest the targets: either can separate; kept when it does, strictly.
            let w = Array1::from(solution.weights.clone());
            let nearest = d.t().dot(&w);
            for v in [solution.lambda, nearest] {
                if separates(d.view(), v.view()) {
                    if let Ok(mut kept) = self.separations.write() {
                        if kept.len() < KEPT_SEPARATIONS {
                            kept.push(v);
                        }
                    }
                    break;
                }
            }
            return (infeasible, None);
        }
        let metrics = SetMetrics {
            effective_n: balance::effective_n(&solution.weights),
            mean_abs_smd,
            max_abs_smd: largest,
            feasible: true,
        };
        (metrics, Some(solution.lambda))
    }

    /// Unweighted SMD of each balance column for the set `members` (0 where the universe
    /// does not vary).
    pub fn smds(&self, members: &[usize]) -> Vec<f64> {
        self.smd_columns
            .iter()
            .map(|(values, mean, sd)| {
                let m =
                    members.iter().map(|&i| values[i]).sum::<f64>() / members.len().max(1) as f64;
                if *sd > 0.0 {
                    (m - mean) / sd
                } else {
                    0.0
                }
            })
            .collect()
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use ndarray::array;

    #[test]
    fn separation_needs_every_row_strictly_on_one_side() {
        // Hand check: three points in the positive quadrant are cut off from the origin
        // by v = (1, 1); the corners of a square around the origin are not, whatever v.
        let outside = array![[1.0, 1.0], [2.0, 0.5], [0.5, 2.0]];
        assert!(separates(outside.view(), array![1.0, 1.0].view()));
        assert!(!separates(outside.view(), array![1.0, -1.0].view()));
        let around = array![[1.0, 1.0], [1.0, -1.0], [-1.0, 1.0], [-1.0, -1.0]];
        for v in [array![1.0, 1.0], array![1.0, 0.0], array![0.3, -2.0]] {
            assert!(!separates(around.view(), v.view()));
        }
        // A point on the boundary (r'v = 0) is not strict separation; nor is v = 0.
        let touching = array![[1.0, 0.0], [0.0, 1.0], [1.0, -1.0]];
        assert!(!separates(touching.view(), array![1.0, 1.0].view()));
        assert!(!separates(outside.view(), array![0.0, 0.0].view()));
    }
}
