//! The narrow seam between the search and the LP / MILP solver (good_lp with its pure-Rust microlp
//! backend).
//!
//! A [`LinearProgram`] is plain data (objective, variable bounds, ranged rows, integrality); [`minimise`]
//! hands it to the solver and returns the optimum's value and point, or says the program is infeasible
//! or unbounded. Nothing here decides soundness: callers treat the solver's numbers as estimates and
//! derive sound bounds from them themselves (see [`super::leaf`]). Swapping the backend touches only
//! this file.

use good_lp::{microlp, variable, Expression, ProblemVariables, ResolutionError, Solution};
use good_lp::{SolverModel, Variable, WithTimeLimit};

use super::SearchError;

/// One ranged constraint `lower ≤ Σ coefficient · variable ≤ upper` (either side may be infinite).
#[derive(Debug, Clone, PartialEq)]
pub(crate) struct Row {
    /// `(variable index, coefficient)` pairs.
    pub coefficients: Vec<(usize, f64)>,
    /// Lower side (−∞ for none).
    pub lower: f64,
    /// Upper side (+∞ for none).
    pub upper: f64,
}

/// A linear program `min objective · v` over `lower ≤ v ≤ upper`, the rows, and integrality.
#[derive(Debug, Clone, PartialEq, Default)]
pub(crate) struct LinearProgram {
    /// Objective coefficient per variable.
    pub objective: Vec<f64>,
    /// Lower bound per variable (may be −∞).
    pub lower: Vec<f64>,
    /// Upper bound per variable (may be +∞).
    pub upper: Vec<f64>,
    /// Integrality per variable (a MILP when any is true).
    pub integer: Vec<bool>,
    /// The constraints.
    pub rows: Vec<Row>,
}

impl LinearProgram {
    /// Adds a continuous variable and returns its index.
    pub fn add_variable(&mut self, objective: f64, lower: f64, upper: f64) -> usize {
        self.objective.push(objective);
        self.lower.push(lower);
        self.upper.push(upper);
        self.integer.push(false);
        self.objective.len() - 1
    }

    /// Adds a 0/1 variable and returns its index.
    pub fn add_binary(&mut self, objective: f64) -> usize {
        let index = self.add_variable(objective, 0.0, 1.0);
        self.integer[index] = true;
        index
    }
}

/// What the solver reported.
#[derive(Debug, Clone, PartialEq)]
pub(crate) enum LpOutcome {
    /// An optimum (up to the solver's tolerances): its value and point.
    Optimal {
        /// Objective value.
        value: f64,
        /// Variable values.
        point: Vec<f64>,
    },
    /// No point satisfies the constraints (as far as the solver can tell).
    Infeasible,
    /// The objective is unbounded below.
    Unbounded,
}

/// Solves `program` (to optimality; MILPs with a zero gap), within `time_limit` seconds when given.
/// When the solver fails numerically (e.g. a singular basis), it is retried once with every row scaled
/// to a largest coefficient of 1 (the same feasible set, a different basis history).
pub(crate) fn minimise(
    program: &LinearProgram,
    time_limit: Option<f64>,
) -> Result<LpOutcome, SearchError> {
    match minimise_once(program, time_limit) {
        Err(SearchError::Solver { .. }) => {
            let mut scaled = program.clone();
            for row in &mut scaled.rows {
                let largest = row
                    .coefficients
                    .iter()
                    .map(|(_, c)| c.abs())
                    .fold(0.0, f64::max);
                if largest > 0.0 {
                    for (_, c) in &mut row.coefficients {
                        *c /= largest;
                    }
                    row.lower /= largest;
                    row.upper /= largest;
                }
            }
            minimise_once(&scaled, time_limit)
        }
        other => other,
    }
}

