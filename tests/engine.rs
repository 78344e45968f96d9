//! The bound engine (src/engine/): batched bounds equal one-at-a-time bounds, and at extreme scales no
//! double input of the region has an exact margin below a bound.
//!
//! Outside reference: exact rational arithmetic (the num-rational crate) evaluates the model as the
//! file describes it — `normalize` as `(x − mean) / std`, then the dense layers — at double inputs
//! sampled in the region's inner box (whose every double lies in the ball ∩ range).

mod common;

use ballast::bound::{self, linear, Method};
use ballast::model::{Dense, Layer, Model, Network};
use ballast::threat::{Budget, Norm, Region};
use common::exact_model::exact_logits;
use nalgebra::{DMatrix, DVector};
use num_rational::BigRational;
use num_traits::Signed;
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;

fn random_dense(rng: &mut ChaCha8Rng, rows: usize, cols: usize, scale: f64) -> Dense {
    Dense {
        weights: DMatrix::from_fn(rows, cols, |_, _| scale * rng.gen_range(-1.0..1.0)),
        bias: DVector::from_fn(rows, |_, _| 0.3 * scale * rng.gen_range(-1.0..1.0)),
    }
}

fn random_network(rng: &mut ChaCha8Rng, depth: usize, input: usize, classes: usize) -> Network {
    let mut sizes = vec![input];
    for _ in 1..depth {
        sizes.push(rng.gen_range(2..=12));
    }
    sizes.push(classes);
    Network::from_dense(
        sizes
            .windows(2)
            .map(|p| random_dense(rng, p[1], p[0], (2.0 / p[0] as f64).sqrt()))
            .collect(),
    )
}

fn random_region(rng: &mut ChaCha8Rng, dim: usize, norm: Norm) -> Region {
    let center: Vec<f64> = (0..dim).map(|_| rng.gen_range(-1.0..1.0)).collect();
    let radius = rng.gen_range(0.01..0.4);
    Budget::uniform(norm, radius, dim).region(&center, &vec![-1.2; dim], &vec![1.2; dim])
}

/// Common practice: the same computation on a batch and on its columns one by one agrees to rounding.
#[test]
fn batched_bounds_equal_one_at_a_time_bounds() {
    let mut rng = ChaCha8Rng::seed_from_u64(31);
    let mut compared = 0;
    for case in 0..24 {
        let depth = 1 + case % 5;
        let input = rng.gen_range(2..=6);
        let network = random_network(&mut rng, depth, input, 3);
        let norm = if case % 3 == 0 { Norm::L2 } else { Norm::Linf };
        let regions: Vec<Region> = (0..7)
            .map(|_| random_region(&mut rng, input, norm))
            .collect();
        let labels: Vec<usize> = regions
            .iter()
            .map(|r| ballast::model::predicted_class(network.forward(&r.center).as_slice()))
            .collect();
        let targets: Vec<Vec<usize>> = labels
            .iter()
            .map(|&y| (0..3).filter(|j| *j != y).collect())
            .collect();
        let batch =
            linear::batch_margin_lower_bounds(&network, &regions, &labels, &targets).unwrap();
        for s in 0..regions.len() {
            let single =
                linear::margin_lower_bounds(&network, &regions[s], labels[s], &targets[s], None)
                    .unwrap();
            for (a, b) in batch.samples[s].lower.iter().zip(&single.lower) {
                assert!(
                    (a - b).abs() <= 1e-12 * (1.0 + b.abs()),
                    "case {case} sample {s}: batch {a} vs single {b}"
                );
                compared += 1;
            }
            for (a, b) in batch.samples[s]
                .pre_activation
                .iter()
                .zip(&single.pre_activation)
            {
                for i in 0..a.len() {
                    assert!((a.lower[i] - b.lower[i]).abs() <= 1e-12 * (1.0 + b.lower[i].abs()));
                    assert!((a.upper[i] - b.upper[i]).abs() <= 1e-12 * (1.0 + b.upper[i].abs()));
                }
            }
        }
    }
    assert!(compared > 200);
}

fn exact(v: f64) -> BigRational {
    BigRational::from_float(v).expect("finite")
}

