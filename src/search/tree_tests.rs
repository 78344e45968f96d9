//! Node bounds of running trees against brute-force enumeration of activation patterns (one exact LP
//! per pattern), in both modes and with both branching rules.

use super::*;
use crate::bound::{Method, ReluSplit, SplitState};
use crate::engine::slopes::SlopeSettings;
use crate::model::Dense;
use crate::search::bounding::{self, Job};
use crate::search::piece::affine_piece;
use crate::search::solver::{minimise, LinearProgram, LpOutcome, Row};
use crate::threat::{Budget, Norm};
use nalgebra::{DMatrix, DVector};
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;

fn random_network(rng: &mut ChaCha8Rng, sizes: &[usize]) -> Network {
    Network::from_dense(
        sizes
            .windows(2)
            .map(|w| Dense {
                weights: DMatrix::from_fn(w[1], w[0], |_, _| rng.gen_range(-1.0..1.0)),
                bias: DVector::from_fn(w[1], |_, _| rng.gen_range(-0.3..0.3)),
            })
            .collect(),
    )
}

type Minima = Vec<(Vec<Vec<bool>>, Option<f64>)>;

/// Brute force: for every full activation pattern, the exact LP minimum of the margin over the region
/// points with that pattern (`None` when no point has it). Every unit gets its half-space.
fn pattern_minima(network: &Network, region: &Region, label: usize, target: usize) -> Minima {
    let sizes = network.hidden_sizes();
    let total: usize = sizes.iter().sum();
    assert!(total <= 10);
    (0..1usize << total)
        .map(|bits| {
            let mut pattern = Vec::new();
            let mut position = 0;
            for size in &sizes {
                pattern.push(
                    (0..*size)
                        .map(|i| bits >> (position + i) & 1 == 1)
                        .collect(),
                );
                position += size;
            }
            let piece = affine_piece(network, &pattern, &|_, _| true, label, target);
            let mut program = LinearProgram::default();
            for i in 0..region.dim() {
                program.add_variable(
                    piece.gradient[i],
                    region.outer_lower[i],
                    region.outer_upper[i],
                );
            }
            for (row, t) in piece.rows.iter().zip(&piece.right_hand_sides) {
                program.rows.push(Row {
                    coefficients: row.iter().copied().enumerate().collect(),
                    lower: *t,
                    upper: f64::INFINITY,
                });
            }
            let value = match minimise(&program, None).unwrap() {
                LpOutcome::Optimal { value, .. } => Some(value + piece.constant),
                _ => None,
            };
            (pattern, value)
        })
        .collect()
}

fn consistent(splits: &SplitState, pattern: &[Vec<bool>]) -> bool {
    splits.layers.iter().zip(pattern).all(|(s, p)| {
        s.iter().zip(p).all(|(s, p)| match s {
            ReluSplit::Free => true,
            ReluSplit::Active => *p,
            ReluSplit::Inactive => !*p,
        })
    })
}

fn exact_over(minima: &Minima, splits: &SplitState) -> f64 {
    minima
        .iter()
        .filter(|(p, _)| consistent(splits, p))
        .filter_map(|(_, v)| *v)
        .fold(f64::INFINITY, f64::min)
}

fn root_bounds(engine: &Engine, region: &Region, label: usize, target: usize) -> Node {
    let settings = bounding::Settings {
        method: Method::OptimisedLinear,
        slopes: SlopeSettings::default(),
        threshold: f64::INFINITY,
    };
    let margin = Margins {
        label,
        targets: &[target],
    };
    let job = Job {
        splits: None,
        given: None,
        warm: None,
    };
    let mut root = bounding::bound(engine, region, margin, &[job], &settings).remove(0);
    Node {
        splits: SplitState {
            layers: engine
                .hidden_sizes()
                .iter()
                .map(|&n| vec![ReluSplit::Free; n])
                .collect(),
        },
        bounds: root.bounds,
        lower: root.lower[0],
        minimiser: root.minimisers.remove(0),
        warm: root.warm.remove(0),
    }
}

