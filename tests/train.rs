//! Training checks: gradients against central finite differences, the plain trainer against
//! scikit-learn's MLPClassifier on load_digits, and constrained retraining end to end.

use std::path::Path;

use approx::assert_relative_eq;
use ballast::data::{load_csv, DataOptions, Dataset};
use ballast::model::{predicted_class, Dense, Model, Network};
use ballast::train::backprop::{classifier_logits, softmax_cross_entropy};
use ballast::train::plain::cross_entropy_gradient;
use ballast::train::{he_network, new_mlp, train_cross_entropy, OptimizerKind, TrainSettings};
use nalgebra::DMatrix;

fn fixture_model() -> Model {
    Model::load(Path::new("tests/data/digits_mlp.model.json")).expect("fixture model loads")
}

fn digits(name: &str, model: &Model) -> Dataset {
    load_csv(Path::new(&format!("tests/data/{name}")), model, &DataOptions::default())
        .expect("fixture data loads")
}

fn accuracy(model: &Model, data: &Dataset) -> f64 {
    let logits = model.classifier().forward_batch(&data.features);
    let correct = (0..data.len())
        .filter(|&i| predicted_class(logits.column(i).as_slice()) == data.labels[i])
        .count();
    correct as f64 / data.len() as f64
}

/// Central finite difference of `loss` with respect to every weight and bias of `network`, compared
/// with `analytic` (relative tolerance on the larger of the two, absolute floor `floor`).
fn check_gradient(
    network: &Network,
    analytic: &Network,
    loss: &dyn Fn(&Network) -> f64,
    floor: f64,
) {
    let h = 1e-6;
    let mut checked = 0;
    for k in 0..network.layers.len() {
        let (rows, cols) = network.layers[k].weights.shape();
        for r in 0..rows {
            for c in 0..cols {
                let mut plus = network.clone();
                plus.layers[k].weights[(r, c)] += h;
                let mut minus = network.clone();
                minus.layers[k].weights[(r, c)] -= h;
                let numeric = (loss(&plus) - loss(&minus)) / (2.0 * h);
                let exact = analytic.layers[k].weights[(r, c)];
                assert!(
                    (numeric - exact).abs() <= 1e-5 * numeric.abs().max(exact.abs()) + floor,
                    "layer {k} weight ({r},{c}): finite difference {numeric}, backprop {exact}"
                );
                checked += 1;
            }
            let mut plus = network.clone();
            plus.layers[k].bias[r] += h;
            let mut minus = network.clone();
            minus.layers[k].bias[r] -= h;
            let numeric = (loss(&plus) - loss(&minus)) / (2.0 * h);
            let exact = analytic.layers[k].bias[r];
            assert!(
                (numeric - exact).abs() <= 1e-5 * numeric.abs().max(exact.abs()) + floor,
                "layer {k} bias {r}: finite difference {numeric}, backprop {exact}"
            );
            checked += 1;
        }
    }
    assert!(checked > 0);
}

fn random_batch(dim: usize, samples: usize, seed: u64) -> DMatrix<f64> {
    use rand::{Rng, SeedableRng};
    let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(seed);
    DMatrix::from_fn(dim, samples, |_, _| rng.gen_range(-1.0..1.0))
}

// Common practice: backpropagation must agree with central differences (error O(h²)).
#[test]
fn cross_entropy_gradient_matches_finite_differences() {
    let network = he_network(5, &[7, 6], 4, 3);
    let batch = random_batch(5, 9, 4);
    let labels = vec![0, 1, 2, 3, 0, 1, 2, 3, 1];
    let (_, analytic) = cross_entropy_gradient(&network, &batch, &labels);
    let loss = |n: &Network| cross_entropy_gradient(n, &batch, &labels).0;
    check_gradient(&network, &analytic, &loss, 1e-8);
}

