//! Sparse affine maps: the fixed linear pieces of a network (average pooling, the differences and sums
//! that write a max pool as ReLUs, per-channel scale and shift), stored by rows.
//!
//! Guarantee: [`Sparse::apply`] computes `W x + b` with `W` the matrix whose non-zeros are the stored
//! entries, each output a dot product over its row's entries; [`Sparse::transpose_apply_with`] is the exact
//! adjoint `Wᵀ A`. A map may store values that are themselves rounded (a `1/std`, a batch-norm scale):
//! `roundings = r` says every stored weight and bias is within relative `γ_r` of the exact value the
//! model file describes, and [`Sparse::fan_in`] counts those `r` roundings like `r` more steps of the
//! evaluation (`γ_r + γ_n + γ_r γ_n ≤ γ_{r+n}`, Higham §3.1, Lemma 3.3), so rounding allowances built
//! on the fan-in cover them.

use nalgebra::{DMatrix, DVector, RealField};

/// A sparse affine map `x ↦ W x + b`.
#[derive(Debug, Clone, PartialEq)]
pub struct Sparse {
    /// Input size.
    pub inputs: usize,
    /// Per output row, its `(input, weight)` entries.
    pub rows: Vec<Vec<(usize, f64)>>,
    /// Bias per output.
    pub bias: DVector<f64>,
    /// Roundings between each stored value and its exact value (0 = stored exactly).
    pub roundings: usize,
}

impl Sparse {
    /// A map from its rows (each entry's input index must be below `inputs`).
    pub fn new(inputs: usize, rows: Vec<Vec<(usize, f64)>>, bias: DVector<f64>) -> Sparse {
        assert_eq!(rows.len(), bias.len(), "one bias per row");
        assert!(
            rows.iter().flatten().all(|(i, _)| *i < inputs),
            "entries inside the input"
        );
        Sparse {
            inputs,
            rows,
            bias,
            roundings: 0,
        }
    }

    /// The same map, declaring each stored value `roundings` roundings away from its exact value.
    pub fn rounded(mut self, roundings: usize) -> Sparse {
        self.roundings = roundings;
        self
    }

    /// The longest dot product of one output, bias and stored roundings included.
    pub fn fan_in(&self) -> usize {
        self.longest_row() + 1 + self.roundings
    }

    /// `self ∘ inner` for two sparse maps (values multiplied out in f64: only for maps whose products
    /// are exact, such as the ±1 differences and sums of a max pool).
    pub fn after(&self, inner: &Sparse) -> Sparse {
        let rows = self
            .rows
            .iter()
            .map(|row| {
                let mut merged: Vec<(usize, f64)> = Vec::new();
                for (j, w) in row {
                    for (i, v) in &inner.rows[*j] {
                        match merged.iter_mut().find(|(k, _)| k == i) {
                            Some(entry) => entry.1 += w * v,
                            None => merged.push((*i, w * v)),
                        }
                    }
                }
                merged.retain(|(_, w)| *w != 0.0);
                merged
            })
            .collect();
        let bias = self.apply_with(
            &DMatrix::from_column_slice(inner.bias.len(), 1, inner.bias.as_slice()),
            |w| w,
        );
        let bias = DVector::from_column_slice(bias.as_slice()) + &self.bias;
        Sparse::new(inner.inputs, rows, bias).rounded(self.roundings + inner.roundings)
    }

    /// A diagonal map `x ↦ scale ∘ x + shift`.
    pub fn diagonal(scale: &DVector<f64>, shift: DVector<f64>) -> Sparse {
        let rows = scale
            .iter()
            .enumerate()
            .map(|(i, s)| vec![(i, *s)])
            .collect();
        Sparse::new(scale.len(), rows, shift)
    }

