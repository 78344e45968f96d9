//! Attack tests: outside references (the dual-norm formula for linear classifiers, a numpy PGD on the
//! digits fixture), soundness properties of every reported counterexample, and the `ballast attack` CLI.

mod common;

use std::path::Path;
use std::process::Command;
use std::time::{Duration, Instant};

use approx::assert_abs_diff_eq;
use ballast::attack::{
    attack_batch, attack_sample, margin_and_gradient, sample_seed, validate, AttackError,
    AttackOutcome, AttackProblem, AttackSettings, SearchPrecision, StopReason,
};
use ballast::data::{load_csv, DataOptions};
use ballast::model::{predicted_class, Dense, Model, Network};
use ballast::threat::{Budget, Norm, Region, Targets};
use nalgebra::{DMatrix, DVector};
use proptest::prelude::*;
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;

const DIGITS_MODEL: &str = "tests/data/digits_mlp.model.json";
const DIGITS_TEST: &str = "tests/data/digits_test.csv";

fn random_network(rng: &mut ChaCha8Rng, sizes: &[usize]) -> Network {
    let layers = sizes
        .windows(2)
        .map(|w| Dense {
            weights: DMatrix::from_fn(w[1], w[0], |_, _| rng.gen_range(-1.0..1.0)),
            bias: DVector::from_fn(w[1], |_, _| rng.gen_range(-0.5..0.5)),
        })
        .collect();
    Network::from_dense(layers)
}

fn unbounded(dim: usize) -> (Vec<f64>, Vec<f64>) {
    (vec![f64::NEG_INFINITY; dim], vec![f64::INFINITY; dim])
}

/// Source: the dual-norm result for linear classifiers (Goodfellow et al., 2015, and any margin
/// derivation for `f(x) = w·x + b`): the smallest perturbation with ‖δ‖_p ≤ ε that flips the sign of
/// `f` has size `|f(x)| / ‖w‖_q` with q the dual norm (L-inf → ‖w‖₁, L2 → ‖w‖₂) when the input range does
/// not bind. So a counterexample exists at 1.001× that size and none can exist at 0.999×.
#[test]
fn linear_binary_classifier_flips_exactly_at_the_dual_norm_distance() {
    let mut rng = ChaCha8Rng::seed_from_u64(11);
    let mut checked = 0;
    for case in 0..24 {
        let dim = rng.gen_range(2..20);
        let raw = random_network(&mut rng, &[dim, 1]);
        let network = raw.as_classifier();
        let x: Vec<f64> = (0..dim).map(|_| rng.gen_range(-2.0..2.0)).collect();
        let w = raw.layers[0].to_dense().weights.row(0).clone_owned();
        let value = raw.forward(&x)[0];
        let label = predicted_class(network.forward(&x).as_slice());
        let (lower, upper) = unbounded(dim);
        for norm in [Norm::Linf, Norm::L2] {
            let dual = match norm {
                Norm::Linf => w.iter().map(|v| v.abs()).sum::<f64>(),
                Norm::L2 => w.norm(),
            };
            let minimum = value.abs() / dual;
            for fgsm_first in [true, false] {
                let settings = AttackSettings {
                    fgsm_first,
                    seed: case,
                    ..AttackSettings::default()
                };
                let above = Budget::uniform(norm, 1.001 * minimum, dim).region(&x, &lower, &upper);
                let outcome =
                    attack_sample(&network, &above, label, &[1 - label], &settings, case, &[])
                        .expect("valid problem");
                let found = outcome.counterexample().unwrap_or_else(|| {
                    panic!("case {case} {norm}: no counterexample at 1.001× the minimum")
                });
                assert_ne!(found.predicted, label);
                assert!(found.distance <= 1.001 * minimum * (1.0 + 1e-9));
                assert!(
                    found.distance >= minimum * (1.0 - 1e-9),
                    "closer than the proven minimum"
                );
                let below = Budget::uniform(norm, 0.999 * minimum, dim).region(&x, &lower, &upper);
                let outcome =
                    attack_sample(&network, &below, label, &[1 - label], &settings, case, &[])
                        .expect("valid problem");
                match outcome {
                    AttackOutcome::NotFound {
                        best_margin, stop, ..
                    } => {
                        assert_eq!(stop, StopReason::BudgetSpent);
                        // The best margin the search reached is the exact worst case |f| (1 − 0.999).
                        assert_abs_diff_eq!(
                            best_margin,
                            0.001 * value.abs(),
                            epsilon = 1e-9 * (1.0 + value.abs())
                        );
                    }
                    AttackOutcome::Found(c) => {
                        panic!("case {case} {norm}: impossible counterexample {c:?}")
                    }
                }
                checked += 1;
            }
        }
    }
    assert_eq!(checked, 96);
}

