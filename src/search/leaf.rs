//! Leaves of the branch and bound: sub-domains on which every hidden ReLU has a known state.
//!
//! With every unit fixed (by a split or because its sound bounds do not straddle zero) the network is an
//! affine map on the sub-domain, and the sub-domain is the region cut by one half-space per split unit
//! (`z_i(x) ≥ 0` for active, `≤ 0` for inactive). The minimum margin there is a linear program.
//!
//! Soundness does not rest on the LP solver's objective value. The solver computes the Lagrange
//! multipliers `λ ≥ 0` of the split rows (the dual LP over the region's bounding box); the bound returned
//! is the Lagrangian `min_{x ∈ region} margin(x) − Σ λᵢ sᵢ zᵢ(x)` (`sᵢ = +1` for a unit forced active,
//! `−1` forced inactive), evaluated **by the bound engine** as a backward pass with split multipliers
//! ([`crate::engine::backward`]), so it carries the engine's rounding allowance and the fold error of
//! the network: a bound on the real-number network. By weak duality it is a lower bound on the margin
//! over the sub-domain for **every** `λ ≥ 0`, so a solver inaccuracy can only loosen it. (The f64
//! Lagrangian of the multiplied-out affine piece is used only to choose multipliers.) For an L-inf region the
//! dual LP is exact and the bound equals the minimum (up to rounding); for L2 it is sound but may be
//! loose. The primal LP gives the minimising input, used to look for counterexamples and, in the
//! optimality mode, as an achieved margin. Nothing here reports a counterexample: callers validate the
//! point with a plain forward pass.
//!
//! The affine piece of a leaf is built in [`super::piece`]; the multipliers are chosen in
//! [`super::multipliers`].

use nalgebra::{DMatrix, DVector};

use super::multipliers::{
    dual_multipliers, emptiness_multipliers, kkt_multipliers, MULTIPLIER_CAP,
};
use super::piece::AffinePiece;
use super::solver::{minimise, LinearProgram, LpOutcome, Row};
use super::SearchError;
use crate::bound::{LayerBounds, ReluSplit, SplitState};
use crate::engine::backward::{self, Choices, Keep, Objectives};
use crate::engine::intermediate::{self, Given, Tightness};
use crate::engine::{Domains, Engine};
use crate::threat::Region;

/// What solving a leaf gave.
#[derive(Debug, Clone, PartialEq)]
pub(crate) struct LeafSolution {
    /// Sound lower bound on the margin over the sub-domain (`+∞` when the Lagrangian proves it empty
    /// beyond any margin of interest).
    pub lower: f64,
    /// The primal minimiser moved into the region (`None` when the solver finds the sub-domain empty).
    pub point: Option<Vec<f64>>,
}

/// Where the engine evaluates a leaf's Lagrangian: the sub-domain and the margin.
#[derive(Clone, Copy)]
pub(crate) struct LeafDomain<'a> {
    /// The engine of the classifier network.
    pub engine: &'a Engine,
    /// The node's split constraints (their order gives the piece's rows).
    pub splits: &'a SplitState,
    /// The node's sound pre-activation bounds.
    pub bounds: &'a [LayerBounds],
    /// The sample's class.
    pub label: usize,
    /// The forbidden class of the tree.
    pub target: usize,
}

