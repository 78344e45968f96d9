//! The settings of the constrained trainer and their check: [`ConstrainedSettings::validate`] refuses
//! any field out of range with a message naming it, before any training starts.

use super::{Constraint, Formulation};
use crate::threat::{Budget, Targets};
use crate::train::plain::TrainSettings;
use crate::train::robust::RobustLoss;
use crate::train::terms::ConstraintTerm;
use crate::train::TrainError;

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
    /// The constraint (when `terms` is empty).
    pub constraint: Constraint,
    /// Several constraints, one multiplier each (e.g. one per line of a requirement list); when
    /// given they replace `constraint`, `budget`, `targets` and the per-class split
    /// ([`ConstrainedSettings::terms`]).
    pub terms: Vec<ConstraintTerm>,
    /// Resilient relaxation: each constraint gets a slack paying `cost/2 · slack²`, learned with the
    /// weights ([`Formulation::relaxed_slack`]); `None` keeps every constraint strict.
    pub relax: Option<f64>,
    /// Multipliers or a fixed penalty.
    pub formulation: Formulation,
    /// Epochs over which epsilon ramps from 0 to the full budget (0 = full from the start).
    pub ramp_epochs: usize,
    /// Measure certified accuracy on the validation data after every epoch (sound linear bounds).
    pub measure_certified: bool,
    /// Tighten the robust-error allowance by the measured generalisation gap (see
    /// [`GapCorrection`](super::GapCorrection)); needs validation data and `measure_certified`.
    pub gap_correction: bool,
    /// Validation checks per epoch (≥ 1, the last at the epoch's end) reported to the check sink of
    /// [`train_constrained_epochs_with_checks`](super::train_constrained_epochs_with_checks); more
    /// checks give the selection of a best feasible iterate a finer choice.
    pub checks_per_epoch: usize,
    /// Step-size factor at the end of the first `train.epochs` epochs, in (0, 1]: the optimiser's
    /// rate is held through the epsilon ramp, then decays linearly to this fraction of the configured
    /// rate by the last of those epochs and stays there (later rounds); 1 keeps it constant.
    pub final_rate_factor: f64,
    /// Fraction of the first `train.epochs` epochs, counted back from their end, over which the
    /// weights and multipliers after every step are averaged
    /// ([`IterateAverage`](crate::train::averaging::IterateAverage), kept in
    /// [`ConstrainedState::average`](super::ConstrainedState::average) and continued through later
    /// calls); 0 = off.
    pub average_tail: f64,
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
        self.constraint.validate()?;
        for term in &self.terms {
            term.constraint.validate()?;
        }
        self.formulation.validate()?;
        if let Some(cost) = self.relax {
            if !(cost.is_finite() && cost > 0.0) {
                return bad(format!(
                    "relaxation cost {cost} must be a finite number > 0"
                ));
            }
        }
        if !(0.0..=1.0).contains(&self.average_tail) {
            return bad(format!(
                "averaged tail {} must be a fraction in [0, 1]",
                self.average_tail
            ));
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