#[derive(serde::Deserialize)]
struct ReferenceRun {
    epsilon: f64,
    counterexamples: usize,
    found: Vec<usize>,
}

#[derive(serde::Deserialize)]
struct Reference {
    steps: usize,
    restarts: usize,
    samples: usize,
    misclassified: Vec<usize>,
    results: Vec<ReferenceRun>,
}

fn digits() -> (Model, ballast::data::Dataset) {
    let model = Model::load(Path::new(DIGITS_MODEL)).expect("fixture model");
    let data =
        load_csv(Path::new(DIGITS_TEST), &model, &DataOptions::default()).expect("fixture data");
    (model, data)
}

fn digits_problems(
    model: &Model,
    data: &ballast::data::Dataset,
    count: usize,
    budget: &Budget,
) -> (Vec<usize>, Vec<AttackProblem>) {
    let network = model.classifier();
    let mut misclassified = Vec::new();
    let mut problems = Vec::new();
    for i in 0..count {
        let label = data.labels[i];
        if predicted_class(network.forward(data.sample(i)).as_slice()) != label {
            misclassified.push(i);
            continue;
        }
        problems.push(AttackProblem {
            index: i,
            region: budget.region(data.sample(i), &model.input.lower, &model.input.upper),
            label,
            forbidden: Targets::Any.forbidden_for(label, model.class_count()),
            extra_starts: Vec::new(),
        });
    }
    (misclassified, problems)
}

/// Source: tests/reference/pgd_reference.py, a textbook L-inf PGD in numpy (margin loss, fixed step
/// 2.5·ε/steps, 100 steps × 5 restarts, first restart at the clean point) run on the digits MLP fixture
/// (scikit-learn load_digits), first 200 test rows; counts committed in tests/reference/out/pgd_digits.json.
/// With the same gradient budget (no FGSM, no targeted runs) ballast must find at least as many.
#[test]
fn digits_pgd_finds_at_least_as_many_counterexamples_as_the_numpy_reference() {
    let text = std::fs::read_to_string("tests/reference/out/pgd_digits.json")
        .expect("committed reference");
    let reference: Reference = serde_json::from_str(&text).expect("reference JSON");
    let (model, data) = digits();
    let network = model.classifier();
    let equal_budget = AttackSettings {
        steps: reference.steps,
        restarts: reference.restarts,
        fgsm_first: false,
        targeted: false,
        seed: 3,
        ..AttackSettings::default()
    };
    let full = AttackSettings {
        steps: reference.steps,
        restarts: reference.restarts,
        seed: 3,
        ..AttackSettings::default()
    };
    assert_eq!(reference.results.len(), 3);
    for run in &reference.results {
        let budget = Budget::uniform(Norm::Linf, run.epsilon, model.input.dim);
        let (misclassified, problems) = digits_problems(&model, &data, reference.samples, &budget);
        // The clean predictions agree with numpy's.
        assert_eq!(misclassified, reference.misclassified);
        for settings in [&equal_budget, &full] {
            let outcomes = attack_batch(&network, &problems, settings).expect("valid problems");
            let found: Vec<usize> = problems
                .iter()
                .zip(&outcomes)
                .filter(|(_, o)| o.counterexample().is_some())
                .map(|(p, _)| p.index)
                .collect();
            let shared = found.iter().filter(|i| run.found.contains(i)).count();
            eprintln!(
                "eps {}: ballast {} (fgsm {}, targeted {}), numpy {}, found by both {}",
                run.epsilon,
                found.len(),
                settings.fgsm_first,
                settings.targeted,
                run.counterexamples,
                shared
            );
            // And it finds nearly every sample the reference found (allowing 5% for different starts).
            assert!(
                shared as f64 >= 0.95 * run.counterexamples as f64,
                "eps {}: only {shared} of the reference's {} counterexamples found",
                run.epsilon,
                run.counterexamples
            );
            assert!(
                found.len() >= run.counterexamples,
                "eps {}: ballast found {} counterexamples, the numpy reference {}",
                run.epsilon,
                found.len(),
                run.counterexamples
            );
            for (p, o) in problems.iter().zip(&outcomes) {
                if let Some(c) = o.counterexample() {
                    assert!(p.region.contains(&c.input));
                    let radii = &p.region.radii;
                    assert!(common::linf_inside(&c.input, &p.region.center, radii));
                    assert!(c.distance <= run.epsilon);
                }
            }
        }
    }
}

