//! The region around one sample: its exact description (centre, norm, radii, input range) and two
//! boxes derived from it with directed rounding.
//!
//! - The **outer box** `[outer_lower, outer_upper]` contains every real point of ball ∩ range: its ends
//!   are `c − r` rounded down and `c + r` rounded up, then intersected with the range. Bounds must use
//!   it (a box rounded inward would miss points of the ball).
//! - The **inner box** `[inner_lower, inner_upper]` holds exactly the doubles `x_i` with
//!   `|x_i − c_i| ≤ r_i` (real arithmetic) inside the range: `c − r` rounded up, `c + r` rounded down.
//!   Attacks clip to it. For L-inf a double point lies in the region exactly when it lies in this box.
//!
//! [`Region::contains`] is exact and has no tolerance: L-inf decides `|x_i − c_i| ≤ r_i` exactly
//! ([`exact::within`]); L2 accepts only when a rigorous upper bound of `Σ ((x_i − c_i)/r_i)²`, its
//! rounding errors included, is ≤ 1 (conservative: a point within a few units in the last place of the
//! sphere may be refused); a fixed feature (`r_i = 0`) must equal the centre bit for bit.
//! [`Region::project`] always yields a point that `contains` accepts. The centre itself always belongs
//! to the boxes (a sample outside the input range, accepted with `--allow-out-of-range`, widens the
//! range to include it).

use super::exact;
use super::{distance, Budget, Norm};

/// The set of inputs a requirement covers around one sample: ball ∩ valid input range.
#[derive(Debug, Clone, PartialEq)]
pub struct Region {
    /// The unperturbed sample.
    pub center: Vec<f64>,
    /// The ball's norm.
    pub norm: Norm,
    /// Radius per feature (0 = fixed).
    pub radii: Vec<f64>,
    /// Lower corner of the outer box (rounded outward): every real point of the region is ≥ it.
    pub outer_lower: Vec<f64>,
    /// Upper corner of the outer box (rounded outward): every real point of the region is ≤ it.
    pub outer_upper: Vec<f64>,
    /// Lower corner of the inner box (rounded inward): the smallest double ≥ `c − r`, within the range.
    pub inner_lower: Vec<f64>,
    /// Upper corner of the inner box (rounded inward): the largest double ≤ `c + r`, within the range.
    pub inner_upper: Vec<f64>,
}

/// How many times [`Region::project`] shrinks an L2 point further before falling back to the centre
/// (the first try already passes in practice; the loop only makes the guarantee unconditional).
const SHRINK_ATTEMPTS: usize = 8;

impl Region {
    /// Builds the region; `lower`/`upper` is the model's valid input range.
    pub fn new(center: &[f64], budget: &Budget, lower: &[f64], upper: &[f64]) -> Region {
        let n = center.len();
        let mut region = Region {
            center: center.to_vec(),
            norm: budget.norm,
            radii: budget.radii.clone(),
            outer_lower: Vec::with_capacity(n),
            outer_upper: Vec::with_capacity(n),
            inner_lower: Vec::with_capacity(n),
            inner_upper: Vec::with_capacity(n),
        };
        for (i, (&c, &r)) in center.iter().zip(&budget.radii).enumerate() {
            let (lo, hi) = (lower[i], upper[i]);
            let ends = [
                exact::add_down(c, -r),
                exact::add_up(c, r),
                exact::add_up(c, -r),
                exact::add_down(c, r),
            ];
            region.outer_lower.push(ends[0].max(lo).min(c));
            region.outer_upper.push(ends[1].min(hi).max(c));
            region.inner_lower.push(ends[2].max(lo).min(c));
            region.inner_upper.push(ends[3].min(hi).max(c));
        }
        region
    }

    /// Input dimension.
    pub fn dim(&self) -> usize {
        self.center.len()
    }

    /// True exactly when `x` is a finite point of the inner box and of the ball (L2: conservatively, see
    /// the module documentation). No tolerance.
    pub fn contains(&self, x: &[f64]) -> bool {
        x.len() == self.dim()
            && x.iter().enumerate().all(|(i, v)| {
                v.is_finite() && *v >= self.inner_lower[i] && *v <= self.inner_upper[i]
            })
            && self.in_ball(x)
    }

