//! numpy arrays in, checked [`Dataset`]s out: the checks the CSV reader makes, with places named as
//! array cells.
//!
//! `X` is samples × features (one row per sample, float64), `y` holds class indices (int64). Every
//! value must be finite; a value outside the model's input range is an error, clipped or its row left
//! out, as the command line's `--out-of-range` says (the same few-ulp allowance at the ends,
//! [`ballast::data::place_in_range`]). Every error names the array, the cell and what was expected.

use nalgebra::DMatrix;
use numpy::{PyReadonlyArray1, PyReadonlyArray2};
use pyo3::PyResult;

use ballast::data::{place_in_range, Dataset, OutOfRange};
use ballast::model::Model;

use crate::errors::input;

/// Features of `x` (samples × features) for `model`, checked (finite, the model's width; the input
/// range under `policy`), as a matrix with one column per sample; also the rows kept.
pub fn features(
    name: &str,
    x: &PyReadonlyArray2<'_, f64>,
    model: &Model,
    policy: OutOfRange,
) -> PyResult<(DMatrix<f64>, Vec<usize>)> {
    let x = x.as_array();
    let (rows, columns) = x.dim();
    let dim = model.input.dim;
    if columns != dim {
        return Err(input(format!(
            "{name}: {columns} features per sample (shape ({rows}, {columns})), the model expects {dim}"
        )));
    }
    if rows == 0 {
        return Err(input(format!("{name}: no samples (shape (0, {columns}))")));
    }
    let mut values = Vec::with_capacity(rows * dim);
    let mut kept = Vec::with_capacity(rows);
    for r in 0..rows {
        let start = values.len();
        let mut skip = false;
        for k in 0..dim {
            let v = x[[r, k]];
            if !v.is_finite() {
                return Err(input(format!(
                    "{name}[{r}, {k}]: {v} is not a finite number"
                )));
            }
            let (lower, upper) = (model.input.lower[k], model.input.upper[k]);
            let v = match (place_in_range(v, lower, upper), policy) {
                (Ok(v), _) => v,
                (Err(end), OutOfRange::Clip) => end,
                (Err(_), OutOfRange::Skip) => {
                    skip = true;
                    v
                }
                (Err(_), OutOfRange::Error) => {
                    return Err(input(format!(
                        "{name}[{r}, {k}] (feature \"{}\"): {v} lies outside the model's input range [{lower}, {upper}] (out_of_range=\"clip\" or \"skip\" accepts such rows)",
                        model.feature_name(k)
                    )))
                }
            };
            values.push(v);
        }
        if skip {
            values.truncate(start);
        } else {
            kept.push(r);
        }
    }
    if kept.is_empty() {
        return Err(input(format!(
            "{name}: every row lies outside the model's input range and was skipped"
        )));
    }
    Ok((DMatrix::from_vec(dim, kept.len(), values), kept))
}

/// Class indices of `y` for the rows `kept` of an `x` with `rows` rows, checked against `model`.
pub fn labels(
    name: &str,
    y: &PyReadonlyArray1<'_, i64>,
    rows: usize,
    kept: &[usize],
    model: &Model,
) -> PyResult<Vec<usize>> {
    let y = y.as_array();
    if y.len() != rows {
        return Err(input(format!(
            "{name}: {} labels, expected one per sample ({rows})",
            y.len()
        )));
    }
    let classes = model.class_count();
    let mut out = Vec::with_capacity(kept.len());
    for (i, &label) in y.iter().enumerate() {
        if label < 0 || label as usize >= classes {
            return Err(input(format!(
                "{name}[{i}]: class index {label} is out of range, expected 0..{}",
                classes - 1
            )));
        }
        if kept.binary_search(&i).is_ok() {
            out.push(label as usize);
        }
    }
    Ok(out)
}

/// The labelled data set of `x` and `y` for `model` (see [`features`] and [`labels`]).
pub fn dataset(
    (x_name, y_name): (&str, &str),
    x: &PyReadonlyArray2<'_, f64>,
    y: &PyReadonlyArray1<'_, i64>,
    model: &Model,
    policy: OutOfRange,
) -> PyResult<Dataset> {
    let rows = x.as_array().nrows();
    let (features, kept) = features(x_name, x, model, policy)?;
    let labels = labels(y_name, y, rows, &kept, model)?;
    Ok(Dataset { features, labels })
}

/// Parses an `out_of_range` argument.
pub fn policy(text: &str) -> PyResult<OutOfRange> {
    text.parse::<OutOfRange>()
        .map_err(|m| input(format!("out_of_range: {m}")))
}
