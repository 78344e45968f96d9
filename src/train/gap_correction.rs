//! The generalisation-gap correction of the robust-error allowance: how far the training batches'
//! certified rate runs ahead of the validation data's, smoothed over epochs and clamped, so the
//! floor is aimed at on held-out data. What it guarantees: the correction stays in `[0, MAX]`.

/// How far the training data's certified accuracy runs ahead of the validation data's, measured after
/// every full-budget epoch: the training batches' linear-bound certified rate (the constraint's own
/// measure) minus the validation data's (sound linear bounds at the full budget), smoothed over epochs
/// and clamped to `[0, MAX]`. The robust-error allowance becomes `1 − floor − slack − gap`, so the
/// floor is aimed at on data the model was not trained on rather than on the training batches.
#[derive(Debug, Clone, Copy, PartialEq, Default, serde::Serialize)]
pub struct GapCorrection {
    /// The current smoothed gap (0 until the first full-budget epoch with validation figures).
    pub gap: f64,
}

impl GapCorrection {
    /// Largest correction (a gap beyond this means the constraint cannot be steered by it).
    pub const MAX: f64 = 0.2;
    /// Weight of the newest epoch in the exponential smoothing.
    pub const SMOOTHING: f64 = 0.5;

    /// Folds in one epoch's training and validation certified fractions.
    pub fn update(&mut self, training_certified: f64, validation_certified: f64) {
        let measured = training_certified - validation_certified;
        let smoothed = Self::SMOOTHING * measured + (1.0 - Self::SMOOTHING) * self.gap;
        self.gap = smoothed.clamp(0.0, Self::MAX);
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use approx::assert_relative_eq;

    #[test]
    fn gap_correction_smooths_and_clamps_the_measured_gap() {
        let mut correction = GapCorrection::default();
        correction.update(0.80, 0.70); // gap 0.10, half of it after one epoch
        assert_relative_eq!(correction.gap, 0.05, epsilon = 1e-12);
        correction.update(0.80, 0.70);
        assert_relative_eq!(correction.gap, 0.075, epsilon = 1e-12);
        correction.update(0.60, 0.70); // validation ahead: the smoothed gap shrinks, never below 0
        assert_relative_eq!(correction.gap, 0.0, epsilon = 1e-12);
        for _ in 0..20 {
            correction.update(1.0, 0.0);
        }
        assert_relative_eq!(correction.gap, GapCorrection::MAX, epsilon = 1e-12);
    }
}
