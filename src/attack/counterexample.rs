//! Validated counterexamples: a perturbed input that a plain forward pass confirms changes the answer
//! into a forbidden class, and that lies inside the region.
//!
//! [`validate`] is the only way a [`Counterexample`] is made in the attack module. It re-runs
//! [`Network::forward`] (not the attack's own buffers) and checks [`Region::contains`], which is exact
//! and has no tolerance (L-inf: `|x_i − c_i| ≤ r_i` in real arithmetic; L2: a rigorous upper bound of
//! the scaled sum of squares ≤ 1; inside the input range); it never accepts a point on the strength of a
//! margin estimate alone, nor a point a rounding step outside the ball.

use crate::model::{predicted_class, Network};
use crate::threat::Region;

/// A validated perturbed input that changes the model's answer into a forbidden class.
#[derive(Debug, Clone, PartialEq)]
pub struct Counterexample {
    /// The perturbed input (raw units); inside the region.
    pub input: Vec<f64>,
    /// Logits of the plain forward pass at `input`.
    pub logits: Vec<f64>,
    /// The class the model gives `input` (a forbidden class, never the label).
    pub predicted: usize,
    /// Plain `‖input − center‖` in the region's norm, raw units (not scaled by the radii), computed in
    /// f64 and never above the largest radius ([`Region::distance`]).
    pub distance: f64,
    /// `logit[label] − max over forbidden classes of logit[class]` at `input` (≤ 0).
    pub margin: f64,
}

/// `logits[label] − max_{j ∈ forbidden} logits[j]`; +∞ when `forbidden` is empty. A point keeps its
/// answer against every forbidden class while this is positive.
pub fn forbidden_margin(logits: &[f64], label: usize, forbidden: &[usize]) -> f64 {
    let best_other = forbidden
        .iter()
        .map(|&j| logits[j])
        .fold(f64::NEG_INFINITY, f64::max);
    logits[label] - best_other
}

/// Confirms `x` as a counterexample for a sample with `label` whose answer must not move into any class
/// of `forbidden`: `x` must be finite, lie in `region`, and a plain forward pass must predict a class of
/// `forbidden` other than `label`. Returns `None` otherwise.
pub fn validate(
    network: &Network,
    region: &Region,
    label: usize,
    forbidden: &[usize],
    x: &[f64],
) -> Option<Counterexample> {
    if x.len() != network.input_dim() || !x.iter().all(|v| v.is_finite()) || !region.contains(x) {
        return None;
    }
    let logits: Vec<f64> = network.forward(x).iter().copied().collect();
    let predicted = predicted_class(&logits);
    if predicted == label || !forbidden.contains(&predicted) {
        return None;
    }
    Some(Counterexample {
        input: x.to_vec(),
        margin: forbidden_margin(&logits, label, forbidden),
        logits,
        predicted,
        distance: region.distance(x),
    })
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::model::Dense;
    use crate::threat::{Budget, Norm};
    use nalgebra::{DMatrix, DVector};

    fn identity_classifier() -> Network {
        Network::from_dense(vec![Dense::identity(3)])
    }

    #[test]
    fn accepts_only_forbidden_classes_inside_the_region() {
        let network = identity_classifier();
        let budget = Budget::uniform(Norm::Linf, 0.5, 3);
        let region = budget.region(&[1.0, 0.8, 0.0], &[-10.0; 3], &[10.0; 3]);
        // Class 1 wins: valid when 1 is forbidden.
        let found = validate(&network, &region, 0, &[1, 2], &[0.7, 0.9, 0.0]).expect("valid");
        assert_eq!(found.predicted, 1);
        approx::assert_abs_diff_eq!(found.distance, 0.3, epsilon = 1e-12);
        assert!(found.margin < 0.0);
        // Same point, but only class 2 is forbidden.
        assert!(validate(&network, &region, 0, &[2], &[0.7, 0.9, 0.0]).is_none());
        // Outside the ball.
        assert!(validate(&network, &region, 0, &[1, 2], &[0.0, 0.9, 0.0]).is_none());
        // Not finite.
        assert!(validate(&network, &region, 0, &[1, 2], &[f64::NAN, 0.9, 0.0]).is_none());
    }

    #[test]
    fn ties_follow_the_lowest_index_rule() {
        let network = Network::from_dense(vec![Dense {
            weights: DMatrix::identity(2, 2),
            bias: DVector::zeros(2),
        }]);
        let budget = Budget::uniform(Norm::Linf, 1.0, 2);
        let region = budget.region(&[0.0, 1.0], &[-5.0; 2], &[5.0; 2]);
        // Equal logits: the prediction is class 0, so a label-1 sample has moved into class 0.
        assert!(validate(&network, &region, 1, &[0], &[0.5, 0.5]).is_some());
        assert!(validate(&network, &region, 0, &[1], &[0.5, 0.5]).is_none());
    }
}