/// Common practice: a valid counterexample lies in ball ∩ input range, leaves fixed features alone and
/// is predicted (by a plain forward pass) as a forbidden class other than the label.
#[test]
fn every_counterexample_is_inside_the_region_and_misclassified() {
    let mut rng = ChaCha8Rng::seed_from_u64(2024);
    let mut found = 0;
    let mut attacked = 0;
    for case in 0..300u64 {
        let dim = rng.gen_range(1..7);
        let classes = rng.gen_range(2..5);
        let depth = rng.gen_range(0..3);
        let mut sizes = vec![dim];
        for _ in 0..depth {
            sizes.push(rng.gen_range(2..9));
        }
        sizes.push(classes);
        let network = random_network(&mut rng, &sizes);
        let norm = if rng.gen_bool(0.5) {
            Norm::Linf
        } else {
            Norm::L2
        };
        let radii: Vec<f64> = (0..dim)
            .map(|_| {
                if rng.gen_bool(0.25) {
                    0.0
                } else {
                    rng.gen_range(0.0..0.6)
                }
            })
            .collect();
        let budget = Budget { norm, radii };
        let bounded = rng.gen_bool(0.5);
        let (lower, upper) = if bounded {
            (vec![0.0; dim], vec![1.0; dim])
        } else {
            unbounded(dim)
        };
        let center: Vec<f64> = (0..dim).map(|_| rng.gen_range(0.0..1.0)).collect();
        let region = budget.region(&center, &lower, &upper);
        let label = predicted_class(network.forward(&center).as_slice());
        let targets = if rng.gen_bool(0.5) {
            Targets::Any
        } else {
            Targets::Into {
                classes: vec![rng.gen_range(0..classes)],
                from: None,
            }
        };
        let forbidden = targets.forbidden_for(label, classes);
        let settings = AttackSettings {
            steps: 20,
            restarts: 2,
            seed: case,
            ..AttackSettings::default()
        };
        let outcome = attack_sample(&network, &region, label, &forbidden, &settings, case, &[])
            .expect("valid");
        attacked += 1;
        if let AttackOutcome::Found(c) = &outcome {
            found += 1;
            assert!(region.contains(&c.input), "case {case}: outside the region");
            let name = if norm == Norm::Linf { "linf" } else { "l2" };
            assert!(
                common::ball_inside(name, &c.input, &center, &budget.radii),
                "case {case}: outside the ball in exact arithmetic"
            );
            for i in 0..dim {
                assert!(c.input[i] >= lower[i] && c.input[i] <= upper[i]);
                if budget.radii[i] == 0.0 {
                    assert_abs_diff_eq!(c.input[i], center[i], epsilon = 1e-15);
                }
            }
            let logits = network.forward(&c.input);
            let predicted = predicted_class(logits.as_slice());
            assert_eq!(predicted, c.predicted);
            assert_ne!(predicted, label);
            assert!(
                forbidden.contains(&predicted),
                "case {case}: class {predicted} is not forbidden"
            );
            assert_abs_diff_eq!(
                c.distance,
                ballast::threat::distance(norm, &center, &c.input),
                epsilon = 1e-12
            );
            for (a, b) in c.logits.iter().zip(logits.iter()) {
                assert_abs_diff_eq!(*a, *b, epsilon = 1e-12);
            }
        } else if let AttackOutcome::NotFound {
            best_input,
            best_margin,
            ..
        } = &outcome
        {
            assert!(region.contains(best_input));
            // A negative forbidden margin without a counterexample means a third, allowed class wins there.
            if *best_margin < 0.0 {
                let predicted = predicted_class(network.forward(best_input).as_slice());
                assert!(
                    !forbidden.contains(&predicted),
                    "case {case}: a counterexample was missed"
                );
                assert!(validate(&network, &region, label, &forbidden, best_input).is_none());
            }
        }
    }
    assert_eq!(attacked, 300);
    // The property is not vacuous: a good share of the random problems have counterexamples.
    assert!(
        found >= 30,
        "only {found} counterexamples in 300 random problems"
    );
}

