//! Training through convolutional layers: the clean and certified losses' gradients against central
//! finite differences on small CNNs (1-D and 2-D convolutions, batch norm, max pooling after and
//! before a ReLU, average pooling, chains of maps in hidden and output layers, a one-logit head), the
//! training bounds below sampled margins, and `ballast retrain` end to end on a CNN.

mod common;

use ballast::bound::interval::batch_margin_lower_bounds;
use ballast::model::{Layer, Model, Network};
use ballast::threat::{Budget, Norm, Region};
use ballast::train::bound_gradient::certified_cross_entropy;
use ballast::train::plain::{cross_entropy_gradient, TrainableModel};
use common::gradient::{check_gradient, random_batch};
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;
use serde_json::{json, Value};

fn values(rng: &mut ChaCha8Rng, n: usize, scale: f64) -> Vec<f64> {
    (0..n).map(|_| scale * rng.gen_range(-1.0..1.0)).collect()
}

/// A nested kernel `[out][in][k]` (1-D) or `[out][in][kh][kw]` (2-D) with He-sized entries.
fn kernel(rng: &mut ChaCha8Rng, out: usize, input: usize, kh: usize, kw: usize) -> Value {
    let scale = (6.0 / (input * kh.max(1) * kw) as f64).sqrt();
    let taps = |rng: &mut ChaCha8Rng| json!(values(rng, kw, scale));
    let channel = |rng: &mut ChaCha8Rng| {
        if kh == 0 {
            taps(rng)
        } else {
            Value::Array((0..kh).map(|_| taps(rng)).collect())
        }
    };
    Value::Array(
        (0..out)
            .map(|_| Value::Array((0..input).map(|_| channel(rng)).collect()))
            .collect(),
    )
}

/// 1-D, `[2, 10]`: normalize, conv 3×3 pad 1, batch norm, relu, max pool 2, conv 4×2, relu,
/// average pool 2, flatten, dense 5, relu, dense 3.
fn one_d_cnn(seed: u64) -> Model {
    let mut rng = ChaCha8Rng::seed_from_u64(seed);
    let std: Vec<f64> = (0..20).map(|_| rng.gen_range(0.5..1.5)).collect();
    let variance: Vec<f64> = (0..3).map(|_| rng.gen_range(0.5..2.0)).collect();
    let text = json!({
        "format": "ballast.model/1",
        "input": {"dim": 20, "shape": [2, 10]},
        "layers": [
            {"kind": "normalize", "mean": values(&mut rng, 20, 0.3), "std": std},
            {"kind": "conv", "kernel": kernel(&mut rng, 3, 2, 0, 3), "bias": values(&mut rng, 3, 0.2),
             "padding": [1, 1]},
            {"kind": "batchnorm", "scale": values(&mut rng, 3, 1.5), "shift": values(&mut rng, 3, 0.3),
             "mean": values(&mut rng, 3, 0.2), "variance": variance},
            {"kind": "relu"},
            {"kind": "maxpool", "kernel": [2]},
            {"kind": "conv", "kernel": kernel(&mut rng, 4, 3, 0, 2), "bias": values(&mut rng, 4, 0.2)},
            {"kind": "relu"},
            {"kind": "averagepool", "kernel": [2]},
            {"kind": "flatten"},
            {"kind": "dense", "weights": (0..5).map(|_| values(&mut rng, 8, 0.8)).collect::<Vec<_>>(),
             "bias": values(&mut rng, 5, 0.2)},
            {"kind": "relu"},
            {"kind": "dense", "weights": (0..3).map(|_| values(&mut rng, 5, 0.9)).collect::<Vec<_>>(),
             "bias": values(&mut rng, 3, 0.2)}
        ]
    });
    Model::from_json_str(&text.to_string()).expect("valid 1-D model")
}

/// 2-D, `[1, 5, 5]`: conv 3×(2×2), max pool 2×2 before the relu (inputs of either sign), relu,
/// conv 2×(1×1), relu, average pool 2×2, flatten, dense 1 (a binary one-logit head).
fn two_d_cnn(seed: u64) -> Model {
    let mut rng = ChaCha8Rng::seed_from_u64(seed);
    let text = json!({
        "format": "ballast.model/1",
        "input": {"dim": 25, "shape": [1, 5, 5]},
        "layers": [
            {"kind": "conv", "kernel": kernel(&mut rng, 3, 1, 2, 2), "bias": values(&mut rng, 3, 0.2)},
            {"kind": "maxpool", "kernel": [2, 2]},
            {"kind": "relu"},
            {"kind": "conv", "kernel": kernel(&mut rng, 2, 3, 1, 1), "bias": values(&mut rng, 2, 0.2)},
            {"kind": "relu"},
            {"kind": "averagepool", "kernel": [2, 2]},
            {"kind": "flatten"},
            {"kind": "dense", "weights": [values(&mut rng, 2, 1.0)], "bias": [0.1]}
        ]
    });
    Model::from_json_str(&text.to_string()).expect("valid 2-D model")
}

