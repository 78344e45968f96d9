//! New models for training from scratch: a normalize layer fitted to the data's mean and standard
//! deviation, then dense layers with He initialisation (He et al., 2015: weights drawn from
//! N(0, 2 / fan-in), biases 0), ReLU between them. Convolutional models: [`super::cnn`].
//!
//! Everything is seeded (ChaCha8), so the same seed gives the same model bit for bit.

use nalgebra::{DMatrix, DVector};
use rand::SeedableRng;
use rand_chacha::ChaCha8Rng;
use rand_distr::{Distribution, Normal};

use crate::data::Dataset;
use crate::model::{Dense, InputSpec, Model, Network, Normalization};

use super::TrainError;

/// Per-feature mean and standard deviation of `data` (population std; a feature with zero spread,
/// or too few samples, gets std 1 so the layer stays valid).
pub fn fit_normalization(data: &Dataset) -> Normalization {
    let dim = data.features.nrows();
    let n = data.len().max(1) as f64;
    let mut mean = DVector::zeros(dim);
    let mut std = DVector::zeros(dim);
    for i in 0..dim {
        let row = data.features.row(i);
        let m = row.sum() / n;
        let var = row.iter().map(|v| (v - m) * (v - m)).sum::<f64>() / n;
        mean[i] = m;
        let s = var.sqrt();
        std[i] = if s.is_finite() && s > 1e-12 * (1.0 + m.abs()) {
            s
        } else {
            1.0
        };
    }
    Normalization { mean, std }
}

/// A ReLU network `input → hidden[0] → … → outputs` with He-initialised weights and zero biases.
pub fn he_network(input: usize, hidden: &[usize], outputs: usize, seed: u64) -> Network {
    let mut rng = ChaCha8Rng::seed_from_u64(seed);
    let mut sizes = vec![input];
    sizes.extend_from_slice(hidden);
    sizes.push(outputs);
    let layers = sizes
        .windows(2)
        .map(|pair| {
            let (fan_in, fan_out) = (pair[0], pair[1]);
            let normal = he_normal(fan_in);
            Dense {
                weights: DMatrix::from_fn(fan_out, fan_in, |_, _| normal.sample(&mut rng)),
                bias: DVector::zeros(fan_out),
            }
        })
        .collect();
    Network::from_dense(layers)
}

/// A new classifier for `input` with `classes` outputs (≥ 2; two logits for a binary problem) and the
/// given hidden layer sizes (empty = softmax regression). The first layer is a normalize layer fitted
/// to `data` ([`fit_normalization`]); the rest is [`he_network`] with `seed`.
pub fn new_mlp(
    input: &InputSpec,
    classes: usize,
    hidden: &[usize],
    data: &Dataset,
    seed: u64,
) -> Result<Model, TrainError> {
    check_new_model(input, classes, hidden, data)?;
    let normalization = fit_normalization(data);
    let network = he_network(input.dim, hidden, classes, seed);
    Ok(empty_model(input).with_network(Some(&normalization), &network))
}

/// Checks what every new model needs: two or more classes, no empty hidden layer, data that fits.
pub(super) fn check_new_model(
    input: &InputSpec,
    classes: usize,
    hidden: &[usize],
    data: &Dataset,
) -> Result<(), TrainError> {
    if classes < 2 {
        return Err(TrainError::Settings(format!(
            "a classifier needs at least 2 classes, got {classes}"
        )));
    }
    if let Some(position) = hidden.iter().position(|h| *h == 0) {
        return Err(TrainError::Settings(format!(
            "hidden layer {position} has size 0, expected at least 1 unit"
        )));
    }
    if data.features.nrows() != input.dim {
        return Err(TrainError::Settings(format!(
            "the data has {} features, the input has {}",
            data.features.nrows(),
            input.dim
        )));
    }
    if data.is_empty() {
        return Err(TrainError::Settings("no training samples".into()));
    }
    Ok(())
}

/// A model for `input` with no layers, name, classes or provenance yet.
pub(super) fn empty_model(input: &InputSpec) -> Model {
    Model {
        name: None,
        input: input.clone(),
        classes: None,
        layers: Vec::new(),
        provenance: None,
        arithmetic: Default::default(),
    }
}

/// He et al. (2015): N(0, 2 / fan-in).
pub(super) fn he_normal(fan_in: usize) -> Normal<f64> {
    Normal::new(0.0, (2.0 / fan_in.max(1) as f64).sqrt()).expect("finite std")
}

#[cfg(test)]
mod tests {
    use super::*;
    use approx::assert_relative_eq;

    #[test]
    fn he_weights_have_the_stated_variance() {
        // He et al. (2015): Var(w) = 2 / fan_in.
        let net = he_network(200, &[300], 2, 7);
        let w = &net.layers[0].to_dense().weights;
        let n = w.len() as f64;
        let mean = w.sum() / n;
        let var = w.iter().map(|v| (v - mean) * (v - mean)).sum::<f64>() / n;
        assert_relative_eq!(var, 2.0 / 200.0, max_relative = 0.05);
        assert!(net.layers[0]
            .to_dense()
            .bias
            .iter()
            .all(|b| b.abs() < 1e-300));
    }

    #[test]
    fn same_seed_same_network() {
        assert_eq!(he_network(4, &[5], 3, 11), he_network(4, &[5], 3, 11));
        assert_ne!(he_network(4, &[5], 3, 11), he_network(4, &[5], 3, 12));
    }

    #[test]
    fn normalization_is_mean_and_population_std() {
        let data = Dataset {
            features: DMatrix::from_column_slice(2, 3, &[1.0, 5.0, 2.0, 5.0, 3.0, 5.0]),
            labels: vec![0, 1, 0],
        };
        let n = fit_normalization(&data);
        assert_relative_eq!(n.mean[0], 2.0, epsilon = 1e-12);
        assert_relative_eq!(n.std[0], (2.0f64 / 3.0).sqrt(), epsilon = 1e-12);
        assert_relative_eq!(n.std[1], 1.0, epsilon = 1e-12); // constant feature
    }
}