#[test]
fn binary_one_logit_gradient_matches_finite_differences() {
    let network = he_network(3, &[4], 1, 5);
    let batch = random_batch(3, 6, 6);
    let labels = vec![0, 1, 1, 0, 1, 0];
    let (_, analytic) = cross_entropy_gradient(&network, &batch, &labels);
    let loss = |n: &Network| cross_entropy_gradient(n, &batch, &labels).0;
    check_gradient(&network, &analytic, &loss, 1e-8);
    // The 1-logit model is read as logits [0, z] (the project's binary rule).
    let logits = classifier_logits(&network.forward_batch(&batch));
    let (value, _) = softmax_cross_entropy(&logits, &labels);
    assert_relative_eq!(value, cross_entropy_gradient(&network, &batch, &labels).0, epsilon = 1e-12);
}

// Outside reference: scikit-learn 1.9.1 MLPClassifier(hidden_layer_sizes=(32,), random_state=0,
// max_iter=500) on load_digits reaches test accuracy 0.9778 (tests/reference/out/digits_forward.json,
// models.digits_mlp.test_accuracy, made by tests/reference/digits_fixtures.py). Our plain trainer with
// the same architecture must come within 2 points.
#[test]
fn plain_trainer_matches_scikit_learn_on_digits() {
    let reference: serde_json::Value = serde_json::from_str(
        &std::fs::read_to_string("tests/reference/out/digits_forward.json").expect("reference"),
    )
    .expect("reference JSON");
    let target = reference["models"]["digits_mlp"]["test_accuracy"].as_f64().expect("accuracy");
    let fixture = fixture_model();
    let train = digits("digits_train.csv", &fixture);
    let test = digits("digits_test.csv", &fixture);
    let initial = new_mlp(&fixture.input, 10, &[32], &train, 1).expect("new model");
    let settings = TrainSettings {
        epochs: 60,
        batch_size: 32,
        optimizer: OptimizerKind::adam(0.003),
        weight_decay: 1e-4,
        seed: 1,
        validation_fraction: 0.1,
        patience: Some(15),
    };
    let (model, log) = train_cross_entropy(&initial, &train, &settings).expect("training runs");
    let test_accuracy = accuracy(&model, &test);
    assert!(
        test_accuracy >= target - 0.02,
        "test accuracy {test_accuracy:.4}, scikit-learn {target:.4} (best epoch {})",
        log.best_epoch
    );
    // The model keeps the layout: normalize, dense, relu, dense; the normalize layer is unchanged.
    assert_eq!(model.layers.len(), 4);
    assert_eq!(model.layers[0], initial.layers[0]);
    assert_eq!(model.input, fixture.input);
}

#[test]
fn training_is_deterministic_and_sgd_lowers_the_loss() {
    let fixture = fixture_model();
    let train = digits("digits_train.csv", &fixture).subset(&(0..300).collect::<Vec<_>>());
    let initial = new_mlp(&fixture.input, 10, &[], &train, 2).expect("softmax regression");
    let settings = TrainSettings {
        epochs: 5,
        optimizer: OptimizerKind::Sgd {
            learning_rate: 0.05,
            momentum: 0.9,
        },
        patience: None,
        ..TrainSettings::default()
    };
    let (a, log) = train_cross_entropy(&initial, &train, &settings).expect("runs");
    let (b, _) = train_cross_entropy(&initial, &train, &settings).expect("runs");
    assert_eq!(a, b, "same seed, same model");
    let first = log.epochs.first().expect("an epoch").train_loss;
    let last = log.epochs.last().expect("an epoch").train_loss;
    assert!(last < first, "loss {first} -> {last}");
}

#[test]
fn bad_settings_and_data_are_errors() {
    let fixture = fixture_model();
    let train = digits("digits_test.csv", &fixture);
    let settings = TrainSettings {
        batch_size: 0,
        ..TrainSettings::default()
    };
    let error = train_cross_entropy(&fixture, &train, &settings).unwrap_err();
    assert!(error.to_string().contains("batch size"), "{error}");
    let mut wrong = train.clone();
    wrong.labels[3] = 12;
    let error = train_cross_entropy(&fixture, &wrong, &TrainSettings::default()).unwrap_err();
    assert!(error.to_string().contains("sample 3"), "{error}");
    assert!(new_mlp(&fixture.input, 10, &[0], &train, 0).is_err());
    let _ = Dense::identity(1);
}
