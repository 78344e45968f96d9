//! The dual side of constrained training: what each constraint bounds ([`Constraint`]), how the
//! robust terms enter the primal step and how the multipliers move ([`Formulation`]).
//!
//! For constraints `g_k(θ) ≤ a_k` the Lagrangian is `f(θ) + Σ_k λ_k (g_k(θ) − a_k)` with `λ_k ≥ 0`.
//! A primal step follows the gradient of `f + Σ_k ω_k g_k`, where the weight `ω_k` of constraint `k`'s
//! robust term is given by [`Formulation::primal_weight`]; the multipliers move by
//! [`Formulation::after_batch`] after every mini-batch, with a step that follows the primal's
//! learning-rate schedule. What it guarantees: multipliers stay finite and ≥ 0, a fixed penalty never moves.
//! What it never does: read a training measurement as evidence that a constraint holds.

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
    /// Clean error rate on the training data ≤ `1 − floor − slack` (a clean-accuracy floor; its
    /// differentiable surrogate is the clean cross-entropy of its rows).
    CleanError {
        /// Required clean accuracy.
        floor: f64,
        /// Extra margin demanded during training.
        slack: f64,
    },
}

impl Constraint {
    /// The allowed value of the measured quantity.
    pub fn allowed(&self) -> f64 {
        match self {
            Constraint::RobustError { floor, slack } | Constraint::CleanError { floor, slack } => {
                (1.0 - floor - slack).max(0.0)
            }
            Constraint::RobustLossLevel { level } => *level,
        }
    }