/// A model with a normalize layer at an extreme scale (means to 1e8, stds to 2^-20), weights mixing
/// 1e-4 and 1e3, and first-layer kinks through the centre (`kinks`) or every unit active (so the bounds
/// are tight and any error of the fold shows).
fn extreme_model(
    rng: &mut ChaCha8Rng,
    dim: usize,
    hidden: usize,
    classes: usize,
    kinks: bool,
) -> (Model, Vec<f64>) {
    let mean: Vec<f64> = (0..dim)
        .map(|_| (rng.gen_range(6.0..8.0f64)).exp2().round() * 10f64.powi(rng.gen_range(4..6)))
        .collect();
    let std: Vec<f64> = (0..dim)
        .map(|_| {
            if rng.gen_bool(0.5) {
                (-(rng.gen_range(3..=20) as f64)).exp2()
            } else {
                10f64.powi(-rng.gen_range(3..=6))
            }
        })
        .collect();
    let center: Vec<f64> = (0..dim)
        .map(|i| mean[i] + std[i] * rng.gen_range(-2.0..2.0))
        .collect();
    let scale = |rng: &mut ChaCha8Rng| {
        let m = [1e-4, 1.0, 1e3][rng.gen_range(0..3)];
        m * rng.gen_range(-1.0..1.0)
    };
    let w1 = DMatrix::from_fn(hidden, dim, |_, _| scale(rng));
    // Kinks through the centre: b = −W (c − m)/s (up to rounding).
    let normal: Vec<f64> = (0..dim).map(|i| (center[i] - mean[i]) / std[i]).collect();
    let b1 = DVector::from_fn(hidden, |r, _| {
        let shift = if kinks {
            0.0
        } else {
            3.0 * (0..dim).map(|c| w1[(r, c)].abs()).sum::<f64>()
        };
        shift - (0..dim).map(|c| w1[(r, c)] * normal[c]).sum::<f64>()
    });
    let w2 = DMatrix::from_fn(classes, hidden, |_, _| scale(rng));
    let b2 = DVector::from_fn(classes, |_, _| rng.gen_range(-1.0..1.0));
    let text = serde_json::json!({
        "format": "ballast.model/1",
        "input": { "dim": dim },
        "layers": [
            { "kind": "normalize", "mean": mean, "std": std },
            { "kind": "dense", "weights": (0..hidden).map(|r| w1.row(r).iter().copied().collect::<Vec<f64>>()).collect::<Vec<_>>(), "bias": b1.iter().copied().collect::<Vec<f64>>() },
            { "kind": "relu" },
            { "kind": "dense", "weights": (0..classes).map(|r| w2.row(r).iter().copied().collect::<Vec<f64>>()).collect::<Vec<_>>(), "bias": b2.iter().copied().collect::<Vec<f64>>() }
        ]
    });
    (Model::from_json_str(&text.to_string()).unwrap(), center)
}

