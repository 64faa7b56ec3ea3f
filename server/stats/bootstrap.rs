//! The pairs cluster bootstrap over countries (Cameron, Gelbach & Miller 2008, section
//! III.A; Efron & Tibshirani 1993, ch. 6 and 13): draw G clusters with replacement from
//! the G clusters of the sample, recompute the whole estimator on the draw, and summarise
//! the B replicates by their standard deviation (the bootstrap standard error,
//! sqrt(Σ_b (θ*_b − θ̄*)² / (B − 1))) and their percentile interval
//! [Q_{α/2}(θ*), Q_{1−α/2}(θ*)] (Efron & Tibshirani 1993, eq. 13.5), quantiles by Hyndman &
//! Fan (1996) definition 7.
//!
//! Replicate b draws its clusters from `Rng::stream(seed, b)` (server/stats/random.rs), so
//! each replicate is reproducible on its own and the result does not depend on the order
//! in which replicates run; they run in parallel with rayon. A replicate whose
//! computation fails returns an error value; failures are counted by the caller, never
//! dropped silently.

use rayon::prelude::*;

use super::describe;
use super::random::Rng;

#[derive(Debug, Clone, PartialEq, thiserror::Error)]
pub enum BootstrapError {
    #[error("the bootstrap needs at least one cluster to draw from")]
    NoClusters,
    #[error("the level of a percentile interval must lie strictly between 0 and 1, not {0}")]
    BadLevel(f64),
}

/// The clusters of replicate `b`: `g` indices drawn uniformly with replacement from
/// `0..g`, from stream `b` of `seed`.
pub fn draw(g: usize, seed: u64, b: usize) -> Result<Vec<usize>, BootstrapError> {
    if g == 0 {
        return Err(BootstrapError::NoClusters);
    }
    let mut rng = Rng::stream(seed, b as u64);
    Ok((0..g).map(|_| rng.below(g)).collect())
}

/// A draw's distinct clusters with how often each was drawn: a fit whose every sum over
/// units can weight its terms by these counts (a likelihood, moment conditions) gives on
/// the distinct clusters what it gives on the draw with its repeats written out, at the
/// cost of the distinct ones (about 63% of G on average, 1 - (1 - 1/G)^G).
#[derive(Debug, Clone, PartialEq)]
pub struct DrawCounts {
    /// The distinct clusters, in increasing order.
    pub clusters: Vec<usize>,
    /// How often each of `clusters` was drawn.
    pub counts: Vec<f64>,
    /// For each drawn row, its cluster's position in `clusters`.
    pub position: Vec<usize>,
}

/// Whether `counts` gives one positive, finite count to each of `units` rows (what the
/// counted fits accept).
pub fn are_unit_counts(counts: &[f64], units: usize) -> bool {
    counts.len() == units && counts.iter().all(|&c| c.is_finite() && c > 0.0)
}

impl DrawCounts {
    /// The counts of `rows`, a draw from `0..g`; `None` if a row lies outside `0..g`.
    pub fn of(rows: &[usize], g: usize) -> Option<DrawCounts> {
        let mut times = vec![0usize; g];
        for &r in rows {
            *times.get_mut(r)? += 1;
        }
        let mut slot = vec![usize::MAX; g];
        let mut clusters = Vec::new();
        let mut counts = Vec::new();
        for (c, &n) in times.iter().enumerate() {
            if n > 0 {
                slot[c] = clusters.len();
                clusters.push(c);
                counts.push(n as f64);
            }
        }
        let position = rows.iter().map(|&r| slot[r]).collect();
        Some(DrawCounts {
            clusters,
            counts,
            position,
        })
    }

    /// Per drawn row, the value of its cluster in `per_cluster` (aligned with `clusters`).
    pub fn expand<T: Copy>(&self, per_cluster: &[T]) -> Vec<T> {
        self.position.iter().map(|&p| per_cluster[p]).collect()
    }
}

/// Runs `replicate` on the draws of replicates `0..b` in parallel; element b of the
/// result is replicate b's outcome.
pub fn run<T, E, F>(
    g: usize,
    b: usize,
    seed: u64,
    replicate: F,
) -> Result<Vec<Result<T, E>>, BootstrapError>
where
    T: Send,
    E: Send,
    F: Fn(&[usize]) -> Result<T, E> + Sync,
{
    if g == 0 {
        return Err(BootstrapError::NoClusters);
    }
    Ok((0..b)
        .into_par_iter()
        .map(|r| {
            let rows = draw(g, seed, r).unwrap_or_default();
            replicate(&rows)
        })
        .collect())
}

