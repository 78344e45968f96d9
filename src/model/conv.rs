//! Convolutions as structured linear maps: 1-D and 2-D cross-correlation with channels, stride,
//! zero padding and dilation, on features flattened row-major as channel × height × width (the order a
//! `Flatten` of an `N × C × H × W` tensor gives). A 1-D convolution is the 2-D one with height 1.
//!
//! Guarantee: [`Conv::correlate`] computes, for every output channel `o` and position `(y, x)`,
//! `Σ_{c,i,j} K[o, c, i, j] · in[c, y·s_h − p_t + i·d_h, x·s_w − p_l + j·d_w]` (out-of-range input
//! positions read as zero), the definition of ONNX `Conv` with `group = 1`; [`Conv::correlate_transpose`]
//! is its exact adjoint. Both run a whole batch as one matrix product over unfolded patches (im2col),
//! never as a dense matrix of the layer. Each output is one dot product of length
//! `in_channels · kernel_height · kernel_width` (plus the bias), evaluated in some order.

use nalgebra::{DMatrix, DVector, RealField};

/// Entries of unfolded patches processed at once (about 2 MB of f64).
const CHUNK_ENTRIES: usize = 1 << 18;

/// The geometry of a convolution.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct ConvShape {
    /// Input channels.
    pub in_channels: usize,
    /// Input height (1 for a 1-D convolution).
    pub in_height: usize,
    /// Input width (the length for a 1-D convolution).
    pub in_width: usize,
    /// Output channels.
    pub out_channels: usize,
    /// Kernel height (1 for a 1-D convolution).
    pub kernel_height: usize,
    /// Kernel width.
    pub kernel_width: usize,
    /// Stride (height, width).
    pub stride: (usize, usize),
    /// Zero padding (top, left, bottom, right).
    pub padding: (usize, usize, usize, usize),
    /// Dilation (height, width).
    pub dilation: (usize, usize),
}

impl ConvShape {
    /// Output height, or `None` when the kernel does not fit the padded input or a step is zero.
    fn out_extent(
        size: usize,
        before: usize,
        after: usize,
        kernel: usize,
        stride: usize,
        dilation: usize,
    ) -> Option<usize> {
        if kernel == 0 || stride == 0 || dilation == 0 {
            return None;
        }
        let padded = size + before + after;
        let reach = dilation * (kernel - 1) + 1;
        (padded >= reach).then(|| (padded - reach) / stride + 1)
    }

    /// Output (height, width), or `None` when the geometry is impossible.
    pub fn output_size(&self) -> Option<(usize, usize)> {
        let (top, left, bottom, right) = self.padding;
        let h = Self::out_extent(
            self.in_height,
            top,
            bottom,
            self.kernel_height,
            self.stride.0,
            self.dilation.0,
        )?;
        let w = Self::out_extent(
            self.in_width,
            left,
            right,
            self.kernel_width,
            self.stride.1,
            self.dilation.1,
        )?;
        Some((h, w))
    }

    /// Output positions per channel.
    fn positions(&self) -> usize {
        let (h, w) = self.output_size().expect("validated geometry");
        h * w
    }

    /// Length of one unfolded patch (`in_channels · kernel_height · kernel_width`).
    pub fn patch_len(&self) -> usize {
        self.in_channels * self.kernel_height * self.kernel_width
    }

    /// Input features (`in_channels · in_height · in_width`).
    pub fn input_dim(&self) -> usize {
        self.in_channels * self.in_height * self.in_width
    }

    /// Output features (`out_channels · out_height · out_width`).
    pub fn output_dim(&self) -> usize {
        self.out_channels * self.positions()
    }

