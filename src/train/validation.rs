//! Measurements of a network during constrained training: the validation checks (clean loss with its
//! standard error, certified accuracy by sound linear-relaxation bounds) and the per-sample robust
//! errors that steer the multipliers of the bound-based losses.
//!
//! What it guarantees: every "certified" figure here comes from sound linear-relaxation bounds
//! ([`crate::bound::linear`]), so it is a lower bound on robust accuracy; the loss figures are plain
//! forward passes. It never changes the network.

use nalgebra::DMatrix;

use crate::bound::linear::batch_margin_lower_bounds as linear_batch;
use crate::data::Dataset;
use crate::model::{predicted_class, Network};
use crate::threat::{Budget, Region, Targets};

use super::backprop::{classifier_logits, cross_entropy_one};
use super::constrained::ConstrainedSettings;
use super::dual::Constraint;
use super::plain::{loss_and_accuracy, TrainableModel};
use super::robust::RegionMap;
use super::TrainError;

/// One validation measurement during training (see [`ConstrainedSettings::checks_per_epoch`]).
#[derive(Debug, Clone, Copy, PartialEq, serde::Serialize)]
pub struct ValidationCheck {
    /// Position in epochs counted across rounds (e.g. 24.25 = a quarter into epoch 25).
    pub epoch_position: f64,
    /// Mean clean cross-entropy on the validation data.
    pub clean_loss: f64,
    /// Standard error of that mean.
    pub clean_loss_error: f64,
    /// Certified accuracy on the validation data (sound linear bounds at the full budget).
    pub certified_accuracy: f64,
    /// With several constraint terms ([`ConstrainedSettings::terms`]): the smallest margin of a
    /// floor over its requirement on the validation data, `min_k (measured_k − floor_k)` with
    /// measured_k the term's certified fraction (sound linear bounds) or clean accuracy on its rows;
    /// ≥ 0 when every floor holds by these bounds. `None` for a single constraint.
    pub worst_margin: Option<f64>,
}

/// The validation figures of `network` at `epoch_position` (a check inside an epoch), with each
/// term's own figure on the validation data (see [`TermFigures`]).
pub(crate) fn validation_check(
    trainable: &TrainableModel,
    network: &Network,
    validation: &Dataset,
    settings: &ConstrainedSettings,
    epoch_position: f64,
) -> Result<(ValidationCheck, TermFigures), TrainError> {
    let features = trainable.to_network_units(&validation.features);
    let losses = per_sample_cross_entropy(network, &features, &validation.labels);
    let mut worst_margin: Option<f64> = None;
    let mut figures = vec![None; settings.terms.len()];
    for (k, term) in settings.terms.iter().enumerate() {
        let Some(floor) = term.floor() else {
            continue;
        };
        let rows: Vec<usize> = (0..validation.len())
            .filter(|&i| term.applies_to(validation.labels[i]))
            .collect();
        if rows.is_empty() {
            continue;
        }
        let subset = validation.subset(&rows);
        let measured = match term.constraint {
            Constraint::CleanError { .. } => {
                let sub = trainable.to_network_units(&subset.features);
                loss_and_accuracy(network, &sub, &subset.labels).1
            }
            _ => certified_accuracy(trainable, network, &subset, &term.budget, &term.targets)?,
        };
        figures[k] = Some(measured);
        let margin = measured - floor;
        worst_margin = Some(worst_margin.map_or(margin, |w: f64| w.min(margin)));
    }
    let check = ValidationCheck {
        epoch_position,
        clean_loss: losses.iter().sum::<f64>() / losses.len().max(1) as f64,
        clean_loss_error: mean_standard_error(&losses),
        certified_accuracy: certified_accuracy(
            trainable,
            network,
            validation,
            &settings.budget,
            &settings.targets,
        )?,
        worst_margin,
    };
    Ok((check, figures))
}

/// Per term of [`ConstrainedSettings::terms`], in order: the fraction of its validation rows that
/// meets it (certified by sound linear bounds, or classified correctly for a clean-accuracy floor);
/// `None` for a robust-loss level or a term without validation rows.
pub(crate) type TermFigures = Vec<Option<f64>>;

