//! Sound margin bounds (src/bound/): soundness against sampled and attacked points, ordering of the
//! methods, the dual-norm closed form for linear classifiers, batch versus single-sample agreement, and
//! the LP against scipy's HiGHS on the digits fixture.

// Index loops mirror the formulas (units i, targets t) and read more plainly than zipped iterators.
#![allow(clippy::needless_range_loop)]

use ballast::bound::{
    self, interval, linear, optimised, Domain, LayerBounds, MarginBounds, Method, ReluSplit,
    SplitState, CERTIFY_TOLERANCE,
};
use ballast::model::{Dense, Model, Network};
use ballast::threat::{Budget, Norm, Region};
use nalgebra::{DMatrix, DVector};
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;
use rand_distr::{Distribution, StandardNormal};

mod common;
use common::fixtures::digits_mlp;

// ---------------------------------------------------------------------------------------------------
// Helpers: random networks and regions, sampling, a simple gradient attack on the margin.

fn gaussian(rng: &mut ChaCha8Rng) -> f64 {
    StandardNormal.sample(rng)
}

fn random_network(rng: &mut ChaCha8Rng, depth: usize, input: usize, classes: usize) -> Network {
    let mut sizes = vec![input];
    for _ in 1..depth {
        sizes.push(rng.gen_range(2..=16));
    }
    sizes.push(classes);
    let layers = sizes
        .windows(2)
        .map(|pair| {
            let scale = (2.0 / pair[0] as f64).sqrt();
            let weights = DMatrix::from_fn(pair[1], pair[0], |_, _| scale * gaussian(rng));
            let bias = DVector::from_fn(pair[1], |_, _| 0.3 * gaussian(rng));
            Dense { weights, bias }
        })
        .collect();
    Network::from_dense(layers)
}

/// A random region: both norms, per-feature radii with some zeros, a valid range that sometimes binds.
fn random_region(rng: &mut ChaCha8Rng, dim: usize, norm: Norm) -> Region {
    let center: Vec<f64> = (0..dim).map(|_| rng.gen_range(-1.0..1.0)).collect();
    let radii: Vec<f64> = (0..dim)
        .map(|_| {
            if rng.gen_bool(0.2) {
                0.0
            } else {
                rng.gen_range(0.01..0.6)
            }
        })
        .collect();
    let binding = rng.gen_bool(0.5);
    let (lower, upper): (Vec<f64>, Vec<f64>) = center
        .iter()
        .map(|c| {
            if binding && rng.gen_bool(0.5) {
                (c - rng.gen_range(0.0..0.2), c + rng.gen_range(0.0..0.2))
            } else {
                (f64::NEG_INFINITY, f64::INFINITY)
            }
        })
        .unzip();
    Budget { norm, radii }.region(&center, &lower, &upper)
}

/// Points of the region: random interior points, corners of the box (L-inf) or sphere points (L2),
/// all moved into the region with `Region::project`.
fn sample_points(rng: &mut ChaCha8Rng, region: &Region, count: usize) -> Vec<Vec<f64>> {
    let n = region.dim();
    let mut points = vec![region.center.clone()];
    for k in 0..count {
        let mut x: Vec<f64> = match region.norm {
            Norm::Linf => (0..n)
                .map(|i| {
                    if k % 2 == 0 {
                        if rng.gen_bool(0.5) {
                            region.outer_lower[i]
                        } else {
                            region.outer_upper[i]
                        }
                    } else {
                        rng.gen_range(region.outer_lower[i]..=region.outer_upper[i])
                    }
                })
                .collect(),
            Norm::L2 => {
                let direction: Vec<f64> = (0..n).map(|_| gaussian(rng)).collect();
                let length = direction
                    .iter()
                    .map(|d| d * d)
                    .sum::<f64>()
                    .sqrt()
                    .max(1e-300);
                let scale = if k % 2 == 0 {
                    1.0
                } else {
                    rng.gen_range(0.0..1.0)
                };
                (0..n)
                    .map(|i| region.center[i] + region.radii[i] * scale * direction[i] / length)
                    .collect()
            }
        };
        region.project(&mut x);
        points.push(x);
    }
    points
}

