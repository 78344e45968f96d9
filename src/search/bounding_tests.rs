//! Soundness and batch-independence of the batched sub-domain bounds: random networks of depth 1–6,
//! L-inf and L2 regions, sub-domains with and without splits, children reusing their parent's bounds
//! and starting from given slopes and multipliers.

use super::*;
use crate::attack::step::random_start;
use crate::bound::ReluSplit;
use crate::engine::slopes::Warm;
use crate::model::{Dense, Network};
use crate::threat::{Budget, Norm};
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;

fn random_network(rng: &mut ChaCha8Rng, depth: usize) -> Network {
    let mut sizes = vec![rng.gen_range(2..=4)];
    for _ in 1..depth {
        sizes.push(rng.gen_range(3..=6));
    }
    sizes.push(3);
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

fn random_splits(rng: &mut ChaCha8Rng, network: &Network, chance: f64) -> SplitState {
    let mut splits = SplitState::free(network);
    for layer in splits.layers.iter_mut() {
        for s in layer.iter_mut() {
            if rng.gen_bool(chance) {
                *s = if rng.gen_bool(0.5) {
                    ReluSplit::Active
                } else {
                    ReluSplit::Inactive
                };
            }
        }
    }
    splits
}

fn close(a: f64, b: f64) -> bool {
    a == b || (a - b).abs() <= 1e-12 * (1.0 + a.abs().max(b.abs()))
}

fn same(a: &Bounded, b: &Bounded) -> bool {
    a.empty == b.empty
        && a.lower.iter().zip(&b.lower).all(|(x, y)| close(*x, *y))
        && a.bounds.len() == b.bounds.len()
        && a.bounds.iter().zip(&b.bounds).all(|(x, y)| {
            let lower = x.lower.iter().zip(&y.lower).all(|(p, q)| close(*p, *q));
            lower && x.upper.iter().zip(&y.upper).all(|(p, q)| close(*p, *q))
        })
}

/// One batch of parents (free and randomly split) and children (one unit of a parent fixed, the
/// parent's bounds reused below the split layer): each job's bounds equal those of the job bounded
/// alone within 1e-12, and no sampled region point that meets a job's splits has a margin below the
/// job's bound or a pre-activation outside its bounds (an empty job admits no point).
#[test]
fn batched_bounds_equal_single_bounds_and_hold_at_sampled_points() {
    let mut rng = ChaCha8Rng::seed_from_u64(2024);
    let (mut children, mut checked, mut tightest) = (0, 0, f64::INFINITY);
    for case in 0..48 {
        let depth = 1 + case % 6;
        let network = random_network(&mut rng, depth);
        let engine = Engine::new(&network);
        let dim = network.input_dim();
        let norm = if case % 12 < 6 { Norm::Linf } else { Norm::L2 };
        let method = if case % 4 == 3 {
            Method::Linear
        } else {
            Method::OptimisedLinear
        };
        let center: Vec<f64> = (0..dim).map(|_| rng.gen_range(0.2..0.8)).collect();
        let epsilon = if norm == Norm::Linf { 0.3 } else { 0.5 };
        let region =
            Budget::uniform(norm, epsilon, dim).region(&center, &vec![0.0; dim], &vec![1.0; dim]);
        let label = crate::model::predicted_class(network.forward(&center).as_slice());
        let targets: Vec<usize> = (0..3).filter(|&j| j != label).collect();
        let margins = Margins {
            label,
            targets: &targets,
        };
        let settings = Settings {
            method,
            slopes: SlopeSettings::default(),
            threshold: f64::INFINITY,
        };
        let mut parent_splits = vec![SplitState::free(&network)];
        for _ in 0..3 {
            parent_splits.push(random_splits(&mut rng, &network, 0.3));
        }
        let parent_jobs: Vec<Job> = parent_splits
            .iter()
            .map(|s| Job {
                splits: Some(s),
                given: None,
                warm: None,
            })
            .collect();
        let parents = bound(&engine, &region, margins, &parent_jobs, &settings);
        // Children: a free unit of each non-empty parent, both sides.
        let mut child_splits = Vec::new();
        let mut child_of = Vec::new();
        for (p, parent) in parents.iter().enumerate() {
            let free: Vec<(usize, usize)> = parent_splits[p]
                .layers
                .iter()
                .enumerate()
                .flat_map(|(k, l)| {
                    l.iter()
                        .enumerate()
                        .filter(|(_, s)| **s == ReluSplit::Free)
                        .map(move |(i, _)| (k, i))
                })
                .collect();
            if parent.empty || free.is_empty() {
                continue;
            }
            let (k, i) = free[rng.gen_range(0..free.len())];
            for side in [ReluSplit::Active, ReluSplit::Inactive] {
                child_splits.push((parent_splits[p].with(k, i, side), k + 1));
                child_of.push(p);
            }
        }
        children += child_splits.len();
        // Half the cases start the children's ascent from arbitrary slopes and multipliers (outside
        // [0, 1] and below 0 too): a warm start may change a bound, never its soundness.
        let hidden = engine.hidden_sizes();
        let warm: Vec<Warm> = (0..targets.len())
            .map(|_| Warm {
                slopes: hidden
                    .iter()
                    .map(|&n| DVector::from_fn(n, |_, _| rng.gen_range(-1.0..2.0)))
                    .collect(),
                multipliers: hidden
                    .iter()
                    .map(|&n| DVector::from_fn(n, |_, _| rng.gen_range(-1.0..3.0)))
                    .collect(),
            })
            .collect();
        let warm_start = (case % 2 == 1).then_some(&warm[..]);
        let mut jobs = parent_jobs.clone();
        jobs.extend(
            child_splits
                .iter()
                .zip(&child_of)
                .map(|((s, start), &p)| Job {
                    splits: Some(s),
                    given: Some((&parents[p].bounds[..], *start)),
                    warm: warm_start,
                }),
        );
        let batch = bound(&engine, &region, margins, &jobs, &settings);
        assert_eq!(batch.len(), jobs.len());
        for (j, job) in jobs.iter().enumerate() {
            let alone = bound(&engine, &region, margins, &[*job], &settings).remove(0);
            assert!(
                same(&batch[j], &alone),
                "case {case} job {j}: batch differs"
            );
        }
        let mut x = vec![0.0; dim];
        for _ in 0..400 {
            random_start(&region, &mut rng, &mut x);
            let logits = network.forward(&x);
            let pre: Vec<Vec<f64>> = network
                .pre_activations(&x)
                .iter()
                .map(|z| z.iter().copied().collect())
                .collect();
            for (j, job) in jobs.iter().enumerate() {
                if !job.splits.is_none_or(|s| s.admits(&pre)) {
                    continue;
                }
                let b = &batch[j];
                assert!(!b.empty, "case {case} job {j}: empty job admits {x:?}");
                for (t, &target) in targets.iter().enumerate() {
                    let margin = logits[label] - logits[target];
                    checked += 1;
                    tightest = tightest.min(margin - b.lower[t]);
                    assert!(
                        margin >= b.lower[t] - 1e-10,
                        "case {case} job {j}: margin {margin} below bound {}",
                        b.lower[t]
                    );
                }
                for (layer, z) in b.bounds.iter().zip(&pre) {
                    for (i, v) in z.iter().enumerate() {
                        assert!(layer.lower[i] - 1e-10 <= *v && *v <= layer.upper[i] + 1e-10);
                    }
                }
            }
        }
    }
    // The check has teeth: many children, many admitted points, and some bounds close to a sample.
    assert!(children >= 100, "{children} children");
    assert!(checked >= 10_000, "{checked} checks");
    assert!(tightest < 1e-2, "closest sample {tightest} above its bound");
}
