//! The symbolic value of a tensor on the score path: the data input after the layers found so far and
//! the last affine step, still open while the next op may merge into it, with the tensor's shape.
//!
//! Guarantees: every layer written here evaluates, in any floating-point format, with the operations of
//! the graph step (or steps) it stands for and no others, so the model's bound on its deployed
//! evaluation error (`model::deployed`, which follows the layers as written) covers the graph as an
//! inference engine runs it. Steps are therefore **not** composed into one affine map: composing
//! `W₂(W₁x + b₁) + b₂` changes the rounding (a bias of 10⁵ followed by an `Add` of −10⁵ loses everything
//! below float32's 0.008 in the graph, nothing in the composed map). The merges kept do not change the
//! operations: `MatMul` then `Add` is one dense layer with its bias; `Sub` then `Div` (or `Mul` by a
//! positive vector) is one `normalize` layer `(x − mean) / std` (a `Mul` by `s` becomes `std = 1/s`, a
//! relative change of one f64 rounding that the layer's allowance covers). `Div` by a vector with
//! negative entries becomes `normalize` by `|d|` followed by a sign flip. A `normalize` read from
//! `(x − mean) / std` reads back bit for bit.
//!
//! On channel data, steps are written in a shape-keeping form (`normalize`, or a per-channel
//! `batchnorm` with mean 0, variance 1, epsilon 0, which computes `scale · x + shift`) — never as a
//! `dense` layer once a spatial layer was written — so the layout's running shape always equals the
//! graph's. A step that has no such form is refused.

use nalgebra::{DMatrix, DVector};

use crate::model::Layer;

/// The data input after `layers` and `pending`.
#[derive(Debug, Clone)]
pub(super) struct DataPath {
    pub layers: Vec<Layer>,
    pending: Pending,
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
    /// Set when a Cast to FLOAT lies on the path (the graph computes in float32 from there on).
    pub float32_cast: bool,
}

