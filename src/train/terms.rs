//! The constraints of a training problem, one multiplier each: a [`ConstraintTerm`] is one
//! [`Constraint`] with the rows it is measured on (all, or one true class), the ball (budget) and the
//! class changes that count. A requirement list gives one term per line ([`terms_for_lines`]); a single
//! requirement gives one term, or one per class ([`ConstrainedSettings::terms`]).
//!
//! What it guarantees: the terms of a list follow the lines in order, so multiplier `k` prices line
//! `k`. Nothing here measures or judges; the trainer ([`super::constrained`]) and the certify pipeline
//! do.

use crate::threat::requirement::{Requirement, RequirementLine};
use crate::threat::{Budget, Targets};

use super::constrained::ConstrainedSettings;
use super::dual::Constraint;

/// One constraint of the training problem with where it is measured.
#[derive(Debug, Clone, PartialEq, serde::Serialize)]
pub struct ConstraintTerm {
    /// The constraint in words (the requirement line it comes from).
    pub name: String,
    /// What it bounds.
    pub constraint: Constraint,
    /// The ball of its robust term (raw input units; unused by a clean-error constraint).
    #[serde(skip)]
    pub budget: Budget,
    /// Which class changes count.
    #[serde(skip)]
    pub targets: Targets,
    /// Only rows of this true class (`None`: every row).
    pub class: Option<usize>,
}

impl ConstraintTerm {
    /// True when a row of true class `label` belongs to the term.
    pub fn applies_to(&self, label: usize) -> bool {
        self.class.is_none_or(|c| c == label)
    }

    /// The allowance the term's batch measurement is held to, with the generalisation-gap correction
    /// `gap` (a rate is tightened by it, not below 0; a robust-loss level is not corrected).
    pub fn allowance(&self, gap: f64) -> f64 {
        match self.constraint {
            Constraint::RobustError { .. } | Constraint::CleanError { .. } => {
                (self.constraint.allowed() - gap).max(0.0)
            }
            Constraint::RobustLossLevel { .. } => self.constraint.allowed(),
        }
    }

    /// The required level the term's validation figure is compared with: the floor of a robust or
    /// clean fraction (`None` for a robust-loss level).
    pub fn floor(&self) -> Option<f64> {
        match self.constraint {
            Constraint::RobustError { floor, .. } | Constraint::CleanError { floor, .. } => {
                Some(floor)
            }
            Constraint::RobustLossLevel { .. } => None,
        }
    }

    /// The term with its floor raised by `margin` (at most to 1; floors only): the level training
    /// and the kept weights aim at on the validation data.
    pub fn with_floor_raised(&self, margin: f64) -> ConstraintTerm {
        let raise = |floor: f64| (floor + margin).min(1.0);
        let constraint = match self.constraint {
            Constraint::RobustError { floor, slack } => Constraint::RobustError {
                floor: raise(floor),
                slack,
            },
            Constraint::CleanError { floor, slack } => Constraint::CleanError {
                floor: raise(floor),
                slack,
            },
            other => other,
        };
        ConstraintTerm {
            constraint,
            ..self.clone()
        }
    }

    /// The term with its slack set to `slack` (floors only).
    pub fn with_slack(&self, slack: f64) -> ConstraintTerm {
        let constraint = match self.constraint {
            Constraint::RobustError { floor, .. } => Constraint::RobustError { floor, slack },
            Constraint::CleanError { floor, .. } => Constraint::CleanError { floor, slack },
            other => other,
        };
        ConstraintTerm {
            constraint,
            ..self.clone()
        }
    }
}

impl ConstrainedSettings {
    /// The terms of the problem: [`ConstrainedSettings::terms`] when given, else the single
    /// constraint over every row (or one per class with a per-class formulation) at the settings'
    /// budget and targets.
    pub fn terms(&self, classes: usize) -> Vec<ConstraintTerm> {
        self.terms_named(classes, &|c| c.to_string())
    }

