//! Exact decisions about sums of doubles, in ordinary round-to-nearest arithmetic (no change of the
//! floating-point rounding mode).
//!
//! [`two_sum`] is the error-free transformation of Møller (1965) and Knuth (*The Art of Computer
//! Programming*, vol. 2, §4.2.2): for finite `a`, `b` whose rounded sum `s` is finite, `a + b = s + e`
//! holds exactly. From it: [`add_down`] / [`add_up`] give the largest double ≤ `a + b` and the smallest
//! double ≥ `a + b` (the sum rounded toward −∞ / +∞), and [`within`] decides `|x − c| ≤ r` exactly.
//! Every function here is exact for all finite inputs, overflow included; the results for infinite
//! inputs are stated per function.

/// `(s, e)` with `s = fl(a + b)` and, when `a`, `b` and `s` are finite, `a + b = s + e` exactly.
pub fn two_sum(a: f64, b: f64) -> (f64, f64) {
    let s = a + b;
    let b_part = s - a;
    let a_part = s - b_part;
    (s, (a - a_part) + (b - b_part))
}

/// The largest double ≤ `a + b` (exact sum); −∞ when no finite double is ≤ it. For an infinite
/// operand, the rounded sum (±∞, or NaN for ∞ − ∞).
pub fn add_down(a: f64, b: f64) -> f64 {
    let (s, e) = two_sum(a, b);
    if s.is_infinite() && a.is_finite() && b.is_finite() {
        // Overflow: the exact sum is finite but beyond ±MAX.
        return if s > 0.0 { f64::MAX } else { f64::NEG_INFINITY };
    }
    if e < 0.0 {
        s.next_down()
    } else {
        s
    }
}

/// The smallest double ≥ `a + b` (exact sum); +∞ when no finite double is ≥ it. For an infinite
/// operand, the rounded sum.
pub fn add_up(a: f64, b: f64) -> f64 {
    let (s, e) = two_sum(a, b);
    if s.is_infinite() && a.is_finite() && b.is_finite() {
        return if s < 0.0 { f64::MIN } else { f64::INFINITY };
    }
    if e > 0.0 {
        s.next_up()
    } else {
        s
    }
}

/// The double nearest to `c + t` on the side of `c`: between `c` and `c + t` (both included), so that
/// `|result − c| ≤ |t|` exactly. `c` and `t` finite.
pub fn toward(c: f64, t: f64) -> f64 {
    if t > 0.0 {
        add_down(c, t)
    } else if t < 0.0 {
        add_up(c, t)
    } else {
        c
    }
}

/// True exactly when `|x − c| ≤ r` in real arithmetic (`r ≥ 0`; `r = +∞` accepts every finite `x`).
/// False when `x` or `c` is not finite or `r` is NaN.
pub fn within(x: f64, c: f64, r: f64) -> bool {
    if !(x.is_finite() && c.is_finite()) || r.is_nan() {
        return false;
    }
    if r == f64::INFINITY {
        return true;
    }
    let (d, e) = two_sum(x, -c);
    if d.is_infinite() {
        return false; // |x − c| > MAX ≥ r
    }
    // d = fl(x − c) and x − c = d + e with |e| at most half the spacing of doubles at d. If |d| < r then
    // r is at least the next double beyond |d|, so |x − c| < r; if |d| > r likewise |x − c| > r; at
    // |d| = r the sign of the error decides. (d = 0 means x − c = 0 exactly.)
    if d >= 0.0 {
        d < r || (d == r && e <= 0.0)
    } else {
        -d < r || (-d == r && e >= 0.0)
    }
}

/// A rigorous upper bound on `Σ ((x_i − c_i) / r_i)²` (exact real value) over the features with
/// `r_i > 0`, from round-to-nearest operations each followed by one step up (`next_up`), which covers
/// its rounding error. Nondecreasing in every `|x_i − c_i|`. +∞ or NaN when something overflows or is
/// not a number.
pub fn scaled_sum_of_squares_upper(x: &[f64], center: &[f64], radii: &[f64]) -> f64 {
    let mut sum: f64 = 0.0;
    for ((&v, &c), &r) in x.iter().zip(center).zip(radii) {
        if r <= 0.0 {
            continue;
        }
        let d = (v - c).abs();
        if d == 0.0 {
            continue; // v − c = 0 exactly
        }
        // |v − c| ≤ next_up(|fl(v − c)|): the rounding error is at most half a spacing.
        let quotient = (d.next_up() / r).next_up();
        sum = (sum + (quotient * quotient).next_up()).next_up();
    }
    sum
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn two_sum_recovers_the_lost_low_part() {
        // 1 + 2⁻⁶⁰ rounds to 1; the error term is the 2⁻⁶⁰ that was lost.
        let tiny = 2f64.powi(-60);
        assert_eq!(two_sum(1.0, tiny), (1.0, tiny));
        assert_eq!(two_sum(0.5, 0.25), (0.75, 0.0));
    }

    #[test]
    fn directed_sums_bracket_the_exact_sum() {
        let tiny = 2f64.powi(-60);
        assert_eq!(add_down(1.0, tiny), 1.0);
        assert_eq!(add_up(1.0, tiny), 1.0f64.next_up());
        assert_eq!(add_down(1.0, -tiny), 1.0f64.next_down());
        assert_eq!(add_up(1.0, -tiny), 1.0);
        assert_eq!(add_down(0.75, 0.25), 1.0);
        assert_eq!(add_up(0.75, 0.25), 1.0);
        assert_eq!(add_down(f64::MAX, f64::MAX), f64::MAX);
        assert_eq!(add_up(f64::MAX, f64::MAX), f64::INFINITY);
        assert_eq!(add_up(-f64::MAX, -f64::MAX), f64::MIN);
        assert_eq!(add_down(-f64::MAX, -f64::MAX), f64::NEG_INFINITY);
    }

    #[test]
    fn toward_never_passes_the_target() {
        let tiny = 2f64.powi(-60);
        assert_eq!(toward(1.0, tiny), 1.0);
        assert_eq!(toward(1.0, -tiny), 1.0);
        assert_eq!(toward(1.0, 0.5), 1.5);
        assert_eq!(toward(f64::MAX, f64::MAX), f64::MAX);
    }

    #[test]
    fn within_decides_the_boundary_exactly() {
        // 0.1 + 0.05 in doubles: the exact sum of the two doubles lies strictly between two doubles.
        let (c, r) = (0.1, 0.05);
        let high = add_down(c, r);
        assert!(within(high, c, r));
        assert!(!within(high.next_up(), c, r));
        let low = add_up(c, -r);
        assert!(within(low, c, r));
        assert!(!within(low.next_down(), c, r));
        assert!(within(3.0, 3.0, 0.0) && !within(3.0f64.next_up(), 3.0, 0.0));
        assert!(within(1e300, -1e300, f64::INFINITY));
        assert!(!within(f64::MAX, -f64::MAX, f64::MAX));
        assert!(!within(f64::NAN, 0.0, 1.0));
    }

    #[test]
    fn the_scaled_sum_bound_is_above_the_plain_sum() {
        let x = [0.3, -0.4, 7.0];
        let c = [0.0, 0.0, 7.0];
        let r = [1.0, 1.0, 0.0];
        let plain = 0.3f64 * 0.3 + 0.4 * 0.4;
        let upper = scaled_sum_of_squares_upper(&x, &c, &r);
        assert!(upper >= plain && upper <= plain * (1.0 + 1e-14));
        assert_eq!(scaled_sum_of_squares_upper(&c, &c, &r), 0.0);
    }
}