#[test]
fn batches_are_deterministic_and_match_single_samples() {
    let (model, data) = digits();
    let network = model.classifier();
    let budget = Budget::uniform(Norm::L2, 0.6, model.input.dim);
    let (_, problems) = digits_problems(&model, &data, 40, &budget);
    let settings = AttackSettings {
        steps: 30,
        restarts: 3,
        seed: 99,
        ..AttackSettings::default()
    };
    let first = attack_batch(&network, &problems, &settings).expect("valid");
    let second = attack_batch(&network, &problems, &settings).expect("valid");
    assert_eq!(first, second);
    for (p, batch_outcome) in problems.iter().zip(&first).take(10) {
        let single = attack_sample(
            &network,
            &p.region,
            p.label,
            &p.forbidden,
            &settings,
            sample_seed(settings.seed, p.index),
            &[],
        )
        .expect("valid");
        assert_eq!(&single, batch_outcome);
    }
    assert!(first.iter().any(|o| o.counterexample().is_some()));
    assert!(first.iter().any(|o| o.counterexample().is_none()));
}

/// A mixed batch on one random network: L-inf and L2 balls, per-feature radii (some 0), bounded and
/// unbounded ranges, restricted targets and extra starts on some samples.
fn mixed_problems(rng: &mut ChaCha8Rng, network: &Network, count: usize) -> Vec<AttackProblem> {
    let dim = network.input_dim();
    let classes = network.output_dim();
    (0..count)
        .map(|index| {
            let norm = if rng.gen_bool(0.5) {
                Norm::Linf
            } else {
                Norm::L2
            };
            let radii = (0..dim)
                .map(|_| {
                    if rng.gen_bool(0.2) {
                        0.0
                    } else {
                        rng.gen_range(0.0..0.5)
                    }
                })
                .collect();
            let (lower, upper) = if rng.gen_bool(0.5) {
                (vec![0.0; dim], vec![1.0; dim])
            } else {
                unbounded(dim)
            };
            let center: Vec<f64> = (0..dim).map(|_| rng.gen_range(0.0..1.0)).collect();
            let label = predicted_class(network.forward(&center).as_slice());
            let targets = if rng.gen_bool(0.7) {
                Targets::Any
            } else {
                Targets::Into {
                    classes: vec![rng.gen_range(0..classes)],
                    from: None,
                }
            };
            let extra_starts = (0..rng.gen_range(0..3))
                .map(|_| (0..dim).map(|_| rng.gen_range(-0.5..1.5)).collect())
                .collect();
            AttackProblem {
                index,
                region: Budget { norm, radii }.region(&center, &lower, &upper),
                label,
                forbidden: targets.forbidden_for(label, classes),
                extra_starts,
            }
        })
        .collect()
}

