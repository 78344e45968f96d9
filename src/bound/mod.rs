//! Sound lower bounds on classification margins over a region: interval, linear relaxation, optimised
//! slopes, LP relaxation.
//!
//! For a sample with label `y` and each forbidden class `j`, every function here returns a number `b_j`
//! with `logit_y(x) − logit_j(x) ≥ b_j` for **every** input `x` of the [`Region`] (ball ∩ input range)
//! that also satisfies the optional ReLU split constraints ([`SplitState`]). The bounds are sound in
//! exact arithmetic; they are computed in f64, so a sample counts as certified only when every bound
//! exceeds [`CERTIFY_TOLERANCE`] (see docs/bounds.md for the floating-point caveats). Nothing here ever
//! turns "could not bound" into "robust": a bound that cannot be computed is an error, a looser method
//! simply returns a lower (more negative) number.
//!
//! Layer indexing used throughout: `network.layers[k]` is an affine map; for `k < K − 1` (the hidden
//! layers) its output is a pre-activation vector followed by a ReLU. `pre_activation[k]` and
//! `SplitState::layers[k]` both refer to that output, one entry per unit.
//!
//! Methods, from loosest and cheapest to tightest and dearest:
//! [`interval`] (Gowal et al., 2018), [`linear`] (backward linear-bound propagation, Zhang et al., 2018;
//! the dual view of Wong & Kolter, 2018), [`optimised`] (slopes optimised by projected gradient ascent,
//! Xu et al., 2021); the tighter LP and MILP leaves of branch and bound are in [`crate::search`].
//! Minimising a linear function over a region lives in [`concretise`].

pub(crate) mod batch;
pub mod concretise;
pub mod interval;
pub mod linear;
pub mod optimised;

use std::borrow::Cow;

use crate::model::Network;
use crate::threat::Region;

/// A sample (or a sub-domain) is certified only when every margin lower bound exceeds this value.
///
/// The bounds are exact-arithmetic sound but computed in f64 (and the LP by an iterative solver with
/// feasibility tolerances around 1e-9); this absolute margin of safety covers those rounding errors for
/// the model sizes ballast accepts (logits of moderate magnitude). See docs/bounds.md.
pub const CERTIFY_TOLERANCE: f64 = 1e-6;

/// Which bounding method to run.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, serde::Serialize, serde::Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum Method {
    /// Interval bound propagation.
    Interval,
    /// Backward linear relaxation with adaptive lower slopes.
    Linear,
    /// Linear relaxation with lower slopes (and split multipliers) optimised by projected gradient
    /// ascent.
    OptimisedLinear,
}

impl Method {
    /// The lowercase name used in reports (`interval`, `linear`, `optimised_linear`, `lp`).
    pub fn name(&self) -> &'static str {
        match self {
            Method::Interval => "interval",
            Method::Linear => "linear",
            Method::OptimisedLinear => "optimised_linear",
        }
    }
}

/// A constraint on one hidden ReLU unit, used by branch and bound.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, Default)]
pub enum ReluSplit {
    /// No constraint: the unit is relaxed if its bounds straddle zero.
    #[default]
    Free,
    /// Restrict to inputs where the pre-activation is ≥ 0 (the ReLU is the identity).
    Active,
    /// Restrict to inputs where the pre-activation is ≤ 0 (the ReLU outputs zero).
    Inactive,
}

/// ReLU split constraints for every hidden unit: `layers[k][i]` constrains unit `i` of hidden layer `k`.
///
/// A bound computed under a split state holds for every region input satisfying all the constraints.
/// A forced unit uses the identity (active) or zero (inactive) relaxation, and its pre-activation bounds
/// are clipped to `[max(l, 0), u]` or `[l, min(u, 0)]`; when clipping empties an interval the domain is
/// reported as [`Domain::Empty`].
#[derive(Debug, Clone, PartialEq, Eq, Hash)]
pub struct SplitState {
    /// One vector per hidden layer, one entry per unit.
    pub layers: Vec<Vec<ReluSplit>>,
}