/// Gradient of `logit_y − logit_j` at `x` (the network is piecewise linear; backprop by hand).
fn margin_gradient(network: &Network, x: &[f64], y: usize, j: usize) -> Vec<f64> {
    let pre = network.pre_activations(x);
    let last = network.layers.len() - 1;
    let mut g: DVector<f64> = (network.layers[last].to_dense().weights.row(y)
        - network.layers[last].to_dense().weights.row(j))
    .transpose();
    for k in (0..last).rev() {
        for i in 0..g.len() {
            if pre[k][i] <= 0.0 {
                g[i] = 0.0;
            }
        }
        g = network.layers[k].to_dense().weights.tr_mul(&g);
    }
    g.iter().copied().collect()
}

/// Projected steepest descent on the margin from `start` (sign steps for L-inf, scaled steps for L2).
fn attack(network: &Network, region: &Region, y: usize, j: usize, start: &[f64]) -> Vec<Vec<f64>> {
    let mut x = start.to_vec();
    let mut trail = Vec::new();
    for step in 0..25 {
        let g = margin_gradient(network, &x, y, j);
        let size = 0.25 * (0.85f64).powi(step);
        match region.norm {
            Norm::Linf => {
                for i in 0..x.len() {
                    x[i] -= size * region.radii[i] * g[i].signum();
                }
            }
            Norm::L2 => {
                let scaled: f64 = (0..x.len())
                    .map(|i| (g[i] * region.radii[i]).powi(2))
                    .sum::<f64>()
                    .sqrt()
                    .max(1e-300);
                for i in 0..x.len() {
                    x[i] -= size * region.radii[i] * region.radii[i] * g[i] / scaled;
                }
            }
        }
        region.project(&mut x);
        trail.push(x.clone());
    }
    trail
}

fn margin(network: &Network, x: &[f64], y: usize, j: usize) -> f64 {
    let logits = network.forward(x);
    logits[y] - logits[j]
}

fn hidden_pre_activations(network: &Network, x: &[f64]) -> Vec<Vec<f64>> {
    let pre = network.pre_activations(x);
    pre[..pre.len() - 1]
        .iter()
        .map(|v| v.iter().copied().collect())
        .collect()
}

/// Checks every bound of `result` against `points` (those admitted by `splits`); returns the smallest
/// observed margin per target over admitted points.
fn check_sound(
    network: &Network,
    region: &Region,
    label: usize,
    result: &MarginBounds,
    points: &[Vec<f64>],
    splits: Option<&SplitState>,
    context: &str,
) -> (Vec<f64>, usize) {
    let mut smallest = vec![f64::INFINITY; result.targets.len()];
    let mut admitted = 0;
    for x in points {
        assert!(region.contains(x), "{context}: sample left the region");
        let pre = hidden_pre_activations(network, x);
        if let Some(s) = splits {
            if !s.admits(&pre) {
                continue;
            }
        }
        admitted += 1;
        assert!(
            result.domain == Domain::Feasible,
            "{context}: domain reported empty but {x:?} satisfies the splits"
        );
        for (k, layer) in result.pre_activation.iter().enumerate() {
            for i in 0..layer.len() {
                let z = pre[k][i];
                assert!(
                    z >= layer.lower[i] - CERTIFY_TOLERANCE
                        && z <= layer.upper[i] + CERTIFY_TOLERANCE,
                    "{context}: pre-activation {k}/{i} = {z} outside [{}, {}]",
                    layer.lower[i],
                    layer.upper[i]
                );
            }
        }
        for (t, &j) in result.targets.iter().enumerate() {
            let m = margin(network, x, label, j);
            smallest[t] = smallest[t].min(m);
            assert!(
                m >= result.lower[t] - CERTIFY_TOLERANCE,
                "{context}: margin {m} below bound {} ({:?}, target {j})",
                result.lower[t],
                result.method
            );
        }
    }
    (smallest, admitted)
}

fn all_points(
    rng: &mut ChaCha8Rng,
    network: &Network,
    region: &Region,
    label: usize,
    targets: &[usize],
    seeds: &[Vec<f64>],
) -> Vec<Vec<f64>> {
    let mut points = sample_points(rng, region, 300);
    for &j in targets {
        let start = points[rng.gen_range(0..points.len())].clone();
        points.extend(attack(network, region, label, j, &start));
        points.extend(attack(network, region, label, j, &region.center.clone()));
    }
    for s in seeds {
        points.push(s.clone());
    }
    points
}

// ---------------------------------------------------------------------------------------------------
// Soundness and ordering on random networks.

