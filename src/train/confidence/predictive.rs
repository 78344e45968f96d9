//! The predictive distribution of a certified count on samples not yet drawn, given the count on
//! samples already seen: the beta-binomial distribution (Skellam, 1948).
//!
//! Model: the model's certified rate `p` on the inputs both sets are drawn from has the uniform prior
//! Beta(1, 1) (Bayes, 1763; Laplace, 1774); `V` of `n` seen samples are certified, `V | p ~ Bin(n, p)`,
//! so `p | V ~ Beta(V + 1, n − V + 1)`; a new, independent set of `m` samples then certifies
//! `K | p ~ Bin(m, p)`, and integrating `p` out gives `K | V ~ BetaBinomial(m, V + 1, n − V + 1)`:
//!
//! ```text
//! P(K = k | V) = C(m, k) · B(k + V + 1, m − k + n − V + 1) / B(V + 1, n − V + 1)
//! ```
//!
//! (the posterior predictive of a binomial count under a conjugate beta prior). What it guarantees:
//! every figure is a direct sum of these masses computed through log-gamma functions (no normal
//! approximation); sums skip only masses below 1e-18, so a probability is off by less than
//! `(m + 1) · 1e-18` plus rounding. Checked against scipy.stats.betabinom in tests/confidence.rs.

use statrs::function::beta::ln_beta;
use statrs::function::gamma::ln_gamma;

/// Masses below this are left out of sums (their total is below `(m + 1)` times it).
const NEGLIGIBLE: f64 = 1e-18;

/// The distribution of the certified count `K` among `acceptance` new samples, given `certified` of
/// `seen` samples (see the module documentation).
#[derive(Debug, Clone, PartialEq)]
pub struct Predictive {
    /// `P(K = k)` for `k = 0..=m`.
    masses: Vec<f64>,
}

impl Predictive {
    /// The predictive of `K` out of `acceptance` given `certified` of `seen`. Needs
    /// `certified ≤ seen` (the caller's count; larger counts are clamped to `seen`).
    pub fn new(certified: usize, seen: usize, acceptance: usize) -> Predictive {
        let certified = certified.min(seen);
        let a = (certified + 1) as f64;
        let b = (seen - certified + 1) as f64;
        let m = acceptance as f64;
        let ln_norm = ln_beta(a, b);
        let ln_m_factorial = ln_gamma(m + 1.0);
        let masses = (0..=acceptance)
            .map(|k| {
                let k = k as f64;
                let ln_choose = ln_m_factorial - ln_gamma(k + 1.0) - ln_gamma(m - k + 1.0);
                (ln_choose + ln_beta(k + a, m - k + b) - ln_norm).exp()
            })
            .collect();
        Predictive { masses }
    }

    /// Size of the new set.
    pub fn acceptance(&self) -> usize {
        self.masses.len() - 1
    }

    /// `P(K = k)` (0 beyond the set's size).
    pub fn probability(&self, k: usize) -> f64 {
        self.masses.get(k).copied().unwrap_or(0.0)
    }

    /// `P(K ≥ k)`: summed over the shorter side of `k` so that both small tails and values close to 1
    /// keep their digits.
    pub fn at_least(&self, k: usize) -> f64 {
        if k == 0 {
            return 1.0;
        }
        if k > self.acceptance() {
            return 0.0;
        }
        let below: f64 = self.masses[..k].iter().filter(|p| **p > NEGLIGIBLE).sum();
        let above: f64 = self.masses[k..].iter().filter(|p| **p > NEGLIGIBLE).sum();
        if below < above {
            (1.0 - below).clamp(0.0, 1.0)
        } else {
            above.clamp(0.0, 1.0)
        }
    }

    /// The largest count `k` with `P(K ≥ k) ≥ probability`: the count reached with at least that
    /// probability (0 when no larger count is).
    pub fn reached_with(&self, probability: f64) -> usize {
        // `at_least` falls as `k` rises: binary search for the last `k` that still qualifies.
        let (mut low, mut high) = (0, self.acceptance());
        while low < high {
            let middle = (low + high).div_ceil(2);
            if self.at_least(middle) >= probability {
                low = middle;
            } else {
                high = middle - 1;
            }
        }
        low
    }

    /// The mean of `f(K)` (masses below 1e-18 left out), for `f` with values in a bounded range.
    pub fn mean_of<E>(&self, mut f: impl FnMut(usize) -> Result<f64, E>) -> Result<f64, E> {
        let mut total = 0.0;
        for (k, p) in self.masses.iter().enumerate() {
            if *p > NEGLIGIBLE {
                total += p * f(k)?;
            }
        }
        Ok(total)
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn masses_sum_to_one_and_tails_agree() {
        let d = Predictive::new(230, 251, 360);
        let total: f64 = (0..=360).map(|k| d.probability(k)).sum();
        approx::assert_abs_diff_eq!(total, 1.0, epsilon = 1e-12);
        for k in [0, 1, 200, 318, 330, 360, 361] {
            let direct: f64 = (k..=360).map(|j| d.probability(j)).sum();
            approx::assert_abs_diff_eq!(d.at_least(k), direct, epsilon = 1e-12);
        }
    }

    #[test]
    fn with_nothing_seen_every_count_is_equally_likely() {
        // Beta(1, 1) prior and no data: BetaBinomial(m, 1, 1) is uniform on 0..=m (a closed form of
        // the beta-binomial, common practice).
        let d = Predictive::new(0, 0, 9);
        for k in 0..=9 {
            approx::assert_abs_diff_eq!(d.probability(k), 0.1, epsilon = 1e-12);
        }
        assert_eq!(d.reached_with(0.55), 4); // P(K ≥ 4) = 0.6, P(K ≥ 5) = 0.5
    }

    #[test]
    fn more_seen_successes_shift_the_count_up() {
        let low = Predictive::new(200, 251, 360);
        let high = Predictive::new(220, 251, 360);
        for k in [250, 300, 320] {
            assert!(high.at_least(k) > low.at_least(k));
        }
        assert!(high.reached_with(0.9) > low.reached_with(0.9));
        let mean = high.mean_of(|k| Ok::<_, ()>(k as f64)).unwrap();
        // Mean of BetaBinomial(m, a, b) = m a / (a + b) (common practice).
        approx::assert_abs_diff_eq!(mean, 360.0 * 221.0 / 253.0, epsilon = 1e-9);
    }
}
