//! `ballast._native.certify` and `ballast._native.Report`: the certify pipeline on arrays, and its
//! report with the per-sample results as arrays.
//!
//! The run is the command line's (`certify_run` with the same pipeline options), so per-sample statuses
//! equal those of `ballast certify` on the same model, data and settings. The report is the
//! `ballast.report/1` document; writing it (`to_json`) also writes the counterexample CSV beside it,
//! as `--report` does. A run stopped by Ctrl-C raises `KeyboardInterrupt` and returns no report.

use std::path::PathBuf;

use numpy::{IntoPyArray, PyArray1, PyArray2, PyReadonlyArray1, PyReadonlyArray2};
use pyo3::prelude::*;

use ballast::certify::{
    certify_run, write_counterexamples, CertifyOptions, PipelineOptions, Report, Silent, Sources,
};
use ballast::cli::certify::{counterexample_path, outcome_of};

use crate::arrays;
use crate::errors::{file, input, OrPy};
use crate::interrupt::run_detached;
use crate::model::PyModel;
use crate::requirement::PyRequirement;

/// Three integer columns (e.g. index, label, predicted).
type IntColumns<'py> = (
    Bound<'py, PyArray1<i64>>,
    Bound<'py, PyArray1<i64>>,
    Bound<'py, PyArray1<i64>>,
);

/// Counterexamples: sample indices, the classes they are moved into, the points (n × features).
pub type Found<'py> = (
    Bound<'py, PyArray1<i64>>,
    Bound<'py, PyArray1<i64>>,
    Bound<'py, PyArray2<f64>>,
);

/// A certification report.
#[pyclass(name = "Report", module = "ballast._native", frozen)]
pub struct PyReport {
    /// The report.
    pub report: Report,
}

/// Where the model and data came from: the model's file and digest when it was read from one and is
/// unchanged, otherwise digests of the model's JSON text and of the arrays.
pub fn sources(model: &PyModel, data: &ballast::data::Dataset) -> Sources {
    let memory = Sources::in_memory(&model.model, data);
    match &model.path {
        Some(p) => match ballast::digest::sha256_file(p) {
            Ok(sha) => Sources {
                model_path: p.display().to_string(),
                model_sha256: sha,
                ..memory
            },
            Err(_) => memory,
        },
        None => memory,
    }
}

/// Certifies every row of `X` with label `y` against `requirement`.
#[pyfunction]
#[pyo3(signature = (model, x, y, requirement, *, budget = 0.0, seed = 0, radius = false,
    attack = true, out_of_range = "error"))]
#[allow(clippy::too_many_arguments)]
pub fn certify(
    py: Python<'_>,
    model: &PyModel,
    x: PyReadonlyArray2<'_, f64>,
    y: PyReadonlyArray1<'_, i64>,
    requirement: &PyRequirement,
    budget: f64,
    seed: u64,
    radius: bool,
    attack: bool,
    out_of_range: &str,
) -> PyResult<PyReport> {
    if !(budget.is_finite() && budget >= 0.0) {
        return Err(input(format!(
            "budget: {budget} is not allowed, expected seconds ≥ 0"
        )));
    }
    if requirement.dim != model.model.input.dim {
        return Err(input("requirement: it was checked against another model"));
    }
    let policy = arrays::policy(out_of_range)?;
    let data = arrays::dataset(("X", "y"), &x, &y, &model.model, policy)?;
    let sources = sources(model, &data);
    let options = CertifyOptions {
        pipeline: PipelineOptions {
            budget_seconds: budget,
            seed,
            radius,
            attack,
            ..PipelineOptions::default()
        },
        shard: None,
        label_column: "label".into(),
        command_line: vec!["ballast.certify (Python)".into()],
    };
    let requirement = &requirement.requirement;
    let model = &model.model;
    let report = run_detached(py, |cancel| {
        certify_run(
            model,
            &data,
            requirement,
            &sources,
            &options,
            None,
            &Silent,
            cancel,
        )
    })?
    .or_py()?;
    Ok(PyReport { report })
}

#[pymethods]
impl PyReport {
    /// Reads a saved report (`ballast.report/1`).
    #[staticmethod]
    fn load(path: PathBuf) -> PyResult<PyReport> {
        let text =
            std::fs::read_to_string(&path).map_err(|e| file(format!("{}: {e}", path.display())))?;
        let report =
            Report::from_json_str(&text).map_err(|m| input(format!("{}: {m}", path.display())))?;
        Ok(PyReport { report })
    }

    /// The report as JSON text.
    fn to_json_string(&self) -> String {
        self.report.to_json_string()
    }