/// Soundness property test (common practice for bound code): no sampled or attacked point of the
/// region has a margin below any method's bound, for random networks of depth 1–4, both norms,
/// per-feature radii with zeros and sometimes-binding input ranges. Also checks the ordering
/// interval ≤ linear ≤ optimised and that every bound is ≤ the smallest margin found.
#[test]
fn bounds_are_sound_and_ordered_on_random_networks() {
    let mut rng = ChaCha8Rng::seed_from_u64(7);
    let mut checked_points = 0;
    let mut positive_bounds = 0;
    for case in 0..48 {
        let depth = 1 + case % 4;
        let input = rng.gen_range(2..=8);
        let classes = rng.gen_range(2..=4);
        let network = random_network(&mut rng, depth, input, classes);
        let norm = if case % 3 == 0 { Norm::L2 } else { Norm::Linf };
        let region = random_region(&mut rng, input, norm);
        let label = ballast::model::predicted_class(network.forward(&region.center).as_slice());
        let targets: Vec<usize> = (0..classes).filter(|j| *j != label).collect();
        let mut results = Vec::new();
        for method in [Method::Interval, Method::Linear, Method::OptimisedLinear] {
            let options = optimised::SlopeOptions {
                ..Default::default()
            };
            let result = if method == Method::OptimisedLinear {
                optimised::margin_lower_bounds(&network, &region, label, &targets, None, &options)
            } else {
                bound::margin_lower_bounds(&network, &region, label, &targets, method, None)
            }
            .unwrap();
            assert_eq!(result.targets, targets);
            results.push(result);
        }
        let seeds: Vec<Vec<f64>> = results
            .iter()
            .flat_map(|r| r.minimisers.iter().flatten().cloned())
            .collect();
        let points = all_points(&mut rng, &network, &region, label, &targets, &seeds);
        for result in &results {
            let context = format!("case {case} ({norm}, depth {depth})");
            let (smallest, admitted) =
                check_sound(&network, &region, label, result, &points, None, &context);
            checked_points += admitted;
            for t in 0..targets.len() {
                assert!(result.lower[t] <= smallest[t]);
            }
        }
        for t in 0..targets.len() {
            let [i, l, o] = [0, 1, 2].map(|m| results[m].lower[t]);
            assert!(i <= l, "case {case}: interval {i} > linear {l}");
            assert!(l <= o, "case {case}: linear {l} > optimised {o}");
            if l > 0.0 {
                positive_bounds += 1;
            }
        }
    }
    assert!(
        checked_points > 10_000,
        "only {checked_points} points checked"
    );
    assert!(
        positive_bounds > 5,
        "too few informative bounds ({positive_bounds})"
    );
}

