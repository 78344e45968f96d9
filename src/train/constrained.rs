//! Constrained training by a Lagrangian primal-dual loop (projected dual ascent, Arrow, Hurwicz &
//! Uzawa, 1958): minimise the clean cross-entropy subject to a robustness constraint on the training
//! data, with one multiplier `λ ≥ 0` per constraint.
//!
//! Per mini-batch the primal step follows the gradient of `clean loss + Σ_c λ_c · robust loss_c` (the
//! robust loss of [`super::robust`] is the differentiable surrogate), then each multiplier takes a
//! projected ascent step `λ_c ← max(0, λ_c + η · (measured_c − allowed_c))` on the batch's measured
//! constraint value: either the robust error rate (for the bound-based losses: sound linear bounds do
//! not prove the sample at the batch's epsilon, whatever bound the loss uses; for PGD: the PGD point
//! is wrong) against `1 − floor − slack`, or the robust loss itself against a level. Constraints are
//! one global constraint or one per class (each class's samples against the same allowance). With a fixed
//! [`Formulation::Penalty`] weight no multiplier moves (the comparison baseline). Epsilon ramps
//! linearly from 0 to the full budget over the first epochs; the linear-bound weight `β` ramps with it.
//!
//! With [`ConstrainedSettings::gap_correction`] the robust-error allowance is tightened by the
//! measured gap between the training batches' and the validation data's certified accuracy
//! ([`GapCorrection`]), so the floor is aimed at on held-out data.
//!
//! The loop never claims the constraint holds: its figures are training measurements; the floor is
//! checked afterwards with sound bounds ([`super::retrain`]).

use nalgebra::DMatrix;
use rand::seq::SliceRandom;
use rand::SeedableRng;
use rand_chacha::ChaCha8Rng;

use crate::bound::linear::batch_margin_lower_bounds as linear_batch;
use crate::data::Dataset;
use crate::model::{predicted_class, Network};
use crate::threat::{Budget, Region, Targets};

use super::backprop::{add_scaled, classifier_logits, cross_entropy_one};
use super::optimizer::Optimizer;
use super::plain::{
    check_data, cross_entropy_gradient, gather_columns, loss_and_accuracy, TrainSettings,
    TrainableModel,
};
use super::robust::{robust_loss, RegionMap, RobustLoss};
use super::TrainError;

/// What the constraint bounds.
#[derive(Debug, Clone, Copy, PartialEq, serde::Serialize)]
#[serde(tag = "kind", rename_all = "snake_case")]
pub enum Constraint {
    /// Robust error rate on the training data ≤ `1 − floor − slack`.
    RobustError {
        /// Required robust fraction.
        floor: f64,
        /// Extra margin demanded during training (raised between rounds).
        slack: f64,
    },
    /// Mean robust loss on the training data ≤ `level`.
    RobustLossLevel {
        /// The allowed mean robust loss.
        level: f64,
    },
}

impl Constraint {
    /// The allowed value of the measured quantity.
    pub fn allowed(&self) -> f64 {
        match self {
            Constraint::RobustError { floor, slack } => (1.0 - floor - slack).max(0.0),
            Constraint::RobustLossLevel { level } => *level,
        }
    }
}

/// How the robust term enters the objective.
#[derive(Debug, Clone, Copy, PartialEq, serde::Serialize)]
#[serde(tag = "kind", rename_all = "snake_case")]
pub enum Formulation {
    /// Lagrangian with multipliers updated by projected dual ascent.
    PrimalDual {
        /// Dual step size η.
        dual_step: f64,
        /// Starting multiplier.
        initial_multiplier: f64,
        /// One constraint (and multiplier) per class instead of one overall.
        per_class: bool,
    },
    /// Fixed weight `clean + weight · robust` (no multiplier updates).
    Penalty {
        /// The fixed weight.
        weight: f64,
    },
}

