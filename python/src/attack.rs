//! `ballast._native.attack`: PGD (with an FGSM start) on arrays, as `ballast attack` runs it.
//!
//! Every returned point was confirmed by a plain forward pass and lies inside ball ∩ input range
//! (the library's guarantee); "not found" proves nothing. The samples are attacked in chunks so Ctrl-C
//! stops the run between chunks; each sample's random starts depend only on the seed and its row, so
//! chunking changes no result.

use numpy::{IntoPyArray, PyArray2, PyReadonlyArray1, PyReadonlyArray2};
use pyo3::prelude::*;

use ballast::attack::{
    attack_batch, AttackOutcome, AttackProblem, AttackSettings, SearchPrecision,
};
use ballast::model::predicted_class;

use crate::arrays;
use crate::certify::Found;
use crate::errors::{input, OrPy};
use crate::interrupt::{run_detached, stop_if_cancelled};
use crate::model::PyModel;
use crate::requirement::PyRequirement;

/// Samples attacked between two looks at the cancel flag.
const CHUNK: usize = 128;

/// Attacks every correctly classified row of `X`; returns the rows where a counterexample was found,
/// the classes they were moved into and the points.
#[pyfunction]
#[pyo3(signature = (model, x, y, requirement, *, steps = 100, restarts = 5, seed = 0,
    precision = "single", out_of_range = "error"))]
#[allow(clippy::too_many_arguments)]
pub fn attack<'py>(
    py: Python<'py>,
    model: &PyModel,
    x: PyReadonlyArray2<'py, f64>,
    y: PyReadonlyArray1<'py, i64>,
    requirement: &PyRequirement,
    steps: usize,
    restarts: usize,
    seed: u64,
    precision: &str,
    out_of_range: &str,
) -> PyResult<Found<'py>> {
    if steps == 0 {
        return Err(input("steps: 0 is not allowed, expected at least 1 step"));
    }
    let precision = match precision {
        "single" => SearchPrecision::Single,
        "double" => SearchPrecision::Double,
        other => {
            return Err(input(format!(
                "precision: '{other}' is not allowed, expected single or double"
            )))
        }
    };
    let policy = arrays::policy(out_of_range)?;
    let data = arrays::dataset(("X", "y"), &x, &y, &model.model, policy)?;
    let settings = AttackSettings {
        steps,
        restarts,
        seed,
        precision,
        ..AttackSettings::default()
    };
    let requirement = &requirement.requirement;
    let model = &model.model;
    let found = run_detached(py, |cancel| {
        let network = model.classifier();
        let classes = model.class_count();
        let budget = requirement.budget(requirement.epsilon(), model.input.dim);
        let clean = network.forward_batch(&data.features);
        let mut problems = Vec::new();
        for (i, &label) in data.labels.iter().enumerate() {
            if predicted_class(clean.column(i).as_slice()) != label {
                continue;
            }
            let forbidden = requirement.targets.forbidden_for(label, classes);
            if forbidden.is_empty() {
                continue;
            }
            problems.push(AttackProblem {
                index: i,
                region: budget.region(data.sample(i), &model.input.lower, &model.input.upper),
                label,
                forbidden,
                extra_starts: Vec::new(),
            });
        }
        let mut found = Vec::new();
        for chunk in problems.chunks(CHUNK) {
            stop_if_cancelled(cancel);
            let outcomes = attack_batch(&network, chunk, &settings)?;
            for (p, outcome) in chunk.iter().zip(outcomes) {
                if let AttackOutcome::Found(c) = outcome {
                    found.push((p.index, c));
                }
            }
        }
        Ok::<_, ballast::attack::AttackError>(found)
    })?
    .or_py()?;
    let indices: Vec<i64> = found.iter().map(|(i, _)| *i as i64).collect();
    let classes: Vec<i64> = found.iter().map(|(_, c)| c.predicted as i64).collect();
    let dim = model.input.dim;
    let points = if found.is_empty() {
        PyArray2::zeros(py, [0, dim], false)
    } else {
        let rows: Vec<Vec<f64>> = found.iter().map(|(_, c)| c.input.clone()).collect();
        PyArray2::from_vec2(py, &rows).map_err(|e| input(e.to_string()))?
    };
    Ok((indices.into_pyarray(py), classes.into_pyarray(py), points))
}