/// The last step, kept open while the next op may still merge into it.
#[derive(Debug, Clone)]
enum Pending {
    None,
    /// `(x − mean) / std`; `scaled` once a `Div` or `Mul` has set `std`.
    Normalize {
        mean: DVector<f64>,
        std: DVector<f64>,
        scaled: bool,
    },
    /// `x ↦ W x + b` on flat data; `bias_set` once a bias is part of it (an `Add` may then no longer
    /// merge).
    Dense {
        weights: DMatrix<f64>,
        bias: DVector<f64>,
        bias_set: bool,
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
            float32_cast: false,
        }
    }

    /// Number of features per sample.
    pub fn width(&self) -> usize {
        self.shape.iter().product()
    }

    /// Width of the data after the pending step.
    pub fn pending_width(&self) -> usize {
        match &self.pending {
            Pending::Dense { weights, .. } => weights.nrows(),
            _ => self.width(),
        }
    }

    /// `x ↦ W x + b` on flat data (Gemm, LinearClassifier: `bias_set`; MatMul: a zero bias an `Add`
    /// may fill).
    pub fn linear(
        &mut self,
        weights: DMatrix<f64>,
        bias: DVector<f64>,
        bias_set: bool,
    ) -> Result<(), String> {
        self.flush()?;
        self.pending = Pending::Dense {
            weights,
            bias,
            bias_set,
        };
        self.shape = vec![self.pending_width()];
        Ok(())
    }

    /// `x ↦ x + t` (Add, or Sub with the data first and `t = −c`).
    pub fn add(&mut self, t: DVector<f64>) -> Result<(), String> {
        if let Pending::Dense {
            bias,
            bias_set: bias_set @ false,
            ..
        } = &mut self.pending
        {
            *bias = t;
            *bias_set = true;
            return Ok(());
        }
        self.flush()?;
        let n = t.len();
        self.pending = Pending::Normalize {
            mean: -t,
            std: DVector::from_element(n, 1.0),
            scaled: false,
        };
        Ok(())
    }

    /// `x ↦ c − x` (Sub with the constant first).
    pub fn subtract_from(&mut self, c: DVector<f64>) -> Result<(), String> {
        self.flush()?;
        let n = c.len();
        self.diagonal(DVector::from_element(n, -1.0), c)
    }

    /// `x ↦ x / d` (`d` nonzero).
    pub fn divide(&mut self, d: DVector<f64>) -> Result<(), String> {
        if d.iter().all(|v| *v > 0.0) && self.takes_std() {
            if let Pending::Normalize { std, scaled, .. } = &mut self.pending {
                *std = d;
                *scaled = true;
            }
            return Ok(());
        }
        self.flush()?;
        let n = d.len();
        self.pending = Pending::Normalize {
            mean: DVector::zeros(n),
            std: d.abs(),
            scaled: true,
        };
        if d.iter().any(|v| *v < 0.0) {
            self.flush()?;
            self.diagonal(d.map(f64::signum), DVector::zeros(n))?;
        }
        Ok(())
    }

    /// `x ↦ s ⊙ x` (Mul).
    pub fn multiply(&mut self, s: DVector<f64>) -> Result<(), String> {
        let positive = s.iter().all(|v| *v > 0.0);
        if positive && self.takes_std() {
            if let Pending::Normalize { std, scaled, .. } = &mut self.pending {
                *std = s.map(|v| 1.0 / v);
                *scaled = true;
            }
            return Ok(());
        }
        self.flush()?;
        let n = s.len();
        // A leading positive scaling stays a normalize layer (training keeps it apart), and so does
        // one on channel data after a spatial layer (no dense layer there).
        if positive && (self.layers.is_empty() || self.layout_is_spatial()) {
            self.pending = Pending::Normalize {
                mean: DVector::zeros(n),
                std: s.map(|v| 1.0 / v),
                scaled: true,
            };
            return Ok(());
        }
        self.diagonal(s, DVector::zeros(n))
    }

    /// True when the pending step is a `normalize` whose `std` is still 1 everywhere.
    fn takes_std(&self) -> bool {
        matches!(&self.pending, Pending::Normalize { scaled: false, std, .. } if std.iter().all(|v| *v == 1.0))
    }

    /// `x ↦ scale ⊙ x + shift` as its own layer (nothing pending): a per-channel `batchnorm` on channel
    /// data whose factors are constant per channel, a diagonal `dense` layer on data no spatial layer
    /// has touched, refused otherwise.
    fn diagonal(&mut self, scale: DVector<f64>, shift: DVector<f64>) -> Result<(), String> {
        if let Some((scale, shift)) = self.per_channel(&scale, &shift) {
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
            return Ok(());
        }
        // On channel data after a spatial layer this stays pending until a Flatten (an elementwise
        // step commutes with it, operations unchanged); anything else there refuses it (`flush`).
        self.pending = Pending::Dense {
            weights: DMatrix::from_diagonal(&scale),
            bias: shift,
            bias_set: true,
        };
        Ok(())
    }

    /// True when the data has channels (`[C, L]` or `[C, H, W]`) and the layout agrees.
    fn spatial_here(&self) -> bool {
        (2..=3).contains(&self.shape.len())
            && self.layout_shape.as_ref().is_none_or(|s| s == &self.shape)
    }

    fn layout_is_spatial(&self) -> bool {
        self.layout_shape.as_ref().is_some_and(|s| s.len() > 1)
    }

    /// Writes the pending step as a layer (a `normalize` that does nothing is dropped).
    pub fn flush(&mut self) -> Result<(), String> {
        match std::mem::replace(&mut self.pending, Pending::None) {
            Pending::None => {}
            Pending::Normalize { mean, std, .. } => {
                if mean.iter().any(|m| *m != 0.0) || std.iter().any(|s| *s != 1.0) {
                    self.layers.push(Layer::Normalize { mean, std });
                }
            }
            Pending::Dense { weights, bias, .. } => {
                if self.layout_is_spatial() {
                    return Err(format!(
                        "an elementwise step before it scales channel data [{}] by factors that \
                         are not all positive and vary within a channel; ballast keeps such data \
                         only through normalize (positive factors), a per-channel batch norm, or \
                         as a dense layer after a Flatten",
                        super::join(&self.shape)
                    ));
                }
                self.layout_shape = Some(vec![weights.nrows()]);
                self.layers.push(Layer::Dense { weights, bias });
            }
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

    /// Writes the pending step and checks that a spatial layer can read the data: it must have
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
    /// this writes the pending step and a `flatten` layer (a pending diagonal `dense` step, which has
    /// no channel form, goes after the `flatten`: flattening keeps the feature order).
    pub fn flatten(&mut self) -> Result<(), String> {
        if self.layout_is_spatial() {
            let diagonal = match std::mem::replace(&mut self.pending, Pending::None) {
                dense @ Pending::Dense { .. } => Some(dense),
                other => {
                    self.pending = other;
                    None
                }
            };
            self.flush()?;
            self.layers.push(Layer::Flatten);
            self.layout_shape = Some(vec![self.width()]);
            if let Some(dense) = diagonal {
                self.pending = dense;
            }
        }
        self.shape = vec![self.width()];
        Ok(())
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn kinds(path: &DataPath) -> Vec<&'static str> {
        path.layers
            .iter()
            .map(|l| match l {
                Layer::Normalize { .. } => "normalize",
                Layer::Dense { .. } => "dense",
                Layer::BatchNorm { .. } => "batchnorm",
                _ => "other",
            })
            .collect()
    }

    fn v(x: &[f64]) -> DVector<f64> {
        DVector::from_column_slice(x)
    }

    #[test]
    fn steps_that_change_the_rounding_stay_apart() {
        // Gemm with a bias, then Add: the Add is its own step (a normalize with mean −t).
        let mut p = DataPath::new(vec![2]);
        p.linear(DMatrix::identity(2, 2), v(&[1e5, 1e5]), true)
            .unwrap();
        p.add(v(&[-1e5, -1e5])).unwrap();
        p.flush().unwrap();
        assert_eq!(kinds(&p), ["dense", "normalize"]);
        // MatMul then Add: one dense layer with the Add as its bias.
        let mut p = DataPath::new(vec![2]);
        p.linear(DMatrix::identity(2, 2), DVector::zeros(2), false)
            .unwrap();
        p.add(v(&[3.0, 4.0])).unwrap();
        p.flush().unwrap();
        assert_eq!(kinds(&p), ["dense"]);
        assert!(matches!(&p.layers[0], Layer::Dense { bias, .. } if bias == &v(&[3.0, 4.0])));
        // MatMul then MatMul: two dense layers.
        let mut p = DataPath::new(vec![2]);
        p.linear(DMatrix::identity(2, 2), DVector::zeros(2), false)
            .unwrap();
        p.linear(DMatrix::identity(2, 2), DVector::zeros(2), false)
            .unwrap();
        p.flush().unwrap();
        assert_eq!(kinds(&p), ["dense", "dense"]);
    }

    #[test]
    fn sub_then_div_is_one_normalize_with_the_graph_numbers() {
        let mut p = DataPath::new(vec![2]);
        p.add(-v(&[10000.5, 3.0])).unwrap();
        p.divide(v(&[0.01, 2.0])).unwrap();
        p.flush().unwrap();
        match &p.layers[..] {
            [Layer::Normalize { mean, std }] => {
                assert_eq!(mean, &v(&[10000.5, 3.0]));
                assert_eq!(std, &v(&[0.01, 2.0]));
            }
            other => panic!("{other:?}"),
        }
        // Division by a negative entry: normalize by |d|, then the sign.
        let mut p = DataPath::new(vec![2]);
        p.divide(v(&[-4.0, 2.0])).unwrap();
        p.flush().unwrap();
        assert_eq!(kinds(&p), ["normalize", "dense"]);
    }

    #[test]
    fn a_sign_flip_on_channel_data_is_a_per_channel_batch_norm() {
        // [2 channels, 3 positions]: Sub from a per-channel constant keeps the shape.
        let mut p = DataPath::new(vec![2, 3]);
        p.subtract_from(v(&[1.0, 1.0, 1.0, 2.0, 2.0, 2.0])).unwrap();
        p.flush().unwrap();
        assert_eq!(kinds(&p), ["batchnorm"]);
        assert_eq!(p.shape, vec![2, 3]);
    }
}
