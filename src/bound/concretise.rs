//! Minimising a linear function `a·x` over a region (ball ∩ input box).
//!
//! For L-inf the region is a box and the minimum is exact per coordinate (`a_i > 0` takes the lower
//! corner, `a_i < 0` the upper one). For L2 ∩ box the minimum of `a·δ` over
//! `{δ : Σ δ_i²/r_i² ≤ 1, δ ∈ box − c}` is bounded by weak Lagrangian duality: for every `μ ≥ 0`,
//! `g(μ) = min_{δ ∈ box} a·δ + μ (Σ δ_i²/r_i² − 1)` is a lower bound (the penalty is ≤ 0 inside the
//! ball). The inner problem is separable: each coordinate minimises a convex quadratic over an interval,
//! whose minimiser is `−a_i r_i² / (2μ)` clipped to the interval. `g` is concave in `μ`; we maximise it by
//! bisection on the sign of `g′(μ) = Σ δ_i(μ)²/r_i² − 1` and return the best value seen, so a short
//! search only loses tightness, never soundness. Without a binding box the result is the dual-norm closed
//! form `a·c − ‖a ∘ r‖₂`. Fixed features (`r_i = 0`) stay at the centre.
//!
//! Every value returned is a lower bound on `min_{x ∈ region} a·x` in exact arithmetic; every point
//! returned lies in the region.

use nalgebra::{DMatrix, DVector};

use crate::threat::{Norm, Region};

/// Bisection steps on the Lagrange multiplier for L2 regions.
const MULTIPLIER_STEPS: usize = 80;

/// A lower bound on `min_{x ∈ region} a·x` (exact for L-inf; the best Lagrangian dual value for L2).
pub fn minimum(region: &Region, a: &[f64]) -> f64 {
    minimise(region, a, false).0
}

/// [`minimum`] together with a region point where `a·x` is (close to) smallest; for L2 it is the primal
/// point of the dual search, moved into the region by [`Region::project`].
pub fn minimum_with_point(region: &Region, a: &[f64]) -> (f64, Vec<f64>) {
    let (value, point) = minimise(region, a, true);
    (value, point.expect("point requested"))
}

/// `constant[r] + minimum(region, row r of a)` for every row of `a` (rows × input dim); for L-inf the
/// rows are minimised together column by column.
pub fn minimum_of_rows(region: &Region, a: &DMatrix<f64>, constant: &DVector<f64>) -> Vec<f64> {
    match region.norm {
        Norm::Linf => {
            let mut value: Vec<f64> = constant.iter().copied().collect();
            for (i, column) in a.column_iter().enumerate() {
                let (lo, hi) = (region.outer_lower[i], region.outer_upper[i]);
                for (v, w) in value.iter_mut().zip(column.as_slice()) {
                    *v += w.max(0.0) * lo + w.min(0.0) * hi;
                }
            }
            value
        }
        Norm::L2 => (0..a.nrows())
            .map(|r| {
                let row: Vec<f64> = a.row(r).iter().copied().collect();
                constant[r] + minimum(region, &row)
            })
            .collect(),
    }
}

fn minimise(region: &Region, a: &[f64], want_point: bool) -> (f64, Option<Vec<f64>>) {
    match region.norm {
        Norm::Linf => {
            let value: f64 = a
                .iter()
                .zip(region.outer_lower.iter().zip(&region.outer_upper))
                .map(|(w, (lo, hi))| if *w > 0.0 { w * lo } else { w * hi })
                .sum();
            let point = want_point.then(|| {
                (0..a.len())
                    .map(|i| {
                        if a[i] > 0.0 {
                            region.inner_lower[i]
                        } else if a[i] < 0.0 {
                            region.inner_upper[i]
                        } else {
                            region.center[i]
                        }
                    })
                    .collect()
            });
            (value, point)
        }
        Norm::L2 => minimise_l2(region, a, want_point),
    }
}

/// The per-coordinate minimiser of `a_i δ + μ δ²/r²` over `[lo, hi]` (μ = 0: the corner).
fn coordinate(a: f64, r: f64, lo: f64, hi: f64, multiplier: f64) -> f64 {
    if r <= 0.0 {
        return 0.0;
    }
    if multiplier <= 0.0 {
        return if a > 0.0 {
            lo
        } else if a < 0.0 {
            hi
        } else {
            0.0
        };
    }
    (-a * r * r / (2.0 * multiplier)).clamp(lo, hi)
}

struct L2Problem<'a> {
    a: &'a [f64],
    radii: &'a [f64],
    low: Vec<f64>,
    high: Vec<f64>,
}

