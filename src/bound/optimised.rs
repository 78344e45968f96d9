//! Linear relaxation with optimised lower slopes (Xu et al., 2021).
//!
//! The lower line `h ≥ α z` of an unstable ReLU is sound for every `α ∈ [0, 1]`, so the margin bound of
//! [`super::linear`] is a function of the slopes whose every value is a sound bound. Here the slopes of
//! the final margin pass (one set per target) are improved by projected gradient ascent (Adam steps,
//! projection onto `[0, 1]`), starting from the adaptive slopes; the best bound seen is kept, so the
//! result is never below the linear-relaxation bound. Intermediate bounds are those of
//! [`super::linear`]. The gradient is exact where the bound is differentiable: a forward pass of the
//! relaxed network at the minimising input gives, for each slope, its coefficient times the relaxed
//! pre-activation at that input (Danskin's theorem for the inner minimum).
//!
//! Under split constraints the final pass also carries one Lagrange multiplier `β ≥ 0` per forced unit
//! (split constraints by multipliers, Wang et al., 2021): the objective `margin − β z` (forced active,
//! where `z ≥ 0`) or `margin + β z` (forced inactive, `z ≤ 0`) is ≤ the margin on the domain, so its
//! linear lower bound is sound for every `β ≥ 0`. The multipliers start at 0 (the plain bound) and are
//! optimised with the slopes; their gradient is `∓` the relaxed pre-activation at the minimising input.

use nalgebra::DVector;

use super::linear::{final_pass, intermediate_bounds, margin_rows, Relaxation, Unit};
use super::{
    concretise, validate, BoundError, Domain, MarginBounds, Method, ReluSplit, SplitState,
    CERTIFY_TOLERANCE,
};
use crate::model::Network;
use crate::threat::Region;

/// Settings of the slope optimisation.
#[derive(Debug, Clone, PartialEq)]
pub struct SlopeOptions {
    /// Gradient steps per target.
    pub iterations: usize,
    /// Adam step size (slopes live in `[0, 1]`).
    pub step: f64,
    /// Stop optimising a target once its bound exceeds [`CERTIFY_TOLERANCE`] (it is certified).
    pub stop_when_certified: bool,
}

impl Default for SlopeOptions {
    fn default() -> SlopeOptions {
        SlopeOptions {
            iterations: 20,
            step: 0.2,
            stop_when_certified: true,
        }
    }
}

/// Lower bounds on `logit_label − logit_j` for every `j` in `targets` with optimised slopes; never
/// below [`super::linear::margin_lower_bounds`] for the same arguments.
pub fn margin_lower_bounds(
    network: &Network,
    region: &Region,
    label: usize,
    targets: &[usize],
    splits: Option<&SplitState>,
    options: &SlopeOptions,
) -> Result<MarginBounds, BoundError> {
    let network = validate(network, region, label, targets, splits)?;
    let (bounds, relaxations, domain, _) = intermediate_bounds(&network, region, splits);
    if let Domain::Empty { layer, unit } = domain {
        return Ok(MarginBounds::empty(
            Method::OptimisedLinear,
            targets,
            bounds,
            layer,
            unit,
        ));
    }
    let (mut result, _) = final_pass(&network, region, label, targets, bounds, &relaxations);
    result.method = Method::OptimisedLinear;
    let (rows, constants) = margin_rows(&network, label, targets);
    for t in 0..targets.len() {
        if options.stop_when_certified && result.lower[t] > CERTIFY_TOLERANCE {
            continue;
        }
        let row: DVector<f64> = rows.row(t).transpose();
        if let Some((value, point)) = optimise_target(
            &network,
            region,
            &relaxations,
            splits,
            &row,
            constants[t],
            options,
        ) {
            if value > result.lower[t] {
                result.lower[t] = value;
                result.minimisers[t] = Some(point);
            }
        }
    }
    Ok(result)
}

/// One number per hidden unit, one vector per hidden layer: the lower slopes of unstable units, or the
/// multipliers of forced units (other entries unused).
type Slopes = Vec<Vec<f64>>;

/// The sign `σ` of a split multiplier's term `σ β z` in the objective: −1 for forced active
/// (`z ≥ 0`), +1 for forced inactive (`z ≤ 0`), 0 for free units.
fn split_sign(splits: Option<&SplitState>, k: usize, i: usize) -> f64 {
    match splits.map(|s| s.layers[k][i]).unwrap_or_default() {
        ReluSplit::Free => 0.0,
        ReluSplit::Active => -1.0,
        ReluSplit::Inactive => 1.0,
    }
}

struct Evaluation {
    value: f64,
    point: Vec<f64>,
    gradient: Slopes,
    multiplier_gradient: Slopes,
}

