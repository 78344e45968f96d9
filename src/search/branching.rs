//! Choosing which unstable ReLU to split, for a batch of sub-domains at once: a score per unit
//! estimating how much fixing it would raise the sub-domain's margin bound, and an optional look-ahead
//! among the best-scored units.
//!
//! The score follows the BaBSR idea (Bunel et al., 2020, "Branch and bound for piecewise linear neural
//! network verification"): push the margin objective backwards through the network with the usual
//! relaxation slopes (one batched backward pass of the engine, [`backward::run`], with the sub-domain's
//! pre-activation bounds). A unit whose backward coefficient `ν` on its ReLU output is negative pays the
//! upper line's intercept `−s·l` (`s = u/(u − l)`) in the bound, so `−ν · s · (−l)` estimates the bound
//! gained by splitting it; units with `ν ≥ 0` get the smaller secondary score `ν · min(u, −l) / 2` (the
//! lower line's worst gap).
//!
//! The look-ahead (filtered smart branching, De Palma et al., 2021) bounds both children of each of the
//! `k` best-scored units cheaply — the parent's intermediate bounds with the one unit fixed, one backward
//! pass — and picks the unit whose worse child bound is highest. Both are heuristics: they decide the
//! order of work, never a verdict. [`children`] splits a step's parents on the chosen units and bounds
//! all their children in one batch ([`super::bounding`]).

use crate::bound::{LayerBounds, Method, ReluSplit, SplitState};
use crate::engine::backward::{self, Choices, Keep};
use crate::engine::intermediate::Tightness;
use crate::engine::Engine;
use crate::threat::Region;

use super::bounding::{self, hidden_bounds, margin_objectives, Bounded, Job, Margins, Settings};
use super::frontier::Node;

/// A hidden unit: `(hidden layer, unit)`.
pub(crate) type Unit = (usize, usize);

/// A sub-domain to branch: its splits and its sound pre-activation bounds.
#[derive(Debug, Clone, Copy)]
pub(crate) struct Parent<'a> {
    /// Split constraints.
    pub splits: &'a SplitState,
    /// Sound pre-activation bounds per hidden layer.
    pub bounds: &'a [LayerBounds],
}

/// For each parent, its unstable free units with their scores, best first (ties by position, earlier
/// layers first). An empty list means every unit is fixed (a leaf).
pub(crate) fn ranked_units(
    engine: &Engine,
    region: &Region,
    margin: Margins,
    parents: &[Parent],
) -> Vec<Vec<(Unit, f64)>> {
    if parents.is_empty() {
        return Vec::new();
    }
    let layers = engine.depth() - 1;
    let jobs: Vec<Job> = parents
        .iter()
        .map(|p| Job {
            splits: Some(p.splits),
            given: Some((p.bounds, layers)),
            warm: None,
        })
        .collect();
    let (domains, hidden) = hidden_bounds(engine, region, &jobs, Tightness::Interval);
    let objectives = margin_objectives(engine, margin, parents.len());
    let per = margin.targets.len();
    let result = backward::run(
        engine,
        &hidden,
        &domains,
        objectives,
        Choices::default(),
        Keep::Everything,
    );
    parents
        .iter()
        .enumerate()
        .map(|(d, parent)| {
            let mut scored = Vec::new();
            for (k, layer) in parent.bounds.iter().enumerate() {
                for i in 0..layer.len() {
                    let (l, u) = (layer.lower[i], layer.upper[i]);
                    if parent.splits.get(k, i) != ReluSplit::Free || l >= 0.0 || u <= 0.0 {
                        continue;
                    }
                    // the parent's first target column (one target per tree)
                    let nu = result.on_hidden[k][(i, d * per)];
                    let score = if nu < 0.0 {
                        -nu * u / (u - l) * (-l)
                    } else {
                        0.5 * nu * u.min(-l)
                    };
                    scored.push(((k, i), score));
                }
            }
            scored.sort_by(|a, b| b.1.total_cmp(&a.1).then(a.0.cmp(&b.0)));
            scored
        })
        .collect()
}

/// For each parent and its candidate units (best-scored first), the candidate whose worse child has
/// the highest cheap bound (ties to the better child, then to the earlier candidate). A child with no
/// input counts as `+∞`.
pub(crate) fn look_ahead(
    engine: &Engine,
    region: &Region,
    margin: Margins,
    parents: &[Parent],
    candidates: &[Vec<Unit>],
) -> Vec<Unit> {
    let layers = engine.depth() - 1;
    let mut splits = Vec::new();
    let mut owner = Vec::new();
    for (p, parent) in parents.iter().enumerate() {
        for &(layer, unit) in &candidates[p] {
            for side in [ReluSplit::Active, ReluSplit::Inactive] {
                splits.push(parent.splits.with(layer, unit, side));
                owner.push(p);
            }
        }
    }
    let jobs: Vec<Job> = splits
        .iter()
        .zip(&owner)
        .map(|(s, &p)| Job {
            splits: Some(s),
            given: Some((parents[p].bounds, layers)),
            warm: None,
        })
        .collect();
    let settings = Settings {
        method: Method::Linear,
        slopes: Default::default(),
        threshold: f64::INFINITY,
    };
    let bounded = bounding::bound(engine, region, margin, &jobs, &settings);
    let mut at = 0;
    candidates
        .iter()
        .map(|units| {
            let mut best: Option<(f64, f64, Unit)> = None;
            for &unit in units {
                let (a, b) = (bounded[at].lower[0], bounded[at + 1].lower[0]);
                at += 2;
                let (worse, better) = (a.min(b), a.max(b));
                if best.is_none_or(|(w, v, _)| worse > w || (worse == w && better > v)) {
                    best = Some((worse, better, unit));
                }
            }
            best.expect("at least one candidate").2
        })
        .collect()
}