/// Random split constraints taken from the activation pattern of a region point (so the domain is not
/// empty) plus some random ones (which may empty it): every admitted point respects the bounds, an
/// empty domain admits no sampled point.
#[test]
fn bounds_are_sound_under_split_constraints() {
    let mut rng = ChaCha8Rng::seed_from_u64(11);
    let mut admitted_total = 0;
    let mut empty_domains = 0;
    let mut improved = 0;
    for case in 0..40 {
        let depth = 2 + case % 3;
        let input = rng.gen_range(2..=6);
        let network = random_network(&mut rng, depth, input, 3);
        let norm = if case % 4 == 0 { Norm::L2 } else { Norm::Linf };
        let region = random_region(&mut rng, input, norm);
        let label = ballast::model::predicted_class(network.forward(&region.center).as_slice());
        let targets: Vec<usize> = (0..3).filter(|j| *j != label).collect();
        let anchor = sample_points(&mut rng, &region, 3).pop().unwrap();
        let pattern = hidden_pre_activations(&network, &anchor);
        let mut splits = SplitState::free(&network);
        for (k, layer) in pattern.iter().enumerate() {
            for (i, z) in layer.iter().enumerate() {
                let roll: f64 = rng.gen();
                splits.layers[k][i] = if roll < 0.3 {
                    if *z >= 0.0 {
                        ReluSplit::Active
                    } else {
                        ReluSplit::Inactive
                    }
                } else if roll < 0.4 && case % 2 == 1 {
                    if rng.gen_bool(0.5) {
                        ReluSplit::Active
                    } else {
                        ReluSplit::Inactive
                    }
                } else {
                    ReluSplit::Free
                };
            }
        }
        let mut points = all_points(
            &mut rng,
            &network,
            &region,
            label,
            &targets,
            std::slice::from_ref(&anchor),
        );
        // More points near the anchor, where the split constraints hold.
        for _ in 0..200 {
            let mut x: Vec<f64> = anchor
                .iter()
                .zip(&region.radii)
                .map(|(a, r)| a + 0.05 * r * rng.gen_range(-1.0..1.0))
                .collect();
            region.project(&mut x);
            points.push(x);
        }
        let mut results = Vec::new();
        for method in [Method::Interval, Method::Linear, Method::OptimisedLinear] {
            let constrained = if method == Method::OptimisedLinear {
                let options = optimised::SlopeOptions {
                    iterations: 40,
                    ..Default::default()
                };
                optimised::margin_lower_bounds(
                    &network,
                    &region,
                    label,
                    &targets,
                    Some(&splits),
                    &options,
                )
            } else {
                bound::margin_lower_bounds(
                    &network,
                    &region,
                    label,
                    &targets,
                    method,
                    Some(&splits),
                )
            }
            .unwrap();
            let context = format!("case {case} {method:?} with splits");
            let (_, admitted) = check_sound(
                &network,
                &region,
                label,
                &constrained,
                &points,
                Some(&splits),
                &context,
            );
            admitted_total += admitted;
            if let Domain::Empty { .. } = constrained.domain {
                empty_domains += 1;
                assert!(constrained.prunable());
            }
            results.push(constrained);
        }
        if results[1].domain == Domain::Feasible {
            for t in 0..targets.len() {
                let (l, o) = (results[1].lower[t], results[2].lower[t]);
                assert!(
                    l <= o + 1e-9 * (1.0 + l.abs()),
                    "case {case}: optimised {o} < linear {l}"
                );
                if o > l + 1e-6 * (1.0 + l.abs()) {
                    improved += 1;
                }
            }
        }
    }
    assert!(
        improved > 0,
        "slope and multiplier optimisation never tightened a split bound"
    );
    assert!(
        admitted_total > 5_000,
        "only {admitted_total} admitted points"
    );
    assert!(empty_domains > 0, "no empty domain exercised");
}

/// A forced unit clips its bounds: active ⇒ lower ≥ 0, inactive ⇒ upper ≤ 0; and contradicting a
/// stable unit empties the domain.
#[test]
fn splits_clip_bounds_and_detect_empty_domains() {
    let network = Network::from_dense(vec![
        Dense {
            weights: DMatrix::from_row_slice(2, 1, &[1.0, 1.0]),
            bias: DVector::from_vec(vec![0.0, 5.0]),
        },
        Dense {
            weights: DMatrix::from_row_slice(2, 2, &[1.0, 1.0, -1.0, 0.5]),
            bias: DVector::zeros(2),
        },
    ]);
    let region = Budget::uniform(Norm::Linf, 1.0, 1).region(&[0.0], &[-10.0], &[10.0]);
    let free = SplitState::free(&network);
    let active = free.with(0, 0, ReluSplit::Active);
    let inactive = free.with(0, 0, ReluSplit::Inactive);
    let impossible = free.with(0, 1, ReluSplit::Inactive); // unit 1 is in [4, 6]
    for method in [Method::Interval, Method::Linear, Method::OptimisedLinear] {
        let a =
            bound::margin_lower_bounds(&network, &region, 0, &[1], method, Some(&active)).unwrap();
        assert!(a.pre_activation[0].lower[0] >= 0.0);
        assert!((a.pre_activation[0].upper[0] - 1.0).abs() < 1e-12);
        let i = bound::margin_lower_bounds(&network, &region, 0, &[1], method, Some(&inactive))
            .unwrap();
        assert!(i.pre_activation[0].upper[0] <= 0.0);
        assert!((i.pre_activation[0].lower[0] + 1.0).abs() < 1e-12);
        let e = bound::margin_lower_bounds(&network, &region, 0, &[1], method, Some(&impossible))
            .unwrap();
        assert_eq!(e.domain, Domain::Empty { layer: 0, unit: 1 });
        assert!(e.prunable() && !e.certified());
        // Exact margin here: 2·relu(x) + relu(x + 5)·0.5 … positive for x ∈ [−1, 1]: m = relu(x)·2
        // − 0.5·(x + 5) + (x + 5) = 2 relu(x) + 0.5 (x + 5) ≥ 2 at x = −1.
        let f = bound::margin_lower_bounds(&network, &region, 0, &[1], method, None).unwrap();
        assert!(f.lower[0] <= 2.0 + 1e-9);
    }
}

