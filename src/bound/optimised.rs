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

use nalgebra::DVector;

use super::linear::{final_pass, intermediate_bounds, margin_rows, Relaxation, Unit};
use super::{
    concretise, validate, BoundError, Domain, MarginBounds, Method, SplitState, CERTIFY_TOLERANCE,
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
        if let Some((value, point)) =
            optimise_target(&network, region, &relaxations, &row, constants[t], options)
        {
            if value > result.lower[t] {
                result.lower[t] = value;
                result.minimisers[t] = Some(point);
            }
        }
    }
    Ok(result)
}

/// Slopes of the unstable units, one vector per hidden layer (entries of stable units are unused).
type Slopes = Vec<Vec<f64>>;

struct Evaluation {
    value: f64,
    point: Vec<f64>,
    gradient: Slopes,
}

/// The bound of one margin row for given slopes, its minimising input and the slope gradient.
fn evaluate(
    network: &Network,
    region: &Region,
    relaxations: &[Relaxation],
    slopes: &Slopes,
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
    let mut adjoint = DVector::from_column_slice(&point);
    for k in 0..top {
        let layer = &network.layers[k];
        let z = &layer.weights * &adjoint + &layer.bias;
        let mut next = DVector::zeros(z.len());
        for (i, unit) in relaxations[k].units.iter().enumerate() {
            let v = coefficients[k][i];
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
    }
}

/// Projected Adam ascent on the slopes of one margin row; the best (value, point) seen.
fn optimise_target(
    network: &Network,
    region: &Region,
    relaxations: &[Relaxation],
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
    let mut first: Slopes = slopes.iter().map(|s| vec![0.0; s.len()]).collect();
    let mut second = first.clone();
    let (beta1, beta2, epsilon) = (0.9f64, 0.999f64, 1e-12);
    let mut best: Option<(f64, Vec<f64>)> = None;
    for step in 1..=options.iterations.max(1) {
        let evaluation = evaluate(network, region, relaxations, &slopes, row, constant);
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
        let correction1 = 1.0 - beta1.powi(step as i32);
        let correction2 = 1.0 - beta2.powi(step as i32);
        for k in 0..slopes.len() {
            for i in 0..slopes[k].len() {
                if !matches!(relaxations[k].units[i], Unit::Unstable { .. }) {
                    continue;
                }
                let g = evaluation.gradient[k][i];
                first[k][i] = beta1 * first[k][i] + (1.0 - beta1) * g;
                second[k][i] = beta2 * second[k][i] + (1.0 - beta2) * g * g;
                let m = first[k][i] / correction1;
                let v = second[k][i] / correction2;
                slopes[k][i] =
                    (slopes[k][i] + options.step * m / (v.sqrt() + epsilon)).clamp(0.0, 1.0);
            }
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

    /// The analytic slope gradient agrees with central finite differences (where the bound is smooth).
    #[test]
    fn gradient_matches_finite_differences() {
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
        let (_, relaxations, _, _) = intermediate_bounds(&network, &region, None);
        let (rows, constants) = margin_rows(&network, 0, &[1]);
        let row: DVector<f64> = rows.row(0).transpose();
        let unstable = relaxations[0]
            .units
            .iter()
            .filter(|u| matches!(u, Unit::Unstable { .. }))
            .count();
        assert!(unstable >= 2, "the example needs unstable units");
        let slopes: Slopes = vec![vec![0.37, 0.61, 0.45]];
        let base = evaluate(&network, &region, &relaxations, &slopes, &row, constants[0]);
        for i in 0..3 {
            if !matches!(relaxations[0].units[i], Unit::Unstable { .. }) {
                continue;
            }
            let h = 1e-6;
            let mut plus = slopes.clone();
            plus[0][i] += h;
            let mut minus = slopes.clone();
            minus[0][i] -= h;
            let up = evaluate(&network, &region, &relaxations, &plus, &row, constants[0]).value;
            let down = evaluate(&network, &region, &relaxations, &minus, &row, constants[0]).value;
            let numeric = (up - down) / (2.0 * h);
            assert!(
                (numeric - base.gradient[0][i]).abs() < 1e-5,
                "unit {i}: numeric {numeric}, analytic {}",
                base.gradient[0][i]
            );
        }
    }
}
