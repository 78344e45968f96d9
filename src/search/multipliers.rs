//! Lagrange multipliers of a leaf's split rows: from the dual LP over the region's bounding box, from
//! the KKT conditions at a primal optimum, and from a phase-one certificate that a sub-domain is empty.
//! Every multiplier returned is in `[0, MULTIPLIER_CAP]`; any such choice gives a sound bound once the
//! engine evaluates the Lagrangian ([`super::leaf`]), so a poor choice only loosens it.

use nalgebra::{DMatrix, DVector};

use super::piece::AffinePiece;
use super::solver::{minimise, LinearProgram, LpOutcome, Row};
use super::SearchError;
use crate::bound::concretise;
use crate::threat::Region;

/// Upper limit on each Lagrange multiplier (keeps the dual LP bounded when the sub-domain is empty; any
/// cap keeps the bound sound, a cap that binds only makes it looser).
pub(super) const MULTIPLIER_CAP: f64 = 1e6;

/// Multipliers of the split rows from the dual LP over the region's bounding box:
/// `max tᵀλ + Σ (lᵢ μᵢ − uᵢ νᵢ)` s.t. `Sᵀλ + μ − ν = g`, `0 ≤ λ ≤ cap`, `μ, ν ≥ 0`.
pub(super) fn dual_multipliers(
    region: &Region,
    piece: &AffinePiece,
) -> Result<Vec<f64>, SearchError> {
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

/// Multipliers from the KKT conditions at a primal optimum `x`: on the coordinates strictly inside the
/// box the reduced cost `g − Sᵀλ` must vanish, using only the rows active at `x`; solved by least
/// squares and clipped to `λ ≥ 0`. Cheap, and exact at a non-degenerate optimum; callers check the
/// resulting bound and fall back to the dual LP when it is not tight.
pub(super) fn kkt_multipliers(region: &Region, piece: &AffinePiece, x: &[f64]) -> Vec<f64> {
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
pub(super) fn emptiness_multipliers(
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