/// The batch runs every sample's own schedule: each outcome equals the one `attack_sample` gives that
/// sample alone with the same seed, bit for bit, under every schedule option and both precisions.
#[test]
fn batched_results_equal_per_sample_results() {
    let mut rng = ChaCha8Rng::seed_from_u64(404);
    let mut found = 0;
    let mut not_found = 0;
    for (case, sizes) in [
        vec![3, 2],
        vec![5, 4, 3],
        vec![8, 12, 7, 4],
        vec![20, 40, 30, 6],
    ]
    .iter()
    .enumerate()
    {
        let network = random_network(&mut rng, sizes);
        let problems = mixed_problems(&mut rng, &network, 70);
        for (fgsm_first, targeted, stop_at_first, precision) in [
            (true, true, true, SearchPrecision::Double),
            (false, true, false, SearchPrecision::Double),
            (true, false, true, SearchPrecision::Single),
            (true, true, false, SearchPrecision::Single),
        ] {
            let settings = AttackSettings {
                steps: 15,
                restarts: 3,
                patience: 3,
                seed: case as u64,
                fgsm_first,
                targeted,
                stop_at_first,
                precision,
                ..AttackSettings::default()
            };
            let batch = attack_batch(&network, &problems, &settings).expect("valid");
            assert_eq!(batch.len(), problems.len());
            for (p, outcome) in problems.iter().zip(&batch) {
                let single = attack_sample(
                    &network,
                    &p.region,
                    p.label,
                    &p.forbidden,
                    &settings,
                    sample_seed(settings.seed, p.index),
                    &p.extra_starts,
                )
                .expect("valid");
                assert_eq!(&single, outcome, "network {sizes:?}, sample {}", p.index);
                match outcome {
                    AttackOutcome::Found(_) => found += 1,
                    AttackOutcome::NotFound { .. } => not_found += 1,
                }
            }
        }
    }
    // Not vacuous: both outcomes occur often.
    assert!(
        found >= 100 && not_found >= 100,
        "{found} found, {not_found} not"
    );
}

proptest! {
    #![proptest_config(ProptestConfig::with_cases(48))]

    /// Common practice: a counterexample lies in the ball ∩ input range — here checked exactly, with no
    /// tolerance, on the box of the region (for L2 the ball itself up to rounding of the norm) — keeps
    /// fixed features exactly, and a plain forward pass puts it in a forbidden class other than the
    /// label. Batches of random problems on random networks, both precisions.
    #[test]
    fn every_batched_counterexample_is_inside_the_region_exactly_and_flips_the_class(
        seed in any::<u64>(),
        depth in 0usize..3,
        single in any::<bool>(),
    ) {
        let mut rng = ChaCha8Rng::seed_from_u64(seed);
        let dim = rng.gen_range(1..10);
        let mut sizes = vec![dim];
        for _ in 0..depth {
            sizes.push(rng.gen_range(2..16));
        }
        sizes.push(rng.gen_range(2..6));
        let network = random_network(&mut rng, &sizes);
        let problems = mixed_problems(&mut rng, &network, 24);
        let settings = AttackSettings {
            steps: 10,
            restarts: 2,
            seed,
            precision: if single { SearchPrecision::Single } else { SearchPrecision::Double },
            ..AttackSettings::default()
        };
        let outcomes = attack_batch(&network, &problems, &settings).expect("valid");
        for (p, outcome) in problems.iter().zip(&outcomes) {
            let AttackOutcome::Found(c) = outcome else { continue };
            let region = &p.region;
            for i in 0..dim {
                prop_assert!(
                    region.inner_lower[i] <= c.input[i] && c.input[i] <= region.inner_upper[i]
                );
                if region.radii[i] == 0.0 {
                    prop_assert_eq!(c.input[i], region.center[i]);
                }
            }
            // Exact membership (no tolerance), for both norms.
            prop_assert!(region.contains(&c.input));
            let predicted = predicted_class(network.forward(&c.input).as_slice());
            prop_assert_eq!(predicted, c.predicted);
            prop_assert_ne!(predicted, p.label);
            prop_assert!(p.forbidden.contains(&predicted));
        }
    }
}