/// Settings of the constrained trainer.
#[derive(Debug, Clone, PartialEq, serde::Serialize)]
pub struct ConstrainedSettings {
    /// Epochs, batch size, optimiser, weight decay, seed (the validation fields are not used here).
    pub train: TrainSettings,
    /// The perturbation budget in raw input units.
    #[serde(skip)]
    pub budget: Budget,
    /// Which class changes count (forbidden targets per sample).
    #[serde(skip)]
    pub targets: Targets,
    /// The robust loss.
    pub loss: RobustLoss,
    /// The constraint.
    pub constraint: Constraint,
    /// Multipliers or a fixed penalty.
    pub formulation: Formulation,
    /// Epochs over which epsilon ramps from 0 to the full budget (0 = full from the start).
    pub ramp_epochs: usize,
    /// Measure certified accuracy on the validation data after every epoch (sound linear bounds).
    pub measure_certified: bool,
    /// Tighten the robust-error allowance by the measured generalisation gap (see [`GapCorrection`]);
    /// needs validation data and `measure_certified`.
    pub gap_correction: bool,
    /// Validation checks per epoch (≥ 1, the last at the epoch's end) reported to the check sink of
    /// [`train_constrained_epochs_with_checks`]; more checks give the selection of a best feasible
    /// iterate a finer choice.
    pub checks_per_epoch: usize,
    /// Step-size factor at the end of the first `train.epochs` epochs, in (0, 1]: the optimiser's
    /// rate is held through the epsilon ramp, then decays linearly to this fraction of the configured
    /// rate by the last of those epochs and stays there (later rounds); 1 keeps it constant.
    pub final_rate_factor: f64,
}

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
}

/// How far the training data's certified accuracy runs ahead of the validation data's, measured after
/// every full-budget epoch: the training batches' linear-bound certified rate (the constraint's own
/// measure) minus the validation data's (sound linear bounds at the full budget), smoothed over epochs
/// and clamped to `[0, MAX]`. The robust-error allowance becomes `1 − floor − slack − gap`, so the
/// floor is aimed at on data the model was not trained on rather than on the training batches.
#[derive(Debug, Clone, Copy, PartialEq, Default, serde::Serialize)]
pub struct GapCorrection {
    /// The current smoothed gap (0 until the first full-budget epoch with validation figures).
    pub gap: f64,
}

impl GapCorrection {
    /// Largest correction (a gap beyond this means the constraint cannot be steered by it).
    pub const MAX: f64 = 0.2;
    /// Weight of the newest epoch in the exponential smoothing.
    pub const SMOOTHING: f64 = 0.5;

    /// Folds in one epoch's training and validation certified fractions.
    pub fn update(&mut self, training_certified: f64, validation_certified: f64) {
        let measured = training_certified - validation_certified;
        let smoothed = Self::SMOOTHING * measured + (1.0 - Self::SMOOTHING) * self.gap;
        self.gap = smoothed.clamp(0.0, Self::MAX);
    }
}

