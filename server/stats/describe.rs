//! Descriptive statistics used across the analyses.

/// Arithmetic mean; `None` for an empty slice.
pub fn mean(x: &[f64]) -> Option<f64> {
    (!x.is_empty()).then(|| x.iter().sum::<f64>() / x.len() as f64)
}

/// Median (average of the two middle values for an even count); `None` for an empty slice.
pub fn median(x: &[f64]) -> Option<f64> {
    quantile(x, 0.5)
}

/// Quantile by linear interpolation between order statistics (Hyndman & Fan 1996,
/// definition 7, the default of R and numpy).
pub fn quantile(x: &[f64], q: f64) -> Option<f64> {
    if x.is_empty() {
        return None;
    }
    let mut sorted = x.to_vec();
    sorted.sort_by(f64::total_cmp);
    let h = (sorted.len() - 1) as f64 * q.clamp(0.0, 1.0);
    let lo = h.floor() as usize;
    let hi = h.ceil() as usize;
    Some(sorted[lo] + (h - lo as f64) * (sorted[hi] - sorted[lo]))
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn quantiles_match_numpy_default() {
        // numpy.quantile([1, 2, 3, 4], [0.25, 0.5]) = [1.75, 2.5] (numpy docs, method="linear").
        assert_eq!(quantile(&[4.0, 1.0, 3.0, 2.0], 0.25), Some(1.75));
        assert_eq!(median(&[4.0, 1.0, 3.0, 2.0]), Some(2.5));
        assert_eq!(mean(&[]), None);
    }
}