impl SplitState {
    /// No constraints, shaped for `network` (a 1-logit network has the same hidden layers).
    pub fn free(network: &Network) -> SplitState {
        SplitState {
            layers: network
                .hidden_sizes()
                .into_iter()
                .map(|n| vec![ReluSplit::Free; n])
                .collect(),
        }
    }

    /// The constraint on unit `unit` of hidden layer `layer`.
    pub fn get(&self, layer: usize, unit: usize) -> ReluSplit {
        self.layers[layer][unit]
    }

    /// A copy with unit `unit` of hidden layer `layer` constrained to `split`.
    pub fn with(&self, layer: usize, unit: usize, split: ReluSplit) -> SplitState {
        let mut next = self.clone();
        next.layers[layer][unit] = split;
        next
    }

    /// Number of constrained (non-free) units.
    pub fn split_count(&self) -> usize {
        self.layers
            .iter()
            .flatten()
            .filter(|s| **s != ReluSplit::Free)
            .count()
    }

    /// True when every unit of `pre_activations` (one vector per hidden layer, from a forward pass)
    /// satisfies the constraints: active units ≥ 0, inactive units ≤ 0.
    pub fn admits(&self, pre_activations: &[Vec<f64>]) -> bool {
        self.layers.iter().zip(pre_activations).all(|(splits, z)| {
            splits.iter().zip(z).all(|(s, v)| match s {
                ReluSplit::Free => true,
                ReluSplit::Active => *v >= 0.0,
                ReluSplit::Inactive => *v <= 0.0,
            })
        })
    }
}

/// Sound bounds on the pre-activations of one hidden layer: `lower[i] ≤ z_i(x) ≤ upper[i]` for every
/// region input satisfying the split constraints.
#[derive(Debug, Clone, PartialEq)]
pub struct LayerBounds {
    /// Lower bound per unit.
    pub lower: Vec<f64>,
    /// Upper bound per unit.
    pub upper: Vec<f64>,
}

impl LayerBounds {
    /// Number of units.
    pub fn len(&self) -> usize {
        self.lower.len()
    }

    /// True for a layer without units.
    pub fn is_empty(&self) -> bool {
        self.lower.is_empty()
    }

    /// True when unit `i` can be on either side of zero (`lower < 0 < upper`).
    pub fn is_unstable(&self, i: usize) -> bool {
        self.lower[i] < 0.0 && self.upper[i] > 0.0
    }

    /// Indices of the unstable units.
    pub fn unstable_units(&self) -> Vec<usize> {
        (0..self.len()).filter(|&i| self.is_unstable(i)).collect()
    }

    /// The elementwise tighter of two sound bounds on the same layer (still sound).
    pub fn tightest(&self, other: &LayerBounds) -> LayerBounds {
        LayerBounds {
            lower: self
                .lower
                .iter()
                .zip(&other.lower)
                .map(|(a, b)| a.max(*b))
                .collect(),
            upper: self
                .upper
                .iter()
                .zip(&other.upper)
                .map(|(a, b)| a.min(*b))
                .collect(),
        }
    }
}

/// Whether the split constraints leave any input in the region.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash)]
pub enum Domain {
    /// Inputs may satisfy the constraints; the bounds are meaningful.
    Feasible,
    /// No region input satisfies the split constraints (a clipped pre-activation interval became
    /// empty at `layer`, `unit`): the domain holds no counterexample and can be pruned. All margin bounds
    /// are then `+∞`.
    Empty {
        /// Hidden layer of the emptied unit.
        layer: usize,
        /// The unit.
        unit: usize,
    },
}