/// Where and how to branch: the engine and region of the sample, the margin of the tree and the
/// look-ahead width (1 = split the best-scored unit).
#[derive(Debug, Clone, Copy)]
pub(crate) struct Branching<'a> {
    /// The sample's engine.
    pub engine: &'a Engine,
    /// Ball ∩ input range.
    pub region: &'a Region,
    /// The tree's margin (one target).
    pub margin: Margins<'a>,
    /// Units considered per split (see [`crate::search::SearchSettings::branching_candidates`]).
    pub candidates: usize,
}

/// Both children of every parent of a step, bounded ([`children`]).
pub(crate) struct Children {
    /// The children's split states, two per parent (active, inactive).
    pub splits: Vec<SplitState>,
    /// Their bounds, in the same order.
    pub bounded: Vec<Bounded>,
}

/// Splits every parent on its chosen unit (scored, or the best of the look-ahead) and bounds both
/// children of each in one batch: layers up to the split layer keep the parent's bounds (clipped by
/// the split) and the ascent starts from the parent's best slopes and multipliers.
pub(crate) fn children(branching: Branching, settings: &Settings, parents: &[Node]) -> Children {
    let Branching {
        engine,
        region,
        margin,
        candidates,
    } = branching;
    if parents.is_empty() {
        return Children {
            splits: Vec::new(),
            bounded: Vec::new(),
        };
    }
    let views: Vec<Parent> = parents
        .iter()
        .map(|p| Parent {
            splits: &p.splits,
            bounds: &p.bounds,
        })
        .collect();
    let ranked = ranked_units(engine, region, margin, &views);
    let chosen: Vec<Unit> = if candidates > 1 {
        let candidates: Vec<Vec<Unit>> = ranked
            .iter()
            .map(|r| r.iter().take(candidates).map(|(u, _)| *u).collect())
            .collect();
        look_ahead(engine, region, margin, &views, &candidates)
    } else {
        ranked.iter().map(|r| r[0].0).collect()
    };
    let mut splits = Vec::with_capacity(2 * parents.len());
    for (parent, &(layer, unit)) in parents.iter().zip(&chosen) {
        for side in [ReluSplit::Active, ReluSplit::Inactive] {
            splits.push(parent.splits.with(layer, unit, side));
        }
    }
    let jobs: Vec<Job> = splits
        .iter()
        .enumerate()
        .map(|(c, s)| Job {
            splits: Some(s),
            given: Some((&parents[c / 2].bounds, chosen[c / 2].0 + 1)),
            warm: parents[c / 2].warm.as_ref().map(std::slice::from_ref),
        })
        .collect();
    let bounded = bounding::bound(engine, region, margin, &jobs, settings);
    Children { splits, bounded }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::model::{Dense, Network};
    use crate::threat::{Budget, Norm};
    use nalgebra::{DMatrix, DVector};

    #[test]
    fn only_free_unstable_units_are_ranked() {
        let network = Network::from_dense(vec![
            Dense::identity(3),
            Dense {
                weights: DMatrix::from_row_slice(2, 3, &[1.0, -1.0, 2.0, 0.0, 1.0, -1.0]),
                bias: DVector::zeros(2),
            },
        ]);
        let engine = Engine::new(&network);
        let region = Budget::uniform(Norm::Linf, 2.0, 3).region(&[0.0; 3], &[-2.0; 3], &[2.0; 3]);
        let bounds = vec![LayerBounds {
            lower: vec![-1.0, 0.5, -2.0],
            upper: vec![1.0, 2.0, 1.0],
        }];
        let splits = SplitState::free(&network).with(0, 2, ReluSplit::Active);
        let margin = Margins {
            label: 0,
            targets: &[1],
        };
        let parent = Parent {
            splits: &splits,
            bounds: &bounds,
        };
        let ranked = ranked_units(&engine, &region, margin, &[parent]);
        // unit 1 is stable, unit 2 is split: only unit 0 remains
        assert_eq!(ranked[0].len(), 1);
        assert_eq!(ranked[0][0].0, (0, 0));
        // margin weight on unit 0 is 1 − 0 = 1 ≥ 0: secondary score 0.5 · min(1, 1)
        assert!((ranked[0][0].1 - 0.5).abs() < 1e-12);
    }
}
