//! Convolutional classifiers for training from scratch: a normalize layer fitted to the data (per
//! feature, as for [`super::new_mlp`]), convolution blocks (convolution, ReLU, optional pooling) and
//! a dense head, with He initialisation (He et al., 2015: N(0, 2 / fan-in), biases 0; the fan-in of a
//! convolution is `in_channels · kernel_height · kernel_width`).
//!
//! Everything is seeded (ChaCha8), so the same seed gives the same model bit for bit. Bad sizes and
//! geometries are [`TrainError::Settings`] errors that name the block, never panics.

use nalgebra::{DMatrix, DVector};
use rand::{RngCore, SeedableRng};
use rand_chacha::ChaCha8Rng;
use rand_distr::Distribution;

use crate::data::Dataset;
use crate::model::layout::Layer;
use crate::model::pool::{Pool, PoolOp};
use crate::model::spatial::Shape;
use crate::model::{Conv, ConvShape, InputSpec, Model};

use super::init::{check_new_model, empty_model, fit_normalization, he_network, he_normal};
use super::TrainError;

/// One block of a CNN built by [`new_cnn`]: a convolution, a ReLU, and optionally a pooling layer.
/// Sizes apply along every spatial axis (a square kernel for 2-D inputs).
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct ConvBlock {
    /// Output channels.
    pub channels: usize,
    /// Kernel extent.
    pub kernel: usize,
    /// Stride.
    pub stride: usize,
    /// Zero padding at both ends.
    pub padding: usize,
    /// Pooling after the ReLU: the operation and its window (the stride equals the window).
    pub pool: Option<(PoolOp, usize)>,
}

/// A CNN: convolution blocks, then a flatten, dense hidden layers with ReLU, and the output layer.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct CnnArchitecture {
    /// The convolution blocks, in order.
    pub blocks: Vec<ConvBlock>,
    /// Sizes of the dense hidden layers after the flatten (empty: the output layer follows it).
    pub hidden: Vec<usize>,
}

impl CnnArchitecture {
    /// The layers in words, e.g. `conv 8×5 pad 2, relu, maxpool 2, flatten, dense 16, relu, dense 4`.
    pub fn describe(&self, classes: usize) -> String {
        let mut parts = Vec::new();
        for b in &self.blocks {
            let mut conv = format!("conv {}×{}", b.channels, b.kernel);
            if b.stride != 1 {
                conv.push_str(&format!(" stride {}", b.stride));
            }
            if b.padding != 0 {
                conv.push_str(&format!(" pad {}", b.padding));
            }
            parts.push(conv);
            parts.push("relu".into());
            if let Some((op, window)) = b.pool {
                let name = if op == PoolOp::Max {
                    "maxpool"
                } else {
                    "averagepool"
                };
                parts.push(format!("{name} {window}"));
            }
        }
        parts.push("flatten".into());
        for h in &self.hidden {
            parts.push(format!("dense {h}"));
            parts.push("relu".into());
        }
        parts.push(format!("dense {classes}"));
        parts.join(", ")
    }
}

/// A new convolutional classifier for `input` (which must state `input.shape`, `[C, L]` or
/// `[C, H, W]`) with `classes` outputs: a normalize layer fitted to `data` ([`fit_normalization`],
/// per feature), then `architecture`'s blocks and dense head, He-initialised with `seed`.
pub fn new_cnn(
    input: &InputSpec,
    classes: usize,
    architecture: &CnnArchitecture,
    data: &Dataset,
    seed: u64,
) -> Result<Model, TrainError> {
    check_new_model(input, classes, &architecture.hidden, data)?;
    let dims = input.shape.as_deref().unwrap_or(&[]);
    let mut shape = Shape::from_dims(dims, input.dim)
        .ok()
        .filter(|s| s.spatial_rank > 0)
        .ok_or_else(|| {
            TrainError::Settings(format!(
                "a CNN needs input.shape [channels, length] or [channels, height, width] holding \
                 the {} input features, got {dims:?}",
                input.dim
            ))
        })?;
    let mut rng = ChaCha8Rng::seed_from_u64(seed);
    let normalization = fit_normalization(data);
    let mut layers = vec![Layer::Normalize {
        mean: normalization.mean,
        std: normalization.std,
    }];
    for (index, block) in architecture.blocks.iter().enumerate() {
        let bad = |what: String| TrainError::Settings(format!("convolution block {index}: {what}"));
        if block.channels == 0 || block.kernel == 0 || block.stride == 0 {
            return Err(bad("channels, kernel and stride must be at least 1".into()));
        }
        let one_d = shape.spatial_rank == 1;
        let along = |v: usize| if one_d { (1, v) } else { (v, v) };
        let (kernel_height, kernel_width) = along(block.kernel);
        let (pad_y, pad_x) = if one_d {
            (0, block.padding)
        } else {
            (block.padding, block.padding)
        };
        let geometry = ConvShape {
            in_channels: shape.channels,
            in_height: shape.height,
            in_width: shape.width,
            out_channels: block.channels,
            kernel_height,
            kernel_width,
            stride: along(block.stride),
            padding: (pad_y, pad_x, pad_y, pad_x),
            dilation: (1, 1),
        };
        let (height, width) = geometry.output_size().ok_or_else(|| {
            bad(format!(
                "kernel {} does not fit an input of {} × {} with padding {}",
                block.kernel, shape.height, shape.width, block.padding
            ))
        })?;
        let normal = he_normal(geometry.patch_len());
        let kernel = DMatrix::from_fn(block.channels, geometry.patch_len(), |_, _| {
            normal.sample(&mut rng)
        });
        layers.push(Layer::Conv(Conv::new(
            geometry,
            kernel,
            DVector::zeros(block.channels),
        )));
        layers.push(Layer::Relu);
        shape = Shape {
            channels: block.channels,
            height,
            width,
            spatial_rank: shape.spatial_rank,
        };
        if let Some((op, window)) = block.pool {
            let pool = Pool {
                op,
                channels: shape.channels,
                in_height: shape.height,
                in_width: shape.width,
                kernel: along(window),
                stride: along(window),
                padding: (0, 0, 0, 0),
            };
            let (height, width) = pool.output_size().ok_or_else(|| {
                bad(format!(
                    "pooling window {window} does not fit {} × {}",
                    shape.height, shape.width
                ))
            })?;
            layers.push(Layer::Pool(pool));
            shape.height = height;
            shape.width = width;
        }
    }
    layers.push(Layer::Flatten);
    let head = he_network(shape.size(), &architecture.hidden, classes, rng.next_u64());
    for (k, layer) in head.layers.iter().enumerate() {
        if k > 0 {
            layers.push(Layer::Relu);
        }
        let dense = layer.to_dense();
        layers.push(Layer::Dense {
            weights: dense.weights,
            bias: dense.bias,
        });
    }
    Ok(Model {
        layers,
        ..empty_model(input)
    })
}

