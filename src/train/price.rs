//! Multipliers read as prices: the sensitivity of the optimal clean loss to each requirement's level.
//!
//! For a convex problem `min f(θ) s.t. g_k(θ) ≤ a_k` with zero duality gap, the optimal value `p*(a)`
//! satisfies `∂p*/∂a_k = −λ_k*` where it is differentiable (Boyd & Vandenberghe, *Convex Optimization*,
//! §5.6.3): loosening constraint `k` by `δ` lowers the best clean loss by about `λ_k δ`, tightening
//! raises it by as much; a multiplier of 0 marks a constraint that does not bind. For a robust-error
//! constraint the allowance is `1 − floor − slack`, so raising the floor by one point (0.01) tightens
//! it by 0.01. For a network the problem is not convex and the multiplier is a local, training-time
//! estimate; the wording says so. Nothing here judges whether a requirement holds.

use super::dual::Constraint;
use super::terms::ConstraintTerm;

/// Multipliers at or below this count as 0 (the constraint does not bind).
pub const BINDING: f64 = 1e-9;

/// One constraint's price.
#[derive(Debug, Clone, PartialEq, serde::Serialize)]
pub struct Price {
    /// Which constraint (e.g. "robust loss ≤ 0.2, all rows" or a requirement line).
    pub constraint: String,
    /// The multiplier.
    pub multiplier: f64,
    /// True when the multiplier is above [`BINDING`].
    pub binding: bool,
    /// About how much the optimal clean loss rises when the requirement is tightened by one unit
    /// step (0.01 of the level or one point of the floor).
    pub cost_per_step: f64,
    /// The relaxation the constraint ended with (0 when strict or not relaxed): how far training
    /// loosened it, in the constraint's measure.
    pub relaxed_by: f64,
    /// The price in words.
    pub meaning: String,
}

/// The prices of `terms` at `multipliers`, with the relaxation `slacks` they ended with (one each).
pub fn prices(terms: &[ConstraintTerm], multipliers: &[f64], slacks: &[f64]) -> Vec<Price> {
    terms
        .iter()
        .zip(multipliers)
        .enumerate()
        .map(|(k, (term, &multiplier))| {
            let step = match term.constraint {
                Constraint::RobustLossLevel { .. } => "lowering the level by 0.01",
                Constraint::RobustError { .. } | Constraint::CleanError { .. } => {
                    "raising the floor by one point"
                }
            };
            let binding = multiplier > BINDING;
            let cost_per_step = 0.01 * multiplier;
            let relaxed_by = slacks.get(k).copied().unwrap_or(0.0);
            let meaning = if binding {
                format!(
                    "{step} costs about {cost_per_step:.3e} in clean loss (multiplier {multiplier:.4}; \
                     exact to first order for a convex model at its optimum, a local estimate for a network)"
                )
            } else {
                format!("not binding at the end: {step} costs nothing to first order")
            };
            Price {
                constraint: term.name.clone(),
                multiplier,
                binding,
                cost_per_step,
                relaxed_by,
                meaning,
            }
        })
        .collect()
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::threat::{Budget, Norm, Targets};

    fn term(name: &str, constraint: Constraint) -> ConstraintTerm {
        ConstraintTerm {
            name: name.into(),
            constraint,
            budget: Budget::uniform(Norm::Linf, 0.1, 2),
            targets: Targets::Any,
            class: None,
        }
    }

    #[test]
    fn a_multiplier_is_the_clean_loss_cost_of_one_step() {
        let level = term("robust loss", Constraint::RobustLossLevel { level: 0.2 });
        let p = prices(&[level], &[0.128], &[0.0]);
        assert_eq!(p.len(), 1);
        assert!(p[0].binding);
        assert!((p[0].cost_per_step - 0.00128).abs() < 1e-15);
        assert!(p[0].meaning.contains("1.280e-3"), "{}", p[0].meaning);
        assert!(p[0].meaning.contains("0.01"));
        let floor = Constraint::RobustError {
            floor: 0.9,
            slack: 0.0,
        };
        let p = prices(
            &[term("a", floor), term("b", floor)],
            &[0.0, 2.5],
            &[0.0, 0.04],
        );
        assert!(!p[0].binding && p[0].meaning.contains("not binding"));
        assert!(p[1].constraint == "b" && p[1].meaning.contains("one point"));
        assert!((p[1].cost_per_step - 0.025).abs() < 1e-15);
        assert_eq!(p[1].relaxed_by, 0.04);
    }
}
