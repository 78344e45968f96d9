//! `ballast._native.Requirement`: the budget, norm, floor and class-change rule of a run, checked
//! against a model by the same function the command line uses.
//!
//! Values are named by their keyword (`eps`, `floor`, …) where the command line names its flag; a
//! requirement file (`requirement=`) is read as `--requirement` reads it, keyword values overriding
//! its values.

use std::path::PathBuf;

use pyo3::prelude::*;

use ballast::threat::requirement::{Requirement, RequirementSpec, ToleranceSource};
use ballast::threat::Norm;

use crate::errors::{input, OrPy};
use crate::model::PyModel;

/// A requirement checked against a model.
#[pyclass(name = "Requirement", module = "ballast._native", frozen)]
pub struct PyRequirement {
    /// The checked requirement.
    pub requirement: Requirement,
    /// The model's input width it was checked against.
    pub dim: usize,
}

fn named<T>(value: Option<T>, name: &str) -> Option<(T, String)> {
    value.map(|v| (v, name.to_string()))
}

#[pymethods]
impl PyRequirement {
    /// Checks the values against `model`; `one_epsilon` refuses a sweep (attack, retrain).
    #[new]
    #[pyo3(signature = (model, *, eps = None, tolerances_file = None, tolerances = None, norm = None,
        floor = None, confidence = None, min_clean_accuracy = None, forbid_into = None,
        forbid_from = None, requirement = None, one_epsilon = false))]
    #[allow(clippy::too_many_arguments)]
    fn new(
        model: &PyModel,
        eps: Option<Vec<f64>>,
        tolerances_file: Option<PathBuf>,
        tolerances: Option<Vec<(String, f64)>>,
        norm: Option<String>,
        floor: Option<f64>,
        confidence: Option<f64>,
        min_clean_accuracy: Option<f64>,
        forbid_into: Option<Vec<String>>,
        forbid_from: Option<Vec<String>>,
        requirement: Option<PathBuf>,
        one_epsilon: bool,
    ) -> PyResult<PyRequirement> {
        let norm = match norm {
            Some(n) => Some(n.parse::<Norm>().map_err(|m| input(format!("norm: {m}")))?),
            None => None,
        };
        if tolerances_file.is_some() && tolerances.is_some() {
            return Err(input("tolerances: give a file or the values, not both"));
        }
        let tolerances = match (tolerances_file, tolerances) {
            (Some(p), _) => Some(ToleranceSource::File(p)),
            (None, Some(list)) => Some(ToleranceSource::Inline(list)),
            (None, None) => None,
        };
        let flags = RequirementSpec {
            epsilons: named(eps, "eps"),
            tolerances: named(tolerances, "tolerances"),
            norm: named(norm, "norm"),
            floor: named(floor, "floor"),
            min_clean_accuracy: named(min_clean_accuracy, "min_clean_accuracy"),
            confidence: named(confidence, "confidence"),
            forbid_into: named(forbid_into, "forbid_into"),
            forbid_from: named(forbid_from, "forbid_from"),
            lines: Vec::new(),
        };
        let file = match &requirement {
            Some(p) => RequirementSpec::from_file(p).or_py()?,
            None => RequirementSpec::default(),
        };
        let merged = file.overridden_by(flags);
        if !merged.lines.is_empty() {
            return Err(input(
                "requirement: a list of requirements ([[requirements]]) is not supported from Python yet; judge or retrain against it with `ballast certify` / `ballast retrain`",
            ));
        }
        if merged.epsilons.is_none() && merged.tolerances.is_none() {
            return Err(input(
                "eps: no budget given: pass eps (a number, or a list for a sweep with certify), tolerances, or requirement=FILE with epsilon or tolerances",
            ));
        }
        if one_epsilon {
            if let Some((values, place)) = &merged.epsilons {
                if values.len() > 1 {
                    return Err(input(format!(
                        "{place}: {} epsilons, expected one (only certify sweeps)",
                        values.len()
                    )));
                }
            }
        }
        let resolved = merged.resolve(&model.model).or_py()?;
        Ok(PyRequirement {
            requirement: resolved,
            dim: model.model.input.dim,
        })
    }

    /// The requirement in one line of words (class names from `model`).
    fn describe(&self, model: &PyModel) -> String {
        self.requirement.describe(&|c| model.model.class_name(c))
    }

    /// The epsilon values (several: a sweep), ascending.
    #[getter]
    fn epsilons(&self) -> Vec<f64> {
        self.requirement.epsilons.clone()
    }

    /// The floor on the robust fraction, if any.
    #[getter]
    fn floor(&self) -> Option<f64> {
        self.requirement.floor
    }

    /// The norm's name (`linf` or `l2`).
    #[getter]
    fn norm(&self) -> String {
        match self.requirement.norm {
            Norm::Linf => "linf".into(),
            Norm::L2 => "l2".into(),
        }
    }
}