/// Margin lower bounds for one sample.
#[derive(Debug, Clone, PartialEq)]
pub struct MarginBounds {
    /// The method that produced the bounds.
    pub method: Method,
    /// The forbidden classes `j`, in the order given.
    pub targets: Vec<usize>,
    /// `lower[t]` ≤ `logit_label − logit_targets[t]` over the (split-constrained) region.
    pub lower: Vec<f64>,
    /// Per target, the region input minimising the final linear lower bound (linear methods) or the LP
    /// optimum's input (LP); `None` for interval bounds or an empty domain. Useful to seed attacks; it is
    /// inside the region but need not satisfy split constraints.
    pub minimisers: Vec<Option<Vec<f64>>>,
    /// Sound pre-activation bounds of every hidden layer used by the method (after split clipping).
    pub pre_activation: Vec<LayerBounds>,
    /// Whether the split constraints leave any input.
    pub domain: Domain,
}

impl MarginBounds {
    /// The smallest margin lower bound (`+∞` without targets).
    pub fn worst(&self) -> f64 {
        self.lower.iter().copied().fold(f64::INFINITY, f64::min)
    }

    /// True when the domain is feasible and every margin bound exceeds [`CERTIFY_TOLERANCE`]: no input of
    /// the (split-constrained) region changes the answer into a forbidden class.
    pub fn certified(&self) -> bool {
        self.domain == Domain::Feasible && self.lower.iter().all(|b| *b > CERTIFY_TOLERANCE)
    }

    /// True when branch and bound may drop this domain: it is empty or certified.
    pub fn prunable(&self) -> bool {
        matches!(self.domain, Domain::Empty { .. }) || self.certified()
    }

    fn empty(
        method: Method,
        targets: &[usize],
        pre_activation: Vec<LayerBounds>,
        layer: usize,
        unit: usize,
    ) -> MarginBounds {
        MarginBounds {
            method,
            targets: targets.to_vec(),
            lower: vec![f64::INFINITY; targets.len()],
            minimisers: vec![None; targets.len()],
            pre_activation,
            domain: Domain::Empty { layer, unit },
        }
    }
}

/// Why a bound could not be computed (bad input or solver failure; never "not robust").
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
pub enum BoundError {
    /// A size does not match the network.
    #[error("{what}: expected {expected}, found {found}")]
    DimensionMismatch {
        /// What was checked.
        what: String,
        /// The expected size.
        expected: usize,
        /// The size given.
        found: usize,
    },
    /// The label is not a class of the network.
    #[error("label {label} is out of range: the network has {classes} classes")]
    LabelOutOfRange {
        /// The label.
        label: usize,
        /// Number of classes.
        classes: usize,
    },
    /// A target class is out of range or equals the label.
    #[error("target class {target} is invalid for label {label} with {classes} classes")]
    InvalidTarget {
        /// The target.
        target: usize,
        /// The label.
        label: usize,
        /// Number of classes.
        classes: usize,
    },
    /// The region or the network holds a non-finite number where a finite one is needed.
    #[error("{what} must be finite, found {value}")]
    NonFinite {
        /// What was checked.
        what: String,
        /// The offending value.
        value: f64,
    },
    /// The LP solver failed.
    #[error("LP solver failed: {message}")]
    Solver {
        /// What the solver said.
        message: String,
    },
}

/// Lower bounds on `logit_label − logit_j` for every `j` in `targets` over `region`, by `method`,
/// optionally under ReLU split constraints.
///
/// A 1-logit binary network is treated as its two-logit classifier form ([`Network::as_classifier`]).
/// `targets` usually comes from [`crate::threat::Targets::forbidden_for`]; an empty list gives no bounds.
pub fn margin_lower_bounds(
    network: &Network,
    region: &Region,
    label: usize,
    targets: &[usize],
    method: Method,
    splits: Option<&SplitState>,
) -> Result<MarginBounds, BoundError> {
    match method {
        Method::Interval => interval::margin_lower_bounds(network, region, label, targets, splits),
        Method::Linear => linear::margin_lower_bounds(network, region, label, targets, splits),
        Method::OptimisedLinear => optimised::margin_lower_bounds(
            network,
            region,
            label,
            targets,
            splits,
            &optimised::SlopeOptions::default(),
        ),
    }
}

