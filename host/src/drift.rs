//! Drift: how far live values have moved from a model's training profile
//! ([`crate::artifact::profile`]), as the Population Stability Index over
//! the profile's bins.
//!
//! The index is Σ over bins of (live − expected) · ln(live / expected),
//! with shares, not counts; a bin empty on either side counts as
//! [`EMPTY_BIN_SHARE`] so the logarithm stays finite. 0 means the same
//! spread. Thresholds such as 0.1 (watch) and 0.25 (act) are common
//! practice in credit scoring, not a standard; a high index says the inputs
//! changed, not that the model is wrong, and a low one does not prove it
//! right.

/// The share an empty bin counts as, on either side.
pub const EMPTY_BIN_SHARE: f64 = 1e-4;

/// The Population Stability Index of live bin counts against the expected
/// shares of the same bins, or `None` when there are no live values (or
/// the bins do not match).
pub fn stability_index(expected: &[f64], live: &[u64]) -> Option<f64> {
    let total: u64 = live.iter().sum();
    if total == 0 || expected.len() != live.len() {
        return None;
    }
    let total = total as f64;
    Some(
        expected
            .iter()
            .zip(live)
            .map(|(&e, &n)| {
                let (a, e) = ((n as f64 / total).max(EMPTY_BIN_SHARE), e.max(EMPTY_BIN_SHARE));
                (a - e) * (a / e).ln()
            })
            .sum(),
    )
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn the_same_spread_is_zero_and_a_move_is_positive() {
        assert_eq!(stability_index(&[0.25, 0.75], &[25, 75]), Some(0.0));
        // Worked by hand: (0.75 − 0.25)·ln 3 + (0.25 − 0.75)·ln(1/3) = ln 3 ≈ 1.0986.
        let moved = stability_index(&[0.25, 0.75], &[75, 25]).unwrap();
        assert!((moved - 3f64.ln()).abs() < 1e-15, "{moved}");
        assert_eq!(stability_index(&[0.5, 0.5], &[0, 0]), None);
    }
}