    /// The ball alone: L-inf exactly, L2 through a rigorous upper bound; fixed features must equal the
    /// centre.
    fn in_ball(&self, x: &[f64]) -> bool {
        match self.norm {
            Norm::Linf => x
                .iter()
                .zip(&self.center)
                .zip(&self.radii)
                .all(|((&v, &c), &r)| exact::within(v, c, r)),
            Norm::L2 => {
                let fixed_kept = x
                    .iter()
                    .zip(&self.center)
                    .zip(&self.radii)
                    .all(|((&v, &c), &r)| r > 0.0 || v == c);
                fixed_kept
                    && exact::scaled_sum_of_squares_upper(x, &self.center, &self.radii) <= 1.0
            }
        }
    }

    /// `‖D⁻¹(x − c)‖` in the region's norm, computed in f64 (an estimate, not a membership test): about
    /// 1 on the sphere. A change in a fixed feature gives ∞.
    pub fn scaled_norm(&self, x: &[f64]) -> f64 {
        let mut acc: f64 = 0.0;
        for (i, &v) in x.iter().enumerate() {
            let d = v - self.center[i];
            let r = self.radii[i];
            let q = if r > 0.0 {
                d.abs() / r
            } else if d == 0.0 {
                0.0
            } else {
                f64::INFINITY
            };
            match self.norm {
                Norm::Linf => acc = acc.max(q),
                Norm::L2 => acc += q * q,
            }
        }
        match self.norm {
            Norm::Linf => acc,
            Norm::L2 => acc.sqrt(),
        }
    }

    /// Plain (unscaled) distance `‖x − c‖` in the region's norm, raw input units, computed in f64. For a
    /// point that [`Region::contains`] accepts it never exceeds the largest radius: the exact distance
    /// cannot, so a value that rounding pushed above it is capped there.
    pub fn distance(&self, x: &[f64]) -> f64 {
        let plain = distance(self.norm, &self.center, x);
        if self.contains(x) {
            let largest = self.radii.iter().copied().fold(0.0, f64::max);
            plain.min(largest)
        } else {
            plain
        }
    }

    /// Moves `x` into the region so that [`Region::contains`] accepts it. L2: a point outside the ball
    /// is scaled toward the centre onto a sphere a relative `4 (n + 4)` units of roundoff inside (each
    /// coordinate rounded toward the centre, re-checked, shrunk further if needed, the centre as last
    /// resort); then every coordinate is clipped to the inner box, which moves it toward the centre and
    /// so keeps it in the ball.
    pub fn project(&self, x: &mut [f64]) {
        if self.norm == Norm::L2 {
            self.shrink_into_ball(x);
        }
        for ((v, &lo), &hi) in x.iter_mut().zip(&self.inner_lower).zip(&self.inner_upper) {
            *v = v.clamp(lo, hi);
        }
    }

    /// L2 only: leaves a point of the ball alone, else moves it toward the centre until it passes.
    fn shrink_into_ball(&self, x: &mut [f64]) {
        if self.in_ball(x) {
            return;
        }
        let change: Vec<f64> = x
            .iter()
            .zip(&self.center)
            .zip(&self.radii)
            .map(|((&v, &c), &r)| if r > 0.0 { v - c } else { 0.0 })
            .collect();
        let scaled: Vec<f64> = change
            .iter()
            .zip(&self.radii)
            .map(|(&d, &r)| if r > 0.0 { d / r } else { 0.0 })
            .collect();
        let largest = scaled.iter().fold(0.0, |m: f64, q| m.max(q.abs()));
        let length = largest
            * scaled
                .iter()
                .map(|q| (q / largest).powi(2))
                .sum::<f64>()
                .sqrt();
        if length.is_finite() && length > 0.0 {
            let mut slack = 4.0 * (self.dim() + 4) as f64 * f64::EPSILON;
            for _ in 0..SHRINK_ATTEMPTS {
                let factor = (1.0 - slack).max(0.0) / length;
                for ((v, &c), &d) in x.iter_mut().zip(&self.center).zip(&change) {
                    *v = exact::toward(c, d * factor);
                }
                if self.in_ball(x) {
                    return;
                }
                slack *= 16.0;
            }
        }
        x.copy_from_slice(&self.center);
    }
}
