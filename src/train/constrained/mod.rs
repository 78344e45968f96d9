//! Constrained training by a Lagrangian primal-dual loop (projected dual ascent, Arrow, Hurwicz &
//! Uzawa, 1958): minimise the clean cross-entropy subject to a robustness constraint on the training
//! data, with one multiplier `λ ≥ 0` per constraint.
//!
//! Per mini-batch the primal step follows the gradient of `clean loss + Σ_c λ_c · robust loss_c` (the
//! robust loss of [`super::robust`] is the differentiable surrogate; each constraint's term is the
//! mean over its rows), then each multiplier takes a projected ascent step
//! `λ_c ← max(0, λ_c + r · η · (measured_c − allowed_c))` ([`super::dual`]; `r` is the primal rate
//! factor, so the dual step shrinks with the primal's) on the batch's measured constraint value: either the robust error rate (for the bound-based losses: sound linear bounds do
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
//! With [`ConstrainedSettings::average_tail`] the weights and multipliers of the last steps are
//! averaged ([`super::averaging`]) for primal recovery; [`super::duality`] evaluates the problem and
//! the duality-gap estimate at any point.
//!
//! The loop never claims the constraint holds: its figures are training measurements; the floor is
//! checked afterwards with sound bounds ([`super::retrain`]).
//!
//! The settings and their check are in `settings`; the per-epoch record and the state carried across
//! calls in `state`.

mod settings;
mod state;

use rand::seq::SliceRandom;
use rand::SeedableRng;
use rand_chacha::ChaCha8Rng;

use crate::data::Dataset;
use crate::model::Network;

pub use super::dual::{Constraint, Formulation};
pub use super::gap_correction::GapCorrection;
pub use super::validation::{certified_accuracy, ValidationCheck};
pub use settings::ConstrainedSettings;
pub use state::{ConstrainedEpoch, ConstrainedState};

