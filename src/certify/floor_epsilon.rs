//! The largest epsilon of a sweep that meets the floor, from both sides: the largest swept epsilon up
//! to which every swept epsilon *passes* (the floor proven there by sound bounds), and the largest up
//! to which none *fails* (the floor not refuted by counterexamples). The true largest epsilon that
//! meets the floor lies between the first and the next swept epsilon after the second. It reads the
//! per-epsilon verdicts of the sweep as they are; it never runs a model.

use serde::{Deserialize, Serialize};

use super::report::{SweepPoint, Verdict};

/// The largest swept epsilons that meet the floor, proven and not refuted.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
pub struct FloorEpsilons {
    /// The largest swept epsilon up to which every swept epsilon passes (absent: the smallest fails
    /// to pass).
    pub certified: Option<f64>,
    /// The largest swept epsilon up to which no swept epsilon fails (absent: the smallest fails).
    pub empirical: Option<f64>,
}

/// The floor epsilons of `sweep` (ascending epsilons); `None` without a sweep of two or more epsilons
/// or without a floor (no point's verdict is pass or fail then).
pub fn floor_epsilons(sweep: &[SweepPoint], floor: Option<f64>) -> Option<FloorEpsilons> {
    if sweep.len() < 2 || floor.is_none() {
        return None;
    }
    let largest_prefix = |ok: &dyn Fn(Verdict) -> bool| {
        sweep
            .iter()
            .take_while(|p| ok(p.summary.verdict))
            .last()
            .map(|p| p.epsilon)
    };
    Some(FloorEpsilons {
        certified: largest_prefix(&|v| v == Verdict::Pass),
        empirical: largest_prefix(&|v| v != Verdict::Fail),
    })
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::certify::report::{summarize, Counts, Status};
    use crate::threat::requirement::Requirement;
    use crate::threat::Norm;

    fn point(
        epsilon: f64,
        certified: usize,
        unresolved: usize,
        requirement: &Requirement,
    ) -> SweepPoint {
        let statuses = std::iter::repeat_n(Status::Certified, certified)
            .chain(std::iter::repeat_n(Status::Unresolved, unresolved))
            .chain(std::iter::repeat_n(
                Status::Counterexample,
                10 - certified - unresolved,
            ));
        SweepPoint {
            epsilon,
            summary: summarize(&Counts::from_statuses(statuses, 10), requirement),
        }
    }

    #[test]
    fn proven_and_not_refuted_ends_of_a_sweep() {
        let requirement = Requirement {
            floor: Some(0.8),
            ..Requirement::uniform(Norm::Linf, 0.4)
        };
        // 9, 8 certified of 10: pass; 7 certified + 2 open: undecided; 6 certified: fail.
        let sweep = [
            point(0.1, 9, 0, &requirement),
            point(0.2, 8, 0, &requirement),
            point(0.3, 7, 2, &requirement),
            point(0.4, 6, 0, &requirement),
        ];
        assert_eq!(
            floor_epsilons(&sweep, Some(0.8)),
            Some(FloorEpsilons {
                certified: Some(0.2),
                empirical: Some(0.3)
            })
        );
        // A pass after a non-pass does not extend the proven end (every smaller epsilon must pass).
        let bumpy = [
            point(0.1, 7, 2, &requirement),
            point(0.2, 9, 0, &requirement),
        ];
        assert_eq!(
            floor_epsilons(&bumpy, Some(0.8)),
            Some(FloorEpsilons {
                certified: None,
                empirical: Some(0.2)
            })
        );
        assert_eq!(floor_epsilons(&sweep[..1], Some(0.8)), None);
        assert_eq!(floor_epsilons(&sweep, None), None);
    }
}
