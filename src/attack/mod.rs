//! Attacks (FGSM, PGD) that search for validated counterexamples: an **upper bound** on robust
//! accuracy.
//!
//! Given a sample, its region (ball ∩ input range, [`crate::threat::Region`]) and the classes its answer
//! must not move into, the attack descends the margin `z_label − z_forbidden` with exact
//! backpropagated gradients computed for many points at once by the bound engine ([`evaluate`]), sign
//! / normalised steps in the region's metric ([`step`]) and a schedule of starts ([`runner`]) that
//! advances every sample of a batch together. It guarantees that every reported [`Counterexample`] was
//! confirmed by a plain forward pass and lies inside the region ([`counterexample::validate`]). It never
//! proves robustness: "not found" only means this search found nothing.

pub mod counterexample;
pub mod evaluate;
mod lockstep;
pub mod runner;
pub mod step;
pub mod survey;

pub use counterexample::{forbidden_margin, validate, Counterexample};
pub use evaluate::margin_and_gradient;
pub use runner::{
    attack_batch, attack_sample, sample_seed, AttackOutcome, AttackProblem, AttackSettings,
    SearchPrecision, StopReason,
};

/// Misuse of the attack API (bad sizes, classes or settings); outcomes are never errors.
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
pub enum AttackError {
    /// A vector does not match the network's input size.
    #[error("{what} has {found} features, expected {expected} (the network's input size)")]
    Dimension {
        /// Which argument.
        what: String,
        /// Its size.
        found: usize,
        /// The network's input size.
        expected: usize,
    },
    /// A class index is not one of the network's logits.
    #[error("class {class} is out of range, expected 0..{classes} (attacks need the classifier network with at least two logits)")]
    Class {
        /// The class given.
        class: usize,
        /// Number of logits.
        classes: usize,
    },
    /// The settings are not usable.
    #[error("attack settings: {0}")]
    Settings(String),
}
