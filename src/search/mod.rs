//! Complete verification by branch and bound over ReLU activation states (Bunel et al., 2018 and 2020).
//!
//! For a sample of class `y` and its forbidden classes, [`verify_sample`] decides whether some input of
//! the region (ball ∩ input range) moves the answer into a forbidden class. It builds one bound engine
//! ([`crate::engine`]) for the sample, bounds every margin `logit_y − logit_j` at the root and runs the
//! attack of [`crate::attack`]; each margin not proved then gets its own best-first tree (`tree`) that
//! splits unstable ReLUs into active / inactive sub-domains a batch at a time, bounds all children of a
//! batch together with the split constraints enforced (`bounding`: optimised slopes and split
//! multipliers started from the parent's best, the parent's pre-activation bounds reused below the
//! split layer), tries short attacks
//! from the bound minimisers (`probe`), and solves fully fixed sub-domains as LPs (`leaf`, with the affine
//! piece of `piece` and the multipliers of `multipliers`). One
//! tree per forbidden class keeps each tree's bound a single number and gives per-class exact minima in
//! the optimality mode; the most dangerous class (lowest root bound) goes first, so a counterexample
//! ends the search early.
//!
//! Guarantees: [`Verdict::Proved`] only when every margin has a sound lower bound above
//! [`crate::bound::CERTIFY_TOLERANCE`] on every sub-domain; [`Verdict::Counterexample`] only with a point
//! that [`crate::attack::validate`] accepted (plain forward pass, inside the region, predicted class
//! forbidden). A search stopped by its deadline, node limit or frontier memory cap, or left with a
//! sub-domain it can neither prove nor refute, says [`Verdict::Unresolved`] with the best sound lower bound found — never a guess.
//! With restricted targets a point may beat the label with a forbidden class's logit while an allowed
//! class wins: that is neither a proof nor a counterexample, and the search says unresolved. L2 regions
//! are searched with the same trees but their leaves are bounded by a Lagrangian (sound, possibly
//! loose), so they can end unresolved where an L-inf search would finish.
//!
//! [`milp`] encodes the same question as a big-M mixed-integer program for cross-checks; the search never
//! relies on it.

mod bounding;
mod branching;
mod frontier;
mod leaf;
pub mod milp;
mod multipliers;
mod piece;
mod probe;
mod runner;
mod solver;
mod tree;

use std::time::Instant;

pub use runner::{verify_batch, verify_sample};

use crate::attack::{AttackError, AttackSettings, Counterexample};
use crate::bound::optimised::SlopeOptions;
use crate::bound::{BoundError, Method};
use crate::threat::Region;

/// An optimality search counts as exact when its sound lower bound and its achieved margin differ by at
/// most this (relative to `1 + |margin|`).
pub const EXACT_TOLERANCE: f64 = 1e-7;

/// How to search one sample.
#[derive(Debug, Clone, PartialEq)]
pub struct SearchSettings {
    /// Give up (unresolved) at this instant.
    pub deadline: Option<Instant>,
    /// Give up (unresolved) after bounding this many sub-domains for one sample.
    pub node_limit: usize,
    /// Give up (unresolved) when the open sub-domains of one sample would take more than this many
    /// bytes (an estimate from their shape: split states, pre-activation bounds, a minimiser).
    pub frontier_memory: usize,
    /// Open sub-domains split per step; all their children are bounded in one batch of the engine.
    pub batch_size: usize,
    /// Run every tree to optimality and report the exact minimum margin per class instead of stopping at
    /// the first proof or counterexample.
    pub optimality: bool,
    /// Seed of the attacks (per sample in [`verify_batch`], see [`crate::attack::sample_seed`]).
    pub seed: u64,
    /// Bounding method for the sub-domains (see [`crate::bound::Method`]): interval, linear (one
    /// backward pass) or optimised (slopes and, under splits, split multipliers).
    pub bound_method: Method,
    /// The ascent of the optimised method.
    pub slope_options: SlopeOptions,
    /// The attack run before any tree (`None` to skip); its deadline is replaced by [`Self::deadline`].
    pub root_attack: Option<AttackSettings>,
    /// PGD steps from each processed node's bound minimiser (0 = no attacks inside the trees).
    pub node_attack_steps: usize,
    /// Units considered per split: 1 splits the best-scored unit; `k > 1` bounds the children of the
    /// `k` best-scored units cheaply (the parent's intermediate bounds, one backward pass) and splits
    /// the unit whose worse child bound is highest (filtered smart branching, De Palma et al., 2021).
    pub branching_candidates: usize,
    /// In the optimality mode, a sub-domain is dropped once its bound is within this of the best margin
    /// achieved (absolute, logit units).
    pub optimality_gap: f64,
}