    /// For each output position and patch entry, the input feature it reads (`None` in the padding).
    fn gather_table(&self) -> Vec<Option<usize>> {
        let (out_h, out_w) = self.output_size().expect("validated geometry");
        let (top, left, _, _) = self.padding;
        let mut table = Vec::with_capacity(out_h * out_w * self.patch_len());
        for y in 0..out_h {
            for x in 0..out_w {
                for c in 0..self.in_channels {
                    for i in 0..self.kernel_height {
                        for j in 0..self.kernel_width {
                            let row =
                                (y * self.stride.0 + i * self.dilation.0) as isize - top as isize;
                            let col =
                                (x * self.stride.1 + j * self.dilation.1) as isize - left as isize;
                            let inside = row >= 0
                                && col >= 0
                                && (row as usize) < self.in_height
                                && (col as usize) < self.in_width;
                            table.push(inside.then(|| {
                                (c * self.in_height + row as usize) * self.in_width + col as usize
                            }));
                        }
                    }
                }
            }
        }
        table
    }
}

/// A convolution layer: geometry, kernel (one row per output channel, columns in
/// in-channel × kernel-row × kernel-column order) and one bias per output channel.
#[derive(Debug, Clone, PartialEq)]
pub struct Conv {
    /// The geometry.
    pub shape: ConvShape,
    /// Kernel, `out_channels × patch_len`.
    pub kernel: DMatrix<f64>,
    /// Bias per output channel.
    pub bias: DVector<f64>,
    /// Patch gather table (see [`ConvShape`]); derived from `shape`.
    table: Vec<Option<usize>>,
}

impl Conv {
    /// A convolution with the given geometry, kernel and bias (sizes must agree; the caller validates).
    pub fn new(shape: ConvShape, kernel: DMatrix<f64>, bias: DVector<f64>) -> Conv {
        assert_eq!(kernel.nrows(), shape.out_channels, "kernel rows");
        assert_eq!(kernel.ncols(), shape.patch_len(), "kernel columns");
        assert_eq!(bias.len(), shape.out_channels, "bias length");
        let table = shape.gather_table();
        Conv {
            shape,
            kernel,
            bias,
            table,
        }
    }

    /// Output features per output channel (the spatial positions).
    pub fn positions(&self) -> usize {
        self.shape.positions()
    }

    /// The unfolded patches of a batch, transposed: `patch_len × (inputs · positions)`, column
    /// `b·P + p` holding the patch of input `b` at position `p` (columns are contiguous in memory).
    fn unfold<T: RealField + Copy>(&self, xs: &DMatrix<T>) -> DMatrix<T> {
        let positions = self.positions();
        let patch = self.shape.patch_len();
        let batch = xs.ncols();
        let mut patches = DMatrix::zeros(patch, batch * positions);
        let out = patches.as_mut_slice();
        for b in 0..batch {
            let x = xs.column(b);
            let x = x.as_slice();
            for p in 0..positions {
                let column = &mut out[(b * positions + p) * patch..(b * positions + p + 1) * patch];
                for (slot, source) in column
                    .iter_mut()
                    .zip(&self.table[p * patch..(p + 1) * patch])
                {
                    if let Some(s) = source {
                        *slot = x[*s];
                    }
                }
            }
        }
        patches
    }

    /// Output coefficients rearranged as `out_channels × (inputs · positions)` (column `b·P + p` holds
    /// every channel's coefficient at position `p` of input `b`).
    fn stack<T: RealField + Copy>(&self, coefficients: &DMatrix<T>) -> DMatrix<T> {
        let positions = self.positions();
        let channels = self.shape.out_channels;
        let batch = coefficients.ncols();
        let mut stacked = DMatrix::zeros(channels, batch * positions);
        let out = stacked.as_mut_slice();
        for b in 0..batch {
            let a = coefficients.column(b);
            let a = a.as_slice();
            for o in 0..channels {
                for p in 0..positions {
                    out[(b * positions + p) * channels + o] = a[o * positions + p];
                }
            }
        }
        stacked
    }

    /// `K ⋆ X` without bias for a kernel of this geometry (`kernel` may be `|K|`, an f32 copy, …):
    /// one column per input, outputs flattened channel-major.
    pub fn correlate<T: RealField + Copy>(
        &self,
        kernel: &DMatrix<T>,
        xs: &DMatrix<T>,
    ) -> DMatrix<T> {
        self.in_chunks(xs, self.shape.output_dim(), |part| {
            self.correlate_block(kernel, part)
        })
    }