impl ConstrainedSettings {
    /// Checks the fields, naming the bad one.
    pub fn validate(&self) -> Result<(), TrainError> {
        self.train.validate()?;
        let bad = |m: String| Err(TrainError::Settings(m));
        if self.checks_per_epoch == 0 {
            return bad("validation checks per epoch must be at least 1".into());
        }
        if !(self.final_rate_factor > 0.0 && self.final_rate_factor <= 1.0) {
            return bad(format!(
                "final rate factor {} must lie in (0, 1]",
                self.final_rate_factor
            ));
        }
        if let Some(r) = self
            .budget
            .radii
            .iter()
            .find(|r| !(r.is_finite() && **r >= 0.0))
        {
            return bad(format!("budget radius {r} must be a finite number ≥ 0"));
        }
        match self.constraint {
            Constraint::RobustError { floor, slack } => {
                if !(0.0..=1.0).contains(&floor) {
                    return bad(format!("floor {floor} must lie in [0, 1]"));
                }
                if !(slack.is_finite() && slack >= 0.0) {
                    return bad(format!("slack {slack} must be a finite number ≥ 0"));
                }
            }
            Constraint::RobustLossLevel { level } => {
                if !(level.is_finite() && level >= 0.0) {
                    return bad(format!(
                        "robust loss level {level} must be a finite number ≥ 0"
                    ));
                }
            }
        }
        match self.formulation {
            Formulation::PrimalDual {
                dual_step,
                initial_multiplier,
                ..
            } => {
                if !(dual_step.is_finite() && dual_step > 0.0) {
                    return bad(format!("dual step {dual_step} must be a finite number > 0"));
                }
                if !(initial_multiplier.is_finite() && initial_multiplier >= 0.0) {
                    return bad(format!(
                        "initial multiplier {initial_multiplier} must be ≥ 0"
                    ));
                }
            }
            Formulation::Penalty { weight } => {
                if !(weight.is_finite() && weight >= 0.0) {
                    return bad(format!(
                        "penalty weight {weight} must be a finite number ≥ 0"
                    ));
                }
            }
        }
        if let RobustLoss::Adversarial { steps } = self.loss {
            if steps == 0 {
                return bad("PGD steps must be at least 1".into());
            }
        }
        if let RobustLoss::LinearInterval {
            final_linear_weight,
        } = self.loss
        {
            if !(0.0..=1.0).contains(&final_linear_weight) {
                return bad(format!(
                    "final linear weight {final_linear_weight} must lie in [0, 1]"
                ));
            }
        }
        Ok(())
    }
}

/// What one epoch of constrained training measured.
#[derive(Debug, Clone, PartialEq, serde::Serialize)]
pub struct ConstrainedEpoch {
    /// 1-based epoch number (counting across rounds).
    pub epoch: usize,
    /// Fraction of the full budget used at the end of the epoch.
    pub epsilon_scale: f64,
    /// Mean clean cross-entropy over the epoch's batches.
    pub clean_loss: f64,
    /// Mean robust loss over the epoch's batches.
    pub robust_loss: f64,
    /// Robust error rate measured on the training batches (the constraint's measure).
    pub robust_error: f64,
    /// The multipliers at the end of the epoch (one, or one per class).
    pub multipliers: Vec<f64>,
    /// The generalisation-gap correction of the allowance after the epoch (0 when not in use).
    pub gap_correction: f64,
    /// Mean clean cross-entropy on the validation data (the objective's held-out estimate).
    pub validation_clean_loss: Option<f64>,
    /// Standard error of that mean (sample standard deviation of the per-sample losses / √n).
    pub validation_clean_loss_error: Option<f64>,
    /// Clean accuracy on the validation data.
    pub validation_clean_accuracy: Option<f64>,
    /// Certified accuracy on the validation data by sound linear bounds at the full budget.
    pub validation_certified_accuracy: Option<f64>,
}

/// State carried across calls (so rounds can continue where the last one stopped).
#[derive(Debug, Clone)]
pub struct ConstrainedState {
    /// The trainable network.
    pub network: Network,
    /// The optimiser's state.
    pub optimizer: Optimizer,
    /// The multipliers.
    pub multipliers: Vec<f64>,
    /// Epochs run so far.
    pub epochs_done: usize,
    /// The allowance correction carried across epochs and rounds.
    pub correction: GapCorrection,
}

impl ConstrainedState {
    /// A fresh state for `trainable` under `settings`.
    pub fn new(
        trainable: &TrainableModel,
        settings: &ConstrainedSettings,
        classes: usize,
    ) -> ConstrainedState {
        let multipliers = match settings.formulation {
            Formulation::PrimalDual {
                initial_multiplier,
                per_class,
                ..
            } => vec![initial_multiplier; if per_class { classes } else { 1 }],
            Formulation::Penalty { weight } => vec![weight],
        };
        ConstrainedState {
            network: trainable.network.clone(),
            optimizer: Optimizer::new(
                settings.train.optimizer,
                settings.train.weight_decay,
                &trainable.network,
            ),
            multipliers,
            epochs_done: 0,
            correction: GapCorrection::default(),
        }
    }
}

