//! The constrained training problem evaluated at one point: the objective (mean clean cross-entropy)
//! and every constraint's value over all training rows at the full budget, the Lagrangian at given
//! multipliers, and from these the duality-gap estimate of a primal-dual run.
//!
//! For `min f(θ) s.t. g_k(θ) ≤ a_k` and multipliers `λ_k ≥ 0`, the Lagrangian is
//! `L(θ, λ) = f(θ) + Σ_k λ_k (g_k(θ) − a_k)`. When `θ` minimises `L(·, λ)` (what the primal steps
//! aim at), `L(θ, λ)` is the dual function at `λ`, a lower bound on the optimum for a convex problem
//! (weak duality; Boyd & Vandenberghe, *Convex Optimization*, §5.2), so `f(θ) − L(θ, λ) =
//! −Σ_k λ_k (g_k(θ) − a_k)` estimates the duality gap: it is 0 at a saddle point (complementary
//! slackness), positive when a priced constraint is slack, negative when one is violated. It is an
//! estimate, not a certificate: `θ` only approximately minimises `L(·, λ)`, and a non-convex problem
//! may have a gap at its optimum. Nothing here is evidence of robustness; the figures are training
//! losses.

use crate::data::Dataset;
use crate::model::{predicted_class, Network};
use crate::threat::Region;

use super::backprop::classifier_logits;
use super::constrained::{ConstrainedSettings, Constraint};
use super::plain::{check_data, gather_columns, TrainableModel};
use super::robust::{robust_loss, RegionMap, RobustLoss};
use super::validation::{linear_bound_errors, per_sample_cross_entropy};
use super::TrainError;

/// Rows per robust-loss evaluation (bounds the memory of one pass).
const CHUNK: usize = 256;

/// The problem's figures at one point (see the module documentation).
#[derive(Debug, Clone, PartialEq, serde::Serialize)]
pub struct ProblemFigures {
    /// Mean clean cross-entropy over all training rows (the objective `f`).
    pub clean_loss: f64,
    /// Each constraint's value over its rows at the full budget (`g_k`), in multiplier order.
    pub constraint_values: Vec<f64>,
    /// Each constraint's allowed value (`a_k`).
    pub allowed: Vec<f64>,
    /// The multipliers the Lagrangian is taken at.
    pub multipliers: Vec<f64>,
    /// `f + Σ_k λ_k (g_k − a_k)`.
    pub lagrangian: f64,
    /// `f − L = −Σ_k λ_k (g_k − a_k)`.
    pub duality_gap_estimate: f64,
    /// `max_k (g_k − a_k)`, clamped at 0: how far the point is from feasible.
    pub violation: f64,
}

/// Evaluates the training problem of `settings` at `network` over every row of `train` with the
/// multipliers `multipliers` (one per term of [`ConstrainedSettings::terms`]). The robust
/// loss uses the full budget and, for the mixed loss, the final linear-bound weight.
pub fn problem_figures(
    trainable: &TrainableModel,
    network: &Network,
    train: &Dataset,
    settings: &ConstrainedSettings,
    multipliers: &[f64],
) -> Result<ProblemFigures, TrainError> {
    let model = &trainable.template;
    check_data(model, train, "training")?;
    let classes = model.class_count();
    let terms = settings.terms(classes);
    let count = terms.len();
    if multipliers.len() != count {
        return Err(TrainError::Settings(format!(
            "{} multipliers for {count} constraints",
            multipliers.len()
        )));
    }
    let features = trainable.to_network_units(&train.features);
    let clean = per_sample_cross_entropy(network, &features, &train.labels);
    let clean_loss = clean.iter().sum::<f64>() / clean.len().max(1) as f64;
    let map = RegionMap::new(model, trainable.normalization.as_ref());
    let beta = match settings.loss {
        RobustLoss::LinearInterval {
            final_linear_weight,
        } => final_linear_weight,
        _ => 0.0,
    };
    let mut constraint_values = Vec::with_capacity(count);
    for term in &terms {
        let rows: Vec<usize> = (0..train.len())
            .filter(|&i| term.applies_to(train.labels[i]))
            .collect();
        let mut total = 0.0;
        for (c, chunk) in rows.chunks(CHUNK).enumerate() {
            let labels: Vec<usize> = chunk.iter().map(|&i| train.labels[i]).collect();
            if let Constraint::CleanError { .. } = term.constraint {
                let logits =
                    classifier_logits(&network.forward_batch(&gather_columns(&features, chunk)));
                total += (0..labels.len())
                    .filter(|&s| predicted_class(logits.column(s).as_slice()) != labels[s])
                    .count() as f64;
                continue;
            }
            let regions: Vec<Region> = chunk
                .iter()
                .map(|&i| map.region(train.sample(i), &term.budget))
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
                &vec![1.0; chunk.len()],
                beta,
                settings.train.seed ^ (c as u64),
            )?;
            total += match term.constraint {
                Constraint::RobustLossLevel { .. } => robust.sample_losses.iter().sum::<f64>(),
                _ => {
                    let errors = if settings.loss.is_certified() {
                        linear_bound_errors(network, &regions, &labels, &targets)?
                    } else {
                        robust.errors
                    };
                    errors.iter().filter(|e| **e).count() as f64
                }
            };
        }
        constraint_values.push(if rows.is_empty() {
            0.0
        } else {
            total / rows.len() as f64
        });
    }
    let allowed: Vec<f64> = terms.iter().map(|t| t.constraint.allowed()).collect();
    let priced: f64 = multipliers
        .iter()
        .zip(constraint_values.iter().zip(&allowed))
        .map(|(l, (g, a))| l * (g - a))
        .sum();
    let violation = constraint_values
        .iter()
        .zip(&allowed)
        .map(|(g, a)| g - a)
        .fold(0.0, f64::max);
    Ok(ProblemFigures {
        clean_loss,
        constraint_values,
        allowed,
        multipliers: multipliers.to_vec(),
        lagrangian: clean_loss + priced,
        duality_gap_estimate: -priced,
        violation,
    })
}