use super::averaging::IterateAverage;
use super::backprop::add_scaled;
use super::plain::{
    check_data, cross_entropy_gradient, gather_columns, loss_and_accuracy, TrainableModel,
};
use super::robust::{RegionMap, RobustLoss};
use super::term_batch::term_on_batch;
use super::terms::ConstraintTerm;
use super::validation::{mean_standard_error, per_sample_cross_entropy, validation_check};
use super::TrainError;

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
    let terms = settings.terms(classes);
    if state.multipliers.len() != terms.len() {
        return Err(TrainError::Settings(format!(
            "{} multipliers for {} constraints",
            state.multipliers.len(),
            terms.len()
        )));
    }
    let batches_per_epoch = train.len().div_ceil(settings.train.batch_size);
    let ramp_steps = settings.ramp_epochs * batches_per_epoch;
    // Steps after which the iterate average runs (never when it is off).
    let first_round_steps = settings.train.epochs * batches_per_epoch;
    let average_start = if settings.average_tail > 0.0 {
        first_round_steps - (settings.average_tail * first_round_steps as f64).round() as usize
    } else {
        usize::MAX
    };
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
        let mut measured_total = vec![0.0; state.multipliers.len()];
        let mut measured_rows = vec![0.0; state.multipliers.len()];
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
            let rate = rate_factor(
                step,
                ramp_steps,
                settings.train.epochs * batches_per_epoch,
                settings.final_rate_factor,
            );
            // One term per constraint, each measured on its own rows with its own ball; the gap
            // correction tightens the robust-error allowances.
            for (k, term) in terms.iter().enumerate() {
                let rows: Vec<usize> = (0..chunk.len())
                    .filter(|&s| term.applies_to(labels[s]))
                    .collect();
                if rows.is_empty() {
                    continue;
                }
                let allowed = term.allowance(state.corrections[k].gap);
                let measured = term_on_batch(
                    settings,
                    &state.network,
                    term,
                    &map,
                    classes,
                    train,
                    &features,
                    chunk,
                    &rows,
                    scale,
                    beta,
                    settings.train.seed ^ step as u64,
                )?;
                if !measured.mean_loss.is_finite() {
                    return Err(TrainError::Diverged { epoch });
                }
                let multiplier = state.multipliers[k];
                let weight = settings.formulation.primal_weight(multiplier);
                add_scaled(&mut gradient, &measured.gradient, weight);
                let slack = state.slacks[k];
                state.multipliers[k] = settings.formulation.after_batch(
                    multiplier,
                    measured.measured,
                    allowed + slack,
                    rate,
                );
                if let Some(cost) = settings.relax {
                    state.slacks[k] = settings
                        .formulation
                        .relaxed_slack(slack, multiplier, cost, rate);
                }
                let count = rows.len() as f64;
                measured_total[k] += measured.measured * count;
                measured_rows[k] += count;
                robust_total += measured.mean_loss * count;
                error_total += measured.error_rate * count;
            }
            clean_total += clean * chunk.len() as f64;
            state.optimizer.step(&mut state.network, &gradient, rate);
            if step > average_start {
                state
                    .average
                    .get_or_insert_with(|| {
                        IterateAverage::new(&state.network, state.multipliers.len())
                    })
                    .add(&state.network, &state.multipliers);
            }
            if let (Some(v), true) = (validation, mid_checks.contains(&b)) {
                let (check, _) = validation_check(
                    trainable,
                    &state.network,
                    v,
                    settings,
                    (epoch - 1) as f64 + (b + 1) as f64 / batches_per_epoch as f64,
                )?;
                checks(&check, &state.network);
            }
        }
        let measured: Vec<f64> = measured_total
            .iter()
            .zip(&measured_rows)
            .map(|(t, n)| if *n > 0.0 { t / n } else { f64::NAN })
            .collect();
        let n = train.len() as f64;
        // Rows counted once per term they belong to (each row once without overlapping terms).
        let term_rows = measured_rows.iter().sum::<f64>().max(1.0);
        let mut record = ConstrainedEpoch {
            epoch,
            epsilon_scale: scale,
            clean_loss: clean_total / n,
            robust_loss: robust_total / term_rows,
            robust_error: error_total / term_rows,
            multipliers: state.multipliers.clone(),
            slacks: state.slacks.clone(),
            measured,
            gap_correction: largest_gap(&state.corrections),
            gap_corrections: state.corrections.iter().map(|c| c.gap).collect(),
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
                let (check, figures) =
                    validation_check(trainable, &state.network, v, settings, epoch as f64)?;
                let certified = check.certified_accuracy;
                checks(&check, &state.network);
                record.validation_certified_accuracy = Some(certified);
                // Only epochs at the full budget throughout measure the gap the floor is stated at.
                let full_epoch = ramp_steps <= (epoch - 1) * batches_per_epoch;
                if settings.gap_correction && full_epoch && settings.loss.is_certified() {
                    update_corrections(&mut state.corrections, &settings.terms, &record, &figures);
                    record.gap_correction = largest_gap(&state.corrections);
                    record.gap_corrections = state.corrections.iter().map(|c| c.gap).collect();
                }
            }
        }
        observer(&record);
        records.push(record);
    }
    Ok(records)
}

/// Folds one full-budget epoch into the gap corrections. A single constraint (or one per class)
/// compares the training batches' overall certified rate with the validation data's; the terms of a
/// list each compare their own: the fraction of their training rows meeting them (1 − the epoch's
/// measured rate) with the fraction of their validation rows (`figures`).
fn update_corrections(
    corrections: &mut [GapCorrection],
    terms: &[ConstraintTerm],
    record: &ConstrainedEpoch,
    figures: &[Option<f64>],
) {
    if terms.is_empty() {
        if let Some(certified) = record.validation_certified_accuracy {
            for correction in corrections.iter_mut() {
                correction.update(1.0 - record.robust_error, certified);
            }
        }
        return;
    }
    for (k, (correction, term)) in corrections.iter_mut().zip(terms).enumerate() {
        let measured = record.measured[k];
        if let (Some(validation), true, Some(_)) = (figures[k], measured.is_finite(), term.floor())
        {
            correction.update(1.0 - measured, validation);
        }
    }
}

/// The largest of the corrections (0 for none).
fn largest_gap(corrections: &[GapCorrection]) -> f64 {
    corrections.iter().map(|c| c.gap).fold(0.0, f64::max)
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

#[cfg(test)]
mod tests {
    use super::*;

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
}