// ---------------------------------------------------------------------------------------------------
// Closed forms.

/// Textbook dual-norm result: for a linear classifier the worst margin over an L-inf ball of radius ε is
/// `w·x + b − ε‖w‖₁` and over an L2 ball `w·x + b − ε‖w‖₂` (w = w_y − w_j); with per-feature radii the
/// norms are weighted by the radii. No ReLU, so the linear relaxation (and the LP) must be exact.
#[test]
fn linear_classifier_bounds_match_the_dual_norm_closed_form() {
    let mut rng = ChaCha8Rng::seed_from_u64(3);
    for case in 0..30 {
        let dim = rng.gen_range(1..=20);
        let classes = rng.gen_range(2..=5);
        let network = random_network(&mut rng, 1, dim, classes);
        let center: Vec<f64> = (0..dim).map(|_| rng.gen_range(-2.0..2.0)).collect();
        let radii: Vec<f64> = (0..dim)
            .map(|i| {
                if i % 5 == 4 {
                    0.0
                } else {
                    rng.gen_range(0.0..0.5)
                }
            })
            .collect();
        let unbounded = (vec![f64::NEG_INFINITY; dim], vec![f64::INFINITY; dim]);
        let label = rng.gen_range(0..classes);
        let targets: Vec<usize> = (0..classes).filter(|j| *j != label).collect();
        for norm in [Norm::Linf, Norm::L2] {
            let region = Budget {
                norm,
                radii: radii.clone(),
            }
            .region(&center, &unbounded.0, &unbounded.1);
            for method in [Method::Linear, Method::OptimisedLinear] {
                let result =
                    bound::margin_lower_bounds(&network, &region, label, &targets, method, None)
                        .unwrap();
                for (t, &j) in targets.iter().enumerate() {
                    let w: Vec<f64> = (0..dim)
                        .map(|i| {
                            network.layers[0].to_dense().weights[(label, i)]
                                - network.layers[0].to_dense().weights[(j, i)]
                        })
                        .collect();
                    let at_center = margin(&network, &center, label, j);
                    let penalty = match norm {
                        Norm::Linf => (0..dim).map(|i| radii[i] * w[i].abs()).sum::<f64>(),
                        Norm::L2 => (0..dim)
                            .map(|i| (radii[i] * w[i]).powi(2))
                            .sum::<f64>()
                            .sqrt(),
                    };
                    let expected = at_center - penalty;
                    let tolerance = 1e-9;
                    assert!(
                        (result.lower[t] - expected).abs() <= tolerance * (1.0 + expected.abs()),
                        "case {case} {norm} {method:?}: {} vs closed form {expected}",
                        result.lower[t]
                    );
                    // The minimiser attains the bound (common practice: the dual-norm optimum is attained).
                    let x = result.minimisers[t].as_ref().unwrap();
                    assert!(region.contains(x));
                    assert!(
                        (margin(&network, x, label, j) - expected).abs()
                            < 1e-8 * (1.0 + expected.abs())
                    );
                }
            }
            if norm == Norm::Linf {
                // Interval propagation is exact for an affine map over a box too.
                let result = bound::margin_lower_bounds(
                    &network,
                    &region,
                    label,
                    &targets,
                    Method::Interval,
                    None,
                )
                .unwrap();
                for (t, &j) in targets.iter().enumerate() {
                    let w: Vec<f64> = (0..dim)
                        .map(|i| {
                            network.layers[0].to_dense().weights[(label, i)]
                                - network.layers[0].to_dense().weights[(j, i)]
                        })
                        .collect();
                    let expected = margin(&network, &center, label, j)
                        - (0..dim).map(|i| radii[i] * w[i].abs()).sum::<f64>();
                    assert!((result.lower[t] - expected).abs() <= 1e-9 * (1.0 + expected.abs()));
                }
            }
        }
    }
}

