//! The affine piece of a leaf: on a fixed activation pattern the margin `logit_label − logit_target`
//! is an affine function of the input, and the pattern's sub-domain is cut out by one half-space per
//! constrained unit. The piece is exact arithmetic on the network's stored weights (f64, no rounding
//! allowance): it chooses LP points and multipliers, never a bound by itself.

use nalgebra::{DMatrix, DVector};

use crate::bound::{LayerBounds, ReluSplit, SplitState};
use crate::model::Network;

/// The margin `logit_label − logit_target` as an affine function on a fixed activation pattern,
/// together with the half-spaces `S x ≥ t` that define the pattern's sub-domain.
#[derive(Debug, Clone, PartialEq)]
pub(crate) struct AffinePiece {
    /// Margin coefficients `g` (one per input feature).
    pub gradient: Vec<f64>,
    /// Margin constant `g₀`.
    pub constant: f64,
    /// Rows of `S` (one per constrained unit).
    pub rows: Vec<Vec<f64>>,
    /// Right-hand sides `t`.
    pub right_hand_sides: Vec<f64>,
}

/// The state of every hidden unit when it is determined: by the split, else by the sound bounds.
/// `None` when some free unit is unstable (not a leaf).
pub(crate) fn fixed_pattern(splits: &SplitState, bounds: &[LayerBounds]) -> Option<Vec<Vec<bool>>> {
    let mut pattern = Vec::with_capacity(splits.layers.len());
    for (layer_splits, layer_bounds) in splits.layers.iter().zip(bounds) {
        let mut active = Vec::with_capacity(layer_splits.len());
        for (i, split) in layer_splits.iter().enumerate() {
            active.push(match split {
                ReluSplit::Active => true,
                ReluSplit::Inactive => false,
                ReluSplit::Free if layer_bounds.lower[i] >= 0.0 => true,
                ReluSplit::Free if layer_bounds.upper[i] <= 0.0 => false,
                ReluSplit::Free => return None,
            });
        }
        pattern.push(active);
    }
    Some(pattern)
}

/// The affine piece of `network` for the activation `pattern`; a half-space is added for every unit
/// with `constrained[k][i]` (the split units; units fixed by their bounds need none).
pub(crate) fn affine_piece(
    network: &Network,
    pattern: &[Vec<bool>],
    constrained: &dyn Fn(usize, usize) -> bool,
    label: usize,
    target: usize,
) -> AffinePiece {
    let last = network.layers.len() - 1;
    let first = network.layers[0].to_dense();
    let mut linear: DMatrix<f64> = first.weights;
    let mut offset: DVector<f64> = first.bias;
    let mut rows = Vec::new();
    let mut right_hand_sides = Vec::new();
    for (k, layer_pattern) in pattern.iter().enumerate().take(last) {
        for (i, &active) in layer_pattern.iter().enumerate() {
            if constrained(k, i) {
                // active: z_i = A_i x + a_i ≥ 0  ⇔  A_i x ≥ −a_i; inactive: −A_i x ≥ a_i.
                let sign = if active { 1.0 } else { -1.0 };
                rows.push(linear.row(i).iter().map(|v| sign * v).collect());
                right_hand_sides.push(-sign * offset[i]);
            }
            if !active {
                linear.row_mut(i).fill(0.0);
                offset[i] = 0.0;
            }
        }
        let next = &network.layers[k + 1];
        linear = next.apply_linear(&linear);
        offset = next.apply(&offset);
    }
    let gradient = (0..linear.ncols())
        .map(|c| linear[(label, c)] - linear[(target, c)])
        .collect();
    AffinePiece {
        gradient,
        constant: offset[label] - offset[target],
        rows,
        right_hand_sides,
    }
}

/// The leaf piece for a node: its pattern and one half-space per split unit.
pub(crate) fn leaf_piece(
    network: &Network,
    splits: &SplitState,
    bounds: &[LayerBounds],
    label: usize,
    target: usize,
) -> Option<AffinePiece> {
    let pattern = fixed_pattern(splits, bounds)?;
    let constrained = |k: usize, i: usize| splits.layers[k][i] != ReluSplit::Free;
    Some(affine_piece(network, &pattern, &constrained, label, target))
}