    /// An inference-form batch norm on `width` features (`positions` per channel) as two maps:
    /// `x − mean` (exact), then `γ/sqrt(var + ε) · y + β`, whose factor is three roundings away from
    /// the exact one (division, square root, addition), declared with [`Sparse::rounded`].
    pub fn batch_norm(
        [scale, shift, mean, variance]: [&DVector<f64>; 4],
        epsilon: f64,
        positions: usize,
        width: usize,
    ) -> [Sparse; 2] {
        let per = |v: &DVector<f64>| DVector::from_fn(width, |r, _| v[r / positions]);
        let centre = Sparse::diagonal(&DVector::from_element(width, 1.0), -per(mean));
        let factor = scale.zip_map(variance, |g, v| g / (v + epsilon).sqrt());
        let rescale = Sparse::diagonal(&per(&factor), per(shift)).rounded(3);
        [centre, rescale]
    }

    /// Output size.
    pub fn output_dim(&self) -> usize {
        self.rows.len()
    }

    /// Longest row (number of entries).
    pub fn longest_row(&self) -> usize {
        self.rows.iter().map(Vec::len).max().unwrap_or(0)
    }

    /// `W X` (no bias) with the weights mapped by `weight` (e.g. `|w|`, or a rounding to f32).
    pub fn apply_with<T: RealField + Copy>(
        &self,
        xs: &DMatrix<T>,
        weight: impl Fn(f64) -> T,
    ) -> DMatrix<T> {
        let mut out = DMatrix::zeros(self.rows.len(), xs.ncols());
        for b in 0..xs.ncols() {
            let x = xs.column(b);
            for (r, row) in self.rows.iter().enumerate() {
                let mut sum = T::zero();
                for (i, w) in row {
                    sum += weight(*w) * x[*i];
                }
                out[(r, b)] = sum;
            }
        }
        out
    }

    /// `W X + b 1ᵀ`.
    pub fn apply(&self, xs: &DMatrix<f64>) -> DMatrix<f64> {
        let mut out = self.apply_with(xs, |w| w);
        for mut column in out.column_iter_mut() {
            column += &self.bias;
        }
        out
    }

    /// `Wᵀ A` with the weights mapped by `weight`.
    pub fn transpose_apply_with<T: RealField + Copy>(
        &self,
        coefficients: &DMatrix<T>,
        weight: impl Fn(f64) -> T,
    ) -> DMatrix<T> {
        let mut out = DMatrix::zeros(self.inputs, coefficients.ncols());
        for b in 0..coefficients.ncols() {
            for (r, row) in self.rows.iter().enumerate() {
                let a = coefficients[(r, b)];
                if a == T::zero() {
                    continue;
                }
                for (i, w) in row {
                    out[(*i, b)] += weight(*w) * a;
                }
            }
        }
        out
    }

    /// The same map as a dense matrix.
    pub fn to_dense_weights(&self) -> DMatrix<f64> {
        let mut weights = DMatrix::zeros(self.rows.len(), self.inputs);
        for (r, row) in self.rows.iter().enumerate() {
            for (i, w) in row {
                weights[(r, *i)] += *w;
            }
        }
        weights
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn apply_and_transpose_agree_with_the_dense_matrix() {
        let s = Sparse::new(
            3,
            vec![vec![(0, 1.0), (2, -2.0)], vec![], vec![(1, 0.5), (1, 0.25)]],
            DVector::from_vec(vec![1.0, 2.0, 3.0]),
        );
        let dense = s.to_dense_weights();
        let xs = DMatrix::from_column_slice(3, 2, &[1.0, 2.0, 3.0, -1.0, 0.0, 4.0]);
        let expected = &dense * &xs + DMatrix::from_fn(3, 2, |r, _| s.bias[r]);
        assert_eq!(s.apply(&xs), expected);
        let a = DMatrix::from_column_slice(3, 1, &[1.0, -1.0, 2.0]);
        assert_eq!(s.transpose_apply_with(&a, |w| w), dense.transpose() * a);
    }
}