/// A 1-logit binary model `z = w·x + b` is treated as logits `[0, z]`: the margin of class 1 against 0 is
/// `z`, of class 0 against 1 is `−z` (design contract: class 1 iff the logit > 0).
#[test]
fn binary_single_logit_models_use_the_classifier_form() {
    let network = Network::from_dense(vec![Dense {
        weights: DMatrix::from_row_slice(1, 2, &[2.0, -1.0]),
        bias: DVector::from_vec(vec![0.5]),
    }]);
    let region = Budget::uniform(Norm::Linf, 0.1, 2).region(&[1.0, 1.0], &[0.0, 0.0], &[1.05, 1.0]);
    // z at centre = 1.5; box: x0 ∈ [0.9, 1.05], x1 ∈ [0.9, 1.0]: min z = 1.8 − 1.0 + 0.5 = 1.3.
    for method in [Method::Interval, Method::Linear, Method::OptimisedLinear] {
        let class_one =
            bound::margin_lower_bounds(&network, &region, 1, &[0], method, None).unwrap();
        assert!(
            (class_one.lower[0] - 1.3).abs() < 1e-9,
            "{method:?}: {}",
            class_one.lower[0]
        );
        assert!(class_one.certified());
        // max z = 2.1 − 0.9 + 0.5 = 1.7, so the margin of class 0 is at least −1.7.
        let class_zero =
            bound::margin_lower_bounds(&network, &region, 0, &[1], method, None).unwrap();
        assert!((class_zero.lower[0] + 1.7).abs() < 1e-9);
        assert!(!class_zero.certified());
    }
}

/// Bad arguments are typed errors, not panics.
#[test]
fn bad_arguments_are_errors() {
    let mut rng = ChaCha8Rng::seed_from_u64(5);
    let network = random_network(&mut rng, 2, 3, 3);
    let region = random_region(&mut rng, 3, Norm::Linf);
    let wrong = random_region(&mut rng, 4, Norm::Linf);
    for method in [Method::Interval, Method::Linear, Method::OptimisedLinear] {
        let call = |r: &Region, label: usize, targets: &[usize], s: Option<&SplitState>| {
            bound::margin_lower_bounds(&network, r, label, targets, method, s)
        };
        assert!(matches!(
            call(&wrong, 0, &[1], None),
            Err(bound::BoundError::DimensionMismatch { .. })
        ));
        assert!(matches!(
            call(&region, 3, &[1], None),
            Err(bound::BoundError::LabelOutOfRange { .. })
        ));
        assert!(matches!(
            call(&region, 0, &[0], None),
            Err(bound::BoundError::InvalidTarget { .. })
        ));
        assert!(matches!(
            call(&region, 0, &[5], None),
            Err(bound::BoundError::InvalidTarget { .. })
        ));
        let bad_splits = SplitState {
            layers: vec![vec![ReluSplit::Free; 1]],
        };
        assert!(call(&region, 0, &[1], Some(&bad_splits)).is_err());
        let mut nan = region.clone();
        nan.outer_upper[0] = f64::NAN;
        assert!(matches!(
            call(&nan, 0, &[1], None),
            Err(bound::BoundError::NonFinite { .. })
        ));
        let empty = call(&region, 0, &[], None).unwrap();
        assert!(empty.lower.is_empty() && empty.certified());
    }
    let given = vec![LayerBounds {
        lower: vec![0.0],
        upper: vec![1.0],
    }];
    assert!(linear::margin_lower_bounds_from(&network, &region, 0, &[1], &given, None).is_err());
}

// ---------------------------------------------------------------------------------------------------
// Digits fixture: batch = single, and the LP against scipy/HiGHS.

fn digits_region(model: &Model, x: &[f64], norm: Norm, epsilon: f64) -> Region {
    Budget::uniform(norm, epsilon, model.input.dim).region(
        x,
        &model.input.lower,
        &model.input.upper,
    )
}

