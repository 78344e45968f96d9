//! Multipliers read as prices: the sensitivity of the optimal clean loss to each requirement's level.
//!
//! For a convex problem `min f(θ) s.t. g_k(θ) ≤ a_k` with zero duality gap, the optimal value `p*(a)`
//! satisfies `∂p*/∂a_k = −λ_k*` where it is differentiable (Boyd & Vandenberghe, *Convex Optimization*,
//! §5.6.3): loosening constraint `k` by `δ` lowers the best clean loss by about `λ_k δ`, tightening
//! raises it by as much; a multiplier of 0 marks a constraint that does not bind. For a robust-error
//! constraint the allowance is `1 − floor − slack`, so raising the floor by one point (0.01) tightens
//! it by 0.01. For a network the problem is not convex and the multiplier is a local, training-time
//! estimate; the wording says so. Nothing here judges whether a requirement holds.
//!
//! Complementary slackness (Boyd & Vandenberghe, §5.5.2: `λ_k (g_k − a_k) = 0` at an optimum) says
//! a constraint with room to spare has multiplier 0. A rate constraint whose last epoch held it with
//! more than two standard errors of that epoch's measurement to spare (`√(m (1 − m) / n)` over its
//! `n` rows, the binomial standard error, common practice) while its multiplier is above 0 is
//! therefore reported as **not settled**, not as binding: the multiplier was still falling (e.g. from
//! the epsilon ramp), and its price is an upper estimate.

use super::dual::Constraint;
use super::terms::ConstraintTerm;

/// Multipliers at or below this count as 0 (the constraint does not bind).
pub const BINDING: f64 = 1e-9;

/// How a constraint stood in the last epoch of training.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Standing {
    /// The epoch's mean measurement (robust or clean error rate, or mean robust loss).
    pub measured: f64,
    /// The allowance it was held to (after the gap correction and the relaxation).
    pub allowed: f64,
    /// The training rows it was measured on in the epoch.
    pub rows: usize,
}

/// One constraint's price.
#[derive(Debug, Clone, PartialEq, serde::Serialize)]
pub struct Price {
    /// Which constraint (e.g. "robust loss ≤ 0.2, all rows" or a requirement line).
    pub constraint: String,
    /// The multiplier.
    pub multiplier: f64,
    /// True when the multiplier is above [`BINDING`] and the constraint is settled.
    pub binding: bool,
    /// False when the multiplier is above [`BINDING`] while the last epoch held a rate constraint
    /// with more than two standard errors of room (see the module documentation).
    pub settled: bool,
    /// The allowance left in the last epoch, `allowed − measured`, in the constraint's measure
    /// (negative when over it); `None` without a measurement.
    pub room: Option<f64>,
    /// About how much the optimal clean loss rises when the requirement is tightened by one unit
    /// step (0.01 of the level or one point of the floor).
    pub cost_per_step: f64,
    /// The relaxation the constraint ended with (0 when strict or not relaxed): how far training
    /// loosened it, in the constraint's measure.
    pub relaxed_by: f64,
    /// The price in words.
    pub meaning: String,
}

/// The prices of `terms` at `multipliers`, with the relaxation `slacks` they ended with and how each
/// stood in the last epoch (`standings`; one each, `None` when not measured).
pub fn prices(
    terms: &[ConstraintTerm],
    multipliers: &[f64],
    slacks: &[f64],
    standings: &[Option<Standing>],
) -> Vec<Price> {
    terms
        .iter()
        .zip(multipliers)
        .enumerate()
        .map(|(k, (term, &multiplier))| {
            let rate = !matches!(term.constraint, Constraint::RobustLossLevel { .. });
            let step = match rate {
                false => "lowering the level by 0.01",
                true => "raising the floor by one point",
            };
            let standing = standings
                .get(k)
                .copied()
                .flatten()
                .filter(|s| s.measured.is_finite() && s.rows > 0);
            let room = standing.map(|s| s.allowed - s.measured);
            // Room beyond two binomial standard errors of the epoch's rate: not tight.
            let spare = standing.filter(|s| {
                let m = s.measured.clamp(0.0, 1.0);
                rate && s.allowed - s.measured > 2.0 * (m * (1.0 - m) / s.rows as f64).sqrt()
            });
            let settled = !(multiplier > BINDING && spare.is_some());
            let binding = multiplier > BINDING && settled;
            let cost_per_step = 0.01 * multiplier;
            let relaxed_by = slacks.get(k).copied().unwrap_or(0.0);
            let meaning = match (binding, spare) {
                (true, _) => format!(
                    "{step} costs about {cost_per_step:.3e} in clean loss (multiplier {multiplier:.4}; \
                     exact to first order for a convex model at its optimum, a local estimate for a network)"
                ),
                (false, Some(s)) if !settled => format!(
                    "not settled: the last epoch held it with {:.1} points to spare (more than two \
                     standard errors) while its multiplier ({multiplier:.4}) was still falling; {step} \
                     costs about {cost_per_step:.3e} in clean loss or less (an upper estimate)",
                    100.0 * (s.allowed - s.measured)
                ),
                _ => format!("not binding at the end: {step} costs nothing to first order"),
            };
            Price {
                constraint: term.name.clone(),
                multiplier,
                binding,
                settled,
                room,
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
        let p = prices(&[level], &[0.128], &[0.0], &[]);
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
            &[None, None],
        );
        assert!(!p[0].binding && p[0].settled && p[0].meaning.contains("not binding"));
        assert!(p[1].constraint == "b" && p[1].meaning.contains("one point"));
        assert!((p[1].cost_per_step - 0.025).abs() < 1e-15);
        assert_eq!(p[1].relaxed_by, 0.04);
    }

    // Complementary slackness (Boyd & Vandenberghe, §5.5.2): a rate constraint held with more room
    // than two binomial standard errors of its epoch's measurement while its multiplier is above 0
    // is not settled and not binding; within them it binds. Here the standard error at a measured rate of 0.08 over 1 000
    // rows is √(0.08 · 0.92 / 1000) = 0.00858, so the boundary is 0.01716 of room.
    #[test]
    fn a_constraint_with_room_to_spare_does_not_bind() {
        let floor = Constraint::RobustError {
            floor: 0.9,
            slack: 0.0,
        };
        let at = |room: f64| Standing {
            measured: 0.08,
            allowed: 0.08 + room,
            rows: 1000,
        };
        let terms = [
            term("tight", floor),
            term("loose", floor),
            term("over", floor),
        ];
        let p = prices(
            &terms,
            &[0.5, 0.5, 0.5],
            &[0.0; 3],
            &[Some(at(0.0171)), Some(at(0.0172)), Some(at(-0.01))],
        );
        assert!(p[0].binding && p[0].settled, "{:?}", p[0]);
        assert!(!p[1].binding && !p[1].settled, "{:?}", p[1]);
        assert!(
            p[1].meaning.contains("1.7 points to spare"),
            "{}",
            p[1].meaning
        );
        assert!(p[1].meaning.contains("upper estimate"));
        assert!(p[2].binding, "over the allowance binds: {:?}", p[2]);
        assert!((p[1].room.expect("measured") - 0.0172).abs() < 1e-12);
        // A loss level has no rate to take a standard error of: its multiplier decides.
        let level = term("loss", Constraint::RobustLossLevel { level: 0.2 });
        let standing = Standing {
            measured: 0.1,
            allowed: 0.2,
            rows: 1000,
        };
        assert!(prices(&[level], &[0.1], &[0.0], &[Some(standing)])[0].binding);
    }
}