impl Default for SearchSettings {
    /// No deadline, 20 000 sub-domains, 256 MiB of open sub-domains, batches of 64, decision mode,
    /// seed 0, optimised bounds (default ascent), the default attack first, 10 PGD steps per node,
    /// look-ahead among the 3 best-scored units, optimality gap 1e-9.
    fn default() -> Self {
        SearchSettings {
            deadline: None,
            node_limit: 20_000,
            frontier_memory: 256 << 20,
            batch_size: 64,
            optimality: false,
            seed: 0,
            bound_method: Method::OptimisedLinear,
            slope_options: SlopeOptions::default(),
            root_attack: Some(AttackSettings::default()),
            node_attack_steps: 10,
            branching_candidates: 3,
            optimality_gap: 1e-9,
        }
    }
}

/// Why a search ended without a verdict.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash)]
pub enum UnresolvedReason {
    /// The deadline passed.
    Deadline,
    /// The node limit was reached.
    NodeLimit,
    /// The open sub-domains would have exceeded the memory cap.
    MemoryLimit,
    /// A sub-domain's bound stayed at or below the tolerance and its minimiser is not a counterexample
    /// (a margin within the tolerance of zero, a tie, an allowed class winning, or a loose L2 leaf).
    Undecided {
        /// The forbidden class of that sub-domain.
        target: usize,
    },
}

/// The answer for one sample.
#[derive(Debug, Clone, PartialEq)]
pub enum Verdict {
    /// No input of the region moves the answer into a forbidden class.
    Proved {
        /// Sound lower bound on the smallest margin over the forbidden classes (> the tolerance).
        min_margin_lower: f64,
    },
    /// A validated input of the region that moves the answer into a forbidden class.
    Counterexample(Counterexample),
    /// Neither within the budget.
    Unresolved {
        /// Best sound lower bound on the smallest margin found.
        best_lower: f64,
        /// Why the search stopped.
        reason: UnresolvedReason,
    },
}

/// What the search learnt about one forbidden class.
#[derive(Debug, Clone, PartialEq)]
pub struct TargetSummary {
    /// The forbidden class `j`.
    pub target: usize,
    /// Sound lower bound on `min (logit_label − logit_j)` over the region.
    pub lower: f64,
    /// Smallest `logit_label − logit_j` reached at a region point seen (an upper bound on the minimum;
    /// `+∞` when no point was evaluated).
    pub upper: f64,
    /// Where `upper` was reached.
    pub upper_point: Option<Vec<f64>>,
    /// True when the tree closed every sub-domain (in the optimality mode `upper` is then the minimum when
    /// `lower` is within [`EXACT_TOLERANCE`] of it; see [`SearchOutcome::minimum_margin`]).
    pub finished: bool,
    /// Sub-domains bounded for this class (the root counts once).
    pub nodes: usize,
    /// Sub-domains solved as LPs.
    pub leaves: usize,
}

/// The result of searching one sample.
#[derive(Debug, Clone, PartialEq)]
pub struct SearchOutcome {
    /// The verdict.
    pub verdict: Verdict,
    /// Per forbidden class, in the order given (classes proved at the root have `nodes == 1`).
    pub targets: Vec<TargetSummary>,
    /// Sub-domains bounded in total.
    pub nodes: usize,
    /// Wall time in seconds.
    pub seconds: f64,
}

impl SearchOutcome {
    /// The exact minimum of `logit_label − logit_target` when an optimality search closed that class
    /// with its sound lower bound within [`EXACT_TOLERANCE`] of the achieved margin (`None` otherwise).
    pub fn minimum_margin(&self, target: usize) -> Option<f64> {
        self.targets
            .iter()
            .find(|t| {
                t.target == target
                    && t.finished
                    && t.upper.is_finite()
                    && t.upper - t.lower <= EXACT_TOLERANCE * (1.0 + t.upper.abs())
            })
            .map(|t| t.upper)
    }
}

/// One sample for [`verify_batch`].
#[derive(Debug, Clone, PartialEq)]
pub struct SearchProblem {
    /// The sample's index in its data set (its attack seed is derived from it).
    pub index: usize,
    /// Ball ∩ input range around the sample.
    pub region: Region,
    /// The sample's class (the model must predict it at the centre for the search to be meaningful).
    pub label: usize,
    /// Forbidden classes (e.g. from [`crate::threat::Targets::forbidden_for`]).
    pub targets: Vec<usize>,
}

/// Why a search could not run (bad input or a solver failure; outcomes are never errors).
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
pub enum SearchError {
    /// The bound module rejected the problem.
    #[error("bounds: {0}")]
    Bound(#[from] BoundError),
    /// The attack module rejected the problem.
    #[error("attack: {0}")]
    Attack(#[from] AttackError),
    /// The LP / MILP solver failed.
    #[error("LP solver failed: {message}")]
    Solver {
        /// What the solver said.
        message: String,
    },
    /// The settings are not usable.
    #[error("search settings: {0}")]
    Settings(String),
    /// The region's norm is not supported by this entry point.
    #[error("{0}")]
    Unsupported(String),
    /// An internal consistency check failed (a bug; the search refuses to guess).
    #[error("internal error in the search: {0}")]
    Internal(String),
}