/// The batch interval and linear functions agree with the single-sample ones, and per-layer bounds hold
/// the forward pass of the centre (digits fixture, first 40 test rows, both norms).
#[test]
fn batch_bounds_agree_with_single_sample_bounds() {
    let (model, data) = digits_mlp();
    let network = model.classifier();
    for norm in [Norm::Linf, Norm::L2] {
        let epsilon = if norm == Norm::Linf { 0.03 } else { 0.3 };
        let rows: Vec<usize> = (0..40).collect();
        let regions: Vec<Region> = rows
            .iter()
            .map(|&r| digits_region(&model, data.sample(r), norm, epsilon))
            .collect();
        let labels: Vec<usize> = rows.iter().map(|&r| data.labels[r]).collect();
        let targets: Vec<Vec<usize>> = labels
            .iter()
            .map(|&y| (0..10).filter(|j| *j != y).collect())
            .collect();
        let batch_interval =
            interval::batch_margin_lower_bounds(&network, &regions, &labels, &targets).unwrap();
        let batch_linear =
            linear::batch_margin_lower_bounds(&network, &regions, &labels, &targets).unwrap();
        for s in 0..rows.len() {
            let single_interval =
                interval::margin_lower_bounds(&network, &regions[s], labels[s], &targets[s], None)
                    .unwrap();
            let single_linear =
                linear::margin_lower_bounds(&network, &regions[s], labels[s], &targets[s], None)
                    .unwrap();
            for t in 0..9 {
                let a = batch_interval.margins[s][t];
                let b = single_interval.lower[t];
                assert!(
                    (a - b).abs() <= 1e-9 * (1.0 + b.abs()),
                    "interval batch {a} vs single {b}"
                );
                let c = batch_linear.samples[s].lower[t];
                let d = single_linear.lower[t];
                assert!((c - d).abs() <= 1e-12 * (1.0 + d.abs()));
                assert!(b <= d + 1e-9);
            }
            let z = network.pre_activations(data.sample(rows[s]));
            for i in 0..32 {
                let (lo, hi) = (
                    batch_interval.lower[0][(i, s)],
                    batch_interval.upper[0][(i, s)],
                );
                assert!(lo <= z[0][i] + 1e-9 && z[0][i] <= hi + 1e-9);
                let lb = &batch_linear.samples[s].pre_activation[0];
                assert!(lb.lower[i] >= lo - 1e-9 && lb.upper[i] <= hi + 1e-9);
            }
        }
    }
}

#[derive(serde::Deserialize)]
struct LpReference {
    rows: usize,
    certify_tolerance: f64,
    cases: Vec<LpCase>,
}

#[derive(serde::Deserialize)]
struct LpCase {
    epsilon: f64,
    certified: usize,
    samples: Vec<LpSample>,
}

#[derive(serde::Deserialize)]
struct LpSample {
    row: usize,
    label: usize,
    lower: Vec<f64>,
    upper: Vec<f64>,
    targets: Vec<usize>,
    values: Vec<f64>,
}

/// Outside reference: tests/reference/lp_reference.py solves the triangle-relaxation LP on numpy interval
/// bounds with scipy.optimize.linprog (HiGHS) for the first 100 digits test rows at L-inf ε ∈ {0.01, 0.02,
/// 0.05} (tests/reference/out/lp_digits.json). ballast's interval bounds must equal numpy's; on a one-hidden-
/// layer network its linear bound on the same intermediate bounds is a feasible point of that LP's dual, so
/// it never exceeds the HiGHS optimum and never certifies more samples.
#[test]
fn linear_bounds_stay_below_scipy_highs_lp_on_digits_mlp() {
    let text = std::fs::read_to_string("tests/reference/out/lp_digits.json").unwrap();
    let reference: LpReference = serde_json::from_str(&text).unwrap();
    assert!((reference.certify_tolerance - CERTIFY_TOLERANCE).abs() < 1e-15);
    let (model, data) = digits_mlp();
    let network = model.classifier();
    assert_eq!(reference.cases.len(), 3);
    for case in &reference.cases {
        assert_eq!(case.samples.len(), reference.rows);
        let mut certified = 0;
        for sample in &case.samples {
            assert_eq!(data.labels[sample.row], sample.label);
            let region = digits_region(&model, data.sample(sample.row), Norm::Linf, case.epsilon);
            let (ours, domain) = interval::pre_activation_bounds(&network, &region, None).unwrap();
            assert_eq!(domain, Domain::Feasible);
            for i in 0..ours[0].len() {
                assert!(
                    (ours[0].lower[i] - sample.lower[i]).abs()
                        <= 1e-9 * (1.0 + sample.lower[i].abs())
                );
                assert!(
                    (ours[0].upper[i] - sample.upper[i]).abs()
                        <= 1e-9 * (1.0 + sample.upper[i].abs())
                );
            }
            let given = vec![LayerBounds {
                lower: sample.lower.clone(),
                upper: sample.upper.clone(),
            }];
            let result = linear::margin_lower_bounds_from(
                &network,
                &region,
                sample.label,
                &sample.targets,
                &given,
                None,
            )
            .unwrap();
            for (t, expected) in sample.values.iter().enumerate() {
                assert!(
                    result.lower[t] <= *expected + 1e-7 * (1.0 + expected.abs()),
                    "eps {} row {} target {}: linear {} above the LP optimum {expected}",
                    case.epsilon,
                    sample.row,
                    sample.targets[t],
                    result.lower[t]
                );
            }
            if result.certified() {
                certified += 1;
            }
        }
        assert!(
            certified <= case.certified,
            "certified count at eps {}",
            case.epsilon
        );
    }
}