#[test]
fn gradient_is_exact_for_a_linear_model() {
    // For z = W x + b the margin gradient is the row difference W_y − W_t (common practice).
    let mut rng = ChaCha8Rng::seed_from_u64(5);
    let network = random_network(&mut rng, &[6, 4]);
    let x: Vec<f64> = (0..6).map(|_| rng.gen_range(-1.0..1.0)).collect();
    let (margin, gradient) = margin_and_gradient(&network, &x, 2, 0);
    let logits = network.forward(&x);
    assert_abs_diff_eq!(margin, logits[2] - logits[0], epsilon = 1e-12);
    let w = &network.layers[0].to_dense().weights;
    for j in 0..6 {
        assert_abs_diff_eq!(gradient[j], w[(2, j)] - w[(0, j)], epsilon = 1e-12);
    }
}

#[test]
fn restricted_targets_only_report_forbidden_classes() {
    // Three classes, identity logits: from (1, 0.8, 0) class 1 is near, class 2 is far.
    let network = Network::from_dense(vec![Dense::identity(3)]);
    let budget = Budget::uniform(Norm::Linf, 0.3, 3);
    let region = budget.region(&[1.0, 0.8, 0.0], &[-5.0; 3], &[5.0; 3]);
    let settings = AttackSettings::default();
    let any = attack_sample(&network, &region, 0, &[1, 2], &settings, 1, &[]).expect("valid");
    assert_eq!(any.counterexample().map(|c| c.predicted), Some(1));
    // Class 2 can reach at most 0.3 < 0.7 = the lowest label logit: none exists.
    let only_two = attack_sample(&network, &region, 0, &[2], &settings, 1, &[]).expect("valid");
    match only_two {
        AttackOutcome::NotFound { best_margin, .. } => {
            assert_abs_diff_eq!(best_margin, 0.4, epsilon = 1e-9)
        }
        AttackOutcome::Found(c) => panic!("class {} is not forbidden", c.predicted),
    }
    // Nothing forbidden: nothing to find.
    let none = attack_sample(&network, &region, 0, &[], &settings, 1, &[]).expect("valid");
    assert!(
        matches!(none, AttackOutcome::NotFound { best_margin, .. } if best_margin.is_infinite())
    );
}

#[test]
fn extra_starts_are_used_and_deadlines_stop_the_search() {
    // Identity logits; with no run planned only the caller's start can find the counterexample.
    let network = Network::from_dense(vec![Dense::identity(2)]);
    let budget = Budget::uniform(Norm::Linf, 1.0, 2);
    let region = budget.region(&[1.0, 0.5], &[-5.0; 2], &[5.0; 2]);
    let settings = AttackSettings {
        steps: 1,
        restarts: 0,
        fgsm_first: false,
        targeted: false,
        ..AttackSettings::default()
    };
    let without = attack_sample(&network, &region, 0, &[1], &settings, 0, &[]).expect("valid");
    assert!(without.counterexample().is_none());
    let with =
        attack_sample(&network, &region, 0, &[1], &settings, 0, &[vec![0.4, 1.2]]).expect("valid");
    let c = with
        .counterexample()
        .expect("the extra start is a counterexample");
    assert_eq!(c.predicted, 1);
    // An extra start outside the region is projected in first.
    let far =
        attack_sample(&network, &region, 0, &[1], &settings, 0, &[vec![-9.0, 9.0]]).expect("valid");
    assert!(region.contains(&far.counterexample().expect("projected start").input));

    let late = AttackSettings {
        deadline: Some(Instant::now() - Duration::from_millis(1)),
        ..AttackSettings::default()
    };
    let outcome = attack_sample(&network, &region, 0, &[1], &late, 0, &[]).expect("valid");
    assert!(matches!(
        outcome,
        AttackOutcome::NotFound {
            stop: StopReason::DeadlineReached,
            ..
        }
    ));
}