    /// [`ConstrainedSettings::terms`] with the single constraint's terms named through `class_name`
    /// (e.g. "robust fraction ≥ 0.9, class worn").
    pub fn terms_named(
        &self,
        classes: usize,
        class_name: &dyn Fn(usize) -> String,
    ) -> Vec<ConstraintTerm> {
        if !self.terms.is_empty() {
            return self.terms.clone();
        }
        let rule = match self.constraint {
            Constraint::RobustLossLevel { level } => format!("mean robust loss ≤ {level}"),
            Constraint::RobustError { floor, .. } => format!("robust fraction ≥ {floor}"),
            Constraint::CleanError { floor, .. } => format!("clean accuracy ≥ {floor}"),
        };
        let one = |class: Option<usize>| ConstraintTerm {
            name: match class {
                Some(c) => format!("{rule}, class {}", class_name(c)),
                None => format!("{rule}, all rows"),
            },
            constraint: self.constraint,
            budget: self.budget.clone(),
            targets: self.targets.clone(),
            class,
        };
        if self.formulation.per_class() {
            (0..classes).map(|c| one(Some(c))).collect()
        } else {
            vec![one(None)]
        }
    }
}

/// One term per line of `lines`, in order: a certified floor becomes a robust-error constraint at the
/// line's budget (the requirement's ball at the line's epsilon) with its targets and class, plus
/// `slack`; a clean-accuracy floor becomes a clean-error constraint over every row. `describe` names
/// a line (as the certify report does).
pub fn terms_for_lines(
    requirement: &Requirement,
    lines: &[RequirementLine],
    dim: usize,
    slack: f64,
    describe: &dyn Fn(&RequirementLine) -> String,
) -> Vec<ConstraintTerm> {
    lines
        .iter()
        .map(|line| match line {
            RequirementLine::Certified(c) => ConstraintTerm {
                name: describe(line),
                constraint: Constraint::RobustError {
                    floor: c.floor,
                    slack,
                },
                budget: requirement.budget(c.epsilon, dim),
                targets: c.targets.clone(),
                class: c.class,
            },
            RequirementLine::CleanAccuracy { minimum } => ConstraintTerm {
                name: describe(line),
                constraint: Constraint::CleanError {
                    floor: *minimum,
                    slack,
                },
                budget: requirement.budget(0.0, dim),
                targets: Targets::Any,
                class: None,
            },
        })
        .collect()
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::threat::requirement::CertifiedFloor;
    use crate::threat::Norm;

    #[test]
    fn one_term_per_line_in_order_with_its_budget_class_and_slack() {
        let requirement = Requirement::uniform(Norm::Linf, 0.05);
        let lines = vec![
            RequirementLine::Certified(CertifiedFloor {
                epsilon: 0.02,
                floor: 0.9,
                confidence: None,
                class: None,
                targets: Targets::Any,
            }),
            RequirementLine::Certified(CertifiedFloor {
                epsilon: 0.05,
                floor: 0.7,
                confidence: None,
                class: Some(2),
                targets: Targets::Any,
            }),
            RequirementLine::CleanAccuracy { minimum: 0.95 },
        ];
        let terms = terms_for_lines(&requirement, &lines, 3, 0.01, &|l| format!("{l:?}"));
        assert_eq!(terms.len(), 3);
        assert_eq!(terms[0].budget.radii, vec![0.02; 3]);
        assert_eq!(terms[1].budget.radii, vec![0.05; 3]);
        assert!(terms[1].applies_to(2) && !terms[1].applies_to(0));
        assert!(terms[0].applies_to(0));
        assert!((terms[0].constraint.allowed() - 0.09).abs() < 1e-12);
        assert!((terms[2].constraint.allowed() - 0.04).abs() < 1e-12);
        assert_eq!(terms[2].floor(), Some(0.95));
        let looser = terms[1].with_slack(0.05);
        assert!((looser.constraint.allowed() - 0.25).abs() < 1e-12);
        let aimed = terms[0].with_floor_raised(0.03);
        assert!((aimed.floor().unwrap() - 0.93).abs() < 1e-12);
        assert!((aimed.constraint.allowed() - 0.06).abs() < 1e-12);
        assert!((terms[0].with_floor_raised(0.5).floor().unwrap() - 1.0).abs() < 1e-12);
    }
}
