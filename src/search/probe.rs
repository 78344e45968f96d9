//! Short projected-gradient descents (PGD, Madry et al., 2018) from many points of one region at once,
//! on the engine's batched forward pass and input gradients: the trees' probes for counterexamples
//! near the bound minimisers of the sub-domains they process.
//!
//! Every column descends `logit_label − max_{c ∈ classes} logit_c` (the strongest listed class at the
//! current point) by the attack's steepest-descent step ([`crate::attack::step::descent_step`]) with a
//! step size halved after a few steps without progress. Points stay inside the region. Nothing here
//! decides anything: the caller checks every returned point with a plain forward pass and accepts a
//! counterexample only through [`crate::attack::validate`].

use nalgebra::DMatrix;

use crate::attack::step::descent_step;
use crate::engine::Engine;
use crate::model::predicted_class;
use crate::threat::Region;

/// First step as a fraction of the ball's radius.
const STEP_FRACTION: f64 = 0.25;
/// Steps without progress before the step size is halved.
const PATIENCE: usize = 5;

/// What to descend.
#[derive(Debug, Clone, Copy)]
pub(crate) struct Descent<'a> {
    /// The sample's class.
    pub label: usize,
    /// The classes whose strongest logit is pushed above the label's.
    pub classes: &'a [usize],
    /// Gradient steps.
    pub steps: usize,
    /// Stop once some column's answer is one of `classes`.
    pub stop_at_flip: bool,
}

/// Runs the descents from `starts` (projected into the region first) and returns the points worth
/// checking: every point whose answer was one of the classes (first one per column), then each
/// column's best point.
pub(crate) fn descend(
    engine: &Engine,
    region: &Region,
    descent: Descent,
    starts: &[Vec<f64>],
) -> Vec<Vec<f64>> {
    let n = starts.len();
    let dim = region.dim();
    if n == 0 || descent.classes.is_empty() {
        return starts.to_vec();
    }
    let mut x = DMatrix::zeros(dim, n);
    for (j, start) in starts.iter().enumerate() {
        let column = &mut x.as_mut_slice()[j * dim..(j + 1) * dim];
        column.copy_from_slice(start);
        region.project(column);
    }
    let mut best_x = x.clone();
    let mut best_gradient = DMatrix::zeros(dim, n);
    let mut best_loss = vec![f64::INFINITY; n];
    let mut step = vec![STEP_FRACTION; n];
    let mut stalled = vec![0usize; n];
    let mut flipped = vec![false; n];
    let mut flips = Vec::new();
    for round in 0..=descent.steps {
        let activations = engine.forward(&x);
        let logits = activations.logits();
        let mut coefficients = DMatrix::zeros(logits.nrows(), n);
        let mut loss = vec![0.0; n];
        for j in 0..n {
            let column: Vec<f64> = logits.column(j).iter().copied().collect();
            let strongest = descent
                .classes
                .iter()
                .copied()
                .max_by(|a, b| column[*a].total_cmp(&column[*b]).then(b.cmp(a)))
                .expect("classes are not empty");
            coefficients[(descent.label, j)] = 1.0;
            coefficients[(strongest, j)] -= 1.0;
            loss[j] = column[descent.label] - column[strongest];
            let predicted = predicted_class(&column);
            if !flipped[j] && predicted != descent.label && descent.classes.contains(&predicted) {
                flipped[j] = true;
                flips.push(x.column(j).iter().copied().collect());
            }
        }
        let last = round == descent.steps || (descent.stop_at_flip && !flips.is_empty());
        if last {
            for j in 0..n {
                if loss[j] < best_loss[j] {
                    best_loss[j] = loss[j];
                    best_x.set_column(j, &x.column(j));
                }
            }
            break;
        }
        let mut gradient = engine.input_gradient(&activations, &coefficients);
        for j in 0..n {
            if loss[j] < best_loss[j] {
                best_loss[j] = loss[j];
                best_x.set_column(j, &x.column(j));
                best_gradient.set_column(j, &gradient.column(j));
                stalled[j] = 0;
            } else {
                stalled[j] += 1;
                if stalled[j] >= PATIENCE {
                    step[j] *= 0.5;
                    x.set_column(j, &best_x.column(j));
                    gradient.set_column(j, &best_gradient.column(j));
                    stalled[j] = 0;
                }
            }
            let g = &gradient.as_slice()[j * dim..(j + 1) * dim];
            let column = &mut x.as_mut_slice()[j * dim..(j + 1) * dim];
            descent_step(region, column, g, step[j]);
        }
    }
    flips.extend((0..n).map(|j| best_x.column(j).iter().copied().collect()));
    flips
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::model::{Dense, Network};
    use crate::threat::{Budget, Norm};
    use nalgebra::DVector;

    #[test]
    fn descent_reaches_the_corner_of_a_linear_margin() {
        // margin = 1 − x0 + x1 on [0, 1]²: its minimum 0 is at the corner (1, 0), a tie that the answer
        // breaks towards class 0, so no point flips.
        let network = Network::from_dense(vec![
            Dense::identity(2),
            Dense {
                weights: DMatrix::from_row_slice(2, 2, &[0.0, 1.0, 1.0, 0.0]),
                bias: DVector::from_vec(vec![1.0, 0.0]),
            },
        ]);
        let engine = Engine::new(&network);
        let region = Budget::uniform(Norm::Linf, 0.5, 2).region(&[0.5, 0.5], &[0.0; 2], &[1.0; 2]);
        let descent = Descent {
            label: 0,
            classes: &[1],
            steps: 10,
            stop_at_flip: false,
        };
        let points = descend(&engine, &region, descent, &[vec![0.5, 0.5], vec![0.2, 0.9]]);
        assert_eq!(points.len(), 2, "no flip: only the best points");
        for p in &points {
            assert!(region.contains(p));
            let logits = network.forward(p);
            assert!((logits[0] - logits[1]).abs() < 1e-12, "{p:?}");
        }
    }
}
