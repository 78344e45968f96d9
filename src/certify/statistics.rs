//! Exact (Clopper–Pearson) one-sided confidence bounds on a population fraction from `k` successes in
//! `n` independent samples (Clopper & Pearson, 1934).
//!
//! The lower bound at confidence `c` is the `1 − c` quantile of Beta(k, n − k + 1) (0 when k = 0); the
//! upper bound is the `c` quantile of Beta(k + 1, n − k) (1 when k = n). Each is one-sided: the true
//! fraction lies above the lower bound with probability at least `c` when the samples are an
//! independent draw from the population. Nothing here checks that assumption; it is the user's to make.

use statrs::distribution::{Beta, ContinuousCDF};

/// Why a bound could not be computed.
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
pub enum StatisticsError {
    /// `k` exceeds `n`, or `n` is zero.
    #[error("{successes} successes out of {samples} samples is not a valid count (need 0 ≤ k ≤ n, n ≥ 1)")]
    InvalidCount {
        /// k.
        successes: usize,
        /// n.
        samples: usize,
    },
    /// The confidence is not strictly between 0 and 1.
    #[error("confidence {0} is not strictly between 0 and 1")]
    InvalidConfidence(f64),
}

fn check(successes: usize, samples: usize, confidence: f64) -> Result<(), StatisticsError> {
    if samples == 0 || successes > samples {
        return Err(StatisticsError::InvalidCount { successes, samples });
    }
    if !(confidence > 0.0 && confidence < 1.0) {
        return Err(StatisticsError::InvalidConfidence(confidence));
    }
    Ok(())
}

/// One-sided Clopper–Pearson lower bound on the fraction, at `confidence` (e.g. 0.95).
pub fn clopper_pearson_lower(
    successes: usize,
    samples: usize,
    confidence: f64,
) -> Result<f64, StatisticsError> {
    check(successes, samples, confidence)?;
    if successes == 0 {
        return Ok(0.0);
    }
    let alpha = 1.0 - confidence;
    if successes == samples {
        // Closed form: P(all n succeed | p) = p^n = alpha.
        return Ok(alpha.powf(1.0 / samples as f64));
    }
    let beta = Beta::new(successes as f64, (samples - successes + 1) as f64)
        .map_err(|_| StatisticsError::InvalidCount { successes, samples })?;
    Ok(beta.inverse_cdf(alpha).clamp(0.0, 1.0))
}

/// One-sided Clopper–Pearson upper bound on the fraction, at `confidence`.
pub fn clopper_pearson_upper(
    successes: usize,
    samples: usize,
    confidence: f64,
) -> Result<f64, StatisticsError> {
    check(successes, samples, confidence)?;
    if successes == samples {
        return Ok(1.0);
    }
    // Symmetry: the upper bound for k successes is 1 − the lower bound for n − k failures.
    Ok(1.0 - clopper_pearson_lower(samples - successes, samples, confidence)?)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn rejects_bad_arguments() {
        assert!(clopper_pearson_lower(3, 2, 0.95).is_err());
        assert!(clopper_pearson_lower(0, 0, 0.95).is_err());
        assert!(clopper_pearson_lower(1, 2, 1.0).is_err());
    }

    #[test]
    fn lower_is_below_the_fraction_and_grows_with_k() {
        let mut previous = -1.0;
        for k in 0..=20 {
            let l = clopper_pearson_lower(k, 20, 0.95).unwrap();
            assert!(l <= k as f64 / 20.0 + 1e-12);
            assert!(l > previous);
            previous = l;
        }
    }
}