impl L2Problem<'_> {
    /// `(g(μ), g′(μ))` for the Lagrangian of `a·δ`.
    fn evaluate(&self, multiplier: f64) -> (f64, f64) {
        let mut linear = 0.0;
        let mut scaled = 0.0;
        for i in 0..self.a.len() {
            let r = self.radii[i];
            if r <= 0.0 {
                continue;
            }
            let d = coordinate(self.a[i], r, self.low[i], self.high[i], multiplier);
            linear += self.a[i] * d;
            scaled += (d / r) * (d / r);
        }
        let slope = scaled - 1.0;
        (linear + multiplier * slope, slope)
    }

    fn point(&self, center: &[f64], multiplier: f64) -> Vec<f64> {
        (0..self.a.len())
            .map(|i| {
                center[i]
                    + coordinate(
                        self.a[i],
                        self.radii[i],
                        self.low[i],
                        self.high[i],
                        multiplier,
                    )
            })
            .collect()
    }
}

fn minimise_l2(region: &Region, a: &[f64], want_point: bool) -> (f64, Option<Vec<f64>>) {
    let n = a.len();
    let mut at_center = 0.0;
    let mut norm_squared = 0.0;
    for ((w, c), r) in a.iter().zip(&region.center).zip(&region.radii) {
        at_center += w * c;
        if *r > 0.0 {
            norm_squared += (w * r) * (w * r);
        }
    }
    let problem = L2Problem {
        a,
        radii: &region.radii,
        low: (0..n)
            .map(|i| region.outer_lower[i] - region.center[i])
            .collect(),
        high: (0..n)
            .map(|i| region.outer_upper[i] - region.center[i])
            .collect(),
    };
    if norm_squared <= 0.0 {
        let point = want_point.then(|| region.center.clone());
        return (at_center, point);
    }
    // g′ is non-increasing in μ; at the unclipped optimum μ* = ‖a∘r‖/2 it is ≤ 0 (clipping only shrinks δ).
    let mut high = norm_squared.sqrt() / 2.0;
    let (value_high, _) = problem.evaluate(high);
    let (value_zero, slope_zero) = problem.evaluate(0.0);
    let mut best = value_high.max(value_zero);
    let mut feasible = high;
    if slope_zero <= 0.0 {
        // The box corner lies in the ball: μ = 0 is optimal and the minimum is the box minimum.
        feasible = 0.0;
    } else {
        let mut low = 0.0;
        for _ in 0..MULTIPLIER_STEPS {
            let middle = 0.5 * (low + high);
            let (value, slope) = problem.evaluate(middle);
            best = best.max(value);
            if slope > 0.0 {
                low = middle;
            } else {
                high = middle;
                feasible = middle;
            }
            if high - low <= 1e-15 * high {
                break;
            }
        }
    }
    let point = want_point.then(|| {
        let mut x = problem.point(&region.center, feasible);
        region.project(&mut x);
        x
    });
    (at_center + best, point)
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::threat::Budget;

    #[test]
    fn linf_minimum_is_the_corner() {
        let budget = Budget::uniform(Norm::Linf, 0.5, 2);
        let region = budget.region(&[1.0, 1.0], &[0.0, 0.0], &[1.2, 10.0]);
        let (value, point) = minimum_with_point(&region, &[1.0, -2.0]);
        // lower corner 0.5 for the first, upper 1.5 for the second: 0.5 − 3.0
        assert!((value - (-2.5)).abs() < 1e-12);
        assert!(region.contains(&point));
    }

    #[test]
    fn l2_without_box_is_the_dual_norm() {
        // Textbook dual-norm result: min over ‖δ‖₂ ≤ ε of a·δ is −ε‖a‖₂.
        let budget = Budget::uniform(Norm::L2, 0.1, 3);
        let inf = f64::INFINITY;
        let region = budget.region(&[0.0, 0.0, 0.0], &[-inf; 3], &[inf; 3]);
        let a = [3.0, -4.0, 0.0];
        let (value, point) = minimum_with_point(&region, &a);
        assert!((value + 0.5).abs() < 1e-12);
        assert!(region.contains(&point));
    }

    #[test]
    fn l2_with_binding_box_is_below_every_feasible_value() {
        let budget = Budget::uniform(Norm::L2, 1.0, 2);
        let region = budget.region(&[0.0, 0.0], &[-0.1, -1.0], &[1.0, 1.0]);
        let a = [1.0, 1.0];
        let value = minimum(&region, &a);
        // True minimum: δ1 = −0.1, δ2 = −sqrt(1 − 0.01).
        let truth = -0.1 - (0.99f64).sqrt();
        assert!(value <= truth + 1e-12);
        assert!(value >= truth - 1e-9);
    }
}
