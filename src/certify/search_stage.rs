//! The seam between the pipeline and complete verification (branch and bound, [`crate::search`]).
//!
//! It turns the search's outcome into three cases and never more: a completed proof, a candidate
//! counterexample (which the pipeline re-validates before recording it), or still open. A search that
//! stops on its deadline is open, never robust.

use std::time::Instant;

use super::CertifyError;
use crate::bound::BoundError;
use crate::model::Network;
use crate::search::{self, SearchError, SearchSettings, Verdict};
use crate::threat::Region;

/// What the search established within its deadline.
#[derive(Debug, Clone, PartialEq)]
pub enum Found {
    /// Every branch was closed by a sound bound: no forbidden class is reachable. Holds the sound
    /// lower bound on the smallest margin that the closed tree proves (> the tolerance).
    Proved(f64),
    /// A candidate counterexample (to be re-validated by the caller).
    Counterexample(Vec<f64>),
    /// The deadline or node limit came first, or a sub-domain stayed undecided; holds the best sound
    /// lower bound on the smallest margin the search found, when it has one.
    Open(Option<f64>),
}

/// Runs branch and bound on one sample until `deadline`; `seed` is the sample's own attack seed.
pub fn run(
    network: &Network,
    region: &Region,
    label: usize,
    forbidden: &[usize],
    deadline: Instant,
    seed: u64,
    index: usize,
) -> Result<Found, CertifyError> {
    let settings = SearchSettings {
        deadline: Some(deadline),
        seed,
        ..SearchSettings::default()
    };
    let outcome = match search::verify_sample(network, region, label, forbidden, &settings) {
        Ok(o) => o,
        // A solver that fails, or a region the search does not handle, proves nothing either way: the
        // sample stays open (unresolved).
        Err(SearchError::Solver { .. })
        | Err(SearchError::Bound(BoundError::Solver { .. }))
        | Err(SearchError::Unsupported(_)) => return Ok(Found::Open(None)),
        Err(e) => {
            return Err(CertifyError::Search {
                index,
                message: e.to_string(),
            })
        }
    };
    Ok(match outcome.verdict {
        Verdict::Proved { min_margin_lower } => Found::Proved(min_margin_lower),
        Verdict::Counterexample(c) => Found::Counterexample(c.input),
        Verdict::Unresolved { best_lower, .. } => {
            Found::Open(Some(best_lower).filter(|b| b.is_finite()))
        }
    })
}
