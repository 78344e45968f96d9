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

use nalgebra::{DMatrix, DVector};

use super::solver::{minimise, LinearProgram, LpOutcome, Row};
use super::SearchError;
use crate::bound::{concretise, LayerBounds, ReluSplit, SplitState};
use crate::engine::backward::{self, Choices, Keep, Objectives};
use crate::engine::intermediate::{self, Given, Tightness};
use crate::engine::{Domains, Engine};
use crate::model::Network;
use crate::threat::Region;

/// Upper limit on each Lagrange multiplier (keeps the dual LP bounded when the sub-domain is empty; any
/// cap keeps the bound sound, a cap that binds only makes it looser).
const MULTIPLIER_CAP: f64 = 1e6;

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

/// Multipliers of the split rows from the dual LP over the region's bounding box:
/// `max tᵀλ + Σ (lᵢ μᵢ − uᵢ νᵢ)` s.t. `Sᵀλ + μ − ν = g`, `0 ≤ λ ≤ cap`, `μ, ν ≥ 0`.
fn dual_multipliers(region: &Region, piece: &AffinePiece) -> Result<Vec<f64>, SearchError> {
    let rows = piece.rows.len();
    if rows == 0 {
        return Ok(Vec::new());
    }
    let n = piece.gradient.len();
    let mut program = LinearProgram::default();
    // maximise ⇔ minimise the negation
    for t in &piece.right_hand_sides {
        program.add_variable(-t, 0.0, MULTIPLIER_CAP);
    }
    let mut mu = Vec::with_capacity(n);
    let mut nu = Vec::with_capacity(n);
    for i in 0..n {
        mu.push(program.add_variable(-region.outer_lower[i], 0.0, f64::INFINITY));
        nu.push(program.add_variable(region.outer_upper[i], 0.0, f64::INFINITY));
    }
    for i in 0..n {
        let mut coefficients: Vec<(usize, f64)> = (0..rows)
            .filter(|r| piece.rows[*r][i] != 0.0)
            .map(|r| (r, piece.rows[r][i]))
            .collect();
        coefficients.push((mu[i], 1.0));
        coefficients.push((nu[i], -1.0));
        program.rows.push(Row {
            coefficients,
            lower: piece.gradient[i],
            upper: piece.gradient[i],
        });
    }
    match minimise(&program, None) {
        Ok(LpOutcome::Optimal { point, .. }) => Ok(point[..rows].to_vec()),
        // The dual is feasible (λ = 0 with μ − ν = g) and bounded by the cap; on any solver trouble fall
        // back to λ = 0 (the box minimum: sound, possibly loose).
        Ok(LpOutcome::Infeasible | LpOutcome::Unbounded) | Err(SearchError::Solver { .. }) => {
            Ok(vec![0.0; rows])
        }
        Err(other) => Err(other),
    }
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

/// Multipliers from the KKT conditions at a primal optimum `x`: on the coordinates strictly inside the
/// box the reduced cost `g − Sᵀλ` must vanish, using only the rows active at `x`; solved by least
/// squares and clipped to `λ ≥ 0`. Cheap, and exact at a non-degenerate optimum; callers check the
/// resulting bound and fall back to the dual LP when it is not tight.
fn kkt_multipliers(region: &Region, piece: &AffinePiece, x: &[f64]) -> Vec<f64> {
    let rows = piece.rows.len();
    let mut multipliers = vec![0.0; rows];
    let scale = 1e-7;
    let active: Vec<usize> = (0..rows)
        .filter(|&r| {
            let value: f64 = piece.rows[r].iter().zip(x).map(|(a, b)| a * b).sum();
            value - piece.right_hand_sides[r] <= scale * (1.0 + piece.right_hand_sides[r].abs())
        })
        .collect();
    let free: Vec<usize> = (0..x.len())
        .filter(|&i| {
            let width = region.outer_upper[i] - region.outer_lower[i];
            x[i] > region.outer_lower[i] + scale * (1.0 + width)
                && x[i] < region.outer_upper[i] - scale * (1.0 + width)
        })
        .collect();
    if active.is_empty() || free.is_empty() {
        return multipliers;
    }
    // (S_{A,F})ᵀ λ_A = g_F in the least-squares sense.
    let matrix = DMatrix::from_fn(free.len(), active.len(), |i, r| {
        piece.rows[active[r]][free[i]]
    });
    let target = DVector::from_fn(free.len(), |i, _| piece.gradient[free[i]]);
    let Ok(solution) = matrix.svd(true, true).solve(&target, 1e-12) else {
        return multipliers;
    };
    for (r, value) in active.iter().zip(solution.iter()) {
        multipliers[*r] = value.max(0.0);
    }
    multipliers
}

/// A sound bound for a sub-domain the primal LP found empty, from the phase-one LP
/// `min Σ s_r` s.t. `S x + s ≥ t`, `s ≥ 0`, `x` in the box. Its KKT multipliers `y ∈ [0, 1]` (1 on rows
/// with positive slack, least squares on the active rows so that `Sᵀy` vanishes on free coordinates)
/// give `φ(y) = min_{x ∈ region} yᵀ(t − S x)`; when `φ(y) > 0` no region input meets the rows, and the
/// Lagrangian with multipliers `cap · y` is a sound (very large) bound. `None` when the certificate fails.
fn emptiness_multipliers(
    region: &Region,
    piece: &AffinePiece,
) -> Result<Option<Vec<f64>>, SearchError> {
    let n = piece.gradient.len();
    let rows = piece.rows.len();
    let mut program = LinearProgram::default();
    for i in 0..n {
        program.add_variable(0.0, region.outer_lower[i], region.outer_upper[i]);
    }
    for (r, (row, t)) in piece.rows.iter().zip(&piece.right_hand_sides).enumerate() {
        let slack = program.add_variable(1.0, 0.0, f64::INFINITY);
        let mut coefficients: Vec<(usize, f64)> = row
            .iter()
            .enumerate()
            .filter(|(_, v)| **v != 0.0)
            .map(|(i, v)| (i, *v))
            .collect();
        coefficients.push((slack, 1.0));
        debug_assert_eq!(slack, n + r);
        program.rows.push(Row {
            coefficients,
            lower: *t,
            upper: f64::INFINITY,
        });
    }
    let Ok(LpOutcome::Optimal { point, .. }) = minimise(&program, None) else {
        return Ok(None);
    };
    let x = &point[..n];
    let scale = 1e-7;
    let mut y = vec![0.0; rows];
    let mut active = Vec::new();
    for r in 0..rows {
        let slack = point[n + r];
        let value: f64 = piece.rows[r].iter().zip(x).map(|(a, b)| a * b).sum();
        let tolerance = scale * (1.0 + piece.right_hand_sides[r].abs());
        if slack > tolerance {
            y[r] = 1.0;
        } else if value - piece.right_hand_sides[r] <= tolerance {
            active.push(r);
        }
    }
    let free: Vec<usize> = (0..n)
        .filter(|&i| {
            let width = region.outer_upper[i] - region.outer_lower[i];
            x[i] > region.outer_lower[i] + scale * (1.0 + width)
                && x[i] < region.outer_upper[i] - scale * (1.0 + width)
        })
        .collect();
    if !active.is_empty() && !free.is_empty() {
        let matrix = DMatrix::from_fn(free.len(), active.len(), |i, r| {
            piece.rows[active[r]][free[i]]
        });
        let target = DVector::from_fn(free.len(), |i, _| {
            -(0..rows)
                .map(|r| y[r] * piece.rows[r][free[i]])
                .sum::<f64>()
        });
        if let Ok(solution) = matrix.svd(true, true).solve(&target, 1e-12) {
            for (r, value) in active.iter().zip(solution.iter()) {
                y[*r] = value.clamp(0.0, 1.0);
            }
        }
    }
    // φ(y) = yᵀt + min_x (−Sᵀy)ᵀx
    let mut coefficients = vec![0.0; n];
    let mut constant = 0.0;
    for ((row, t), weight) in piece.rows.iter().zip(&piece.right_hand_sides).zip(&y) {
        constant += weight * t;
        for (c, s) in coefficients.iter_mut().zip(row) {
            *c -= weight * s;
        }
    }
    let certificate = concretise::minimum(region, &coefficients) + constant;
    if certificate <= 0.0 {
        return Ok(None);
    }
    Ok(Some(y.iter().map(|v| v * MULTIPLIER_CAP).collect()))
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
    use crate::model::Dense;
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