#[test]
fn no_exact_margin_below_a_bound_at_extreme_scales() {
    let mut rng = ChaCha8Rng::seed_from_u64(1602);
    let mut checked = 0;
    let mut informative = 0;
    for case in 0..60 {
        let dim = rng.gen_range(1..=3);
        let classes = rng.gen_range(1..=3);
        let hidden = rng.gen_range(2..=6);
        let (model, center) = extreme_model(&mut rng, dim, hidden, classes, case % 2 == 0);
        let network = model.classifier();
        let radii: Vec<f64> = (0..dim)
            .map(|i| match &model.layers[0] {
                Layer::Normalize { std, .. } => std[i] * rng.gen_range(0.01..1.0),
                _ => unreachable!(),
            })
            .collect();
        let norm = if case % 4 == 3 { Norm::L2 } else { Norm::Linf };
        let inf = vec![f64::INFINITY; dim];
        let neg = vec![f64::NEG_INFINITY; dim];
        let region = Budget { norm, radii }.region(&center, &neg, &inf);
        let logits = exact_logits(&model, &center);
        let label =
            (0..logits.len()).fold(0, |best, j| if logits[j] > logits[best] { j } else { best });
        let targets: Vec<usize> = (0..logits.len()).filter(|j| *j != label).collect();
        let mut points: Vec<Vec<f64>> = Vec::new();
        for _ in 0..60 {
            let mut x: Vec<f64> = (0..dim)
                .map(|i| rng.gen_range(region.inner_lower[i]..=region.inner_upper[i]))
                .collect();
            region.project(&mut x);
            points.push(x);
        }
        for corner in 0..(1usize << dim) {
            let mut x: Vec<f64> = (0..dim)
                .map(|i| {
                    if corner >> i & 1 == 1 {
                        region.inner_upper[i]
                    } else {
                        region.inner_lower[i]
                    }
                })
                .collect();
            region.project(&mut x);
            points.push(x);
        }
        points.retain(|x| region.contains(x));
        for method in [Method::Interval, Method::Linear, Method::OptimisedLinear] {
            let result =
                bound::margin_lower_bounds(&network, &region, label, &targets, method, None)
                    .unwrap();
            for x in &points {
                let z = exact_logits(&model, x);
                for (t, &j) in targets.iter().enumerate() {
                    let margin = &z[label] - &z[j];
                    assert!(
                        margin >= exact(result.lower[t]),
                        "case {case} {method:?}: exact margin below the bound {}",
                        result.lower[t]
                    );
                    checked += 1;
                }
            }
            informative += result
                .lower
                .iter()
                .filter(|b| b.is_finite() && **b > -1e3)
                .count();
        }
    }
    assert!(checked > 3000, "only {checked} checks");
    assert!(informative > 20, "only {informative} finite bounds");
}

/// Unit objectives by row selection ([`backward::run_units`], with the product below the first ReLU
/// shared by each ± pair) agree with the plain backward pass on the same unit columns within 1e-12
/// relative (common practice: the same terms summed in another order), and the minimisers are equal.
#[test]
fn unit_objectives_equal_the_plain_backward_pass() {
    use ballast::engine::backward::{self, Choices, Keep, Objectives};
    use ballast::engine::intermediate::{self, Tightness};
    use ballast::engine::{Domains, Engine};
    let mut rng = ChaCha8Rng::seed_from_u64(77);
    let mut compared = 0;
    for case in 0..20 {
        let depth = 2 + case % 4;
        let input = rng.gen_range(2..=6);
        let network = random_network(&mut rng, depth, input, 3);
        let engine = Engine::new(&network);
        let norm = if case % 4 == 0 { Norm::L2 } else { Norm::Linf };
        let regions: Vec<Region> = (0..3)
            .map(|_| random_region(&mut rng, input, norm))
            .collect();
        let sizes: Vec<usize> = (0..depth - 1)
            .map(|k| engine.layer(k).output_dim())
            .collect();
        let domains = Domains::new(regions.iter().collect(), &[None, None, None], &sizes);
        let hidden = intermediate::compute(&engine, &domains, Tightness::Interval, None);
        for top in 1..depth - 1 {
            let n = engine.layer(top).output_dim();
            let mut units = Vec::new();
            let mut domain = Vec::new();
            for d in 0..3 {
                for i in 0..n {
                    units.extend([(i, 1.0), (i, -1.0)]);
                    domain.extend([d, d]);
                }
            }
            let mut a = DMatrix::zeros(n, units.len());
            for (j, &(i, s)) in units.iter().enumerate() {
                a[(i, j)] = s;
            }
            let plain = backward::run(
                &engine,
                &hidden,
                &domains,
                Objectives {
                    top,
                    coefficients: a,
                    constant: DVector::zeros(units.len()),
                    domain: domain.clone(),
                },
                Choices::default(),
                Keep::Minimisers,
            );
            let selected = backward::run_units(
                &engine,
                &hidden,
                &domains,
                top,
                &units,
                &domain,
                Keep::Minimisers,
            );
            for (p, s) in plain.lower.iter().zip(&selected.lower) {
                assert!(
                    p == s || (p - s).abs() <= 1e-12 * (1.0 + p.abs()),
                    "case {case} top {top}: {p} vs {s}"
                );
                compared += 1;
            }
            assert_eq!(plain.minimiser, selected.minimiser);
        }
    }
    assert!(compared > 100, "{compared}");
}
