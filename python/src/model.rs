//! `ballast._native.Model`: a checked model held in memory — loaded from the JSON layout or ONNX, or
//! built from layout text (what the scikit-learn and PyTorch converters produce) — with prediction,
//! its input range and saving.
//!
//! Every model here passed the library's layout checks; changing the input range re-runs them, so an
//! object never holds a model the command line would refuse.

use std::path::PathBuf;

use numpy::{IntoPyArray, PyArray1, PyArray2, PyReadonlyArray2};
use pyo3::prelude::*;

use ballast::data::OutOfRange;
use ballast::model::{predicted_class, Model};

use crate::arrays;
use crate::errors::{input, OrPy};
use crate::interrupt::guarded;

/// A model the library accepted.
#[pyclass(name = "Model", module = "ballast._native", frozen)]
pub struct PyModel {
    /// The model.
    pub model: Model,
    /// The file it was loaded from, while it is unchanged (recorded with its digest in reports).
    pub path: Option<PathBuf>,
}

impl PyModel {
    /// A model not read from a file.
    pub fn in_memory(model: Model) -> PyModel {
        PyModel { model, path: None }
    }

    /// The network's outputs (`classifier`: a 1-output model as the two logits `[0, z]`).
    fn outputs(
        &self,
        x: &PyReadonlyArray2<'_, f64>,
        classifier: bool,
    ) -> PyResult<nalgebra::DMatrix<f64>> {
        // Prediction accepts any finite input, inside the input range or not.
        let mut unbounded = self.model.clone();
        unbounded.input.lower = vec![f64::NEG_INFINITY; unbounded.input.dim];
        unbounded.input.upper = vec![f64::INFINITY; unbounded.input.dim];
        let (features, _) = arrays::features("X", x, &unbounded, OutOfRange::Error)?;
        guarded(|| {
            let network = if classifier {
                self.model.classifier()
            } else {
                self.model.network()
            };
            network.forward_batch(&features)
        })
    }
}

#[pymethods]
impl PyModel {
    /// Reads a model file: the JSON layout, or ONNX when the name ends in `.onnx`.
    #[staticmethod]
    #[pyo3(signature = (path, allow_large = false))]
    fn load(path: PathBuf, allow_large: bool) -> PyResult<PyModel> {
        let model = guarded(|| ballast::cli::common::load_model(&path, allow_large))?.or_py()?;
        let path = (!ballast::model::onnx::is_onnx_path(&path)).then_some(path);
        Ok(PyModel { model, path })
    }

    /// Parses and checks a model from JSON text in the `ballast.model/1` layout.
    #[staticmethod]
    fn from_json(text: &str) -> PyResult<PyModel> {
        Ok(PyModel::in_memory(
            guarded(|| Model::from_json_str(text))?.or_py()?,
        ))
    }

    /// The model in the JSON layout.
    fn to_json(&self) -> String {
        self.model.to_json_string()
    }

    /// Writes the model in the JSON layout, atomically.
    fn save(&self, path: PathBuf) -> PyResult<()> {
        self.model.save(&path).or_py()
    }

    /// The network's outputs for every sample of `X` (samples × outputs; one column for a binary model).
    fn logits<'py>(
        &self,
        py: Python<'py>,
        x: PyReadonlyArray2<'py, f64>,
    ) -> PyResult<Bound<'py, PyArray2<f64>>> {
        let logits = self.outputs(&x, false)?;
        let (outputs, samples) = logits.shape();
        let rows: Vec<Vec<f64>> = (0..samples)
            .map(|i| (0..outputs).map(|o| logits[(o, i)]).collect())
            .collect();
        PyArray2::from_vec2(py, &rows).map_err(|e| input(e.to_string()))
    }

    /// The predicted class index of every sample of `X`.
    fn predict<'py>(
        &self,
        py: Python<'py>,
        x: PyReadonlyArray2<'py, f64>,
    ) -> PyResult<Bound<'py, PyArray1<i64>>> {
        let logits = self.outputs(&x, true)?;
        let classes: Vec<i64> = (0..logits.ncols())
            .map(|i| predicted_class(logits.column(i).as_slice()) as i64)
            .collect();
        Ok(classes.into_pyarray(py))
    }

    /// A copy with the input range set (`lower`, `upper`: one value per feature; ±inf for none).
    fn with_input_range(&self, lower: Vec<f64>, upper: Vec<f64>) -> PyResult<PyModel> {
        let dim = self.model.input.dim;
        for (name, values) in [("lower", &lower), ("upper", &upper)] {
            if values.len() != dim {
                return Err(input(format!(
                    "input_range: {} {name} values, expected {dim} (one per feature)",
                    values.len()
                )));
            }
            if let Some(k) = values.iter().position(|v| v.is_nan()) {
                return Err(input(format!("input_range: {name}[{k}] is not a number")));
            }
        }
        if let Some(k) = (0..dim).find(|&k| lower[k] > upper[k]) {
            return Err(input(format!(
                "input_range: feature {k} (\"{}\"): lower {} is above upper {}",
                self.model.feature_name(k),
                lower[k],
                upper[k]
            )));
        }
        let mut model = self.model.clone();
        model.input.lower = lower;
        model.input.upper = upper;
        // Through the layout checks again, as a file with this range would be.
        let model = Model::from_json_str(&model.to_json_string()).or_py()?;
        Ok(PyModel::in_memory(model))
    }

    /// (lower, upper): the input range, one value per feature (±inf where unbounded).
    #[getter]
    fn input_range(&self) -> (Vec<f64>, Vec<f64>) {
        (
            self.model.input.lower.clone(),
            self.model.input.upper.clone(),
        )
    }

    /// Number of input features.
    #[getter]
    fn input_dim(&self) -> usize {
        self.model.input.dim
    }

    /// Class names (the indices as text when the model names none).
    #[getter]
    fn classes(&self) -> Vec<String> {
        (0..self.model.class_count())
            .map(|c| self.model.class_name(c))
            .collect()
    }

    /// Feature names (`x0`, `x1`, … when the model names none).
    #[getter]
    fn feature_names(&self) -> Vec<String> {
        (0..self.model.input.dim)
            .map(|k| self.model.feature_name(k))
            .collect()
    }

    /// True when the model names its inputs (`input.names`); data columns are then matched by name.
    #[getter]
    fn names_inputs(&self) -> bool {
        self.model.input.names.is_some()
    }

    /// The model's name, if it has one.
    #[getter]
    fn name(&self) -> Option<String> {
        self.model.name.clone()
    }

    /// Weights and biases in all dense and convolution layers.
    #[getter]
    fn parameter_count(&self) -> usize {
        self.model.parameter_count()
    }

    /// The file the model was read from (None when built in memory or changed since).
    #[getter]
    fn path(&self) -> Option<PathBuf> {
        self.path.clone()
    }
}
