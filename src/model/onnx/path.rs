//! The symbolic value on an imported graph's score path: "the data input after these layers", built op
//! by op so that the model's layers compute what the graph computes.
//!
//! Guarantee: every layer written here evaluates, in any floating-point format, with the operations
//! of the graph step (or steps) it stands for and no others, so the model's bound on its deployed
//! evaluation error (`model::deployed`, which follows the layers as written) covers the graph as an
//! inference engine runs it. Steps are therefore **not** composed into one affine map: composing
//! `W₂(W₁x + b₁) + b₂` changes the rounding (a bias of 10⁵ followed by an `Add` of −10⁵ loses everything
//! below float32's 0.008 in the graph, nothing in the composed map). The merges kept are the ones that
//! do not change the operations: `MatMul` then `Add` is one dense layer with its bias; `Sub` then `Div`
//! (or `Mul` by a positive vector) is one `normalize` layer `(x − mean) / std` (a `Mul` by `s` becomes
//! `std = 1/s`, a relative change of one f64 rounding that the layer's allowance for four roundings
//! covers). `Div` by a vector with negative entries becomes `normalize` by `|d|` followed by a sign flip.
//! Gemm's `alpha` and `beta` scale its matrices (exact in f64 for float32 values; the deployed bound
//! allows for the two extra roundings).

use nalgebra::{DMatrix, DVector};

use crate::model::Layer;

/// The symbolic value of a tensor on the score path: the data input after `layers` and `pending`.
#[derive(Debug, Clone)]
pub(super) struct DataPath {
    pub layers: Vec<Layer>,
    pending: Pending,
    /// Shape without the batch dimension.
    pub shape: Vec<usize>,
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
    /// `x ↦ W x + b`; `bias_set` once a bias is part of it (an `Add` may then no longer merge).
    Dense {
        weights: DMatrix<f64>,
        bias: DVector<f64>,
        bias_set: bool,
    },
}

impl DataPath {
    /// The data input of `shape` (batch dimension removed), before any step.
    pub fn input(shape: Vec<usize>) -> DataPath {
        DataPath {
            layers: Vec::new(),
            pending: Pending::None,
            shape,
            finished_by: None,
            positive: false,
            labels: None,
            single_logit: false,
            sigmoid: None,
            float32_cast: false,
        }
    }

    /// Number of features.
    pub fn width(&self) -> usize {
        self.shape.iter().product()
    }

    /// Width after the pending step.
    pub fn pending_width(&self) -> usize {
        match &self.pending {
            Pending::Dense { weights, .. } => weights.nrows(),
            _ => self.width(),
        }
    }

    /// `x ↦ W x + b` (Gemm, LinearClassifier: `bias_set`; MatMul: a zero bias an `Add` may fill).
    pub fn linear(&mut self, weights: DMatrix<f64>, bias: DVector<f64>, bias_set: bool) {
        self.flush();
        self.pending = Pending::Dense {
            weights,
            bias,
            bias_set,
        };
        self.shape = vec![self.pending_width()];
    }

    /// `x ↦ x + t` (Add, or Sub with the data first and `t = −c`).
    pub fn add(&mut self, t: DVector<f64>) {
        if let Pending::Dense {
            bias,
            bias_set: bias_set @ false,
            ..
        } = &mut self.pending
        {
            *bias = t;
            *bias_set = true;
            return;
        }
        self.flush();
        self.pending = Pending::Normalize {
            mean: -t,
            std: DVector::from_element(self.width(), 1.0),
            scaled: false,
        };
    }

    /// `x ↦ c − x` (Sub with the constant first).
    pub fn subtract_from(&mut self, c: DVector<f64>) {
        self.flush();
        let n = c.len();
        self.pending = Pending::Dense {
            weights: DMatrix::from_diagonal_element(n, n, -1.0),
            bias: c,
            bias_set: true,
        };
    }

    /// `x ↦ x / d` (`d` nonzero).
    pub fn divide(&mut self, d: DVector<f64>) {
        if d.iter().all(|v| *v > 0.0) && self.takes_std() {
            if let Pending::Normalize { std, scaled, .. } = &mut self.pending {
                *std = d;
                *scaled = true;
            }
            return;
        }
        self.flush();
        self.pending = Pending::Normalize {
            mean: DVector::zeros(d.len()),
            std: d.abs(),
            scaled: true,
        };
        if d.iter().any(|v| *v < 0.0) {
            self.flush();
            self.pending = Pending::Dense {
                weights: DMatrix::from_diagonal(&d.map(f64::signum)),
                bias: DVector::zeros(d.len()),
                bias_set: false,
            };
        }
    }

