//! One constraint term on one mini-batch: the gradient of its differentiable surrogate (the mean
//! robust loss of its rows at the batch's budget, or their clean cross-entropy for a clean-error
//! constraint) and its measurement (robust error rate by sound linear bounds or the loss's own
//! measure, the mean robust loss, or the clean error rate).
//!
//! What it guarantees: the measurement is taken on the term's own rows with its own ball and
//! targets, the surrogate is kept apart from the measure (as in the proxy-Lagrangian of Cotter, Jiang
//! & Sridharan, 2019). It never moves a multiplier or the weights.

use nalgebra::DMatrix;

use crate::data::Dataset;
use crate::model::{predicted_class, Network};
use crate::threat::Region;

use super::backprop::classifier_logits;
use super::constrained::ConstrainedSettings;
use super::dual::Constraint;
use super::plain::{cross_entropy_gradient, gather_columns};
use super::robust::{robust_loss, RegionMap};
use super::terms::ConstraintTerm;
use super::validation::linear_bound_errors;
use super::TrainError;

/// What one term measured on its rows of a batch.
#[derive(Debug, Clone)]
pub(crate) struct TermBatch {
    /// Gradient of the surrogate (the mean over the term's rows).
    pub gradient: Network,
    /// Mean surrogate loss over the rows.
    pub mean_loss: f64,
    /// The error rate over the rows (robust or clean, as the constraint bounds).
    pub error_rate: f64,
    /// The constraint's measurement (error rate, or mean robust loss for a loss level).
    pub measured: f64,
}

/// Evaluates `term` on the batch rows `rows` (positions in `chunk`, indices of `train`; `features`
/// in network units; `classes` outputs) at budget scale `scale` and linear-bound weight `beta`.
#[allow(clippy::too_many_arguments)]
pub(crate) fn term_on_batch(
    settings: &ConstrainedSettings,
    network: &Network,
    term: &ConstraintTerm,
    map: &RegionMap,
    classes: usize,
    train: &Dataset,
    features: &DMatrix<f64>,
    chunk: &[usize],
    rows: &[usize],
    scale: f64,
    beta: f64,
    seed: u64,
) -> Result<TermBatch, TrainError> {
    let count = rows.len() as f64;
    let indices: Vec<usize> = rows.iter().map(|&s| chunk[s]).collect();
    let labels: Vec<usize> = indices.iter().map(|&i| train.labels[i]).collect();
    if let Constraint::CleanError { .. } = term.constraint {
        let batch = gather_columns(features, &indices);
        let (loss, gradient) = cross_entropy_gradient(network, &batch, &labels);
        let logits = classifier_logits(&network.forward_batch(&batch));
        let wrong = (0..labels.len())
            .filter(|&i| predicted_class(logits.column(i).as_slice()) != labels[i])
            .count() as f64;
        return Ok(TermBatch {
            gradient,
            mean_loss: loss,
            error_rate: wrong / count,
            measured: wrong / count,
        });
    }
    let budget = term.budget.scaled(scale);
    let regions: Vec<Region> = indices
        .iter()
        .map(|&i| map.region(train.sample(i), &budget))
        .collect();
    let targets: Vec<Vec<usize>> = labels
        .iter()
        .map(|&y| term.targets.forbidden_for(y, classes))
        .collect();
    let robust = robust_loss(
        settings.loss,
        network,
        &regions,
        &labels,
        &targets,
        &vec![1.0; rows.len()],
        beta,
        seed,
    )?;
    let errors = if settings.loss.is_certified() {
        linear_bound_errors(network, &regions, &labels, &targets)?
    } else {
        robust.errors.clone()
    };
    let mean_loss = robust.sample_losses.iter().sum::<f64>() / count;
    let error_rate = errors.iter().filter(|e| **e).count() as f64 / count;
    let measured = match term.constraint {
        Constraint::RobustLossLevel { .. } => mean_loss,
        _ => error_rate,
    };
    Ok(TermBatch {
        gradient: robust.gradient,
        mean_loss,
        error_rate,
        measured,
    })
}