#[test]
fn misuse_is_a_typed_error() {
    let network = Network::from_dense(vec![Dense::identity(2)]);
    let region: Region =
        Budget::uniform(Norm::Linf, 0.1, 3).region(&[0.0; 3], &[-1.0; 3], &[1.0; 3]);
    let settings = AttackSettings::default();
    assert!(matches!(
        attack_sample(&network, &region, 0, &[1], &settings, 0, &[]),
        Err(AttackError::Dimension {
            found: 3,
            expected: 2,
            ..
        })
    ));
    let region = Budget::uniform(Norm::Linf, 0.1, 2).region(&[0.0; 2], &[-1.0; 2], &[1.0; 2]);
    assert!(matches!(
        attack_sample(&network, &region, 0, &[2], &settings, 0, &[]),
        Err(AttackError::Class {
            class: 2,
            classes: 2
        })
    ));
    let bad = AttackSettings {
        step_fraction: 0.0,
        ..AttackSettings::default()
    };
    assert!(matches!(
        attack_sample(&network, &region, 0, &[1], &bad, 0, &[]),
        Err(AttackError::Settings(_))
    ));
    // validate refuses a point outside the region even when it changes the class.
    assert!(validate(&network, &region, 0, &[1], &[0.0, 0.5]).is_none());
}

fn ballast() -> Command {
    Command::new(env!("CARGO_BIN_EXE_ballast"))
}

#[test]
fn cli_writes_a_parseable_csv_and_exits_as_documented() {
    let dir = tempfile::tempdir().expect("temporary folder");
    let out = dir.path().join("counterexamples.csv");
    let output = ballast()
        .args([
            "attack",
            "--model",
            DIGITS_MODEL,
            "--data",
            DIGITS_TEST,
            "--eps",
            "0.1",
            "--steps",
            "40",
        ])
        .args(["--restarts", "2", "--seed", "7", "--out"])
        .arg(&out)
        .output()
        .expect("runs");
    let stdout = String::from_utf8_lossy(&output.stdout);
    assert_eq!(
        output.status.code(),
        Some(0),
        "stdout: {stdout}\nstderr: {}",
        String::from_utf8_lossy(&output.stderr)
    );
    let count: usize = stdout
        .lines()
        .find_map(|l| l.strip_prefix("counterexamples: "))
        .expect("count line")
        .trim()
        .parse()
        .expect("a number");
    assert!(count > 0);
    let (model, data) = digits();
    let network = model.classifier();
    let mut reader = csv::Reader::from_path(&out).expect("CSV");
    let header = reader.headers().expect("header").clone();
    assert_eq!(&header[0], "sample");
    assert_eq!(&header[1], "label");
    assert_eq!(&header[2], "new_class");
    assert_eq!(&header[3], "distance");
    assert_eq!(header.len(), 4 + 64);
    assert_eq!(&header[4], "px0");
    let mut rows = 0;
    for record in reader.records() {
        let record = record.expect("row");
        rows += 1;
        let sample: usize = record[0].parse().expect("index");
        let label: usize = record[1].parse().expect("label");
        let new_class: usize = record[2].parse().expect("class");
        let distance: f64 = record[3].parse().expect("distance");
        let input: Vec<f64> = (4..record.len())
            .map(|i| record[i].parse().expect("feature"))
            .collect();
        assert_eq!(label, data.labels[sample]);
        assert_ne!(label, new_class);
        assert!(distance <= 0.1);
        assert!(common::linf_inside(&input, data.sample(sample), &[0.1; 64]));
        assert_abs_diff_eq!(
            distance,
            ballast::threat::distance(Norm::Linf, data.sample(sample), &input),
            epsilon = 1e-12
        );
        assert!(input.iter().all(|v| (0.0..=1.0).contains(v)));
        assert_eq!(
            predicted_class(network.forward(&input).as_slice()),
            new_class
        );
    }
    assert_eq!(rows, count);

    // A floor the counterexamples refute: exit 1.
    let refuted = ballast()
        .args([
            "attack",
            "--model",
            DIGITS_MODEL,
            "--data",
            DIGITS_TEST,
            "--eps",
            "0.1",
            "--steps",
            "20",
        ])
        .args(["--restarts", "1", "--floor", "0.99"])
        .output()
        .expect("runs");
    assert_eq!(refuted.status.code(), Some(1));
    // A floor an attack cannot prove: exit 3, said on stderr.
    let undecided = ballast()
        .args([
            "attack",
            "--model",
            DIGITS_MODEL,
            "--data",
            DIGITS_TEST,
            "--eps",
            "0.01",
            "--steps",
            "10",
        ])
        .args(["--restarts", "1", "--floor", "0.5", "--norm", "l2"])
        .output()
        .expect("runs");
    assert_eq!(undecided.status.code(), Some(3));
    assert!(String::from_utf8_lossy(&undecided.stderr).contains("undecided"));
}

