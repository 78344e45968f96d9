//! How far the counterexamples moved each feature, in units of the feature's radius (epsilon ×
//! tolerance, or epsilon without tolerances), so a reviewer sees which inputs the model is fragile in.
//!
//! For every sample with a counterexample at the requirement's epsilon, the change of feature `i` is
//! `δ_i = x'_i − x_i` (the saved perturbed input minus the data row) and its relative size
//! `|δ_i| / radius_i`, at most 1 inside the budget. Per feature this gives the mean relative size, the
//! mean signed change (the direction the attacks pushed), the share of counterexamples that moved the
//! feature to its radius (relative size ≥ [`AT_RADIUS`]; the range end can stop a feature short of it),
//! and the largest relative size. Features with radius 0 are held fixed and get no figures. These are
//! statistics of the counterexamples found (by attacks and search), not of every counterexample there
//! is. Shard statistics combine exactly ([`combine`]).

use serde::{Deserialize, Serialize};

use super::report::{Report, Status};
use crate::data::Dataset;

/// A feature counts as moved to its radius at this relative size or more.
pub const AT_RADIUS: f64 = 0.999;

/// Per-feature statistics of the counterexamples' changes.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct FeatureMovement {
    /// The feature's name.
    pub feature: String,
    /// Its radius at the requirement's epsilon (raw units; 0 = held fixed).
    pub radius: f64,
    /// Mean of |δ| / radius over the counterexamples (absent for a fixed feature).
    pub mean_relative_change: Option<f64>,
    /// Mean of δ / radius (sign = the direction the counterexamples pushed the feature).
    pub mean_signed_change: Option<f64>,
    /// Share of counterexamples with |δ| / radius ≥ [`AT_RADIUS`].
    pub share_at_radius: Option<f64>,
    /// Largest |δ| / radius.
    pub max_relative_change: Option<f64>,
}

/// The statistics over all counterexamples of a report.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct CounterexampleMovement {
    /// Counterexamples the statistics are over.
    pub counterexamples: usize,
    /// One entry per feature, in model input order.
    pub features: Vec<FeatureMovement>,
}

/// The statistics of `report`'s counterexamples against the rows of `data` (`None` without any).
pub fn movement(report: &Report, data: &Dataset) -> Option<CounterexampleMovement> {
    let requirement = report.requirement.requirement();
    let radii = requirement
        .budget(requirement.epsilon(), report.model.features.len())
        .radii;
    let changes: Vec<Vec<f64>> = report
        .samples
        .iter()
        .filter(|s| s.status == Status::Counterexample && s.index < data.len())
        .filter_map(|s| {
            let c = s.counterexample.as_ref()?;
            let row = data.features.column(s.index);
            Some(
                c.features
                    .iter()
                    .zip(row.iter())
                    .map(|(p, x)| p - x)
                    .collect(),
            )
        })
        .collect();
    if changes.is_empty() {
        return None;
    }
    let n = changes.len() as f64;
    let features = report
        .model
        .features
        .iter()
        .enumerate()
        .map(|(i, name)| {
            let r = radii[i];
            let relative: Vec<f64> = changes.iter().map(|d| d[i] / r).collect();
            let fixed = r <= 0.0;
            let stat = |v: f64| (!fixed).then_some(v);
            FeatureMovement {
                feature: name.clone(),
                radius: r,
                mean_relative_change: stat(relative.iter().map(|v| v.abs()).sum::<f64>() / n),
                mean_signed_change: stat(relative.iter().sum::<f64>() / n),
                share_at_radius: stat(
                    relative.iter().filter(|v| v.abs() >= AT_RADIUS).count() as f64 / n,
                ),
                max_relative_change: stat(relative.iter().map(|v| v.abs()).fold(0.0, f64::max)),
            }
        })
        .collect();
    Some(CounterexampleMovement {
        counterexamples: changes.len(),
        features,
    })
}

/// The statistics of several disjoint sets of counterexamples (e.g. shards) as one.
pub fn combine(parts: &[&CounterexampleMovement]) -> Option<CounterexampleMovement> {
    let first = parts.first()?;
    let total: usize = parts.iter().map(|p| p.counterexamples).sum();
    let weighted = |i: usize, f: fn(&FeatureMovement) -> Option<f64>| -> Option<f64> {
        let mut sum = 0.0;
        for p in parts {
            sum += f(&p.features[i])? * p.counterexamples as f64;
        }
        Some(sum / total.max(1) as f64)
    };
    let features = first
        .features
        .iter()
        .enumerate()
        .map(|(i, f)| FeatureMovement {
            feature: f.feature.clone(),
            radius: f.radius,
            mean_relative_change: weighted(i, |f| f.mean_relative_change),
            mean_signed_change: weighted(i, |f| f.mean_signed_change),
            share_at_radius: weighted(i, |f| f.share_at_radius),
            max_relative_change: parts
                .iter()
                .map(|p| p.features[i].max_relative_change)
                .try_fold(0.0, |m: f64, v| v.map(|v| m.max(v))),
        })
        .collect();
    Some(CounterexampleMovement {
        counterexamples: total,
        features,
    })
}