/// The trainable network of `model` (a leading normalize layer split off, as training does).
fn trainable(model: &Model) -> Network {
    TrainableModel::new(model).network
}

fn regions(dim: usize, radius: f64, norm: Norm, samples: usize, seed: u64) -> Vec<Region> {
    let mut rng = ChaCha8Rng::seed_from_u64(seed);
    let budget = Budget::uniform(norm, radius, dim);
    (0..samples)
        .map(|_| {
            let c = values(&mut rng, dim, 1.0);
            budget.region(&c, &vec![-3.0; dim], &vec![3.0; dim])
        })
        .collect()
}

/// Some hidden unit is unstable over some region (so the relaxation's slopes enter the gradient).
fn some_unit_unstable(
    network: &Network,
    regions: &[Region],
    labels: &[usize],
    targets: &[Vec<usize>],
) -> bool {
    let bounds = batch_margin_lower_bounds(network, regions, labels, targets).expect("bounds");
    bounds
        .lower
        .iter()
        .zip(&bounds.upper)
        .any(|(l, u)| l.iter().zip(u.iter()).any(|(a, b)| *a < 0.0 && *b > 0.0))
}

#[test]
fn the_test_networks_hold_chains_and_lowered_max_pools() {
    // The 1-D model: conv + batch norm in one chain, the max pool's ReLU layer, the pool's output map
    // chained with the second conv, the average pool chained with the first dense layer.
    let network = trainable(&one_d_cnn(1));
    assert_eq!(network.layers.len(), 5);
    assert!(matches!(
        network.layers[0],
        ballast::model::Affine::Chain(_)
    ));
    assert_eq!(network.layers[1].parameter_count(), 0);
    assert!(network.layers.iter().all(|l| l.parameters().len() % 2 == 0));
    // The 2-D model: the max pool before the ReLU needs two ReLU layers for a 2×2 window.
    let network = trainable(&two_d_cnn(2));
    assert_eq!(network.layers.len(), 5);
    assert_eq!(network.output_dim(), 1);
}

// Common practice: backpropagation through convolutions and pooling must agree with central
// differences (error O(h²)).
#[test]
fn clean_loss_gradients_through_convolutions_match_finite_differences() {
    for (model, labels) in [
        (one_d_cnn(11), vec![0, 1, 2, 0, 1, 2, 1]),
        (two_d_cnn(12), vec![0, 1, 1, 0, 1, 0, 0]),
    ] {
        let network = trainable(&model);
        let batch = random_batch(network.input_dim(), labels.len(), 13);
        let (_, analytic) = cross_entropy_gradient(&network, &batch, &labels);
        let loss = |n: &Network| cross_entropy_gradient(n, &batch, &labels).0;
        check_gradient(&network, &analytic, &loss, 1e-8);
    }
}

// Common practice: reverse-mode gradients through the bound computations must agree with central
// differences (away from the measure-zero kinks of ReLU, |·| and the stability tests).
#[test]
fn certified_loss_gradients_through_convolutions_match_finite_differences() {
    let network = trainable(&one_d_cnn(21));
    let regions = regions(20, 0.15, Norm::Linf, 7, 22);
    let labels = vec![0, 1, 2, 0, 1, 2, 1];
    let targets: Vec<Vec<usize>> = labels
        .iter()
        .enumerate()
        .map(|(s, &y)| {
            if s == 3 {
                vec![(y + 1) % 3] // a restricted requirement: one forbidden class only
            } else {
                (0..3).filter(|j| *j != y).collect()
            }
        })
        .collect();
    let weights = vec![1.0, 0.5, 2.0, 1.0, 1.5, 0.7, 1.2];
    assert!(some_unit_unstable(&network, &regions, &labels, &targets));
    for beta in [0.0, 0.4, 1.0] {
        let batch = certified_cross_entropy(&network, &regions, &labels, &targets, &weights, beta)
            .expect("bounds");
        assert!(batch.loss.is_finite() && batch.loss > 0.0);
        let loss = |n: &Network| {
            certified_cross_entropy(n, &regions, &labels, &targets, &weights, beta)
                .expect("bounds")
                .loss
        };
        check_gradient(&network, &batch.gradient, &loss, 1e-7);
    }
}