#[test]
fn cli_rejects_bad_input_with_exit_2_and_writes_nothing() {
    let dir = tempfile::tempdir().expect("temporary folder");
    let out = dir.path().join("never.csv");
    for (extra, message) in [
        (vec!["--eps", "-1"], "--eps"),
        (vec!["--eps", "0.1", "--norm", "l3"], "--norm"),
        (vec!["--eps", "0.1", "--floor", "1.5"], "--floor"),
        (vec!["--eps", "0.1", "--steps", "0"], "--steps"),
        (vec!["--eps", "0.1", "--precision", "half"], "--precision"),
    ] {
        let output = ballast()
            .args(["attack", "--model", DIGITS_MODEL, "--data", DIGITS_TEST])
            .args(&extra)
            .arg("--out")
            .arg(&out)
            .output()
            .expect("runs");
        assert_eq!(output.status.code(), Some(2), "{extra:?}");
        assert!(
            String::from_utf8_lossy(&output.stderr).contains(message),
            "{extra:?}"
        );
        assert!(!out.exists());
    }
    let output = ballast()
        .args([
            "attack",
            "--model",
            "tests/data/no-such-model.json",
            "--data",
            DIGITS_TEST,
            "--eps",
            "0.1",
        ])
        .output()
        .expect("runs");
    assert_eq!(output.status.code(), Some(2));
    assert!(String::from_utf8_lossy(&output.stderr).contains("no-such-model.json"));
}

/// `--untargeted-only` runs the plain PGD schedule (no FGSM point, no targeted runs): it never finds a
/// sample the full schedule misses on these settings' starts, and the flag is accepted with every
/// other attack flag. Counts: the samples with a counterexample, read from stdout.
#[test]
fn cli_untargeted_only_runs_a_subset_of_the_schedule() {
    let count = |extra: &[&str]| -> usize {
        let output = ballast()
            .args([
                "attack",
                "--model",
                DIGITS_MODEL,
                "--data",
                DIGITS_TEST,
                "--eps",
                "0.05",
                "--steps",
                "20",
                "--restarts",
                "1",
            ])
            .args(extra)
            .output()
            .expect("runs");
        let stdout = String::from_utf8_lossy(&output.stdout);
        assert_eq!(output.status.code(), Some(0), "{stdout}");
        stdout
            .lines()
            .find_map(|l| l.strip_prefix("counterexamples: "))
            .expect("count line")
            .trim()
            .parse()
            .expect("a number")
    };
    let full = count(&[]);
    let plain = count(&["--untargeted-only"]);
    assert!(
        plain <= full,
        "untargeted only {plain}, full schedule {full}"
    );
    assert!(full > 0);
}
