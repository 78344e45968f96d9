//! The generalisation margin of a floor judged on a separate acceptance set: how far above the floor
//! the validation figure must lie so that the acceptance set, a different sample of the same
//! population, is not expected to fall below it by sampling noise alone.
//!
//! With `n` validation rows and `m` acceptance rows, the two certified fractions are independent
//! binomial proportions; at a true rate near the floor `F` their difference has standard error
//! `√(F (1 − F) (1/n + 1/m))` (the normal approximation to the difference of two proportions, common
//! practice). The margin is one such standard error, the same one-standard-error convention as the
//! kept-weights rule (Breiman, Friedman, Olshen & Stone, 1984). What it guarantees: the margin is
//! finite, ≥ 0, and 0 when either set is empty or the floor is 0 or 1. It never turns a validation
//! figure into evidence: the verdict still comes from the acceptance set.

/// One standard error of the difference between a validation fraction over `validation_rows` and an
/// acceptance fraction over `acceptance_rows`, both near `floor`.
pub fn generalisation_margin(floor: f64, validation_rows: usize, acceptance_rows: usize) -> f64 {
    if validation_rows == 0 || acceptance_rows == 0 || !(0.0..=1.0).contains(&floor) {
        return 0.0;
    }
    let spread = floor * (1.0 - floor);
    (spread * (1.0 / validation_rows as f64 + 1.0 / acceptance_rows as f64)).sqrt()
}

#[cfg(test)]
mod tests {
    use super::*;
    use approx::assert_relative_eq;

    #[test]
    fn one_standard_error_of_a_difference_of_two_proportions() {
        // Hand computation: F = 0.75, n = 320, m = 360: 0.1875 · (1/320 + 1/360) = 0.0011068,
        // square root 0.033269.
        assert_relative_eq!(
            generalisation_margin(0.75, 320, 360),
            0.033269,
            epsilon = 1e-6
        );
        // Equal sets of 100 rows at F = 0.5: √(0.25 · 0.02) = 0.0707107.
        assert_relative_eq!(
            generalisation_margin(0.5, 100, 100),
            0.0707107,
            epsilon = 1e-6
        );
        assert_eq!(generalisation_margin(1.0, 100, 100), 0.0);
        assert_eq!(generalisation_margin(0.8, 0, 100), 0.0);
        assert_eq!(generalisation_margin(f64::NAN, 10, 10), 0.0);
        // More acceptance rows, smaller margin.
        assert!(generalisation_margin(0.8, 300, 3000) < generalisation_margin(0.8, 300, 300));
    }
}