#[test]
fn certified_loss_gradient_through_a_max_pool_before_relu_and_one_logit() {
    let network = trainable(&two_d_cnn(31));
    let regions = regions(25, 0.2, Norm::L2, 5, 32);
    let labels = vec![0, 1, 1, 0, 1];
    let targets = vec![vec![1], vec![0], vec![], vec![1], vec![0]];
    let weights = vec![1.0; 5];
    assert!(some_unit_unstable(&network, &regions, &labels, &targets));
    for beta in [0.0, 0.5, 1.0] {
        let batch = certified_cross_entropy(&network, &regions, &labels, &targets, &weights, beta)
            .expect("bounds");
        assert!(batch.sample_losses[2].abs() < 1e-300 && batch.worst_margins[2].is_infinite());
        let loss = |n: &Network| {
            certified_cross_entropy(n, &regions, &labels, &targets, &weights, beta)
                .expect("bounds")
                .loss
        };
        check_gradient(&network, &batch.gradient, &loss, 1e-7);
    }
}

// Soundness of the training bounds (common practice: a lower bound must not exceed any attained
// margin): at many points of each region, a plain forward pass of the model as its file describes it
// never gives a margin below the mixed or the interval bound.
#[test]
fn training_bounds_on_a_cnn_are_below_sampled_margins() {
    let model = one_d_cnn(41);
    let network = trainable(&model);
    let regions = regions(20, 0.1, Norm::Linf, 6, 42);
    let labels = vec![0, 1, 2, 2, 1, 0];
    let targets: Vec<Vec<usize>> = labels
        .iter()
        .map(|&y| (0..3).filter(|j| *j != y).collect())
        .collect();
    let weights = vec![1.0; 6];
    let mut rng = ChaCha8Rng::seed_from_u64(43);
    for beta in [0.0, 0.5, 1.0] {
        let batch = certified_cross_entropy(&network, &regions, &labels, &targets, &weights, beta)
            .expect("bounds");
        for (s, region) in regions.iter().enumerate() {
            for _ in 0..200 {
                let x: Vec<f64> = (0..20)
                    .map(|i| rng.gen_range(region.outer_lower[i]..=region.outer_upper[i]))
                    .collect();
                let z = network.forward(&x);
                let margin = targets[s]
                    .iter()
                    .map(|&j| z[labels[s]] - z[j])
                    .fold(f64::INFINITY, f64::min);
                assert!(
                    batch.worst_margins[s] <= margin + 1e-9,
                    "beta {beta}, sample {s}"
                );
            }
        }
    }
}

mod retraining {
    use super::*;
    use ballast::bound::{margin_lower_bounds, Method};
    use ballast::cli::{run, Cli, Outcome};
    use ballast::data::{load_csv, DataOptions};
    use ballast::model::pool::PoolOp;
    use ballast::model::predicted_class;
    use ballast::model::InputSpec;
    use ballast::train::{new_cnn, CnnArchitecture, ConvBlock};
    use clap::Parser;

    const LENGTH: usize = 16;

    /// Signals of 16 samples in [0, 1]: a bump of height 0.6–1 in the left half (class 0) or the
    /// right half (class 1) on uniform noise up to 0.1, as CSV.
    fn bumps(samples: usize, seed: u64) -> String {
        let mut rng = ChaCha8Rng::seed_from_u64(seed);
        let mut text = String::from("label");
        for i in 0..LENGTH {
            text.push_str(&format!(",x{i}"));
        }
        text.push('\n');
        for n in 0..samples {
            let y = n % 2;
            let at = if y == 0 {
                rng.gen_range(2..6)
            } else {
                rng.gen_range(10..14)
            };
            let height = rng.gen_range(0.6..1.0);
            text.push_str(&y.to_string());
            for i in 0..LENGTH {
                let bump = match i.abs_diff(at) {
                    0 => height,
                    1 => 0.5 * height,
                    _ => 0.0,
                };
                let v: f64 = (bump + rng.gen_range(0.0..0.1f64)).min(1.0);
                text.push_str(&format!(",{v:.4}"));
            }
            text.push('\n');
        }
        text
    }

