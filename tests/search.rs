//! Complete verification (src/search/) against outside references and planted counterexamples.
//!
//! Outside reference: `tests/reference/out/milp_digits_mlp.json`, exact minimum margins of the digits
//! MLP fixture (scikit-learn `load_digits`, tests/data/digits_mlp.model.json) over L-inf balls clipped to
//! [0, 1], computed by `tests/reference/milp_reference.py` with scipy.optimize.milp (HiGHS) on the big-M
//! encoding; the scipy version is recorded in the file.

use ballast::attack::validate;
use ballast::bound::CERTIFY_TOLERANCE;
use ballast::model::{Dense, Model, Network};
use ballast::search::{milp, verify_batch, verify_sample, SearchProblem, SearchSettings, Verdict};
use ballast::threat::{Budget, Norm, Region};
use nalgebra::{DMatrix, DVector};
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;
use serde_json::Value;

mod common;
use common::fixtures::{digits_mlp, random_network};

struct Fixture {
    network: Network,
    model: Model,
    features: Vec<Vec<f64>>,
    reference: Value,
}

fn fixture() -> Fixture {
    let (model, data) = digits_mlp();
    let features = (0..data.len()).map(|i| data.sample(i).to_vec()).collect();
    let text = std::fs::read_to_string("tests/reference/out/milp_digits_mlp.json").unwrap();
    Fixture {
        network: model.classifier(),
        model,
        features,
        reference: serde_json::from_str(&text).unwrap(),
    }
}

fn region_of(f: &Fixture, index: usize, epsilon: f64) -> Region {
    Budget::uniform(Norm::Linf, epsilon, f.model.input.dim).region(
        &f.features[index],
        &f.model.input.lower,
        &f.model.input.upper,
    )
}

fn problems(f: &Fixture, budget: &Value) -> Vec<(SearchProblem, Vec<(usize, f64)>)> {
    let epsilon = budget["epsilon"].as_f64().unwrap();
    budget["samples"]
        .as_array()
        .unwrap()
        .iter()
        .map(|s| {
            let index = s["index"].as_u64().unwrap() as usize;
            let label = s["label"].as_u64().unwrap() as usize;
            let exact: Vec<(usize, f64)> = s["targets"]
                .as_array()
                .unwrap()
                .iter()
                .map(|t| {
                    (
                        t["target"].as_u64().unwrap() as usize,
                        t["exact"].as_f64().unwrap(),
                    )
                })
                .collect();
            let problem = SearchProblem {
                index,
                region: region_of(f, index, epsilon),
                label,
                targets: exact.iter().map(|(j, _)| *j).collect(),
            };
            (problem, exact)
        })
        .collect()
}

/// Verdicts equal HiGHS's exact answer (robust iff every exact minimum margin is > 0) on every sample of
/// both budgets; the fixture's budgets are ones where the LP relaxation leaves samples undecided.
#[test]
fn digits_verdicts_match_highs_milp() {
    let f = fixture();
    let budgets = f.reference["budgets"].as_array().unwrap();
    assert_eq!(budgets.len(), 2);
    let mut lp_gap = 0;
    for budget in budgets {
        let robust = budget["robust"].as_u64().unwrap();
        let lp_proved = budget["lp_proved"].as_u64().unwrap();
        assert!(
            lp_proved < robust,
            "fixture budget where LP and exact agree"
        );
        lp_gap += robust - lp_proved;
        let set = problems(&f, budget);
        let list: Vec<SearchProblem> = set.iter().map(|(p, _)| p.clone()).collect();
        let outcomes = verify_batch(&f.network, &list, &SearchSettings::default());
        for ((problem, exact), outcome) in set.iter().zip(outcomes) {
            let outcome = outcome.unwrap();
            let min_exact = exact.iter().map(|(_, v)| *v).fold(f64::INFINITY, f64::min);
            match &outcome.verdict {
                Verdict::Proved { min_margin_lower } => {
                    assert!(
                        min_exact > 0.0,
                        "sample {} proved, HiGHS says not robust",
                        problem.index
                    );
                    // sound: the proven bound is below the exact minimum
                    assert!(*min_margin_lower <= min_exact + 1e-6);
                }
                Verdict::Counterexample(c) => {
                    assert!(
                        min_exact <= 0.0,
                        "sample {} refuted, HiGHS says robust",
                        problem.index
                    );
                    let again = validate(
                        &f.network,
                        &problem.region,
                        problem.label,
                        &problem.targets,
                        &c.input,
                    );
                    assert!(again.is_some());
                    assert!(problem.region.contains(&c.input));
                }
                Verdict::Unresolved { .. } => {
                    panic!("sample {} unresolved: {outcome:?}", problem.index)
                }
            }
        }
    }
    assert!(lp_gap >= 2);
}