fn minimise_once(
    program: &LinearProgram,
    time_limit: Option<f64>,
) -> Result<LpOutcome, SearchError> {
    let mut variables = ProblemVariables::new();
    let handles: Vec<Variable> = (0..program.objective.len())
        .map(|i| {
            let mut definition = variable();
            if program.lower[i].is_finite() {
                definition = definition.min(program.lower[i]);
            }
            if program.upper[i].is_finite() {
                definition = definition.max(program.upper[i]);
            }
            if program.integer[i] {
                definition = definition.integer();
            }
            variables.add(definition)
        })
        .collect();
    let mut objective = Expression::with_capacity(handles.len());
    for (handle, coefficient) in handles.iter().zip(&program.objective) {
        if *coefficient != 0.0 {
            objective.add_mul(*coefficient, *handle);
        }
    }
    let mut model = variables.minimise(objective).using(microlp);
    if let Some(seconds) = time_limit {
        model = model.with_time_limit(seconds.max(0.0));
    }
    for row in &program.rows {
        let mut expression = Expression::with_capacity(row.coefficients.len());
        for (index, coefficient) in &row.coefficients {
            expression.add_mul(*coefficient, handles[*index]);
        }
        if row.lower.is_finite() && row.upper.is_finite() && row.lower == row.upper {
            model = model.with(expression.eq(row.lower));
            continue;
        }
        if row.lower.is_finite() {
            model = model.with(expression.clone().geq(row.lower));
        }
        if row.upper.is_finite() {
            model = model.with(expression.leq(row.upper));
        }
    }
    match model.solve() {
        Ok(solution) => {
            let point: Vec<f64> = handles.iter().map(|h| solution.value(*h)).collect();
            let value = point
                .iter()
                .zip(&program.objective)
                .map(|(v, c)| v * c)
                .sum();
            Ok(LpOutcome::Optimal { value, point })
        }
        Err(ResolutionError::Infeasible) => Ok(LpOutcome::Infeasible),
        Err(ResolutionError::Unbounded) => Ok(LpOutcome::Unbounded),
        Err(other) => Err(SearchError::Solver {
            message: other.to_string(),
        }),
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn small_lp_and_milp() {
        // min −x − y  s.t. x + 2y ≤ 4, 3x + y ≤ 6, x, y ≥ 0: optimum at (1.6, 1.2), value −2.8
        // (worked by hand from the two binding rows).
        let mut program = LinearProgram::default();
        let x = program.add_variable(-1.0, 0.0, f64::INFINITY);
        let y = program.add_variable(-1.0, 0.0, f64::INFINITY);
        program.rows.push(Row {
            coefficients: vec![(x, 1.0), (y, 2.0)],
            lower: f64::NEG_INFINITY,
            upper: 4.0,
        });
        program.rows.push(Row {
            coefficients: vec![(x, 3.0), (y, 1.0)],
            lower: f64::NEG_INFINITY,
            upper: 6.0,
        });
        match minimise(&program, None).unwrap() {
            LpOutcome::Optimal { value, point } => {
                assert!((value + 2.8).abs() < 1e-9);
                assert!((point[0] - 1.6).abs() < 1e-9 && (point[1] - 1.2).abs() < 1e-9);
            }
            other => panic!("unexpected {other:?}"),
        }
        // With x integral the best is x = 1, y = 1.5 (value −2.5) or x = 2, y = 0 (−2): −2.5.
        program.integer[x] = true;
        match minimise(&program, None).unwrap() {
            LpOutcome::Optimal { value, .. } => assert!((value + 2.5).abs() < 1e-9),
            other => panic!("unexpected {other:?}"),
        }
        // An infeasible row.
        program.rows.push(Row {
            coefficients: vec![(x, 1.0)],
            lower: 10.0,
            upper: f64::INFINITY,
        });
        program.rows.push(Row {
            coefficients: vec![(x, 1.0)],
            lower: f64::NEG_INFINITY,
            upper: 2.0,
        });
        assert_eq!(minimise(&program, None).unwrap(), LpOutcome::Infeasible);
    }
}