    fn kinds(model: &Model) -> Vec<&'static str> {
        model
            .layers
            .iter()
            .map(|l| match l {
                Layer::Normalize { .. } => "normalize",
                Layer::Dense { .. } => "dense",
                Layer::Relu => "relu",
                Layer::Conv(_) => "conv",
                Layer::BatchNorm { .. } => "batchnorm",
                Layer::Pool(_) => "pool",
                Layer::Flatten => "flatten",
            })
            .collect()
    }

    // End to end: `ballast retrain` on a CNN with a max pool and an average pool keeps the layer
    // kinds and the fixed normalize layer, and either says the floor was not met or sound linear
    // bounds (bound/, computed here independently of the trainer) certify at least the floor.
    #[test]
    fn retrain_on_a_cnn_keeps_its_layers_and_meets_the_floor_or_says_so() {
        let dir = tempfile::tempdir().expect("temp dir");
        let (train, acceptance) = (dir.path().join("train.csv"), dir.path().join("acc.csv"));
        std::fs::write(&train, bumps(400, 1)).expect("write");
        std::fs::write(&acceptance, bumps(200, 2)).expect("write");
        let input = InputSpec {
            dim: LENGTH,
            names: Some((0..LENGTH).map(|i| format!("x{i}")).collect()),
            lower: vec![0.0; LENGTH],
            upper: vec![1.0; LENGTH],
            shape: Some(vec![1, LENGTH]),
            units: None,
        };
        let block = |pool| ConvBlock {
            channels: 4,
            kernel: 3,
            stride: 1,
            padding: 1,
            pool: Some((pool, 2)),
        };
        let architecture = CnnArchitecture {
            blocks: vec![block(PoolOp::Max), block(PoolOp::Average)],
            hidden: vec![8],
        };
        let probe = ballast::data::Dataset {
            features: nalgebra::DMatrix::from_fn(LENGTH, 2, |i, s| (i + s) as f64 / 20.0),
            labels: vec![0, 1],
        };
        let mut start = new_cnn(&input, 2, &architecture, &probe, 4).expect("cnn");
        start.classes = Some(vec!["left".into(), "right".into()]);
        let start_path = dir.path().join("start.json");
        start.save(&start_path).expect("save");
        let out = dir.path().join("retrained.json");
        let (floor, eps) = (0.8, 0.04);
        let (floor_text, eps_text) = (floor.to_string(), eps.to_string());
        let path = |p: &std::path::Path| p.to_str().unwrap().to_owned();
        let cli = Cli::parse_from([
            "ballast",
            "retrain",
            "--model",
            &path(&start_path),
            "--train",
            &path(&train),
            "--acceptance",
            &path(&acceptance),
            "--eps",
            &eps_text,
            "--floor",
            &floor_text,
            "--epochs",
            "10",
            "--max-rounds",
            "2",
            "--learning-rate",
            "0.01",
            "--seed",
            "3",
            "--out",
            &path(&out),
        ]);
        let outcome = run(cli).expect("retrain runs");
        let model = Model::load(&out).expect("retrained model written");
        assert_eq!(kinds(&model), kinds(&start));
        assert_eq!(
            model.layers[0], start.layers[0],
            "normalize layer kept fixed"
        );
        assert_ne!(
            model.layers[1], start.layers[1],
            "first convolution trained"
        );
        assert_eq!(model.input, start.input);
        let data = load_csv(&acceptance, &model, &DataOptions::default()).expect("acceptance");
        let network = model.classifier();
        let budget = Budget::uniform(Norm::Linf, eps, LENGTH);
        let mut certified = 0;
        for (i, &y) in data.labels.iter().enumerate() {
            let x = data.sample(i);
            if predicted_class(network.forward(x).as_slice()) != y {
                continue;
            }
            let region = budget.region(x, &model.input.lower, &model.input.upper);
            let bounds = margin_lower_bounds(&network, &region, y, &[1 - y], Method::Linear, None)
                .expect("bounds");
            certified += usize::from(bounds.certified());
        }
        let fraction = certified as f64 / data.len() as f64;
        match outcome {
            Outcome::Met => assert!(
                fraction >= floor,
                "claimed met but bounds certify {fraction}"
            ),
            Outcome::NotMet => {}
            other => panic!("unexpected outcome {other:?}"),
        }
        // The bumps are far apart compared to eps, so the floor should be reachable.
        assert_eq!(outcome, Outcome::Met, "certified fraction {fraction}");
    }
}
