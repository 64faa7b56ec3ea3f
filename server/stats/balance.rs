//! Balance between weighted participants and the eligible universe, and how concentrated
//! the weights are.

/// Weighted mean sum w x / sum w; `None` when the weights sum to zero.
pub fn weighted_mean(x: &[f64], w: &[f64]) -> Option<f64> {
    let sw: f64 = w.iter().sum();
    (sw > 0.0).then(|| x.iter().zip(w).map(|(a, b)| a * b).sum::<f64>() / sw)
}

/// Weighted variance with the reliability-weights correction,
/// sum w (x - m)^2 / (sum w - sum w^2 / sum w), which reduces to the usual n - 1 sample
/// variance when all weights are equal (e.g. the GNU Scientific Library's
/// `gsl_stats_wvariance`). `None` with fewer than two positive weights.
pub fn weighted_variance(x: &[f64], w: &[f64]) -> Option<f64> {
    let m = weighted_mean(x, w)?;
    let sw: f64 = w.iter().sum();
    let sw2: f64 = w.iter().map(|v| v * v).sum();
    let denominator = sw - sw2 / sw;
    (denominator > 0.0).then(|| {
        x.iter()
            .zip(w)
            .map(|(a, b)| b * (a - m).powi(2))
            .sum::<f64>()
            / denominator
    })
}

/// Standardised mean difference of participants against the universe:
/// (participants' weighted mean - universe mean) / universe standard deviation (n - 1),
/// for a level of a category the proportions divided by sqrt(p (1 - p)) of the universe
/// (Austin 2009, Statistics in Medicine 28, eq. 1-2, with the universe as reference).
/// `None` when the universe does not vary.
pub fn smd(participant_mean: f64, universe_mean: f64, universe_sd: f64) -> Option<f64> {
    (universe_sd > 0.0 && universe_sd.is_finite())
        .then(|| (participant_mean - universe_mean) / universe_sd)
}

/// Kish's (1965, Survey Sampling, sec. 11.7) effective sample size (sum w)^2 / sum w^2:
/// here the effective number of countries.
pub fn effective_n(w: &[f64]) -> f64 {
    let sw: f64 = w.iter().sum();
    let sw2: f64 = w.iter().map(|v| v * v).sum();
    if sw2 > 0.0 {
        sw * sw / sw2
    } else {
        0.0
    }
}

/// The largest weight's share of the total.
pub fn max_share(w: &[f64]) -> f64 {
    let sw: f64 = w.iter().sum();
    if sw > 0.0 {
        w.iter().fold(0.0f64, |m, &v| m.max(v)) / sw
    } else {
        0.0
    }
}

/// Coefficient of variation of the weights, sd / mean with the population (n) standard
/// deviation, so that effective_n = n / (1 + cv^2) (Kish 1965).
pub fn coefficient_of_variation(w: &[f64]) -> f64 {
    let n = w.len() as f64;
    if n == 0.0 {
        return 0.0;
    }
    let mean = w.iter().sum::<f64>() / n;
    let var = w.iter().map(|v| (v - mean).powi(2)).sum::<f64>() / n;
    if mean > 0.0 {
        var.sqrt() / mean
    } else {
        0.0
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn kish_identity_and_equal_weights() {
        let w = [1.0, 2.0, 3.0, 4.0];
        let cv = coefficient_of_variation(&w);
        assert!((effective_n(&w) - 4.0 / (1.0 + cv * cv)).abs() < 1e-12);
        assert!((effective_n(&[2.0; 5]) - 5.0).abs() < 1e-12);
        // Equal weights: the n - 1 sample variance of 1..4 is 5/3.
        assert!((weighted_variance(&w, &[1.0; 4]).unwrap() - 5.0 / 3.0).abs() < 1e-12);
        assert_eq!(max_share(&w), 0.4);
    }
}
