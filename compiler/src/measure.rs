//! The figures several stages compute the same way: signal-to-quantization
//! noise ratio and the top-1 class. One definition each, so calibration
//! reports and the harness cannot drift apart.

/// SQNR in dB from summed squares, `10 log10(Σ x² / Σ (x − x̂)²)`: `+∞` for
/// zero noise, `−∞` for a zero signal with noise, and `None` for zero over
/// zero (an all-zero map reproduced exactly has no ratio). The calibration
/// report prints `None` as a missing value; the harness counts it as exact
/// (`unwrap_or(f64::INFINITY)`), as each did before they shared this.
pub fn sqnr_db(signal: f64, noise: f64) -> Option<f64> {
    if noise == 0.0 {
        (signal > 0.0).then_some(f64::INFINITY)
    } else {
        Some(10.0 * (signal / noise).log10())
    }
}

/// An SQNR in dB as the reports print it: one decimal, `exact` for `+∞`
/// (no noise), `-inf` for `−∞` (noise and no signal: never `exact`), and
/// the missing-value dash for `None`.
pub fn format_db(x: Option<f64>) -> String {
    match x {
        Some(v) if v.is_finite() => format!("{v:.1}"),
        Some(v) if v == f64::INFINITY => "exact".into(),
        Some(v) if v == f64::NEG_INFINITY => "-inf".into(),
        Some(_) => "NaN".into(),
        None => crate::util::MISSING.into(),
    }
}

/// Index of the largest value, the first one on ties; NaN never wins; 0 for
/// an empty slice.
pub fn argmax_f32(v: &[f32]) -> usize {
    let mut best = 0;
    for (i, &x) in v.iter().enumerate() {
        if v[best].is_nan() || x > v[best] {
            best = i;
        }
    }
    best
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Edge cases of the definition (the ratio itself: common practice,
    /// e.g. 20 dB for a noise power one hundredth of the signal's).
    #[test]
    fn sqnr_edges_and_a_worked_value() {
        assert_eq!(sqnr_db(1.0, 0.0), Some(f64::INFINITY));
        assert_eq!(sqnr_db(0.0, 0.0), None);
        assert_eq!(sqnr_db(0.0, 1.0), Some(f64::NEG_INFINITY));
        assert!((sqnr_db(100.0, 1.0).unwrap() - 20.0).abs() < 1e-12);
    }

    /// `exact` only for no noise: a map with noise and no signal (`−∞`)
    /// is the worst case, not a perfect one.
    #[test]
    fn db_prints_exact_only_for_plus_infinity() {
        assert_eq!(format_db(sqnr_db(1.0, 0.0)), "exact");
        assert_eq!(format_db(sqnr_db(0.0, 1.0)), "-inf");
        assert_eq!(format_db(sqnr_db(0.0, 0.0)), "–");
        assert_eq!(format_db(sqnr_db(100.0, 1.0)), "20.0");
    }

    #[test]
    fn argmax_first_maximum_and_nan() {
        assert_eq!(argmax_f32(&[1.0, 3.0, 3.0]), 1);
        assert_eq!(argmax_f32(&[f32::NAN, 1.0, 1.0]), 1);
        assert_eq!(argmax_f32(&[]), 0);
    }
}