/// In the optimality mode the minimum margin per class equals HiGHS's within 1e-6 (a subset of the
/// samples of each budget, to keep the test short).
#[test]
fn digits_minimum_margins_match_highs_milp() {
    let f = fixture();
    let settings = SearchSettings {
        optimality: true,
        node_limit: 200_000,
        ..SearchSettings::default()
    };
    let mut checked = 0;
    for budget in f.reference["budgets"].as_array().unwrap() {
        let set = problems(&f, budget);
        let subset: Vec<&(SearchProblem, Vec<(usize, f64)>)> = set.iter().step_by(4).collect();
        let list: Vec<SearchProblem> = subset.iter().map(|(p, _)| p.clone()).collect();
        let outcomes = verify_batch(&f.network, &list, &settings);
        for ((problem, exact), outcome) in subset.iter().zip(outcomes) {
            let outcome = outcome.unwrap();
            for (target, value) in exact {
                let found = outcome.minimum_margin(*target).unwrap_or_else(|| {
                    panic!("sample {} target {target} did not finish", problem.index)
                });
                assert!(
                    (found - value).abs() < 1e-6,
                    "sample {} target {target}: ballast {found}, HiGHS {value}",
                    problem.index
                );
                let summary = outcome
                    .targets
                    .iter()
                    .find(|t| t.target == *target)
                    .unwrap();
                assert!(summary.lower <= value + 1e-6);
                checked += 1;
            }
        }
    }
    assert!(checked >= 100);
}

/// A network whose answer flips only in a small corner of the region: hidden unit 0 of the first layer
/// fires only when `Σ sᵢ (xᵢ − cᵢ) > 0.9 ε n`, near the largest value `ε n`, reached at the corner
/// `p = c + ε s`; it is passed through the later hidden layers and adds to logit 1. Other units are
/// random distractors with small output weights. Returns the network, the centre and `p`.
fn planted(seed: u64, dim: usize, hidden: &[usize], epsilon: f64) -> (Network, Vec<f64>, Vec<f64>) {
    let mut rng = ChaCha8Rng::seed_from_u64(seed);
    let center: Vec<f64> = (0..dim).map(|_| rng.gen_range(0.3..0.7)).collect();
    let signs: Vec<f64> = (0..dim)
        .map(|_| if rng.gen_bool(0.5) { 1.0 } else { -1.0 })
        .collect();
    // c ± ε rounded toward the centre, so the corner lies in the ball exactly.
    let corner: Vec<f64> = (0..dim)
        .map(|i| ballast::threat::exact::toward(center[i], epsilon * signs[i]))
        .collect();
    let mut layers = Vec::new();
    let mut width = dim;
    for (k, &size) in hidden.iter().enumerate() {
        let mut weights = DMatrix::from_fn(size, width, |_, _| rng.gen_range(-1.0..1.0));
        let mut bias = DVector::from_fn(size, |_, _| rng.gen_range(-0.5..0.5));
        weights.row_mut(0).fill(0.0);
        if k == 0 {
            let scale = 10.0;
            let mut offset = 0.0;
            for i in 0..dim {
                weights[(0, i)] = scale * signs[i];
                offset += scale * signs[i] * center[i];
            }
            bias[0] = -offset - scale * 0.9 * epsilon * dim as f64;
        } else {
            weights[(0, 0)] = 1.0;
            bias[0] = 0.0;
            // distractors ignore the planted unit, so they cannot cancel it
            for r in 1..size {
                weights[(r, 0)] = 0.0;
            }
        }
        layers.push(Dense { weights, bias });
        width = size;
    }
    let mut weights = DMatrix::from_fn(2, width, |_, _| rng.gen_range(-0.05..0.05));
    weights[(0, 0)] = 0.0;
    weights[(1, 0)] = 200.0;
    layers.push(Dense {
        weights,
        bias: DVector::from_vec(vec![1.0, 0.0]),
    });
    (Network::from_dense(layers), center, corner)
}

