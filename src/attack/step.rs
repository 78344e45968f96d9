//! One step of the attack: steepest descent of a margin over a [`Region`], followed by projection, and
//! the starting points (centre, random, FGSM).
//!
//! Steps are measured in the region's own metric `u = D⁻¹(x − c)`, `D = diag(radii)`, so a step of
//! size 1 crosses the whole ball whatever the per-feature radii are:
//! - L-inf: `x ← x − α D sign(g)` (the FGSM / PGD sign step of Goodfellow et al., 2015 and
//!   Madry et al., 2018, per feature scaled by its radius);
//! - L2: `x ← x − α D (D g) / ‖D g‖₂` (steepest descent of the margin in the radii metric).
//!
//! Features with radius 0 never move. Every function here leaves its point inside the region, in the
//! exact sense of [`Region::contains`] ([`Region::project`] after each move, random L-inf starts drawn
//! from the inner box); none of them decides anything about counterexamples.

use rand::Rng;
use rand_distr::StandardNormal;

use crate::threat::{Norm, Region};

/// Moves `x` against the gradient `gradient` of the margin by `step` (a fraction of the ball's
/// radius, in the region's metric), then projects it back into the region. A zero gradient leaves `x`
/// where it is (apart from the projection).
pub fn descent_step(region: &Region, x: &mut [f64], gradient: &[f64], step: f64) {
    match region.norm {
        Norm::Linf => {
            // Branch-free (so it vectorises): the sign is 0 for a zero gradient, and a zero radius
            // moves nothing (x − 0 = x exactly). The L-inf region is its box: the projection is the
            // clamp of `Region::project`, written with max/min (the same values for the finite points
            // here).
            let n = x.len();
            let (gradient, radii) = (&gradient[..n], &region.radii[..n]);
            let (lower, upper) = (&region.inner_lower[..n], &region.inner_upper[..n]);
            for i in 0..n {
                let g = gradient[i];
                let sign = f64::from(u8::from(g > 0.0)) - f64::from(u8::from(g < 0.0));
                x[i] = (x[i] - step * radii[i] * sign).max(lower[i]).min(upper[i]);
            }
        }
        Norm::L2 => {
            let length = gradient
                .iter()
                .zip(&region.radii)
                .map(|(g, r)| (g * r) * (g * r))
                .sum::<f64>()
                .sqrt();
            if length > 0.0 && length.is_finite() {
                let scale = step / length;
                for ((xi, g), r) in x.iter_mut().zip(gradient).zip(&region.radii) {
                    *xi -= scale * r * r * g;
                }
            }
            region.project(x);
        }
    }
}

/// The fast gradient sign point (Goodfellow et al., 2015; for L2 the normalised-gradient analogue): one
/// full-radius step from the centre against `gradient` (the margin's gradient at the centre),
/// projected. Written into `x`.
pub fn fgsm_point(region: &Region, gradient: &[f64], x: &mut [f64]) {
    x.copy_from_slice(&region.center);
    descent_step(region, x, gradient, 1.0);
}

/// A random starting point inside the region, written into `x`: uniform over the inner box for L-inf; for L2
/// uniform over the scaled ball (Gaussian direction, radius `U^(1/k)` for `k` free features), then
/// clipped to the input range.
pub fn random_start<R: Rng>(region: &Region, rng: &mut R, x: &mut [f64]) {
    match region.norm {
        Norm::Linf => {
            for ((xi, &lo), &hi) in x
                .iter_mut()
                .zip(&region.inner_lower)
                .zip(&region.inner_upper)
            {
                *xi = if hi > lo { rng.gen_range(lo..=hi) } else { lo };
            }
        }
        Norm::L2 => {
            let free = region.radii.iter().filter(|r| **r > 0.0).count();
            x.copy_from_slice(&region.center);
            if free == 0 {
                return;
            }
            let direction: Vec<f64> = region
                .radii
                .iter()
                .map(|r| {
                    if *r > 0.0 {
                        rng.sample(StandardNormal)
                    } else {
                        0.0
                    }
                })
                .collect();
            let length = direction.iter().map(|d| d * d).sum::<f64>().sqrt();
            if length > 0.0 {
                let radius = rng.gen::<f64>().powf(1.0 / free as f64);
                for ((xi, r), d) in x.iter_mut().zip(&region.radii).zip(&direction) {
                    *xi += radius * r * d / length;
                }
            }
            region.project(x);
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::threat::Budget;
    use rand::SeedableRng;

    #[test]
    fn linf_fgsm_reaches_the_corner_and_keeps_fixed_features() {
        let budget = Budget {
            norm: Norm::Linf,
            radii: vec![0.1, 0.0, 0.2],
        };
        let region = budget.region(&[0.5, 0.5, 0.95], &[0.0; 3], &[1.0; 3]);
        let mut x = vec![0.0; 3];
        fgsm_point(&region, &[1.0, -3.0, -2.0], &mut x);
        approx::assert_abs_diff_eq!(x[0], 0.4, epsilon = 1e-12);
        approx::assert_abs_diff_eq!(x[1], 0.5, epsilon = 1e-12);
        approx::assert_abs_diff_eq!(x[2], 1.0, epsilon = 1e-12); // clipped to the input range
        assert!(region.contains(&x));
    }

    #[test]
    fn l2_step_follows_the_radii_metric() {
        let budget = Budget {
            norm: Norm::L2,
            radii: vec![1.0, 2.0],
        };
        let region = budget.region(&[0.0, 0.0], &[-10.0; 2], &[10.0; 2]);
        let mut x = vec![0.0; 2];
        fgsm_point(&region, &[1.0, 1.0], &mut x);
        // D g = (1, 2), |D g| = √5; x = −D (D g)/√5 = −(1, 4)/√5; scaled norm = |(1, 2)|/√5 = 1.
        approx::assert_abs_diff_eq!(x[0], -1.0 / 5f64.sqrt(), epsilon = 1e-12);
        approx::assert_abs_diff_eq!(x[1], -4.0 / 5f64.sqrt(), epsilon = 1e-12);
        approx::assert_abs_diff_eq!(region.scaled_norm(&x), 1.0, epsilon = 1e-12);
    }

    #[test]
    fn random_starts_lie_in_the_region() {
        let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(7);
        for norm in [Norm::Linf, Norm::L2] {
            let budget = Budget {
                norm,
                radii: vec![0.3, 0.0, 0.1, 0.5],
            };
            let region = budget.region(&[0.1, 0.5, 0.9, 0.5], &[0.0; 4], &[1.0; 4]);
            let mut x = vec![0.0; 4];
            for _ in 0..200 {
                random_start(&region, &mut rng, &mut x);
                assert!(region.contains(&x), "{norm}: {x:?}");
                approx::assert_abs_diff_eq!(x[1], 0.5, epsilon = 1e-15);
            }
        }
    }
}
