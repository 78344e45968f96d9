//! Small inputs shared by the test crates: random dense ReLU networks and the digits fixture
//! (`tests/data/digits_mlp.model.json` with `tests/data/digits_test.csv`, scikit-learn's digits data).

use std::path::Path;

use ballast::data::{load_csv, DataOptions, Dataset};
use ballast::model::{Dense, Model, Network};
use nalgebra::{DMatrix, DVector};
use rand::Rng;
use rand_chacha::ChaCha8Rng;

/// A dense ReLU network with layer sizes `sizes`, weights uniform in [−1, 1) and biases in [−0.3, 0.3).
pub fn random_network(rng: &mut ChaCha8Rng, sizes: &[usize]) -> Network {
    let layers = sizes
        .windows(2)
        .map(|w| Dense {
            weights: DMatrix::from_fn(w[1], w[0], |_, _| rng.gen_range(-1.0..1.0)),
            bias: DVector::from_fn(w[1], |_, _| rng.gen_range(-0.3..0.3)),
        })
        .collect();
    Network::from_dense(layers)
}

/// The digits MLP and its test set.
pub fn digits_mlp() -> (Model, Dataset) {
    let model = Model::load(Path::new("tests/data/digits_mlp.model.json")).unwrap();
    let data = load_csv(
        Path::new("tests/data/digits_test.csv"),
        &model,
        &DataOptions::default(),
    )
    .unwrap();
    (model, data)
}