    /// Runs `f` on column blocks of `xs` small enough for the unfolded patches to stay in cache (and
    /// their buffers to be reused), gathering the results into one `rows × columns` matrix.
    fn in_chunks<T: RealField + Copy>(
        &self,
        xs: &DMatrix<T>,
        rows: usize,
        f: impl Fn(&DMatrix<T>) -> DMatrix<T>,
    ) -> DMatrix<T> {
        let per_column = self.shape.patch_len() * self.positions();
        let chunk = (CHUNK_ENTRIES / per_column.max(1)).max(1);
        if xs.ncols() <= chunk {
            return f(xs);
        }
        let mut out = DMatrix::zeros(rows, xs.ncols());
        let mut start = 0;
        while start < xs.ncols() {
            let n = chunk.min(xs.ncols() - start);
            let part = f(&xs.columns(start, n).into_owned());
            out.columns_mut(start, n).copy_from(&part);
            start += n;
        }
        out
    }

    fn correlate_block<T: RealField + Copy>(
        &self,
        kernel: &DMatrix<T>,
        xs: &DMatrix<T>,
    ) -> DMatrix<T> {
        let positions = self.positions();
        let channels = self.shape.out_channels;
        // (C_out × patch) · (patch × B·P): column b·P + p holds every channel at (b, p).
        let product = kernel * self.unfold(xs);
        let product = product.as_slice();
        let batch = xs.ncols();
        let mut out = DMatrix::zeros(self.shape.output_dim(), batch);
        for b in 0..batch {
            let mut column = out.column_mut(b);
            let column = column.as_mut_slice();
            for p in 0..positions {
                let source =
                    &product[(b * positions + p) * channels..(b * positions + p + 1) * channels];
                for (o, v) in source.iter().enumerate() {
                    column[o * positions + p] = *v;
                }
            }
        }
        out
    }

    /// The adjoint of [`Conv::correlate`]: `Kᵀ A` for output coefficients `A` (one column each), given
    /// the kernel already transposed (`patch_len × out_channels`: a blocked product, where a
    /// transposed product would take one dot product per entry).
    pub fn correlate_transpose<T: RealField + Copy>(
        &self,
        kernel_transposed: &DMatrix<T>,
        coefficients: &DMatrix<T>,
    ) -> DMatrix<T> {
        self.in_chunks(coefficients, self.shape.input_dim(), |part| {
            self.correlate_transpose_block(kernel_transposed, part)
        })
    }

    fn correlate_transpose_block<T: RealField + Copy>(
        &self,
        kernel_transposed: &DMatrix<T>,
        coefficients: &DMatrix<T>,
    ) -> DMatrix<T> {
        let positions = self.positions();
        let patch = self.shape.patch_len();
        let batch = coefficients.ncols();
        // (patch × C_out) · (C_out × B·P): the coefficient each patch entry receives, by column.
        let spread = kernel_transposed * self.stack(coefficients);
        let spread = spread.as_slice();
        let mut out = DMatrix::zeros(self.shape.input_dim(), batch);
        for b in 0..batch {
            let mut column = out.column_mut(b);
            let column = column.as_mut_slice();
            for p in 0..positions {
                let row = b * positions + p;
                let values = &spread[row * patch..(row + 1) * patch];
                for (v, target) in values.iter().zip(&self.table[p * patch..(p + 1) * patch]) {
                    if let Some(t) = target {
                        column[*t] += *v;
                    }
                }
            }
        }
        out
    }

    /// The gradient of `Σ_b ⟨A_b, K ⋆ X_b⟩` with respect to the kernel: `out_channels × patch_len`.
    pub fn kernel_gradient(&self, coefficients: &DMatrix<f64>, xs: &DMatrix<f64>) -> DMatrix<f64> {
        self.stack(coefficients) * self.unfold(xs).transpose()
    }