/// Planted counterexamples are never certified; the search returns a validated counterexample, with
/// and without the attacks (then the trees must find it through bound minimisers and leaf LPs).
#[test]
fn planted_counterexamples_are_found_never_certified() {
    let epsilon = 0.1;
    for seed in 0..12u64 {
        let hidden: &[usize] = if seed % 2 == 0 { &[8] } else { &[6, 5] };
        let dim = 4 + (seed as usize % 3);
        let (network, center, corner) = planted(seed, dim, hidden, epsilon);
        let clean = network.forward(&center);
        let flipped = network.forward(&corner);
        assert!(
            clean[0] > clean[1],
            "construction: centre must be class 0 (seed {seed})"
        );
        assert!(
            flipped[1] > flipped[0],
            "construction: corner must be class 1 (seed {seed})"
        );
        let region = Budget::uniform(Norm::Linf, epsilon, dim).region(
            &center,
            &vec![0.0; dim],
            &vec![1.0; dim],
        );
        assert!(region.contains(&corner));
        let quiet = SearchSettings {
            root_attack: None,
            node_attack_steps: 0,
            ..SearchSettings::default()
        };
        for settings in [SearchSettings::default(), quiet] {
            let outcome = verify_sample(&network, &region, 0, &[1], &settings).unwrap();
            match &outcome.verdict {
                Verdict::Counterexample(c) => {
                    assert!(region.contains(&c.input));
                    let logits = network.forward(&c.input);
                    assert!(logits[1] > logits[0]);
                    assert_eq!(c.predicted, 1);
                }
                other => panic!("seed {seed}: planted counterexample missed: {other:?}"),
            }
        }
    }
}

/// On small random networks the optimality mode equals the big-M MILP (microlp with integer variables,
/// an independent encoding of the same problem), and the decision verdict agrees with its sign.
#[test]
fn optimality_mode_matches_the_big_m_milp_on_small_networks() {
    let mut rng = ChaCha8Rng::seed_from_u64(7);
    let settings = SearchSettings {
        optimality: true,
        ..SearchSettings::default()
    };
    for case in 0..10 {
        let sizes: &[usize] = if case % 2 == 0 {
            &[3, 6, 3]
        } else {
            &[3, 4, 4, 3]
        };
        let network = random_network(&mut rng, sizes);
        let center: Vec<f64> = (0..3).map(|_| rng.gen_range(0.2..0.8)).collect();
        let label = ballast::model::predicted_class(network.forward(&center).as_slice());
        let targets: Vec<usize> = (0..3).filter(|j| *j != label).collect();
        let region = Budget::uniform(Norm::Linf, 0.3, 3).region(&center, &[0.0; 3], &[1.0; 3]);
        let outcome = verify_sample(&network, &region, label, &targets, &settings).unwrap();
        let decision = verify_sample(
            &network,
            &region,
            label,
            &targets,
            &SearchSettings::default(),
        )
        .unwrap();
        let mut min_exact = f64::INFINITY;
        for &j in &targets {
            let reference = milp::minimum_margin(&network, &region, label, j)
                .unwrap()
                .unwrap();
            let found = outcome.minimum_margin(j).expect("finished");
            assert!(
                (found - reference.value).abs() < 1e-6,
                "case {case} target {j}: search {found}, MILP {}",
                reference.value
            );
            min_exact = min_exact.min(reference.value);
        }
        match decision.verdict {
            Verdict::Proved { min_margin_lower } => {
                assert!(min_exact > CERTIFY_TOLERANCE);
                assert!(min_margin_lower <= min_exact + 1e-9);
            }
            Verdict::Counterexample(c) => {
                assert!(min_exact <= 0.0);
                assert!(validate(&network, &region, label, &targets, &c.input).is_some());
            }
            Verdict::Unresolved { .. } => panic!("case {case} unresolved"),
        }
    }
}