    /// Writes the report (atomically) and, when there are counterexamples, `NAME.counterexamples.csv`
    /// beside it, as `ballast certify --report` does.
    fn to_json(&self, path: PathBuf) -> PyResult<()> {
        ballast::atomic::check_writable(&path)
            .map_err(|m| file(format!("{}: {m}", path.display())))?;
        let mut report = self.report.clone();
        let any = report.samples.iter().any(|s| {
            s.counterexample.is_some() || s.sweep.iter().any(|o| o.counterexample.is_some())
        });
        if any {
            let csv = counterexample_path(&path);
            write_counterexamples(&report, &csv).map_err(|e| file(e.to_string()))?;
            report.counterexamples = csv.file_name().map(|n| n.to_string_lossy().into_owned());
        }
        ballast::atomic::write_file(&path, report.to_json_string().as_bytes())
            .map_err(|e| file(format!("writing {}: {e}", path.display())))
    }

    /// Renders the sheet (Markdown + self-contained HTML) into `folder`; returns both paths.
    fn sheet(&self, folder: PathBuf) -> PyResult<(PathBuf, PathBuf)> {
        crate::interrupt::guarded(|| ballast::sheet::write_sheet(&self.report, &folder))?
            .map_err(|e| file(e.to_string()))
    }

    /// The summary as JSON text.
    fn summary_json(&self) -> String {
        serde_json::to_string(&self.report.summary).expect("the summary serialises")
    }

    /// `pass`, `fail`, `undecided` or `none` (no floor).
    #[getter]
    fn verdict(&self) -> &'static str {
        self.report.summary.verdict.name()
    }

    /// The command line's exit code for this verdict (0 met or no floor, 1 not met, 3 undecided).
    #[getter]
    fn exit_code(&self) -> u8 {
        outcome_of(self.report.summary.verdict).exit_code()
    }

    /// The status of every sample: certified, counterexample, misclassified or unresolved.
    #[getter]
    fn status(&self) -> Vec<&'static str> {
        self.report
            .samples
            .iter()
            .map(|s| s.status.name())
            .collect()
    }

    /// The stage that decided every sample.
    #[getter]
    fn stage(&self) -> Vec<&'static str> {
        self.report.samples.iter().map(|s| s.stage.name()).collect()
    }

    /// A sound lower bound on every sample's margin (NaN where none was computed).
    #[getter]
    fn margin_lower<'py>(&self, py: Python<'py>) -> Bound<'py, PyArray1<f64>> {
        let v: Vec<f64> = self
            .report
            .samples
            .iter()
            .map(|s| s.margin_lower.unwrap_or(f64::NAN))
            .collect();
        v.into_pyarray(py)
    }

    /// Every sample's certified radius (NaN unless computed with `radius=True`).
    #[getter]
    fn radius<'py>(&self, py: Python<'py>) -> Bound<'py, PyArray1<f64>> {
        let v: Vec<f64> = self
            .report
            .samples
            .iter()
            .map(|s| s.radius.unwrap_or(f64::NAN))
            .collect();
        v.into_pyarray(py)
    }

    /// Seconds spent on every sample.
    #[getter]
    fn seconds<'py>(&self, py: Python<'py>) -> Bound<'py, PyArray1<f64>> {
        let v: Vec<f64> = self.report.samples.iter().map(|s| s.seconds).collect();
        v.into_pyarray(py)
    }

    /// Every sample's row index, label and predicted class.
    #[getter]
    fn index_label_predicted<'py>(&self, py: Python<'py>) -> IntColumns<'py> {
        let s = &self.report.samples;
        let col = |f: &dyn Fn(&ballast::certify::SampleRecord) -> usize| -> Vec<i64> {
            s.iter().map(|r| f(r) as i64).collect()
        };
        (
            col(&|r| r.index).into_pyarray(py),
            col(&|r| r.label).into_pyarray(py),
            col(&|r| r.predicted).into_pyarray(py),
        )
    }

    /// The counterexamples (at the requirement's epsilon): their sample indices, the classes they
    /// are moved into and the points (n × features).
    fn counterexample_arrays<'py>(&self, py: Python<'py>) -> PyResult<Found<'py>> {
        let found: Vec<_> = self
            .report
            .samples
            .iter()
            .filter_map(|s| s.counterexample.as_ref().map(|c| (s.index, c)))
            .collect();
        let indices: Vec<i64> = found.iter().map(|(i, _)| *i as i64).collect();
        let classes: Vec<i64> = found.iter().map(|(_, c)| c.new_class as i64).collect();
        let dim = self.report.model.features.len();
        let points = if found.is_empty() {
            numpy::PyArray2::zeros(py, [0, dim], false)
        } else {
            let rows: Vec<Vec<f64>> = found.iter().map(|(_, c)| c.features.clone()).collect();
            PyArray2::from_vec2(py, &rows).map_err(|e| input(e.to_string()))?
        };
        Ok((indices.into_pyarray(py), classes.into_pyarray(py), points))
    }

    /// False when the run was stopped before every sample was decided.
    #[getter]
    fn complete(&self) -> bool {
        self.report.complete
    }
}