#[cfg(test)]
mod tests {
    use super::*;
    use approx::assert_relative_eq;

    fn spectrum_input(channels: usize, length: usize) -> InputSpec {
        InputSpec {
            dim: channels * length,
            names: None,
            lower: vec![0.0; channels * length],
            upper: vec![1.0; channels * length],
            shape: Some(vec![channels, length]),
            units: None,
        }
    }

    fn ramp_data(dim: usize) -> Dataset {
        Dataset {
            features: DMatrix::from_fn(dim, 4, |r, c| ((r * 3 + c * 7) % 10) as f64 / 10.0),
            labels: vec![0, 1, 0, 1],
        }
    }

    #[test]
    fn cnn_kernels_have_the_he_variance_and_the_model_is_valid() {
        let input = spectrum_input(1, 8);
        let architecture = CnnArchitecture {
            blocks: vec![
                ConvBlock {
                    channels: 64,
                    kernel: 5,
                    stride: 1,
                    padding: 2,
                    pool: None,
                },
                ConvBlock {
                    channels: 200,
                    kernel: 3,
                    stride: 1,
                    padding: 1,
                    pool: Some((PoolOp::Max, 2)),
                },
            ],
            hidden: vec![3],
        };
        let model = new_cnn(&input, 2, &architecture, &ramp_data(8), 5).expect("builds");
        let Layer::Conv(second) = &model.layers[3] else {
            panic!("layer 3 is {:?}", model.layers[3]);
        };
        // He et al. (2015): Var(w) = 2 / fan_in, fan_in = 64 channels × 3 taps.
        let w = &second.kernel;
        let n = w.len() as f64;
        let mean = w.sum() / n;
        let var = w.iter().map(|v| (v - mean) * (v - mean)).sum::<f64>() / n;
        assert_relative_eq!(var, 2.0 / 192.0, max_relative = 0.05);
        assert!(second.bias.iter().all(|b| *b == 0.0));
        let kinds: Vec<&str> = model
            .layers
            .iter()
            .map(|l| match l {
                Layer::Normalize { .. } => "normalize",
                Layer::Conv(_) => "conv",
                Layer::Relu => "relu",
                Layer::Pool(_) => "pool",
                Layer::Flatten => "flatten",
                Layer::Dense { .. } => "dense",
                Layer::BatchNorm { .. } => "batchnorm",
            })
            .collect();
        assert_eq!(
            kinds,
            [
                "normalize",
                "conv",
                "relu",
                "conv",
                "relu",
                "pool",
                "flatten",
                "dense",
                "relu",
                "dense"
            ]
        );
        // 200 channels × 4 pooled positions reach the dense head; the file layout accepts it.
        let again = Model::from_json_str(&model.to_json_string()).expect("valid layout");
        assert_eq!(again, model);
        assert_eq!(model.network().input_dim(), 8);
        assert_eq!(model.output_dim(), 2);
        assert_eq!(
            architecture.describe(2),
            "conv 64×5 pad 2, relu, conv 200×3 pad 1, relu, maxpool 2, flatten, dense 3, relu, dense 2"
        );
        assert_eq!(
            new_cnn(&input, 2, &architecture, &ramp_data(8), 5).unwrap(),
            model
        );
    }

    #[test]
    fn cnn_settings_errors_name_the_problem() {
        let block = ConvBlock {
            channels: 2,
            kernel: 9,
            stride: 1,
            padding: 0,
            pool: None,
        };
        let architecture = CnnArchitecture {
            blocks: vec![block],
            hidden: vec![],
        };
        let error = new_cnn(&spectrum_input(1, 8), 2, &architecture, &ramp_data(8), 0)
            .unwrap_err()
            .to_string();
        assert!(
            error.contains("block 0") && error.contains("kernel 9"),
            "{error}"
        );
        let mut flat = spectrum_input(1, 8);
        flat.shape = None;
        let error = new_cnn(&flat, 2, &architecture, &ramp_data(8), 0)
            .unwrap_err()
            .to_string();
        assert!(error.contains("input.shape"), "{error}");
        let pooled = CnnArchitecture {
            blocks: vec![ConvBlock {
                kernel: 3,
                pool: Some((PoolOp::Average, 9)),
                ..block
            }],
            hidden: vec![],
        };
        let error = new_cnn(&spectrum_input(1, 8), 2, &pooled, &ramp_data(8), 0)
            .unwrap_err()
            .to_string();
        assert!(error.contains("pooling window 9"), "{error}");
    }
}