/// A budget stopped at once says unresolved with a sound bound, never proved or refuted by guess.
#[test]
fn exhausted_budgets_are_unresolved() {
    let f = fixture();
    let budget = &f.reference["budgets"].as_array().unwrap()[1];
    let set = problems(&f, budget);
    // a robust sample whose root bound is not enough (LP does not prove it either)
    let (problem, exact) = set
        .iter()
        .find(|(_, exact)| exact.iter().all(|(_, v)| *v > 0.05))
        .expect("a robust sample");
    let settings = SearchSettings {
        node_limit: 1,
        ..SearchSettings::default()
    };
    let outcome = verify_sample(
        &f.network,
        &problem.region,
        problem.label,
        &problem.targets,
        &settings,
    )
    .unwrap();
    let min_exact = exact.iter().map(|(_, v)| *v).fold(f64::INFINITY, f64::min);
    match outcome.verdict {
        Verdict::Unresolved { best_lower, .. } => assert!(best_lower <= min_exact + 1e-9),
        Verdict::Proved { min_margin_lower } => assert!(min_margin_lower <= min_exact + 1e-9),
        Verdict::Counterexample(_) => panic!("robust sample refuted"),
    }
    let past = SearchSettings {
        deadline: Some(std::time::Instant::now()),
        root_attack: None,
        ..SearchSettings::default()
    };
    let outcome = verify_sample(
        &f.network,
        &problem.region,
        problem.label,
        &problem.targets,
        &past,
    )
    .unwrap();
    assert!(!matches!(outcome.verdict, Verdict::Counterexample(_)));
}

/// A frontier memory cap too small for one open sub-domain stops the search as unresolved (reason
/// `MemoryLimit`) with a bound below HiGHS's exact minimum, on a robust sample whose root bound does
/// not prove it; a generous cap decides the same sample.
#[test]
fn a_full_frontier_is_unresolved_with_a_sound_bound() {
    let f = fixture();
    let budget = &f.reference["budgets"].as_array().unwrap()[1];
    let set = problems(&f, budget);
    let options = ballast::bound::optimised::SlopeOptions::default();
    let (problem, exact) = set
        .iter()
        .find(|(p, exact)| {
            let root = ballast::bound::optimised::margin_lower_bounds(
                &f.network, &p.region, p.label, &p.targets, None, &options,
            )
            .unwrap();
            exact.iter().all(|(_, v)| *v > 0.0) && !root.certified()
        })
        .expect("a robust sample the root bound leaves open");
    let min_exact = exact.iter().map(|(_, v)| *v).fold(f64::INFINITY, f64::min);
    let quiet = SearchSettings {
        root_attack: None,
        node_attack_steps: 0,
        ..SearchSettings::default()
    };
    let tight = SearchSettings {
        frontier_memory: 1,
        ..quiet.clone()
    };
    let outcome = verify_sample(
        &f.network,
        &problem.region,
        problem.label,
        &problem.targets,
        &tight,
    )
    .unwrap();
    match outcome.verdict {
        Verdict::Unresolved { best_lower, reason } => {
            assert_eq!(reason, ballast::search::UnresolvedReason::MemoryLimit);
            assert!(best_lower <= min_exact + 1e-9);
        }
        other => panic!("sample {}: {other:?}", problem.index),
    }
    let outcome = verify_sample(
        &f.network,
        &problem.region,
        problem.label,
        &problem.targets,
        &quiet,
    )
    .unwrap();
    assert!(
        matches!(outcome.verdict, Verdict::Proved { .. }),
        "{outcome:?}"
    );
}
