//! The symbolic value of a tensor on the score path: the data input after the layers found so far and
//! the affine steps not yet written as a layer, with the tensor's shape.
//!
//! Guarantees: pending affine steps are composed in f64 and written out only at a Relu, before a
//! spatial layer, at a flatten of channel data, or at the end. A subtraction followed by a division
//! with positive divisors (`(x − mean) / std`) is kept exactly as written, so a `normalize` layer reads
//! back bit for bit. On channel data that already went through a spatial layer, pending steps are
//! written in a shape-keeping form (`normalize`, or a per-channel `batchnorm` with mean 0, variance 1,
//! epsilon 0, which computes `scale · x + shift` exactly) — never as a `dense` layer — so the layout's
//! running shape always equals the graph's. A step that has no such form is refused.

use nalgebra::{DMatrix, DVector};

use crate::model::Layer;

/// The data input after `layers` and `pending`.
#[derive(Debug, Clone)]
pub(super) struct DataPath {
    pub layers: Vec<Layer>,
    pub pending: Pending,
    /// Shape without the batch dimension.
    pub shape: Vec<usize>,
    /// The shape the layout gives the data after `layers`; `None` while only shape-free layers
    /// (normalize, relu) were written, so that `input.shape` may still be chosen.
    pub layout_shape: Option<Vec<usize>>,
    /// The model's `input.shape`, fixed by the first spatial layer.
    pub input_shape: Option<Vec<usize>>,
    /// The final argmax-preserving step already applied, if any; only shape-keeping steps may follow.
    pub finished_by: Option<String>,
    /// True when the values are known positive (after a Softmax or a logistic post-transform).
    pub positive: bool,
    /// The model's class labels, when a classifier node on the path carried them.
    pub labels: Option<Vec<String>>,
    /// Set when a one-row binary LinearClassifier produced a single logit.
    pub single_logit: bool,
    /// After a final Sigmoid on one logit: the Sigmoid node and whether the value is `1 − σ(z)`.
    pub sigmoid: Option<(usize, bool)>,
}

#[derive(Debug, Clone)]
pub(super) enum Pending {
    None,
    /// `x ↦ (x − mean) / std`, exactly as a Sub and a Div wrote it (`std > 0`).
    Standardize {
        mean: DVector<f64>,
        std: DVector<f64>,
    },
    /// `x ↦ scale ⊙ x + shift`.
    Diagonal {
        scale: DVector<f64>,
        shift: DVector<f64>,
    },
    /// `x ↦ W x + b`.
    Full {
        weights: DMatrix<f64>,
        bias: DVector<f64>,
    },
}

impl DataPath {
    /// The data input itself, of the given shape (batch dimension dropped).
    pub fn new(shape: Vec<usize>) -> DataPath {
        DataPath {
            layers: Vec::new(),
            pending: Pending::None,
            shape,
            layout_shape: None,
            input_shape: None,
            finished_by: None,
            positive: false,
            labels: None,
            single_logit: false,
            sigmoid: None,
        }
    }

    /// Number of features per sample.
    pub fn width(&self) -> usize {
        self.shape.iter().product()
    }

    /// `x − c`: starts an exact standardisation when nothing is pending.
    pub fn subtract(&mut self, c: DVector<f64>) {
        let n = c.len();
        if matches!(self.pending, Pending::None) {
            self.pending = Pending::Standardize {
                mean: c,
                std: DVector::from_element(n, 1.0),
            };
        } else {
            self.elementwise(DVector::from_element(n, 1.0), -c);
        }
    }

    /// `x / c` (no zero in `c`): completes an exact standardisation when at most a subtraction is
    /// pending and every divisor is positive.
    pub fn divide(&mut self, c: DVector<f64>) {
        let positive = c.iter().all(|v| *v > 0.0);
        match &mut self.pending {
            Pending::None if positive => {
                self.pending = Pending::Standardize {
                    mean: DVector::zeros(c.len()),
                    std: c,
                };
            }
            Pending::Standardize { std, .. } if positive && std.iter().all(|s| *s == 1.0) => {
                *std = c;
            }
            _ => {
                let n = c.len();
                self.elementwise(c.map(|v| 1.0 / v), DVector::zeros(n));
            }
        }
    }

