//! Products `Wᵀ A` of coefficient matrices that skip work the relaxation makes unnecessary.
//!
//! Guarantee: every entry is a sum of the same nonzero terms `W[r, i]·A[r, j]` as the plain product
//! [`LinearLayer::transpose_apply`], summed in another order (exact-zero terms left out, or two
//! partial sums added); the rounding allowance of the engine holds for any order of summation
//! (docs/bounds.md), so a bound built on these products is as sound as one built on the plain one.

use nalgebra::DMatrix;

use super::LinearLayer;

/// `Wᵀ A`, skipping the rows of `A` that are zero in every column (units a ReLU relaxation zeroes,
/// e.g. inactive ones) when at least an eighth of them are.
pub fn transpose_nonzero(layer: &dyn LinearLayer, a: &DMatrix<f64>) -> DMatrix<f64> {
    let mut used = vec![false; a.nrows()];
    for column in a.column_iter() {
        for (u, v) in used.iter_mut().zip(column.iter()) {
            *u |= *v != 0.0;
        }
    }
    let rows: Vec<usize> = (0..a.nrows()).filter(|&i| used[i]).collect();
    if rows.len() * 8 > a.nrows() * 7 {
        return layer.transpose_apply(a);
    }
    layer.transpose_apply_rows(&a.select_rows(&rows), &rows)
}

/// `Wᵀ A` for columns in pairs `(2c, 2c + 1)`: on the rows where every pair is an exact negation
/// (`A[r, 2c + 1] = −A[r, 2c]`), the product is taken once for the pair, `S = W[R, :]ᵀ A[R, 2c]`,
/// and column `2c` is `S + P₂c`, column `2c + 1` is `−S + P₂c₊₁`, with `P` the product over the
/// other nonzero rows. Falls back to [`transpose_nonzero`] when fewer than an eighth of the rows are
/// shared or the column count is odd.
pub fn transpose_paired(layer: &dyn LinearLayer, a: &DMatrix<f64>) -> DMatrix<f64> {
    let (n, columns) = a.shape();
    if !columns.is_multiple_of(2) {
        return transpose_nonzero(layer, a);
    }
    let pairs = columns / 2;
    let mut negated = vec![true; n];
    let mut used = vec![false; n];
    for c in 0..pairs {
        let (p, q) = (a.column(2 * c), a.column(2 * c + 1));
        for r in 0..n {
            negated[r] &= q[r] == -p[r];
            used[r] |= p[r] != 0.0 || q[r] != 0.0;
        }
    }
    let shared: Vec<usize> = (0..n).filter(|&r| used[r] && negated[r]).collect();
    if shared.len() * 8 < n {
        return transpose_nonzero(layer, a);
    }
    let rest: Vec<usize> = (0..n).filter(|&r| used[r] && !negated[r]).collect();
    let even = DMatrix::from_fn(shared.len(), pairs, |i, c| a[(shared[i], 2 * c)]);
    let once = layer.transpose_apply_rows(&even, &shared);
    let mut g = if rest.is_empty() {
        DMatrix::zeros(once.nrows(), columns)
    } else {
        layer.transpose_apply_rows(&a.select_rows(&rest), &rest)
    };
    for c in 0..pairs {
        let s = once.column(c);
        let mut plus = g.column_mut(2 * c);
        plus += s;
        let mut minus = g.column_mut(2 * c + 1);
        minus -= s;
    }
    g
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::engine::DenseLayer;
    use crate::model::Dense;
    use nalgebra::DVector;

    /// The shared and the plain products agree to rounding (common practice: another summation order).
    #[test]
    fn paired_products_equal_the_plain_product() {
        let (n, m, pairs) = (9, 6, 5);
        let dense = Dense {
            weights: DMatrix::from_fn(n, m, |i, j| ((i * 7 + j * 3) % 11) as f64 / 4.0 - 1.3),
            bias: DVector::zeros(n),
        };
        let layer = DenseLayer::new(&dense);
        // Rows 0..5 negated in every pair, rows 5..7 differing, rows 7..9 zero.
        let mut a = DMatrix::zeros(n, 2 * pairs);
        for c in 0..pairs {
            for r in 0..7 {
                let v = (r as f64 + 1.0) * (c as f64 - 1.7) / 3.0;
                a[(r, 2 * c)] = v;
                a[(r, 2 * c + 1)] = if r < 5 { -v } else { 0.5 * v + 0.1 };
            }
        }
        let plain = layer.transpose_apply(&a);
        let paired = transpose_paired(&layer, &a);
        for (x, y) in plain.iter().zip(paired.iter()) {
            assert!((x - y).abs() <= 1e-12 * (1.0 + x.abs()), "{x} vs {y}");
        }
        let skipped = transpose_nonzero(&layer, &a);
        for (x, y) in plain.iter().zip(skipped.iter()) {
            assert!((x - y).abs() <= 1e-12 * (1.0 + x.abs()), "{x} vs {y}");
        }
    }
}