/// Checks the arguments shared by every method and returns the classifier form of the network.
pub(crate) fn validate<'a>(
    network: &'a Network,
    region: &Region,
    label: usize,
    targets: &[usize],
    splits: Option<&SplitState>,
) -> Result<Cow<'a, Network>, BoundError> {
    let network = if network.output_dim() == 1 {
        Cow::Owned(network.as_classifier())
    } else {
        Cow::Borrowed(network)
    };
    validate_network(&network)?;
    validate_sample(&network, region, label, targets, splits)?;
    Ok(network)
}

/// Checks a batch: one label and one target list per region, a valid network, and every sample valid.
pub(crate) fn validate_batch(
    network: &Network,
    regions: &[Region],
    labels: &[usize],
    targets: &[Vec<usize>],
) -> Result<(), BoundError> {
    let samples = regions.len();
    for (what, found) in [("labels", labels.len()), ("target lists", targets.len())] {
        if found != samples {
            return Err(BoundError::DimensionMismatch {
                what: format!("number of {what}"),
                expected: samples,
                found,
            });
        }
    }
    validate_network(network)?;
    for s in 0..samples {
        validate_sample(network, &regions[s], labels[s], &targets[s], None)?;
    }
    Ok(())
}

/// Checks that every parameter is finite.
pub(crate) fn validate_network(network: &Network) -> Result<(), BoundError> {
    for (k, layer) in network.layers.iter().enumerate() {
        if let Some(v) = layer
            .parameters()
            .into_iter()
            .flatten()
            .find(|v| !v.is_finite())
        {
            return Err(BoundError::NonFinite {
                what: format!("parameter of layer {k}"),
                value: *v,
            });
        }
    }
    Ok(())
}

/// Checks one sample's region, label, targets and splits against a classifier-form network.
pub(crate) fn validate_sample(
    network: &Network,
    region: &Region,
    label: usize,
    targets: &[usize],
    splits: Option<&SplitState>,
) -> Result<(), BoundError> {
    if region.dim() != network.input_dim() {
        return Err(BoundError::DimensionMismatch {
            what: "region dimension".into(),
            expected: network.input_dim(),
            found: region.dim(),
        });
    }
    if region.outer_lower.len() != region.dim() || region.outer_upper.len() != region.dim() {
        return Err(BoundError::DimensionMismatch {
            what: "region box".into(),
            expected: region.dim(),
            found: region.outer_lower.len().min(region.outer_upper.len()),
        });
    }
    if region.radii.len() != region.dim() {
        return Err(BoundError::DimensionMismatch {
            what: "region radii".into(),
            expected: region.dim(),
            found: region.radii.len(),
        });
    }
    for i in 0..region.dim() {
        for (what, value) in [
            ("region lower corner", region.outer_lower[i]),
            ("region upper corner", region.outer_upper[i]),
            ("region centre", region.center[i]),
            ("region radius", region.radii[i]),
        ] {
            if !value.is_finite() {
                return Err(BoundError::NonFinite {
                    what: format!("{what} (feature {i})"),
                    value,
                });
            }
        }
    }
    let classes = network.output_dim();
    if label >= classes {
        return Err(BoundError::LabelOutOfRange { label, classes });
    }
    for &target in targets {
        if target >= classes || target == label {
            return Err(BoundError::InvalidTarget {
                target,
                label,
                classes,
            });
        }
    }
    if let Some(splits) = splits {
        let sizes = network.hidden_sizes();
        if splits.layers.len() != sizes.len() {
            return Err(BoundError::DimensionMismatch {
                what: "split state hidden layers".into(),
                expected: sizes.len(),
                found: splits.layers.len(),
            });
        }
        for (k, (s, n)) in splits.layers.iter().zip(&sizes).enumerate() {
            if s.len() != *n {
                return Err(BoundError::DimensionMismatch {
                    what: format!("split state units of hidden layer {k}"),
                    expected: *n,
                    found: s.len(),
                });
            }
        }
    }
    Ok(())
}