/// Runs `epochs` epochs of constrained training from `state` on `train` (validating on `validation`).
/// `observer` sees every epoch's record.
pub fn train_constrained_epochs(
    trainable: &TrainableModel,
    state: &mut ConstrainedState,
    train: &Dataset,
    validation: Option<&Dataset>,
    settings: &ConstrainedSettings,
    epochs: usize,
    observer: &mut dyn FnMut(&ConstrainedEpoch),
) -> Result<Vec<ConstrainedEpoch>, TrainError> {
    train_constrained_epochs_with_checks(
        trainable,
        state,
        train,
        validation,
        settings,
        epochs,
        observer,
        &mut |_, _| {},
    )
}

/// [`train_constrained_epochs`] that also hands every validation check (with validation data and
/// `measure_certified`: `checks_per_epoch` per epoch, the last at its end) and the weights at that
/// moment to `checks`.
#[allow(clippy::too_many_arguments)]
pub fn train_constrained_epochs_with_checks(
    trainable: &TrainableModel,
    state: &mut ConstrainedState,
    train: &Dataset,
    validation: Option<&Dataset>,
    settings: &ConstrainedSettings,
    epochs: usize,
    observer: &mut dyn FnMut(&ConstrainedEpoch),
    checks: &mut dyn FnMut(&ValidationCheck, &Network),
) -> Result<Vec<ConstrainedEpoch>, TrainError> {
    settings.validate()?;
    let model = &trainable.template;
    check_data(model, train, "training")?;
    if let Some(v) = validation {
        check_data(model, v, "validation")?;
    }
    let classes = model.class_count();
    let features = trainable.to_network_units(&train.features);
    let map = RegionMap::new(model, trainable.normalization.as_ref());
    let targets: Vec<Vec<usize>> = train
        .labels
        .iter()
        .map(|&y| settings.targets.forbidden_for(y, classes))
        .collect();
    let batches_per_epoch = train.len().div_ceil(settings.train.batch_size);
    let ramp_steps = settings.ramp_epochs * batches_per_epoch;
    let mut rng = ChaCha8Rng::seed_from_u64(
        settings.train.seed ^ (state.epochs_done as u64).wrapping_mul(0x2545_f491_4f6c_dd1d),
    );
    let mut order: Vec<usize> = (0..train.len()).collect();
    let mut records = Vec::with_capacity(epochs);
    // Batches after which a mid-epoch check runs (the epoch's end has its own).
    let mid_checks: Vec<usize> = if settings.measure_certified {
        (1..settings.checks_per_epoch)
            .map(|k| (k * batches_per_epoch / settings.checks_per_epoch).max(1) - 1)
            .filter(|&b| b + 1 < batches_per_epoch)
            .collect()
    } else {
        Vec::new()
    };
    for _ in 0..epochs {
        state.epochs_done += 1;
        let epoch = state.epochs_done;
        order.shuffle(&mut rng);
        let (mut clean_total, mut robust_total, mut error_total) = (0.0, 0.0, 0.0);
        let mut scale = 1.0;
        for (b, chunk) in order.chunks(settings.train.batch_size).enumerate() {
            let step = (epoch - 1) * batches_per_epoch + b + 1;
            scale = if ramp_steps == 0 {
                1.0
            } else {
                (step as f64 / ramp_steps as f64).min(1.0)
            };
            let beta = match settings.loss {
                RobustLoss::LinearInterval {
                    final_linear_weight,
                } => 1.0 - scale * (1.0 - final_linear_weight),
                _ => 0.0,
            };
            let batch = gather_columns(&features, chunk);
            let labels: Vec<usize> = chunk.iter().map(|&i| train.labels[i]).collect();
            let (clean, mut gradient) = cross_entropy_gradient(&state.network, &batch, &labels);
            if !clean.is_finite() {
                return Err(TrainError::Diverged { epoch });
            }
            let budget = settings.budget.scaled(scale);
            let regions: Vec<Region> = chunk
                .iter()
                .map(|&i| map.region(train.sample(i), &budget))
                .collect();
            let batch_targets: Vec<Vec<usize>> =
                chunk.iter().map(|&i| targets[i].clone()).collect();
            // Per-sample weights: λ (global) or λ_c · B / B_c (per class, so each term is a class mean).
            let per_class = state.multipliers.len() > 1;
            let mut class_counts = vec![0usize; classes];
            for &y in &labels {
                class_counts[y] += 1;
            }
            let weights: Vec<f64> = labels
                .iter()
                .map(|&y| {
                    if per_class {
                        state.multipliers[y] * chunk.len() as f64 / class_counts[y] as f64
                    } else {
                        state.multipliers[0]
                    }
                })
                .collect();
            let robust = robust_loss(
                settings.loss,
                &state.network,
                &regions,
                &labels,
                &batch_targets,
                &weights,
                beta,
                settings.train.seed ^ step as u64,
            )?;
            if !robust.loss.is_finite() {
                return Err(TrainError::Diverged { epoch });
            }
            let errors = if settings.loss.is_certified() {
                linear_bound_errors(&state.network, &regions, &labels, &batch_targets)?
            } else {
                robust.errors.clone()
            };
            add_scaled(&mut gradient, &robust.gradient, 1.0);
            let rate = rate_factor(
                step,
                ramp_steps,
                settings.train.epochs * batches_per_epoch,
                settings.final_rate_factor,
            );
            state.optimizer.step(&mut state.network, &gradient, rate);
            if let (Some(v), true) = (validation, mid_checks.contains(&b)) {
                let check = validation_check(
                    trainable,
                    &state.network,
                    v,
                    settings,
                    (epoch - 1) as f64 + (b + 1) as f64 / batches_per_epoch as f64,
                )?;
                checks(&check, &state.network);
            }
            let mean_robust = robust.sample_losses.iter().sum::<f64>() / chunk.len() as f64;
            let error_rate = errors.iter().filter(|e| **e).count() as f64 / chunk.len() as f64;
            clean_total += clean * chunk.len() as f64;
            robust_total += mean_robust * chunk.len() as f64;
            error_total += error_rate * chunk.len() as f64;
            if let Formulation::PrimalDual { dual_step, .. } = settings.formulation {
                let allowed = match settings.constraint {
                    Constraint::RobustError { .. } => {
                        (settings.constraint.allowed() - state.correction.gap).max(0.0)
                    }
                    Constraint::RobustLossLevel { .. } => settings.constraint.allowed(),
                };
                if per_class {
                    for (c, &count) in class_counts.iter().enumerate() {
                        if count == 0 {
                            continue;
                        }
                        let members: Vec<usize> =
                            (0..labels.len()).filter(|&s| labels[s] == c).collect();
                        let measured = match settings.constraint {
                            Constraint::RobustError { .. } => {
                                members.iter().filter(|&&s| errors[s]).count() as f64
                                    / members.len() as f64
                            }
                            Constraint::RobustLossLevel { .. } => {
                                members
                                    .iter()
                                    .map(|&s| robust.sample_losses[s])
                                    .sum::<f64>()
                                    / members.len() as f64
                            }
                        };
                        state.multipliers[c] =
                            (state.multipliers[c] + dual_step * (measured - allowed)).max(0.0);
                    }
                } else {
                    let measured = match settings.constraint {
                        Constraint::RobustError { .. } => error_rate,
                        Constraint::RobustLossLevel { .. } => mean_robust,
                    };
                    state.multipliers[0] =
                        (state.multipliers[0] + dual_step * (measured - allowed)).max(0.0);
                }
            }
        }
        let n = train.len() as f64;
        let mut record = ConstrainedEpoch {
            epoch,
            epsilon_scale: scale,
            clean_loss: clean_total / n,
            robust_loss: robust_total / n,
            robust_error: error_total / n,
            multipliers: state.multipliers.clone(),
            gap_correction: state.correction.gap,
            validation_clean_loss: None,
            validation_clean_loss_error: None,
            validation_clean_accuracy: None,
            validation_certified_accuracy: None,
        };
        if let Some(v) = validation {
            let vf = trainable.to_network_units(&v.features);
            let (clean_loss, accuracy) = loss_and_accuracy(&state.network, &vf, &v.labels);
            let clean_loss_error =
                mean_standard_error(&per_sample_cross_entropy(&state.network, &vf, &v.labels));
            record.validation_clean_loss = Some(clean_loss);
            record.validation_clean_loss_error = Some(clean_loss_error);
            record.validation_clean_accuracy = Some(accuracy);
            if settings.measure_certified {
                let certified = certified_accuracy(
                    trainable,
                    &state.network,
                    v,
                    &settings.budget,
                    &settings.targets,
                )?;
                let check = ValidationCheck {
                    epoch_position: epoch as f64,
                    clean_loss,
                    clean_loss_error,
                    certified_accuracy: certified,
                };
                checks(&check, &state.network);
                record.validation_certified_accuracy = Some(certified);
                // Only epochs at the full budget throughout measure the gap the floor is stated at.
                let full_epoch = ramp_steps <= (epoch - 1) * batches_per_epoch;
                if settings.gap_correction && full_epoch && settings.loss.is_certified() {
                    state
                        .correction
                        .update(1.0 - record.robust_error, certified);
                    record.gap_correction = state.correction.gap;
                }
            }
        }
        observer(&record);
        records.push(record);
    }
    Ok(records)
}