/// The Lagrangian bound for `multipliers` (one per split row, clamped to `[0, cap]`), evaluated by the
/// engine with its rounding allowance: sound for the real-number network.
pub(crate) fn engine_bound(leaf: &LeafDomain, region: &Region, multipliers: &[f64]) -> f64 {
    let engine = leaf.engine;
    let hidden_sizes = engine.hidden_sizes();
    let domains = Domains::new(vec![region], &[Some(leaf.splits)], &hidden_sizes);
    let lower: Vec<DMatrix<f64>> = leaf
        .bounds
        .iter()
        .map(|b| DMatrix::from_column_slice(b.len(), 1, &b.lower))
        .collect();
    let upper: Vec<DMatrix<f64>> = leaf
        .bounds
        .iter()
        .map(|b| DMatrix::from_column_slice(b.len(), 1, &b.upper))
        .collect();
    let hidden = intermediate::compute(
        engine,
        &domains,
        Tightness::Interval,
        Some(Given {
            lower: &lower,
            upper: &upper,
            start: hidden_sizes.len(),
        }),
    );
    let mut terms: Vec<DMatrix<f64>> = hidden_sizes.iter().map(|&n| DMatrix::zeros(n, 1)).collect();
    let mut row = 0;
    for (k, layer) in leaf.splits.layers.iter().enumerate() {
        for (i, split) in layer.iter().enumerate() {
            let sign = match split {
                ReluSplit::Free => continue,
                ReluSplit::Active => -1.0,
                ReluSplit::Inactive => 1.0,
            };
            let lambda = multipliers.get(row).copied().unwrap_or(0.0);
            terms[k][(i, 0)] = sign * lambda.clamp(0.0, MULTIPLIER_CAP);
            row += 1;
        }
    }
    let mut coefficients = DMatrix::zeros(engine.output_dim(), 1);
    coefficients[(leaf.label, 0)] = 1.0;
    coefficients[(leaf.target, 0)] = -1.0;
    let objectives = Objectives {
        top: engine.depth() - 1,
        coefficients,
        constant: DVector::zeros(1),
        domain: vec![0],
    };
    let choices = Choices {
        slopes: None,
        multipliers: Some(&terms),
    };
    backward::run(engine, &hidden, &domains, objectives, choices, Keep::Bounds).lower[0]
}

/// The primal LP `min g·x` s.t. `S x ≥ t` over the region's bounding box; the minimiser is moved into
/// the region. `None` when the solver finds the sub-domain empty.
pub(crate) fn primal_point(
    region: &Region,
    piece: &AffinePiece,
) -> Result<Option<Vec<f64>>, SearchError> {
    let n = piece.gradient.len();
    let mut program = LinearProgram::default();
    for i in 0..n {
        program.add_variable(
            piece.gradient[i],
            region.outer_lower[i],
            region.outer_upper[i],
        );
    }
    for (row, t) in piece.rows.iter().zip(&piece.right_hand_sides) {
        program.rows.push(Row {
            coefficients: row
                .iter()
                .enumerate()
                .filter(|(_, v)| **v != 0.0)
                .map(|(i, v)| (i, *v))
                .collect(),
            lower: *t,
            upper: f64::INFINITY,
        });
    }
    match minimise(&program, None) {
        Ok(LpOutcome::Optimal { mut point, .. }) => {
            region.project(&mut point);
            Ok(Some(point))
        }
        Ok(LpOutcome::Infeasible | LpOutcome::Unbounded) => Ok(None),
        // A numerical failure gives no point; the bound falls back to the dual side.
        Err(SearchError::Solver { .. }) => Ok(None),
        Err(other) => Err(other),
    }
}