    /// `x ↦ s ⊙ x` (Mul).
    pub fn multiply(&mut self, s: DVector<f64>) {
        let positive = s.iter().all(|v| *v > 0.0);
        if positive && self.takes_std() {
            if let Pending::Normalize { std, scaled, .. } = &mut self.pending {
                *std = s.map(|v| 1.0 / v);
                *scaled = true;
            }
            return;
        }
        if positive && self.layers.is_empty() && matches!(self.pending, Pending::None) {
            // A leading scaling stays a normalize layer (training keeps it apart).
            self.pending = Pending::Normalize {
                mean: DVector::zeros(s.len()),
                std: s.map(|v| 1.0 / v),
                scaled: true,
            };
            return;
        }
        self.flush();
        let n = s.len();
        self.pending = Pending::Dense {
            weights: DMatrix::from_diagonal(&s),
            bias: DVector::zeros(n),
            bias_set: false,
        };
    }

    /// True when the pending step is a `normalize` whose `std` is still 1 everywhere.
    fn takes_std(&self) -> bool {
        matches!(&self.pending, Pending::Normalize { scaled: false, std, .. } if std.iter().all(|v| *v == 1.0))
    }

    /// Writes the pending step as a layer (a `normalize` that does nothing is dropped).
    pub fn flush(&mut self) {
        match std::mem::replace(&mut self.pending, Pending::None) {
            Pending::None => {}
            Pending::Normalize { mean, std, .. } => {
                if mean.iter().any(|m| *m != 0.0) || std.iter().any(|s| *s != 1.0) {
                    self.layers.push(Layer::Normalize { mean, std });
                }
            }
            Pending::Dense { weights, bias, .. } => {
                self.layers.push(Layer::Dense { weights, bias })
            }
        }
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
                Layer::Relu => "relu",
            })
            .collect()
    }

    #[test]
    fn steps_that_change_the_rounding_stay_apart() {
        let v = |x: &[f64]| DVector::from_column_slice(x);
        // Gemm with a bias, then Add: the Add is its own step (a normalize with mean −t).
        let mut p = DataPath::input(vec![2]);
        p.linear(DMatrix::identity(2, 2), v(&[1e5, 1e5]), true);
        p.add(v(&[-1e5, -1e5]));
        p.flush();
        assert_eq!(kinds(&p), ["dense", "normalize"]);
        // MatMul then Add: one dense layer with the Add as its bias.
        let mut p = DataPath::input(vec![2]);
        p.linear(DMatrix::identity(2, 2), DVector::zeros(2), false);
        p.add(v(&[3.0, 4.0]));
        p.flush();
        assert_eq!(kinds(&p), ["dense"]);
        assert!(matches!(&p.layers[0], Layer::Dense { bias, .. } if bias == &v(&[3.0, 4.0])));
        // MatMul then MatMul: two dense layers.
        let mut p = DataPath::input(vec![2]);
        p.linear(DMatrix::identity(2, 2), DVector::zeros(2), false);
        p.linear(DMatrix::identity(2, 2), DVector::zeros(2), false);
        p.flush();
        assert_eq!(kinds(&p), ["dense", "dense"]);
    }

    #[test]
    fn sub_then_div_is_one_normalize_with_the_graph_numbers() {
        let v = |x: &[f64]| DVector::from_column_slice(x);
        let mut p = DataPath::input(vec![2]);
        p.add(-v(&[10000.5, 3.0]));
        p.divide(v(&[0.01, 2.0]));
        p.flush();
        match &p.layers[..] {
            [Layer::Normalize { mean, std }] => {
                assert_eq!(mean, &v(&[10000.5, 3.0]));
                assert_eq!(std, &v(&[0.01, 2.0]));
            }
            other => panic!("{other:?}"),
        }
        // Division by a negative entry: normalize by |d|, then the sign.
        let mut p = DataPath::input(vec![2]);
        p.divide(v(&[-4.0, 2.0]));
        p.flush();
        assert_eq!(kinds(&p), ["normalize", "dense"]);
    }
}
