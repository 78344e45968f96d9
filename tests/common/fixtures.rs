//! Small inputs shared by the test crates: random dense ReLU networks and the digits fixture
//! (`tests/data/digits_mlp.model.json` with `tests/data/digits_test.csv`, scikit-learn's digits data).

use std::path::Path;

use ballast::data::{load_csv, DataOptions, Dataset};
use ballast::model::{Dense, Model, Network};
use nalgebra::{DMatrix, DVector};
use rand::{Rng, SeedableRng};
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

/// Three overlapping classes in 2-D (class means −1, 0, 1 on the first axis, std 0.6, clamped to
/// [−3, 3]; row i has class i mod 3; seeded, so a longer set extends a shorter one).
pub fn three_classes(samples: usize) -> Dataset {
    let mut rng = ChaCha8Rng::seed_from_u64(11);
    let normal = rand_distr::Normal::new(0.0, 0.6).expect("normal");
    let mut features = DMatrix::zeros(2, samples);
    let mut labels = Vec::with_capacity(samples);
    for i in 0..samples {
        let y = i % 3;
        features[(0, i)] = (y as f64 - 1.0 + rng.sample::<f64, _>(normal)).clamp(-3.0, 3.0);
        features[(1, i)] = rng.sample::<f64, _>(normal).clamp(-3.0, 3.0);
        labels.push(y);
    }
    Dataset { features, labels }
}

/// The 2-8-3 MLP over [−3, 3]² (normalize layer fitted to `data`, seed 4) that the primal-dual
/// tests start from.
pub fn three_class_mlp(data: &Dataset) -> Model {
    let input = ballast::model::InputSpec {
        dim: 2,
        names: None,
        lower: vec![-3.0; 2],
        upper: vec![3.0; 2],
        shape: None,
        units: None,
    };
    ballast::train::new_mlp(&input, 3, &[8], data, 4).expect("model")
}