    /// The gradient of `Σ_b ⟨A_b, bias pattern⟩` with respect to the per-channel bias: each
    /// channel's coefficients summed over its positions and the batch.
    pub fn bias_gradient(&self, coefficients: &DMatrix<f64>) -> DVector<f64> {
        let positions = self.positions();
        let sums = coefficients.column_sum();
        let mut out = DVector::zeros(self.shape.out_channels);
        for (r, v) in sums.iter().enumerate() {
            out[r / positions] += v;
        }
        out
    }

    /// The bias pattern over the flattened output (each channel's bias at each of its positions).
    pub fn bias_per_output<T: RealField + Copy>(&self, bias: &DVector<T>) -> DVector<T> {
        let positions = self.positions();
        DVector::from_fn(self.shape.output_dim(), |r, _| bias[r / positions])
    }

    /// The same layer written out as a dense matrix (for exact references and small layers only).
    pub fn to_dense_weights(&self) -> DMatrix<f64> {
        let inputs = self.shape.input_dim();
        let positions = self.positions();
        let patch = self.shape.patch_len();
        let mut weights = DMatrix::zeros(self.shape.output_dim(), inputs);
        for o in 0..self.shape.out_channels {
            for p in 0..positions {
                for (e, source) in self.table[p * patch..(p + 1) * patch].iter().enumerate() {
                    if let Some(s) = source {
                        weights[(o * positions + p, *s)] += self.kernel[(o, e)];
                    }
                }
            }
        }
        weights
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn shape() -> ConvShape {
        ConvShape {
            in_channels: 2,
            in_height: 4,
            in_width: 5,
            out_channels: 3,
            kernel_height: 2,
            kernel_width: 3,
            stride: (1, 2),
            padding: (1, 0, 0, 1),
            dilation: (2, 1),
        }
    }

    fn conv() -> Conv {
        let s = shape();
        let kernel = DMatrix::from_fn(s.out_channels, s.patch_len(), |r, c| {
            ((r * 7 + c * 3) % 11) as f64 - 5.0
        });
        Conv::new(s, kernel, DVector::from_vec(vec![0.5, -1.0, 2.0]))
    }

    #[test]
    fn output_size_follows_the_usual_formula() {
        // Common practice: out = floor((in + pads − dilation·(k − 1) − 1) / stride) + 1.
        // Height: (4 + 1 + 0 − 2·1 − 1)/1 + 1 = 3; width: (5 + 0 + 1 − 1·2 − 1)/2 + 1 = 2.
        assert_eq!(shape().output_size(), Some((3, 2)));
    }

    #[test]
    fn correlate_agrees_with_the_dense_form_and_its_adjoint() {
        let c = conv();
        let dense = c.to_dense_weights();
        let xs = DMatrix::from_fn(c.shape.input_dim(), 3, |r, b| {
            ((r * 5 + b * 13) % 7) as f64 - 3.0
        });
        assert_eq!(c.correlate(&c.kernel, &xs), &dense * &xs);
        let a = DMatrix::from_fn(c.shape.output_dim(), 2, |r, b| {
            ((r + 3 * b) % 5) as f64 - 2.0
        });
        assert_eq!(
            c.correlate_transpose(&c.kernel.transpose(), &a),
            dense.transpose() * &a
        );
    }

    #[test]
    fn kernel_gradient_matches_finite_differences() {
        let c = conv();
        let xs = DMatrix::from_fn(c.shape.input_dim(), 2, |r, b| {
            ((r * 3 + b) % 4) as f64 * 0.25
        });
        let a = DMatrix::from_fn(c.shape.output_dim(), 2, |r, b| ((r + b) % 3) as f64 - 1.0);
        let g = c.kernel_gradient(&a, &xs);
        let value = |k: &DMatrix<f64>| a.component_mul(&c.correlate(k, &xs)).sum();
        // The objective is linear in the kernel, so a unit step gives the derivative exactly.
        for (o, e) in [(0, 0), (1, 4), (2, 11)] {
            let mut k = c.kernel.clone();
            k[(o, e)] += 1.0;
            assert_eq!(value(&k) - value(&c.kernel), g[(o, e)]);
        }
    }
}
