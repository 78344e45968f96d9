//! The one seam between ballast and an LP solver (good_lp with the pure-Rust microlp backend, or HiGHS
//! with the `highs` cargo feature).
//!
//! Callers describe a minimisation in plain numbers ([`LinearProgram`]); only this file knows the
//! solver library. It reports an optimum (value and point), infeasibility, or a solver error; it never
//! invents a value when the solver did not reach an optimum.

use good_lp::{Expression, ProblemVariables, ResolutionError, Solution, SolverModel, Variable};

use super::BoundError;

#[cfg(feature = "highs")]
use good_lp::solvers::highs::highs as backend;
#[cfg(not(feature = "highs"))]
use good_lp::solvers::microlp::microlp as backend;

/// The sense of one linear constraint `terms · x (sense) right_hand_side`.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub(crate) enum Sense {
    AtMost,
    Equal,
    AtLeast,
}

/// One linear constraint over the program's variables.
#[derive(Debug, Clone, PartialEq)]
pub(crate) struct Constraint {
    pub(crate) terms: Vec<(usize, f64)>,
    pub(crate) sense: Sense,
    pub(crate) right_hand_side: f64,
}

/// Variables with bounds (±∞ allowed) and linear constraints.
#[derive(Debug, Clone, PartialEq, Default)]
pub(crate) struct LinearProgram {
    pub(crate) lower: Vec<f64>,
    pub(crate) upper: Vec<f64>,
    pub(crate) constraints: Vec<Constraint>,
}

impl LinearProgram {
    /// Adds a variable and returns its index.
    pub(crate) fn variable(&mut self, lower: f64, upper: f64) -> usize {
        self.lower.push(lower);
        self.upper.push(upper);
        self.lower.len() - 1
    }

    /// Adds a constraint.
    pub(crate) fn constrain(
        &mut self,
        terms: Vec<(usize, f64)>,
        sense: Sense,
        right_hand_side: f64,
    ) {
        self.constraints.push(Constraint {
            terms,
            sense,
            right_hand_side,
        });
    }
}

/// What the solver found.
#[derive(Debug, Clone, PartialEq)]
pub(crate) enum Outcome {
    /// The minimum and a minimising point.
    Optimal { value: f64, point: Vec<f64> },
    /// No point satisfies the constraints.
    Infeasible,
}

/// Minimises `objective · x + constant` over the program.
pub(crate) fn minimise(
    program: &LinearProgram,
    objective: &[(usize, f64)],
    constant: f64,
) -> Result<Outcome, BoundError> {
    let mut variables = ProblemVariables::new();
    let handles: Vec<Variable> = program
        .lower
        .iter()
        .zip(&program.upper)
        .map(|(l, u)| {
            let mut definition = good_lp::variable();
            if l.is_finite() {
                definition = definition.min(*l);
            }
            if u.is_finite() {
                definition = definition.max(*u);
            }
            variables.add(definition)
        })
        .collect();
    let mut goal = Expression::with_capacity(objective.len());
    for &(i, c) in objective {
        goal.add_mul(c, handles[i]);
    }
    let mut model = variables.minimise(goal).using(backend);
    for constraint in &program.constraints {
        let mut expression = Expression::with_capacity(constraint.terms.len());
        for &(i, c) in &constraint.terms {
            expression.add_mul(c, handles[i]);
        }
        let rhs = constraint.right_hand_side;
        model.add_constraint(match constraint.sense {
            Sense::AtMost => expression.leq(rhs),
            Sense::Equal => expression.eq(rhs),
            Sense::AtLeast => expression.geq(rhs),
        });
    }
    match model.solve() {
        Ok(solution) => {
            let point: Vec<f64> = handles.iter().map(|v| solution.value(*v)).collect();
            let value = objective.iter().map(|&(i, c)| c * point[i]).sum::<f64>() + constant;
            Ok(Outcome::Optimal { value, point })
        }
        Err(ResolutionError::Infeasible) => Ok(Outcome::Infeasible),
        Err(other) => Err(BoundError::Solver {
            message: other.to_string(),
        }),
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// A two-variable textbook LP: min −x − y s.t. x + 2y ≤ 4, 3x + y ≤ 6, x, y ≥ 0; optimum at
    /// (1.6, 1.2) with value −2.8 (solved by hand at the vertex where both constraints bind).
    #[test]
    fn solves_a_small_program() {
        let mut program = LinearProgram::default();
        let x = program.variable(0.0, f64::INFINITY);
        let y = program.variable(0.0, f64::INFINITY);
        program.constrain(vec![(x, 1.0), (y, 2.0)], Sense::AtMost, 4.0);
        program.constrain(vec![(x, 3.0), (y, 1.0)], Sense::AtMost, 6.0);
        match minimise(&program, &[(x, -1.0), (y, -1.0)], 0.0).unwrap() {
            Outcome::Optimal { value, point } => {
                assert!((value + 2.8).abs() < 1e-9);
                assert!((point[0] - 1.6).abs() < 1e-9 && (point[1] - 1.2).abs() < 1e-9);
            }
            Outcome::Infeasible => panic!("feasible program reported infeasible"),
        }
    }

    #[test]
    fn reports_infeasible() {
        let mut program = LinearProgram::default();
        let x = program.variable(0.0, 1.0);
        program.constrain(vec![(x, 1.0)], Sense::AtLeast, 2.0);
        assert_eq!(
            minimise(&program, &[(x, 1.0)], 0.0).unwrap(),
            Outcome::Infeasible
        );
    }
}