/// Cross-entropy of every sample (columns of `features`, network units) under `network`.
pub(crate) fn per_sample_cross_entropy(
    network: &Network,
    features: &DMatrix<f64>,
    labels: &[usize],
) -> Vec<f64> {
    let logits = classifier_logits(&network.forward_batch(features));
    (0..labels.len())
        .map(|i| cross_entropy_one(logits.column(i).as_slice(), labels[i]).0)
        .collect()
}

/// Standard error of the mean of `values`: sample standard deviation / √n (0 for fewer than 2).
pub(crate) fn mean_standard_error(values: &[f64]) -> f64 {
    let n = values.len();
    if n < 2 {
        return 0.0;
    }
    let mean = values.iter().sum::<f64>() / n as f64;
    let variance = values.iter().map(|v| (v - mean) * (v - mean)).sum::<f64>() / (n - 1) as f64;
    (variance / n as f64).sqrt()
}

/// Per sample of a batch: true when sound linear-relaxation bounds (the certify pipeline's first
/// linear stage) do not prove the margin over every forbidden class. This is the constraint's measure
/// for the bound-based losses, whatever bound the loss itself uses, so the multiplier is steered by a
/// figure close to what certification will find (the surrogate and the measured constraint are kept
/// apart as in the proxy-Lagrangian of Cotter, Jiang & Sridharan, 2019).
pub(crate) fn linear_bound_errors(
    network: &Network,
    regions: &[Region],
    labels: &[usize],
    targets: &[Vec<usize>],
) -> Result<Vec<bool>, TrainError> {
    let bounds = linear_batch(network, regions, labels, targets)
        .map_err(|e| TrainError::Data(format!("linear bounds: {e}")))?;
    Ok(bounds.samples.iter().map(|b| !b.certified()).collect())
}

/// Fraction of `data` predicted correctly and certified by sound linear-relaxation bounds (at least as
/// tight as interval bounds) under `budget` and `targets`: a lower bound on robust accuracy.
pub fn certified_accuracy(
    trainable: &TrainableModel,
    network: &Network,
    data: &Dataset,
    budget: &Budget,
    targets: &Targets,
) -> Result<f64, TrainError> {
    let model = &trainable.template;
    let classes = model.class_count();
    let map = RegionMap::new(model, trainable.normalization.as_ref());
    let features = trainable.to_network_units(&data.features);
    let logits = network.as_classifier().forward_batch(&features);
    let correct: Vec<usize> = (0..data.len())
        .filter(|&i| predicted_class(logits.column(i).as_slice()) == data.labels[i])
        .collect();
    if correct.is_empty() {
        return Ok(0.0);
    }
    let regions: Vec<Region> = correct
        .iter()
        .map(|&i| map.region(data.sample(i), budget))
        .collect();
    let labels: Vec<usize> = correct.iter().map(|&i| data.labels[i]).collect();
    let target_lists: Vec<Vec<usize>> = labels
        .iter()
        .map(|&y| targets.forbidden_for(y, classes))
        .collect();
    let bounds = linear_batch(network, &regions, &labels, &target_lists)
        .map_err(|e| TrainError::Data(format!("linear bounds: {e}")))?;
    let certified = bounds.samples.iter().filter(|b| b.certified()).count();
    Ok(certified as f64 / data.len() as f64)
}

#[cfg(test)]
mod tests {
    use super::*;
    use approx::assert_relative_eq;

    #[test]
    fn standard_error_of_the_mean() {
        // Values 1, 2, 3, 4: sample variance 5/3, so the standard error is sqrt(5/12).
        assert_relative_eq!(
            mean_standard_error(&[1.0, 2.0, 3.0, 4.0]),
            (5.0f64 / 12.0).sqrt(),
            epsilon = 1e-12
        );
        assert_eq!(mean_standard_error(&[7.0]), 0.0);
    }
}
