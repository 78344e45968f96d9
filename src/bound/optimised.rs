//! Linear relaxation with optimised lower slopes (Xu et al., 2021) and, under split constraints,
//! optimised split multipliers (Wang et al., 2021), run on the batched engine
//! ([`crate::engine::slopes`]).
//!
//! Every slope in `[0, 1]` and every multiplier `β ≥ 0` gives a sound bound, and the ascent starts from
//! the adaptive slopes, so the result is never below [`super::linear`]'s bound for the same arguments.
//! Intermediate bounds are those of [`super::linear`].

use super::batch::{self, Request};
use super::{BoundError, MarginBounds, Method, SplitState};
use crate::engine::slopes::SlopeSettings;
use crate::model::Network;
use crate::threat::Region;

/// Settings of the slope optimisation.
#[derive(Debug, Clone, PartialEq)]
pub struct SlopeOptions {
    /// Gradient steps.
    pub iterations: usize,
    /// Adam step size (slopes live in `[0, 1]`).
    pub step: f64,
}

impl Default for SlopeOptions {
    fn default() -> SlopeOptions {
        let settings = SlopeSettings::default();
        SlopeOptions {
            iterations: settings.iterations,
            step: settings.step,
        }
    }
}

/// Lower bounds on `logit_label − logit_j` for every `j` in `targets` with optimised slopes (and split
/// multipliers); never below [`super::linear::margin_lower_bounds`] for the same arguments.
pub fn margin_lower_bounds(
    network: &Network,
    region: &Region,
    label: usize,
    targets: &[usize],
    splits: Option<&SplitState>,
    options: &SlopeOptions,
) -> Result<MarginBounds, BoundError> {
    let request = Request {
        region,
        label,
        targets,
        splits,
    };
    let settings = SlopeSettings {
        iterations: options.iterations,
        step: options.step,
    };
    batch::one(network, request, Method::OptimisedLinear, &settings)
}