/// The summary of one quantity's replicates.
#[derive(Debug, Clone, Copy, PartialEq, serde::Serialize)]
pub struct Summary {
    /// Standard deviation of the replicates (B − 1 divisor); null with fewer than two.
    pub se: Option<f64>,
    /// The percentile interval's ends; null with fewer than two replicates.
    pub low: Option<f64>,
    pub high: Option<f64>,
    /// Replicates that gave a finite value.
    pub used: usize,
}

impl Summary {
    pub const NONE: Summary = Summary {
        se: None,
        low: None,
        high: None,
        used: 0,
    };
}

/// Standard error and percentile interval at `level` (e.g. 0.95) of the finite values
/// among `values` (non-finite ones are not counted in `used`).
pub fn summarise(values: &[f64], level: f64) -> Result<Summary, BootstrapError> {
    if !(level > 0.0 && level < 1.0) {
        return Err(BootstrapError::BadLevel(level));
    }
    let ok: Vec<f64> = values.iter().copied().filter(|v| v.is_finite()).collect();
    if ok.len() < 2 {
        return Ok(Summary {
            used: ok.len(),
            ..Summary::NONE
        });
    }
    let n = ok.len() as f64;
    let mean = ok.iter().sum::<f64>() / n;
    let var = ok.iter().map(|v| (v - mean).powi(2)).sum::<f64>() / (n - 1.0);
    let alpha = 1.0 - level;
    Ok(Summary {
        se: Some(var.sqrt()),
        low: describe::quantile(&ok, alpha / 2.0),
        high: describe::quantile(&ok, 1.0 - alpha / 2.0),
        used: ok.len(),
    })
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn draw_counts_list_each_distinct_cluster_once_and_expand_back() {
        // Common practice: counts of a small draw written out by hand.
        let rows = [3, 0, 3, 2, 3];
        let counts = DrawCounts::of(&rows, 5).expect("rows within 0..5");
        assert_eq!(counts.clusters, vec![0, 2, 3]);
        assert_eq!(counts.counts, vec![1.0, 1.0, 3.0]);
        assert_eq!(counts.position, vec![2, 0, 2, 1, 2]);
        assert_eq!(
            counts.expand(&['a', 'c', 'd']),
            vec!['d', 'a', 'd', 'c', 'd']
        );
        assert_eq!(counts.counts.iter().sum::<f64>(), rows.len() as f64);
        assert!(DrawCounts::of(&[0, 5], 5).is_none());
    }

    /// Draws stay in range, repeat with their seed and differ between streams (common
    /// practice).
    #[test]
    fn draws_repeat_and_differ() {
        let a = draw(10, 5, 0).unwrap();
        assert_eq!(a.len(), 10);
        assert!(a.iter().all(|&i| i < 10));
        assert_eq!(a, draw(10, 5, 0).unwrap());
        assert_ne!(a, draw(10, 5, 1).unwrap());
        assert_ne!(a, draw(10, 6, 0).unwrap());
        assert_eq!(draw(0, 5, 0), Err(BootstrapError::NoClusters));
    }

    /// The bootstrap of a mean: its standard error approaches the plug-in s.e.
    /// sqrt(Σ(x − x̄)²/n) / sqrt(n) (Efron & Tibshirani 1993, eq. 5.11 and 6.9); at B = 4000
    /// the Monte Carlo error of the SE is about 1/sqrt(2B) ≈ 1.1% (5% allowed).
    #[test]
    fn mean_bootstrap_matches_plug_in() {
        let x: Vec<f64> = (0..30)
            .map(|i| ((i * 37) % 11) as f64 + 0.1 * i as f64)
            .collect();
        let n = x.len() as f64;
        let m = x.iter().sum::<f64>() / n;
        let plug_in = (x.iter().map(|v| (v - m).powi(2)).sum::<f64>() / n).sqrt() / n.sqrt();
        let reps = run(x.len(), 4000, 11, |rows| -> Result<f64, ()> {
            Ok(rows.iter().map(|&i| x[i]).sum::<f64>() / n)
        })
        .unwrap();
        let values: Vec<f64> = reps.into_iter().map(|r| r.unwrap()).collect();
        let s = summarise(&values, 0.95).unwrap();
        let se = s.se.unwrap();
        assert!((se / plug_in - 1.0).abs() < 0.05, "{se} vs {plug_in}");
        assert!(s.low.unwrap() < m && m < s.high.unwrap());
        assert_eq!(s.used, 4000);
    }

    /// Fewer than two finite values: nothing estimable (null, not 0); a bad level is an
    /// error.
    #[test]
    fn too_few_values_are_not_estimable() {
        let s = summarise(&[1.0, f64::NAN], 0.95).unwrap();
        assert_eq!(
            s,
            Summary {
                used: 1,
                ..Summary::NONE
            }
        );
        assert!(summarise(&[1.0, 2.0], 1.0).is_err());
    }
}