/// The bound of one margin row for given slopes, its minimising input and the slope gradient.
#[allow(clippy::too_many_arguments)]
fn evaluate(
    network: &Network,
    region: &Region,
    relaxations: &[Relaxation],
    splits: Option<&SplitState>,
    slopes: &Slopes,
    multipliers: &Slopes,
    row: &DVector<f64>,
    constant: f64,
) -> Evaluation {
    let top = network.layers.len() - 1;
    // Backward pass, keeping the coefficients on every hidden layer's output before relaxation.
    let mut coefficients: Vec<DVector<f64>> = vec![DVector::zeros(0); top];
    let mut a = row.clone();
    let mut constant = constant;
    for k in (0..top).rev() {
        let mut relaxed = a.clone();
        for (i, unit) in relaxations[k].units.iter().enumerate() {
            let v = a[i];
            relaxed[i] = match *unit {
                Unit::Identity => v,
                Unit::Zero => 0.0,
                Unit::Unstable {
                    upper_slope,
                    upper_intercept,
                    ..
                } => {
                    if v >= 0.0 {
                        v * slopes[k][i]
                    } else {
                        constant += v * upper_intercept;
                        v * upper_slope
                    }
                }
            };
            relaxed[i] += split_sign(splits, k, i) * multipliers[k][i];
        }
        coefficients[k] = a;
        let layer = &network.layers[k];
        constant += relaxed.dot(&layer.bias);
        a = layer.weights.tr_mul(&relaxed);
    }
    let input: Vec<f64> = a.iter().copied().collect();
    let (minimum, point) = concretise::minimum_with_point(region, &input);
    // Forward pass of the relaxed network at the minimising input: the adjoint of the backward pass.
    let mut gradient: Slopes = relaxations
        .iter()
        .map(|r| vec![0.0; r.units.len()])
        .collect();
    let mut multiplier_gradient = gradient.clone();
    let mut adjoint = DVector::from_column_slice(&point);
    for k in 0..top {
        let layer = &network.layers[k];
        let z = &layer.weights * &adjoint + &layer.bias;
        let mut next = DVector::zeros(z.len());
        for (i, unit) in relaxations[k].units.iter().enumerate() {
            let v = coefficients[k][i];
            multiplier_gradient[k][i] = split_sign(splits, k, i) * z[i];
            next[i] = match *unit {
                Unit::Identity => z[i],
                Unit::Zero => 0.0,
                Unit::Unstable {
                    upper_slope,
                    upper_intercept,
                    ..
                } => {
                    if v >= 0.0 {
                        gradient[k][i] = v * z[i];
                        slopes[k][i] * z[i]
                    } else {
                        upper_slope * z[i] + upper_intercept
                    }
                }
            };
        }
        adjoint = next;
    }
    Evaluation {
        value: minimum + constant,
        point,
        gradient,
        multiplier_gradient,
    }
}

/// Adam moments of one parameter set.
struct Moments {
    first: Slopes,
    second: Slopes,
}

impl Moments {
    fn like(parameters: &Slopes) -> Moments {
        let zeros: Slopes = parameters.iter().map(|p| vec![0.0; p.len()]).collect();
        Moments {
            first: zeros.clone(),
            second: zeros,
        }
    }

    /// One projected Adam ascent step on the entries selected by `active`, clamped to `[low, high]`.
    #[allow(clippy::too_many_arguments)]
    fn ascend(
        &mut self,
        parameters: &mut Slopes,
        gradient: &Slopes,
        active: impl Fn(usize, usize) -> bool,
        step_size: f64,
        step: usize,
        low: f64,
        high: f64,
    ) {
        let (beta1, beta2, epsilon) = (0.9f64, 0.999f64, 1e-12);
        let correction1 = 1.0 - beta1.powi(step as i32);
        let correction2 = 1.0 - beta2.powi(step as i32);
        for k in 0..parameters.len() {
            for i in 0..parameters[k].len() {
                if !active(k, i) {
                    continue;
                }
                let g = gradient[k][i];
                self.first[k][i] = beta1 * self.first[k][i] + (1.0 - beta1) * g;
                self.second[k][i] = beta2 * self.second[k][i] + (1.0 - beta2) * g * g;
                let m = self.first[k][i] / correction1;
                let v = self.second[k][i] / correction2;
                parameters[k][i] =
                    (parameters[k][i] + step_size * m / (v.sqrt() + epsilon)).clamp(low, high);
            }
        }
    }
}

