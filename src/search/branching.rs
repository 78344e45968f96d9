//! Choosing which unstable ReLU to split: a score per unit estimating how much fixing it would raise
//! the node's margin bound.
//!
//! The score follows the BaBSR idea (Bunel et al., 2020, "Branch and bound for piecewise linear neural
//! network verification"): push the margin objective backwards through the network with the usual
//! relaxation slopes (identity / zero for fixed units; for an unstable unit with bounds `l < 0 < u` the
//! upper line of slope `s = u/(u − l)` when the coefficient is negative, the adaptive lower line
//! otherwise). A unit whose backward coefficient `ν` is negative pays the upper line's intercept
//! `−s·l` in the bound, so `max(−ν, 0) · s · (−l)` estimates the bound gained by splitting it; units with
//! `ν ≥ 0` get the smaller secondary score `ν · min(u, −l) / 2` (the lower line's worst gap). This is a
//! heuristic only: it decides the order of work, never a verdict.

use nalgebra::DVector;

use crate::bound::{LayerBounds, ReluSplit, SplitState};
use crate::model::Network;

/// A hidden unit: `(hidden layer, unit)`.
pub(crate) type Unit = (usize, usize);

/// Unstable free units with their scores, best first (ties by position, earlier layers first).
pub(crate) fn ranked_units(
    network: &Network,
    bounds: &[LayerBounds],
    splits: &SplitState,
    label: usize,
    target: usize,
) -> Vec<(Unit, f64)> {
    let last = network.layers.len() - 1;
    let classes = network.output_dim();
    let mut objective = DVector::zeros(classes);
    objective[label] = 1.0;
    objective[target] = -1.0;
    // coefficient on the post-activation of hidden layer `last − 1`
    let mut coefficient = network.layers[last].weights.transpose() * &objective;
    let mut scored = Vec::new();
    for k in (0..last).rev() {
        let layer_bounds = &bounds[k];
        let mut on_pre = coefficient.clone();
        for i in 0..on_pre.len() {
            let (l, u) = (layer_bounds.lower[i], layer_bounds.upper[i]);
            let nu = coefficient[i];
            let split = splits.get(k, i);
            let slope = match split {
                ReluSplit::Active => 1.0,
                ReluSplit::Inactive => 0.0,
                ReluSplit::Free if l >= 0.0 => 1.0,
                ReluSplit::Free if u <= 0.0 => 0.0,
                ReluSplit::Free => {
                    let upper_slope = u / (u - l);
                    let score = if nu < 0.0 {
                        -nu * upper_slope * (-l)
                    } else {
                        0.5 * nu * u.min(-l)
                    };
                    scored.push(((k, i), score));
                    if nu < 0.0 {
                        upper_slope
                    } else if u >= -l {
                        1.0
                    } else {
                        0.0
                    }
                }
            };
            on_pre[i] = nu * slope;
        }
        if k > 0 {
            coefficient = network.layers[k].weights.transpose() * on_pre;
        }
    }
    scored.sort_by(|a, b| b.1.total_cmp(&a.1).then(a.0.cmp(&b.0)));
    scored
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::model::Dense;
    use nalgebra::DMatrix;

    #[test]
    fn only_free_unstable_units_are_ranked() {
        let network = Network::new(vec![
            Dense::identity(3),
            Dense {
                weights: DMatrix::from_row_slice(2, 3, &[1.0, -1.0, 2.0, 0.0, 1.0, -1.0]),
                bias: DVector::zeros(2),
            },
        ]);
        let bounds = vec![LayerBounds {
            lower: vec![-1.0, 0.5, -2.0],
            upper: vec![1.0, 2.0, 1.0],
        }];
        let splits = SplitState::free(&network).with(0, 2, ReluSplit::Active);
        let ranked = ranked_units(&network, &bounds, &splits, 0, 1);
        // unit 1 is stable, unit 2 is split: only unit 0 remains
        assert_eq!(ranked.len(), 1);
        assert_eq!(ranked[0].0, (0, 0));
        // margin weight on unit 0 is 1 − 0 = 1 ≥ 0: secondary score 0.5 · min(1, 1)
        assert!((ranked[0].1 - 0.5).abs() < 1e-12);
    }
}