/// Every open node's bound is ≤ the brute-force minimum over its sub-domain, and the optimality mode
/// ends at the brute-force minimum over all patterns, with plain and look-ahead branching and with
/// batches of one and of several nodes.
#[test]
fn node_bounds_and_optimum_against_pattern_enumeration() {
    let mut rng = ChaCha8Rng::seed_from_u64(11);
    for case in 0..8 {
        let sizes: &[usize] = if case % 2 == 0 {
            &[3, 6, 3]
        } else {
            &[2, 4, 4, 3]
        };
        let network = random_network(&mut rng, sizes);
        let engine = Engine::new(&network);
        let dim = sizes[0];
        let center: Vec<f64> = (0..dim).map(|_| rng.gen_range(0.3..0.7)).collect();
        let region =
            Budget::uniform(Norm::Linf, 0.4, dim).region(&center, &vec![0.0; dim], &vec![1.0; dim]);
        let label = crate::model::predicted_class(network.forward(&center).as_slice());
        let target = (label + 1) % 3;
        let minima = pattern_minima(&network, &region, label, target);
        let exact = exact_over(&minima, &SplitState::free(&network));
        let settings = SearchSettings {
            optimality: true,
            batch_size: if case < 4 { 1 } else { 5 },
            branching_candidates: if case % 4 < 2 { 1 } else { 3 },
            ..SearchSettings::default()
        };
        let forbidden = [target];
        let problem = Problem {
            network: &network,
            engine: &engine,
            region: &region,
            label,
            forbidden: &forbidden,
            settings: &settings,
        };
        let root = root_bounds(&engine, &region, label, target);
        assert!(root.lower <= exact + 1e-9);
        let mut tree = TargetTree::new(problem, target, root);
        let mut steps = 0;
        while tree.has_open_nodes() {
            for node in tree.frontier.iter() {
                let truth = exact_over(&minima, &node.splits);
                assert!(
                    node.lower <= truth + 1e-7,
                    "case {case}: node bound above its minimum"
                );
            }
            assert!(tree.lower() <= exact + 1e-9);
            if tree.step(usize::MAX).unwrap() == Step::Finished {
                break;
            }
            steps += 1;
            assert!(steps < 10_000);
        }
        assert!(
            (tree.incumbent - exact).abs() < 1e-6,
            "case {case}: {} vs {exact}",
            tree.incumbent
        );
        assert!(tree.lower() <= exact + 1e-9);
    }
}

/// A node budget too small for one split and a memory cap too small for one more node stop the tree
/// with the matching reason, and its bound stays sound.
#[test]
fn budgets_stop_a_tree_with_a_sound_bound() {
    let mut rng = ChaCha8Rng::seed_from_u64(5);
    let network = random_network(&mut rng, &[3, 8, 3]);
    let engine = Engine::new(&network);
    let center = [0.5, 0.4, 0.6];
    let region = Budget::uniform(Norm::Linf, 0.5, 3).region(&center, &[0.0; 3], &[1.0; 3]);
    let label = crate::model::predicted_class(network.forward(&center).as_slice());
    let target = (label + 1) % 3;
    let exact = exact_over(
        &pattern_minima(&network, &region, label, target),
        &SplitState::free(&network),
    );
    let forbidden = [target];
    for (settings, children, reason) in [
        (SearchSettings::default(), 1, UnresolvedReason::NodeLimit),
        (
            SearchSettings {
                frontier_memory: 1,
                ..SearchSettings::default()
            },
            usize::MAX,
            UnresolvedReason::MemoryLimit,
        ),
    ] {
        let settings = SearchSettings {
            root_attack: None,
            node_attack_steps: 0,
            optimality: true,
            ..settings
        };
        let problem = Problem {
            network: &network,
            engine: &engine,
            region: &region,
            label,
            forbidden: &forbidden,
            settings: &settings,
        };
        let mut root = root_bounds(&engine, &region, label, target);
        root.minimiser = None;
        assert!(!root.is_leaf(), "construction: the root has unstable units");
        let mut tree = TargetTree::new(problem, target, root);
        assert_eq!(tree.step(children).unwrap(), Step::Stopped(reason));
        assert!(tree.has_open_nodes());
        assert!(tree.lower() <= exact + 1e-9);
    }
}