/// Projected Adam ascent on the slopes (and split multipliers) of one margin row; the best
/// (value, point) seen.
fn optimise_target(
    network: &Network,
    region: &Region,
    relaxations: &[Relaxation],
    splits: Option<&SplitState>,
    row: &DVector<f64>,
    constant: f64,
    options: &SlopeOptions,
) -> Option<(f64, Vec<f64>)> {
    let mut slopes: Slopes = relaxations
        .iter()
        .map(|r| {
            r.units
                .iter()
                .map(|u| match u {
                    Unit::Unstable { lower_slope, .. } => *lower_slope,
                    _ => 0.0,
                })
                .collect()
        })
        .collect();
    let mut multipliers: Slopes = slopes.iter().map(|s| vec![0.0; s.len()]).collect();
    let mut slope_moments = Moments::like(&slopes);
    let mut multiplier_moments = Moments::like(&multipliers);
    let has_splits = splits.map(|s| s.split_count() > 0).unwrap_or(false);
    let mut best: Option<(f64, Vec<f64>)> = None;
    for step in 1..=options.iterations.max(1) {
        let evaluation = evaluate(
            network,
            region,
            relaxations,
            splits,
            &slopes,
            &multipliers,
            row,
            constant,
        );
        if best
            .as_ref()
            .map(|b| evaluation.value > b.0)
            .unwrap_or(true)
        {
            best = Some((evaluation.value, evaluation.point.clone()));
        }
        if options.stop_when_certified && evaluation.value > CERTIFY_TOLERANCE {
            break;
        }
        slope_moments.ascend(
            &mut slopes,
            &evaluation.gradient,
            |k, i| matches!(relaxations[k].units[i], Unit::Unstable { .. }),
            options.step,
            step,
            0.0,
            1.0,
        );
        if has_splits {
            multiplier_moments.ascend(
                &mut multipliers,
                &evaluation.multiplier_gradient,
                |k, i| split_sign(splits, k, i) != 0.0,
                options.step,
                step,
                0.0,
                f64::INFINITY,
            );
        }
    }
    best
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::model::Dense;
    use crate::threat::{Budget, Norm};
    use nalgebra::{DMatrix, DVector};

    fn example() -> (Network, Region) {
        let w0 = DMatrix::from_row_slice(3, 2, &[1.0, -0.5, 0.3, 0.8, -0.7, 0.4]);
        let w1 = DMatrix::from_row_slice(3, 3, &[0.5, -0.2, 0.9, -0.6, 0.4, 0.1, 0.2, 0.3, -0.8]);
        let network = Network::new(vec![
            Dense {
                weights: w0,
                bias: DVector::from_vec(vec![0.1, -0.1, 0.05]),
            },
            Dense {
                weights: w1,
                bias: DVector::from_vec(vec![0.0, 0.1, -0.2]),
            },
        ]);
        let inf = f64::INFINITY;
        let region = Budget::uniform(Norm::Linf, 0.6, 2).region(&[0.2, 0.1], &[-inf; 2], &[inf; 2]);
        (network, region)
    }

    /// The analytic slope and multiplier gradients agree with central finite differences (where the
    /// bound is smooth).
    #[test]
    fn gradient_matches_finite_differences() {
        let (network, region) = example();
        let free = SplitState::free(&network);
        for splits in [None, Some(free.with(0, 2, ReluSplit::Active))] {
            let (_, relaxations, _, _) = intermediate_bounds(&network, &region, splits.as_ref());
            let (rows, constants) = margin_rows(&network, 0, &[1]);
            let row: DVector<f64> = rows.row(0).transpose();
            let unstable = relaxations[0]
                .units
                .iter()
                .filter(|u| matches!(u, Unit::Unstable { .. }))
                .count();
            assert!(unstable >= 2, "the example needs unstable units");
            let slopes: Slopes = vec![vec![0.37, 0.61, 0.45]];
            let multipliers: Slopes = vec![vec![0.0, 0.0, 0.3]];
            let run = |s: &Slopes, m: &Slopes| {
                evaluate(
                    &network,
                    &region,
                    &relaxations,
                    splits.as_ref(),
                    s,
                    m,
                    &row,
                    constants[0],
                )
            };
            let base = run(&slopes, &multipliers);
            let h = 1e-6;
            let mut checked = 0;
            for i in 0..3 {
                if matches!(relaxations[0].units[i], Unit::Unstable { .. }) {
                    let (mut plus, mut minus) = (slopes.clone(), slopes.clone());
                    plus[0][i] += h;
                    minus[0][i] -= h;
                    let numeric = (run(&plus, &multipliers).value
                        - run(&minus, &multipliers).value)
                        / (2.0 * h);
                    assert!(
                        (numeric - base.gradient[0][i]).abs() < 1e-5,
                        "slope {i}: numeric {numeric}, analytic {}",
                        base.gradient[0][i]
                    );
                    checked += 1;
                }
                if split_sign(splits.as_ref(), 0, i) != 0.0 {
                    let (mut plus, mut minus) = (multipliers.clone(), multipliers.clone());
                    plus[0][i] += h;
                    minus[0][i] -= h;
                    let numeric =
                        (run(&slopes, &plus).value - run(&slopes, &minus).value) / (2.0 * h);
                    assert!(
                        (numeric - base.multiplier_gradient[0][i]).abs() < 1e-5,
                        "multiplier {i}: numeric {numeric}, analytic {}",
                        base.multiplier_gradient[0][i]
                    );
                    checked += 1;
                }
            }
            assert!(checked >= 2);
        }
    }
}