    /// Checks the values, naming the bad one.
    pub fn validate(&self) -> Result<(), TrainError> {
        let bad = |m: String| Err(TrainError::Settings(m));
        match *self {
            Constraint::RobustError { floor, slack } | Constraint::CleanError { floor, slack } => {
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
        Ok(())
    }
}

/// How the robust terms enter the objective and how the multipliers move.
#[derive(Debug, Clone, Copy, PartialEq, serde::Serialize)]
#[serde(tag = "kind", rename_all = "snake_case")]
pub enum Formulation {
    /// Lagrangian with projected dual ascent after every mini-batch on the batch's measurement
    /// (Arrow, Hurwicz & Uzawa, 1958): `ω = λ`, `λ ← max(0, λ + r η (measured − allowed))` with `r`
    /// the primal step's current rate factor.
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

impl Formulation {
    /// True when the multipliers move (a primal-dual method, not a fixed penalty).
    pub fn is_primal_dual(&self) -> bool {
        !matches!(self, Formulation::Penalty { .. })
    }

    /// One constraint per class instead of one overall.
    pub fn per_class(&self) -> bool {
        match *self {
            Formulation::PrimalDual { per_class, .. } => per_class,
            Formulation::Penalty { .. } => false,
        }
    }

    /// The multipliers at the start: one, or one per class.
    pub fn initial_multipliers(&self, classes: usize) -> Vec<f64> {
        let count = if self.per_class() { classes } else { 1 };
        match *self {
            Formulation::PrimalDual {
                initial_multiplier, ..
            } => vec![initial_multiplier; count],
            Formulation::Penalty { weight } => vec![weight; count],
        }
    }

    /// The weight of a constraint's robust term in the primal step, given its multiplier.
    pub fn primal_weight(&self, multiplier: f64) -> f64 {
        match *self {
            Formulation::PrimalDual { .. } => multiplier,
            Formulation::Penalty { weight } => weight,
        }
    }

    /// The multiplier after a mini-batch that measured `measured` (moves only for
    /// [`Formulation::PrimalDual`]). `rate` is the primal step's current factor of its configured
    /// learning rate (the schedule of [`super::constrained::ConstrainedSettings::final_rate_factor`]):
    /// the dual step follows it, so the multiplier settles as the weights do instead of running on
    /// at full speed while the primal steps shrink.
    pub fn after_batch(&self, multiplier: f64, measured: f64, allowed: f64, rate: f64) -> f64 {
        match *self {
            Formulation::PrimalDual { dual_step, .. } => {
                (multiplier + rate * dual_step * (measured - allowed)).max(0.0)
            }
            _ => multiplier,
        }
    }

    /// The slack of a relaxed constraint after a mini-batch (resilient constrained learning, Hounie,
    /// Ribeiro, Chamon et al., NeurIPS 2023): the relaxation `u ≥ 0` pays `cost/2 · u²` and moves by
    /// projected descent on the Lagrangian, `u ← max(0, u − r η (cost · u − λ))`, so at rest
    /// `u = λ / cost`: a constraint that cannot hold is loosened until its price equals the marginal
    /// cost of loosening it further. A fixed penalty never relaxes.
    pub fn relaxed_slack(&self, slack: f64, multiplier: f64, cost: f64, rate: f64) -> f64 {
        match *self {
            Formulation::PrimalDual { dual_step, .. } => {
                (slack - rate * dual_step * (cost * slack - multiplier)).max(0.0)
            }
            _ => slack,
        }
    }

    /// Checks the values, naming the bad one.
    pub fn validate(&self) -> Result<(), TrainError> {
        let bad = |m: String| Err(TrainError::Settings(m));
        let (step, name, start) = match *self {
            Formulation::PrimalDual {
                dual_step,
                initial_multiplier,
                ..
            } => (dual_step, "dual step", initial_multiplier),
            Formulation::Penalty { weight } => {
                if !(weight.is_finite() && weight >= 0.0) {
                    return bad(format!(
                        "penalty weight {weight} must be a finite number ≥ 0"
                    ));
                }
                return Ok(());
            }
        };
        if !(step.is_finite() && step > 0.0) {
            return bad(format!("{name} {step} must be a finite number > 0"));
        }
        if !(start.is_finite() && start >= 0.0) {
            return bad(format!("initial multiplier {start} must be ≥ 0"));
        }
        Ok(())
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn projected_ascent_moves_per_batch_and_never_below_zero() {
        let f = Formulation::PrimalDual {
            dual_step: 0.5,
            initial_multiplier: 0.0,
            per_class: false,
        };
        assert_eq!(f.primal_weight(0.3), 0.3);
        assert!((f.after_batch(0.3, 0.5, 0.1, 1.0) - 0.5).abs() < 1e-12);
        assert_eq!(f.after_batch(0.1, 0.0, 0.9, 1.0), 0.0);
        // The dual step follows the primal's rate factor.
        assert!((f.after_batch(0.3, 0.5, 0.1, 0.1) - 0.32).abs() < 1e-12);
    }

    #[test]
    fn a_penalty_never_moves_and_bad_values_are_named() {
        let f = Formulation::Penalty { weight: 3.0 };
        assert_eq!(f.primal_weight(0.0), 3.0);
        assert_eq!(f.after_batch(3.0, 1.0, 0.0, 1.0), 3.0);
        assert_eq!(f.initial_multipliers(3), vec![3.0]);
        let e = Formulation::PrimalDual {
            dual_step: 0.0,
            initial_multiplier: 0.0,
            per_class: true,
        }
        .validate()
        .unwrap_err()
        .to_string();
        assert!(e.contains("dual step"), "{e}");
        assert!(Constraint::RobustLossLevel { level: -1.0 }
            .validate()
            .is_err());
    }

    #[test]
    fn a_relaxed_slack_settles_where_its_cost_equals_the_multiplier() {
        let f = Formulation::PrimalDual {
            dual_step: 0.1,
            initial_multiplier: 0.0,
            per_class: false,
        };
        // Fixed multiplier 0.4, cost 2: the fixed point of u ← u − η (2u − 0.4) is u = 0.2.
        let mut u = 0.0;
        for _ in 0..500 {
            u = f.relaxed_slack(u, 0.4, 2.0, 1.0);
        }
        assert!((u - 0.2).abs() < 1e-9, "{u}");
        assert_eq!(f.relaxed_slack(0.0, 0.0, 2.0, 1.0), 0.0);
        let clean = Constraint::CleanError {
            floor: 0.95,
            slack: 0.01,
        };
        assert!((clean.allowed() - 0.04).abs() < 1e-12);
        assert!(Constraint::CleanError {
            floor: 1.5,
            slack: 0.0
        }
        .validate()
        .is_err());
    }
}
