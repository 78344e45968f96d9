//! A model evaluated in exact rational arithmetic, layers as the file writes them: an outside reference
//! for bounds (no rounding at all; num-rational over num-bigint). Convolutions, pooling and batch
//! normalisation follow their textbook definitions (ONNX operator semantics, group = 1, padding ignored
//! by pooling) computed directly from the kernel indices, not through ballast's lowering.

use ballast::model::pool::PoolOp;
use ballast::model::{Layer, Model};
use num_rational::BigRational;
use num_traits::{Signed, Zero};

use super::rational;

/// The model's logits in exact arithmetic (classifier form `[0, z]` for one output). Batch norm needs
/// `variance + epsilon` to be the square of a double (the square root is then exact).
pub fn exact_logits(model: &Model, x: &[f64]) -> Vec<BigRational> {
    let mut h: Vec<BigRational> = x.iter().map(|v| rational(*v)).collect();
    for layer in &model.layers {
        h = match layer {
            Layer::Normalize { mean, std } => h
                .iter()
                .enumerate()
                .map(|(i, v)| (v - rational(mean[i])) / rational(std[i]))
                .collect(),
            Layer::Dense { weights, bias } => (0..weights.nrows())
                .map(|r| {
                    (0..weights.ncols()).fold(rational(bias[r]), |acc, c| {
                        acc + rational(weights[(r, c)]) * &h[c]
                    })
                })
                .collect(),
            Layer::Relu => h
                .into_iter()
                .map(|v| {
                    if v.is_negative() {
                        BigRational::zero()
                    } else {
                        v
                    }
                })
                .collect(),
            Layer::Conv(c) => {
                let s = c.shape;
                let (out_h, out_w) = s.output_size().expect("valid");
                let (top, left, _, _) = s.padding;
                let mut out = Vec::with_capacity(s.output_dim());
                for o in 0..s.out_channels {
                    for y in 0..out_h {
                        for x in 0..out_w {
                            let mut sum = rational(c.bias[o]);
                            for ci in 0..s.in_channels {
                                for i in 0..s.kernel_height {
                                    for j in 0..s.kernel_width {
                                        let row = (y * s.stride.0 + i * s.dilation.0) as isize
                                            - top as isize;
                                        let col = (x * s.stride.1 + j * s.dilation.1) as isize
                                            - left as isize;
                                        if row < 0
                                            || col < 0
                                            || row as usize >= s.in_height
                                            || col as usize >= s.in_width
                                        {
                                            continue;
                                        }
                                        let index = (ci * s.in_height + row as usize) * s.in_width
                                            + col as usize;
                                        let e = (ci * s.kernel_height + i) * s.kernel_width + j;
                                        sum += rational(c.kernel[(o, e)]) * &h[index];
                                    }
                                }
                            }
                            out.push(sum);
                        }
                    }
                }
                out
            }
            Layer::BatchNorm {
                scale,
                shift,
                mean,
                variance,
                epsilon,
                positions,
            } => h
                .iter()
                .enumerate()
                .map(|(r, v)| {
                    let c = r / positions;
                    let spread = (variance[c] + epsilon).sqrt();
                    assert_eq!(spread * spread, variance[c] + epsilon, "exact square root");
                    (v - rational(mean[c])) / rational(spread) * rational(scale[c])
                        + rational(shift[c])
                })
                .collect(),
            Layer::Pool(p) => {
                let (out_h, out_w) = p.output_size().expect("valid");
                let (top, left, _, _) = p.padding;
                let mut out = Vec::new();
                for c in 0..p.channels {
                    for y in 0..out_h {
                        for x in 0..out_w {
                            let mut window = Vec::new();
                            for i in 0..p.kernel.0 {
                                for j in 0..p.kernel.1 {
                                    let row = (y * p.stride.0 + i) as isize - top as isize;
                                    let col = (x * p.stride.1 + j) as isize - left as isize;
                                    if row >= 0
                                        && col >= 0
                                        && (row as usize) < p.in_height
                                        && (col as usize) < p.in_width
                                    {
                                        window.push(
                                            h[(c * p.in_height + row as usize) * p.in_width
                                                + col as usize]
                                                .clone(),
                                        );
                                    }
                                }
                            }
                            let count = BigRational::from_integer(window.len().into());
                            out.push(match p.op {
                                PoolOp::Max => window.into_iter().max().expect("non-empty"),
                                PoolOp::Average => {
                                    window.into_iter().fold(BigRational::zero(), |a, b| a + b)
                                        / count
                                }
                            });
                        }
                    }
                }
                out
            }
            Layer::Flatten => h,
        };
    }
    if h.len() == 1 {
        vec![BigRational::zero(), h.remove(0)]
    } else {
        h
    }
}
