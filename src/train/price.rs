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

/// Multipliers at or below this count as 0 (the constraint does not bind).
pub const BINDING: f64 = 1e-9;

/// One constraint's price.
#[derive(Debug, Clone, PartialEq, serde::Serialize)]
pub struct Price {
    /// Which constraint (e.g. "robust loss ≤ 0.2, all rows" or "floor 0.9, class normal").
    pub constraint: String,
    /// The multiplier.
    pub multiplier: f64,
    /// True when the multiplier is above [`BINDING`].
    pub binding: bool,
    /// About how much the optimal clean loss rises when the requirement is tightened by one unit
    /// step (0.01 of the level or one point of the floor).
    pub cost_per_step: f64,
    /// The price in words.
    pub meaning: String,
}

/// The prices of `constraint` at `multipliers` (one, or one per class named by `class_name`).
pub fn prices(
    constraint: &Constraint,
    multipliers: &[f64],
    class_name: &dyn Fn(usize) -> String,
) -> Vec<Price> {
    let per_class = multipliers.len() > 1;
    multipliers
        .iter()
        .enumerate()
        .map(|(k, &multiplier)| {
            let rows = if per_class {
                format!("class {}", class_name(k))
            } else {
                "all rows".to_string()
            };
            let (name, step) = match constraint {
                Constraint::RobustLossLevel { level } => (
                    format!("mean robust loss ≤ {level}, {rows}"),
                    "lowering the level by 0.01",
                ),
                Constraint::RobustError { floor, .. } => (
                    format!("robust fraction ≥ {floor}, {rows}"),
                    "raising the floor by one point",
                ),
            };
            let binding = multiplier > BINDING;
            let cost_per_step = 0.01 * multiplier;
            let meaning = if binding {
                format!(
                    "{step} costs about {cost_per_step:.3e} in clean loss (multiplier {multiplier:.4}; \
                     exact to first order for a convex model at its optimum, a local estimate for a network)"
                )
            } else {
                format!("not binding at the end: {step} costs nothing to first order")
            };
            Price {
                constraint: name,
                multiplier,
                binding,
                cost_per_step,
                meaning,
            }
        })
        .collect()
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn a_multiplier_is_the_clean_loss_cost_of_one_step() {
        let level = Constraint::RobustLossLevel { level: 0.2 };
        let p = prices(&level, &[0.128], &|c| c.to_string());
        assert_eq!(p.len(), 1);
        assert!(p[0].binding);
        assert!((p[0].cost_per_step - 0.00128).abs() < 1e-15);
        assert!(p[0].meaning.contains("1.280e-3"), "{}", p[0].meaning);
        assert!(p[0].constraint.contains("all rows"));
        let floor = Constraint::RobustError {
            floor: 0.9,
            slack: 0.0,
        };
        let names = ["normal", "worn"];
        let p = prices(&floor, &[0.0, 2.5], &|c| names[c].to_string());
        assert!(!p[0].binding && p[0].meaning.contains("not binding"));
        assert!(p[1].constraint.contains("class worn") && p[1].meaning.contains("one point"));
        assert!((p[1].cost_per_step - 0.025).abs() < 1e-15);
    }
}