/// The step-size factor of 1-based `step`: 1 through the ramp's `ramp_steps`, then linear down to
/// `final_factor` at `end_steps`, and `final_factor` after it.
fn rate_factor(step: usize, ramp_steps: usize, end_steps: usize, final_factor: f64) -> f64 {
    if step <= ramp_steps {
        return 1.0;
    }
    if step >= end_steps {
        return final_factor;
    }
    let t = (step - ramp_steps) as f64 / (end_steps - ramp_steps) as f64;
    1.0 - t * (1.0 - final_factor)
}

/// The validation figures of `network` at `epoch_position` (a check inside an epoch).
fn validation_check(
    trainable: &TrainableModel,
    network: &Network,
    validation: &Dataset,
    settings: &ConstrainedSettings,
    epoch_position: f64,
) -> Result<ValidationCheck, TrainError> {
    let features = trainable.to_network_units(&validation.features);
    let losses = per_sample_cross_entropy(network, &features, &validation.labels);
    Ok(ValidationCheck {
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
    })
}

/// Cross-entropy of every sample (columns of `features`, network units) under `network`.
fn per_sample_cross_entropy(
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
fn mean_standard_error(values: &[f64]) -> f64 {
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
fn linear_bound_errors(
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
    fn the_rate_is_held_through_the_ramp_then_decays_linearly() {
        assert_eq!(rate_factor(1, 10, 30, 0.1), 1.0);
        assert_eq!(rate_factor(10, 10, 30, 0.1), 1.0);
        assert!((rate_factor(20, 10, 30, 0.1) - 0.55).abs() < 1e-12);
        assert_eq!(rate_factor(30, 10, 30, 0.1), 0.1);
        assert_eq!(rate_factor(45, 10, 30, 0.1), 0.1);
        // A ramp as long as training (or longer) leaves the rate alone until the end.
        assert_eq!(rate_factor(29, 30, 30, 0.1), 1.0);
        assert_eq!(rate_factor(5, 0, 30, 1.0), 1.0);
    }

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

    #[test]
    fn gap_correction_smooths_and_clamps_the_measured_gap() {
        let mut correction = GapCorrection::default();
        correction.update(0.80, 0.70); // gap 0.10, half of it after one epoch
        assert_relative_eq!(correction.gap, 0.05, epsilon = 1e-12);
        correction.update(0.80, 0.70);
        assert_relative_eq!(correction.gap, 0.075, epsilon = 1e-12);
        correction.update(0.60, 0.70); // validation ahead: the smoothed gap shrinks, never below 0
        assert_relative_eq!(correction.gap, 0.0, epsilon = 1e-12);
        for _ in 0..20 {
            correction.update(1.0, 0.0);
        }
        assert_relative_eq!(correction.gap, GapCorrection::MAX, epsilon = 1e-12);
    }
}