    /// `x ↦ scale ⊙ x + shift` after the pending steps.
    pub fn elementwise(&mut self, scale: DVector<f64>, shift: DVector<f64>) {
        self.pending = match std::mem::replace(&mut self.pending, Pending::None).diagonal() {
            Pending::None => Pending::Diagonal { scale, shift },
            Pending::Diagonal { scale: s, shift: t } => Pending::Diagonal {
                scale: s.component_mul(&scale),
                shift: t.component_mul(&scale) + shift,
            },
            Pending::Full { mut weights, bias } => {
                for (r, mut row) in weights.row_iter_mut().enumerate() {
                    row *= scale[r];
                }
                Pending::Full {
                    weights,
                    bias: bias.component_mul(&scale) + shift,
                }
            }
            Pending::Standardize { .. } => unreachable!("diagonal() rewrites it"),
        };
    }

    /// `x ↦ W x + b` after the pending steps (flat data only).
    pub fn linear(&mut self, weights: DMatrix<f64>, bias: DVector<f64>) {
        let pending = std::mem::replace(&mut self.pending, Pending::None);
        self.pending = match pending {
            Pending::None => Pending::Full { weights, bias },
            Pending::Standardize { mean, std } if self.layers.is_empty() => {
                // A leading normalisation stays its own layer (training keeps it apart).
                self.layers.push(Layer::Normalize { mean, std });
                Pending::Full { weights, bias }
            }
            Pending::Diagonal { scale, shift }
                if self.layers.is_empty() && scale.iter().all(|s| *s > 0.0) =>
            {
                self.layers.push(normalize_layer(&scale, &shift));
                Pending::Full { weights, bias }
            }
            other => match other.diagonal() {
                Pending::Diagonal { scale, shift } => {
                    let b = &weights * &shift + bias;
                    let mut w = weights;
                    for (c, mut column) in w.column_iter_mut().enumerate() {
                        column *= scale[c];
                    }
                    Pending::Full {
                        weights: w,
                        bias: b,
                    }
                }
                Pending::Full {
                    weights: w0,
                    bias: b0,
                } => Pending::Full {
                    bias: &weights * &b0 + bias,
                    weights: weights * w0,
                },
                Pending::None | Pending::Standardize { .. } => {
                    unreachable!("handled above or rewritten by diagonal()")
                }
            },
        };
        self.shape = vec![self.pending_width()];
    }

    /// Width of the data after the pending steps.
    pub fn pending_width(&self) -> usize {
        match &self.pending {
            Pending::None => self.width(),
            Pending::Standardize { mean, .. } => mean.len(),
            Pending::Diagonal { scale, .. } => scale.len(),
            Pending::Full { weights, .. } => weights.nrows(),
        }
    }

    /// True when the data has channels (`[C, L]` or `[C, H, W]`) and the layout agrees.
    fn spatial_here(&self) -> bool {
        (2..=3).contains(&self.shape.len())
            && self.layout_shape.as_ref().is_none_or(|s| s == &self.shape)
    }

    fn layout_is_spatial(&self) -> bool {
        self.layout_shape.as_ref().is_some_and(|s| s.len() > 1)
    }

    /// Writes the pending steps as layers (see the module guarantees).
    pub fn flush(&mut self) -> Result<(), String> {
        match std::mem::replace(&mut self.pending, Pending::None) {
            Pending::None => {}
            Pending::Standardize { mean, std } => self.layers.push(Layer::Normalize { mean, std }),
            Pending::Diagonal { scale, shift } => {
                if scale.iter().all(|s| *s == 1.0) && shift.iter().all(|t| *t == 0.0) {
                    return Ok(());
                }
                if scale.iter().all(|s| *s > 0.0) {
                    self.layers.push(normalize_layer(&scale, &shift));
                } else if let Some((scale, shift)) = self.per_channel(&scale, &shift) {
                    let channels = scale.len();
                    let positions = self.width() / channels;
                    let shape = self.shape.clone();
                    self.push_spatial(
                        Layer::BatchNorm {
                            scale,
                            shift,
                            mean: DVector::zeros(channels),
                            variance: DVector::from_element(channels, 1.0),
                            epsilon: 0.0,
                            positions,
                        },
                        shape,
                    );
                } else if self.layout_is_spatial() {
                    return Err(format!(
                        "the elementwise steps before it scale channel data [{}] by factors that \
                         are not all positive and vary within a channel; ballast keeps such data \
                         only through normalize (positive factors) or a per-channel batch norm",
                        super::join(&self.shape)
                    ));
                } else {
                    self.push_flat(Layer::Dense {
                        weights: DMatrix::from_diagonal(&scale),
                        bias: shift,
                    });
                }
            }
            Pending::Full { weights, bias } => self.push_flat(Layer::Dense { weights, bias }),
        }
        Ok(())
    }

