//! Exact checks for test assertions about doubles, in rational arithmetic (num-rational over
//! num-bigint): every finite double is a rational number, so these decide `|x − c| ≤ r` and
//! `Σ ((x − c)/r)² ≤ 1` with no rounding at all. Independent of ballast's own arithmetic.

#![allow(dead_code)] // each test crate uses the part it needs

pub mod cli;
pub mod exact_model;
pub mod fixtures;
pub mod gradient;

use num_rational::BigRational;
use num_traits::{One, Signed, Zero};

/// The exact rational value of a finite double.
pub fn rational(v: f64) -> BigRational {
    BigRational::from_float(v).unwrap_or_else(|| panic!("{v} is not finite"))
}

/// `|x_i − c_i| ≤ r_i` for every feature, exactly.
pub fn linf_inside(x: &[f64], center: &[f64], radii: &[f64]) -> bool {
    x.iter()
        .zip(center)
        .zip(radii)
        .all(|((&v, &c), &r)| (rational(v) - rational(c)).abs() <= rational(r))
}

/// `Σ ((x_i − c_i)/r_i)² ≤ 1` over the features with `r_i > 0`, and `x_i = c_i` where `r_i = 0`,
/// exactly.
pub fn l2_inside(x: &[f64], center: &[f64], radii: &[f64]) -> bool {
    l2_scaled_sum(x, center, radii).is_some_and(|sum| sum <= BigRational::one())
}

/// `Σ ((x_i − c_i)/r_i)²` over the features with `r_i > 0`, exactly; `None` when a fixed feature
/// (`r_i = 0`) moved.
pub fn l2_scaled_sum(x: &[f64], center: &[f64], radii: &[f64]) -> Option<BigRational> {
    let mut sum = BigRational::zero();
    for ((&v, &c), &r) in x.iter().zip(center).zip(radii) {
        if r == 0.0 {
            if v != c {
                return None;
            }
            continue;
        }
        let q = (rational(v) - rational(c)) / rational(r);
        sum += &q * &q;
    }
    Some(sum)
}

/// Exact membership in the ball of `norm` (by name, "linf" or "l2").
pub fn ball_inside(norm: &str, x: &[f64], center: &[f64], radii: &[f64]) -> bool {
    match norm {
        "linf" => linf_inside(x, center, radii),
        "l2" => l2_inside(x, center, radii),
        other => panic!("unknown norm {other}"),
    }
}

/// `lower_i ≤ x_i ≤ upper_i` for every feature (comparisons of doubles are exact).
pub fn in_range(x: &[f64], lower: &[f64], upper: &[f64]) -> bool {
    x.iter()
        .zip(lower.iter().zip(upper))
        .all(|(v, (lo, hi))| lo <= v && v <= hi)
}