/// Solves a leaf: the primal LP for the minimiser and value, then a sound Lagrangian bound from the KKT
/// multipliers at the optimum; when that bound is not within `1e-7` of the LP value (degenerate optimum,
/// solver noise, an L2 region) and does not exceed `threshold`, the multipliers of the dual LP are tried
/// as well and the larger bound kept. The point is the primal minimiser moved into the region.
pub(crate) fn solve_leaf(
    leaf: &LeafDomain,
    region: &Region,
    piece: &AffinePiece,
    threshold: f64,
) -> Result<LeafSolution, SearchError> {
    let point = primal_point(region, piece)?;
    let mut lower = f64::NEG_INFINITY;
    let mut value = f64::NEG_INFINITY;
    if let Some(x) = &point {
        value = piece
            .gradient
            .iter()
            .zip(x)
            .map(|(g, v)| g * v)
            .sum::<f64>()
            + piece.constant;
        lower = engine_bound(leaf, region, &kkt_multipliers(region, piece, x));
    }
    if point.is_none() {
        if let Some(multipliers) = emptiness_multipliers(region, piece)? {
            lower = engine_bound(leaf, region, &multipliers);
        }
    }
    let tight = point.is_some() && lower >= value - 1e-7 * (1.0 + value.abs());
    if !(tight || lower > threshold) {
        let multipliers = dual_multipliers(region, piece)?;
        lower = lower.max(engine_bound(leaf, region, &multipliers));
    }
    Ok(LeafSolution { lower, point })
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::model::{Dense, Network};
    use crate::search::piece::affine_piece;
    use crate::threat::{Budget, Norm};

    fn tiny() -> Network {
        // 2 inputs, 2 hidden units, 2 logits.
        Network::from_dense(vec![
            Dense {
                weights: DMatrix::from_row_slice(2, 2, &[1.0, -1.0, 0.5, 1.0]),
                bias: DVector::from_vec(vec![0.1, -0.2]),
            },
            Dense {
                weights: DMatrix::from_row_slice(2, 2, &[1.0, -2.0, -1.0, 1.0]),
                bias: DVector::from_vec(vec![0.3, 0.0]),
            },
        ])
    }

    #[test]
    fn affine_piece_matches_the_forward_pass_where_the_pattern_holds() {
        let network = tiny();
        for x in [[0.3, -0.4], [-0.5, 0.2], [0.9, 0.9], [-0.2, -0.9]] {
            let z = network.pre_activations(&x);
            let pattern = vec![z[0].iter().map(|v| *v >= 0.0).collect::<Vec<_>>()];
            let piece = affine_piece(&network, &pattern, &|_, _| true, 0, 1);
            let logits = network.forward(&x);
            let margin: f64 = piece
                .gradient
                .iter()
                .zip(&x)
                .map(|(g, v)| g * v)
                .sum::<f64>()
                + piece.constant;
            assert!((margin - (logits[0] - logits[1])).abs() < 1e-12);
            // the point satisfies its own pattern's half-spaces
            for (row, t) in piece.rows.iter().zip(&piece.right_hand_sides) {
                let s: f64 = row.iter().zip(&x).map(|(a, b)| a * b).sum();
                assert!(s >= t - 1e-12);
            }
        }
    }

    #[test]
    fn leaf_bound_equals_the_primal_minimum_on_a_box() {
        let network = tiny();
        let budget = Budget::uniform(Norm::Linf, 1.0, 2);
        let region = budget.region(&[0.0, 0.0], &[-10.0; 2], &[10.0; 2]);
        for pattern in [[true, true], [true, false], [false, true], [false, false]] {
            let pattern = vec![pattern.to_vec()];
            let piece = affine_piece(&network, &pattern, &|_, _| true, 0, 1);
            let splits = SplitState {
                layers: vec![pattern[0]
                    .iter()
                    .map(|&a| {
                        if a {
                            ReluSplit::Active
                        } else {
                            ReluSplit::Inactive
                        }
                    })
                    .collect()],
            };
            // Sound bounds of the whole region hold on the sub-domain too.
            let (bounds, _) =
                crate::bound::interval::pre_activation_bounds(&network, &region, None).unwrap();
            let engine = Engine::new(&network);
            let leaf = LeafDomain {
                engine: &engine,
                splits: &splits,
                bounds: &bounds,
                label: 0,
                target: 1,
            };
            let solution = solve_leaf(&leaf, &region, &piece, f64::INFINITY).unwrap();
            if let Some(point) = solution.point {
                let value: f64 = piece
                    .gradient
                    .iter()
                    .zip(&point)
                    .map(|(g, v)| g * v)
                    .sum::<f64>()
                    + piece.constant;
                // weak duality: bound ≤ primal value; strong duality for LPs: equal.
                assert!(solution.lower <= value + 1e-7);
                assert!((solution.lower - value).abs() < 1e-6);
            } else {
                // empty sub-domain: the bound must not be a small number
                assert!(solution.lower > 1.0);
            }
        }
    }
}