    /// The per-channel values of a diagonal map on channel data, when it has them.
    fn per_channel(
        &self,
        scale: &DVector<f64>,
        shift: &DVector<f64>,
    ) -> Option<(DVector<f64>, DVector<f64>)> {
        if !self.spatial_here() {
            return None;
        }
        let channels = self.shape[0];
        let positions = self.width() / channels;
        let constant = |v: &DVector<f64>| {
            (0..channels).all(|c| {
                let block = v.rows(c * positions, positions);
                block.iter().all(|x| *x == block[0])
            })
        };
        (constant(scale) && constant(shift)).then(|| {
            (
                DVector::from_fn(channels, |c, _| scale[c * positions]),
                DVector::from_fn(channels, |c, _| shift[c * positions]),
            )
        })
    }

    fn push_flat(&mut self, layer: Layer) {
        if let Layer::Dense { weights, .. } = &layer {
            self.layout_shape = Some(vec![weights.nrows()]);
        }
        self.layers.push(layer);
    }

    /// Writes the pending steps and checks that a spatial layer can read the data: it must have
    /// channels, and the layout must see the same shape.
    pub fn begin_spatial(&mut self) -> Result<(), String> {
        self.flush()?;
        if !(2..=3).contains(&self.shape.len()) {
            return Err(format!(
                "the data has shape [batch, {}] here; expected [batch, channels, length] or \
                 [batch, channels, height, width]",
                super::join(&self.shape)
            ));
        }
        match &self.layout_shape {
            Some(s) if s != &self.shape => Err(format!(
                "the data has shape [batch, {}] here, but the layers before it give [batch, {}]; \
                 ballast cannot reshape the output of a dense layer or a spatial layer into other \
                 channels",
                super::join(&self.shape),
                super::join(s)
            )),
            _ => Ok(()),
        }
    }

    /// Appends a spatial layer (after [`DataPath::begin_spatial`]) whose output has shape `output`.
    pub fn push_spatial(&mut self, layer: Layer, output: Vec<usize>) {
        if self.layout_shape.is_none() {
            self.input_shape = Some(self.shape.clone());
        }
        self.layers.push(layer);
        self.layout_shape = Some(output.clone());
        self.shape = output;
    }

    /// The data becomes flat (`Flatten`, or a `Reshape` to one feature axis): after spatial layers,
    /// this writes a `flatten` layer. Pending steps are written before it when they have a
    /// shape-keeping form; otherwise they stay pending (flattening keeps the feature order), to be
    /// composed with what follows.
    pub fn flatten(&mut self) -> Result<(), String> {
        if self.layout_is_spatial() {
            let keeps_shape = match &self.pending {
                Pending::Diagonal { scale, shift } => {
                    scale.iter().all(|s| *s > 0.0) || self.per_channel(scale, shift).is_some()
                }
                _ => true,
            };
            if keeps_shape {
                self.flush()?;
            }
            self.layers.push(Layer::Flatten);
            self.layout_shape = Some(vec![self.width()]);
        }
        self.shape = vec![self.width()];
        Ok(())
    }
}

impl Pending {
    /// The same steps with a standardisation rewritten as a diagonal map (as the graph computes
    /// `(x − mean) · (1 / std)` when further steps are composed with it).
    fn diagonal(self) -> Pending {
        match self {
            Pending::Standardize { mean, std } => {
                let scale = std.map(|s| 1.0 / s);
                let shift = -mean.component_mul(&scale);
                Pending::Diagonal { scale, shift }
            }
            other => other,
        }
    }
}

/// `scale ⊙ x + shift` written as `(x − mean) / std` with `std = 1/scale`, `mean = −shift/scale`.
fn normalize_layer(scale: &DVector<f64>, shift: &DVector<f64>) -> Layer {
    Layer::Normalize {
        mean: DVector::from_fn(scale.len(), |i, _| -shift[i] / scale[i]),
        std: scale.map(|s| 1.0 / s),
    }
}
