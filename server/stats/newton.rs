//! The damped Newton step shared by the maximum-likelihood fits (binary.rs, regression.rs)
//! and the weightings' Newton loops (weights.rs; minimisations pass the negated objective):
//! a full Newton step, halved until the objective does not fall.

use ndarray::Array1;

/// Halvings tried before a Newton step is given up.
pub const MAX_HALVINGS: usize = 40;

/// The step factor after every halving failed: 2^-[`MAX_HALVINGS`].
pub fn exhausted_factor() -> f64 {
    0.5f64.powi(MAX_HALVINGS as i32)
}

/// One damped Newton step of a maximisation: tries `from + t step` for t = 1, 1/2, 1/4,
/// ... ([`MAX_HALVINGS`] tries) and returns the first candidate at which `evaluate` gives
/// a finite objective of at least `floor` (the current objective less a rounding slack),
/// with `evaluate`'s state there and t; `None` when no try qualifies (`evaluate` returns
/// `None` where the objective cannot be computed). Backtracking by halving keeps every
/// iteration from lowering the objective (Nocedal & Wright 2006, Numerical Optimization,
/// section 3.1, from memory).
pub fn halving_step<S>(
    from: &Array1<f64>,
    step: &Array1<f64>,
    floor: f64,
    evaluate: impl FnMut(&Array1<f64>) -> Option<(S, f64)>,
) -> Option<(Array1<f64>, S, f64)> {
    halving_step_to(from, step, floor, MAX_HALVINGS, evaluate)
}

/// [`halving_step`] with at most `halvings` tries (a fit whose moves below some size no
/// longer count gives up sooner instead of evaluating steps that change nothing).
pub fn halving_step_to<S>(
    from: &Array1<f64>,
    step: &Array1<f64>,
    floor: f64,
    halvings: usize,
    mut evaluate: impl FnMut(&Array1<f64>) -> Option<(S, f64)>,
) -> Option<(Array1<f64>, S, f64)> {
    halving_step_told(from, step, floor, halvings, |candidate, _| {
        evaluate(candidate)
    })
}

/// [`halving_step_to`] with `evaluate` told each try's factor t beside its candidate (a
/// caller that can refuse some tries from what it learnt at earlier ones).
pub fn halving_step_told<S>(
    from: &Array1<f64>,
    step: &Array1<f64>,
    floor: f64,
    halvings: usize,
    mut evaluate: impl FnMut(&Array1<f64>, f64) -> Option<(S, f64)>,
) -> Option<(Array1<f64>, S, f64)> {
    let mut t = 1.0;
    for _ in 0..halvings {
        let candidate = from + &(step * t);
        if let Some((state, objective)) = evaluate(&candidate, t) {
            if objective.is_finite() && objective >= floor {
                return Some((candidate, state, t));
            }
        }
        t *= 0.5;
    }
    None
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn halves_until_the_objective_does_not_fall() {
        // Common practice: on f(b) = -(b - 1)^2 from 0, a step of 4 overshoots (f = -9),
        // 2 gives f = -1 (equal to f(0), accepted at the floor), so t = 1/2.
        let f = |b: &Array1<f64>| -(b[0] - 1.0).powi(2);
        let from = Array1::from(vec![0.0]);
        let step = Array1::from(vec![4.0]);
        let (b, state, t) = halving_step(&from, &step, f(&from), |c| Some(((), f(c)))).unwrap();
        assert_eq!((b[0], t), (2.0, 0.5));
        assert_eq!(state, ());
        // A step that never qualifies gives None.
        assert!(halving_step(&from, &step, 1.0, |c| Some(((), f(c)))).is_none());
        assert!(halving_step(&from, &step, -1e9, |_| None::<((), f64)>).is_none());
        assert_eq!(exhausted_factor(), 1.0 / (1u64 << 40) as f64);
    }
}