/// On the digits fixture, the default methods certify in the expected order and the optimised linear
/// bounds certify at least as many samples as the LP on interval bounds (scipy's counts from
/// tests/reference/out/lp_digits.json) at ε = 0.02 and 0.05.
#[test]
fn optimised_linear_certifies_at_least_the_interval_lp_count() {
    let text = std::fs::read_to_string("tests/reference/out/lp_digits.json").unwrap();
    let reference: LpReference = serde_json::from_str(&text).unwrap();
    let (model, data) = digits_mlp();
    let network = model.classifier();
    for case in reference.cases.iter().filter(|c| c.epsilon > 0.015) {
        let mut counts = [0usize; 3];
        for sample in &case.samples {
            let region = digits_region(&model, data.sample(sample.row), Norm::Linf, case.epsilon);
            for (m, method) in [Method::Interval, Method::Linear, Method::OptimisedLinear]
                .iter()
                .enumerate()
            {
                let result = bound::margin_lower_bounds(
                    &network,
                    &region,
                    sample.label,
                    &sample.targets,
                    *method,
                    None,
                )
                .unwrap();
                if result.certified() {
                    counts[m] += 1;
                }
            }
        }
        assert!(
            counts[0] <= counts[1] && counts[1] <= counts[2],
            "{counts:?}"
        );
        assert!(
            counts[2] >= case.certified,
            "eps {}: optimised linear {} < interval LP {}",
            case.epsilon,
            counts[2],
            case.certified
        );
    }
}

/// Through the model layout: a `normalize` layer (folded into the network), a 1-logit binary output,
/// per-feature radii in raw units (one fixed) and a binding input range. Every method's bound holds on
/// sampled and attacked points of the raw-unit region, checked with the model's own forward pass.
#[test]
fn bounds_hold_for_layout_models_with_normalize_and_one_logit() {
    let text = r#"{
        "format": "ballast.model/1",
        "input": { "dim": 3, "lower": [0.0, 0.0, 0.0], "upper": [10.0, 5.0, 100.0] },
        "layers": [
            { "kind": "normalize", "mean": [5.0, 2.5, 50.0], "std": [2.0, 1.0, 25.0] },
            { "kind": "dense", "weights": [[0.8, -0.5, 0.3], [-0.4, 0.9, 0.2], [0.5, 0.5, -0.7], [0.1, -0.3, 0.6]],
              "bias": [0.1, -0.2, 0.05, 0.0] },
            { "kind": "relu" },
            { "kind": "dense", "weights": [[1.0, -0.8, 0.6, -0.5]], "bias": [0.05] }
        ]
    }"#;
    let model = Model::from_json_str(text).unwrap();
    let network = model.network();
    assert_eq!(network.output_dim(), 1);
    let classifier = model.classifier();
    let mut rng = ChaCha8Rng::seed_from_u64(17);
    let mut informative = 0;
    for case in 0..12 {
        let center = vec![
            rng.gen_range(0.0..10.0),
            rng.gen_range(0.0..5.0),
            rng.gen_range(0.0..100.0),
        ];
        let norm = if case % 2 == 0 { Norm::Linf } else { Norm::L2 };
        let radii = vec![0.8, 0.0, 12.0];
        let region = Budget { norm, radii }.region(&center, &model.input.lower, &model.input.upper);
        let logit = network.forward(&center)[0];
        let label = usize::from(logit > 0.0);
        let other = 1 - label;
        let mut points = sample_points(&mut rng, &region, 400);
        points.extend(attack(&classifier, &region, label, other, &center));
        for method in [Method::Interval, Method::Linear, Method::OptimisedLinear] {
            let result =
                bound::margin_lower_bounds(&network, &region, label, &[other], method, None)
                    .unwrap();
            for x in &points {
                assert!(region.contains(x));
                assert!((x[1] - center[1]).abs() < 1e-12, "fixed feature moved");
                let z = network.forward(x)[0];
                let m = if label == 1 { z } else { -z };
                assert!(
                    m >= result.lower[0] - CERTIFY_TOLERANCE,
                    "case {case} {method:?}: {m} < {}",
                    result.lower[0]
                );
            }
            if result.lower[0] > 0.0 {
                informative += 1;
            }
        }
    }
    assert!(informative > 0, "no positive bound in the layout cases");
}
