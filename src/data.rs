//! Labelled data from CSV (header row, a label column, feature columns in model input order).
//!
//! When the model names its inputs, columns are matched by name (extra columns are an error); otherwise
//! every non-label column is a feature, in order. Labels are class indices or class names. Every error
//! names the file, the row (1-based, the header is row 1) and the column.

use std::path::Path;

use nalgebra::DMatrix;

use crate::model::Model;

/// Why a data file could not be read.
#[derive(Debug, thiserror::Error)]
pub enum DataError {
    /// The file could not be read.
    #[error("{path}")]
    Io {
        /// The file.
        path: String,
        /// What the system said.
        source: std::io::Error,
    },
    /// The content is not what the model needs.
    #[error("{path}: {place}: {message}")]
    Invalid {
        /// The file.
        path: String,
        /// Row and/or column.
        place: String,
        /// What is wrong and what was expected.
        message: String,
    },
}

/// Labelled samples matched to a model's inputs.
#[derive(Debug, Clone, PartialEq)]
pub struct Dataset {
    /// Features, **one column per sample** (input dim × samples), in model input order, raw units.
    pub features: DMatrix<f64>,
    /// Class index of each sample.
    pub labels: Vec<usize>,
}

impl Dataset {
    /// Number of samples.
    pub fn len(&self) -> usize {
        self.labels.len()
    }

    /// True when there are no samples.
    pub fn is_empty(&self) -> bool {
        self.labels.is_empty()
    }

    /// Features of sample `i`.
    pub fn sample(&self, i: usize) -> &[f64] {
        let dim = self.features.nrows();
        &self.features.as_slice()[i * dim..(i + 1) * dim]
    }

    /// The samples at `indices`, in that order.
    pub fn subset(&self, indices: &[usize]) -> Dataset {
        let dim = self.features.nrows();
        let mut features = DMatrix::zeros(dim, indices.len());
        for (k, &i) in indices.iter().enumerate() {
            features.column_mut(k).copy_from_slice(self.sample(i));
        }
        Dataset {
            features,
            labels: indices.iter().map(|&i| self.labels[i]).collect(),
        }
    }
}

/// How to read a data file.
#[derive(Debug, Clone)]
pub struct DataOptions {
    /// Name of the label column.
    pub label_column: String,
    /// What to do with a value outside the model's input range (beyond [`RANGE_ULPS`] of it).
    pub out_of_range: OutOfRange,
    /// Largest file size in bytes.
    pub max_bytes: u64,
}

impl Default for DataOptions {
    fn default() -> Self {
        DataOptions {
            label_column: "label".into(),
            out_of_range: OutOfRange::Error,
            max_bytes: crate::limits::MAX_DATA_FILE_BYTES,
        }
    }
}

/// A value this many units in the last place (or fewer, the unit taken at the range's largest finite
/// magnitude) beyond an end of the input range counts as on that end and is set to it: a scaler's own output such as 1.0000000000000002 for [0, 1] is rounding,
/// not data outside the range.
pub const RANGE_ULPS: u64 = 4;

/// The input-range policy: what happens to a value outside the model's input range.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default, serde::Serialize, serde::Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum OutOfRange {
    /// Refuse the file, naming the row, column, value and range (the default).
    #[default]
    Error,
    /// Set the value to the nearest end of the range.
    Clip,
    /// Leave the whole row out.
    Skip,
}

impl OutOfRange {
    /// The policy's name as given to `--out-of-range`.
    pub fn name(self) -> &'static str {
        match self {
            OutOfRange::Error => "error",
            OutOfRange::Clip => "clip",
            OutOfRange::Skip => "skip",
        }
    }
}

impl std::str::FromStr for OutOfRange {
    type Err = String;
    fn from_str(text: &str) -> Result<Self, String> {
        match text.trim() {
            "error" => Ok(OutOfRange::Error),
            "clip" => Ok(OutOfRange::Clip),
            "skip" => Ok(OutOfRange::Skip),
            other => Err(format!(
                "\"{other}\" is not a policy, expected error, clip or skip"
            )),
        }
    }
}

/// What the input-range policy did to a file: the rows it changed, by their row numbers in the file
/// (1-based, the header is row 1, as in error messages). Recorded in the report (`data.out_of_range`).
#[derive(Debug, Clone, PartialEq, Eq, Default, serde::Serialize, serde::Deserialize)]
pub struct RangeCounts {
    /// The policy the file was read with.
    pub policy: OutOfRange,
    /// Data rows in the file (blank lines not counted), kept or not.
    pub rows_in_file: usize,
    /// Rows with at least one value set to an end of the range (by `clip`), ascending.
    pub clipped: Vec<usize>,
    /// Rows left out (by `skip`), ascending. The data set's sample indices count the rows kept.
    pub skipped: Vec<usize>,
}

impl RangeCounts {
    /// Number of rows clipped.
    pub fn clipped_rows(&self) -> usize {
        self.clipped.len()
    }

    /// Number of rows left out.
    pub fn skipped_rows(&self) -> usize {
        self.skipped.len()
    }
}

/// One unit in the last place at `x` (finite, ≥ 0): the gap to the next larger double.
fn ulp(x: f64) -> f64 {
    f64::from_bits(x.to_bits() + 1) - x
}

/// `v` placed against `[lower, upper]`: `Ok(v)` inside, `Ok(end)` within [`RANGE_ULPS`] units in the last
/// place of an end, `Err(nearest end)` beyond. The unit is taken at the range's largest finite magnitude,
/// so an end at 0 gets the same allowance as the other end (rounding near 0 is not relative to 0).
pub fn place_in_range(v: f64, lower: f64, upper: f64) -> Result<f64, f64> {
    let scale = [lower, upper]
        .iter()
        .filter(|e| e.is_finite())
        .fold(0.0_f64, |m, e| m.max(e.abs()));
    let allowance = RANGE_ULPS as f64 * ulp(scale);
    for (outside, end) in [(v < lower, lower), (v > upper, upper)] {
        if outside {
            return if end.is_finite() && (v - end).abs() <= allowance {
                Ok(end)
            } else {
                Err(end)
            };
        }
    }
    Ok(v)
}

/// Reads a CSV file for `model`.
pub fn load_csv(path: &Path, model: &Model, options: &DataOptions) -> Result<Dataset, DataError> {
    load_csv_counted(path, model, options).map(|(data, _)| data)
}

/// Reads a CSV file for `model` and says how many rows the input-range policy changed.
pub fn load_csv_counted(
    path: &Path,
    model: &Model,
    options: &DataOptions,
) -> Result<(Dataset, RangeCounts), DataError> {
    let text =
        crate::limits::read_text_file(path, options.max_bytes).map_err(|source| DataError::Io {
            path: path.display().to_string(),
            source,
        })?;
    parse_csv_counted(&text, model, options).map_err(|(place, message)| DataError::Invalid {
        path: path.display().to_string(),
        place,
        message,
    })
}

/// Parses CSV text for `model`; errors are `(place, message)`.
pub fn parse_csv(
    text: &str,
    model: &Model,
    options: &DataOptions,
) -> Result<Dataset, (String, String)> {
    parse_csv_counted(text, model, options).map(|(data, _)| data)
}

/// Parses CSV text for `model` and counts the rows the input-range policy changed.
pub fn parse_csv_counted(
    text: &str,
    model: &Model,
    options: &DataOptions,
) -> Result<(Dataset, RangeCounts), (String, String)> {
    let mut reader = csv::ReaderBuilder::new()
        .has_headers(true)
        .flexible(true)
        .trim(csv::Trim::All)
        .from_reader(text.as_bytes());
    let headers = reader
        .headers()
        .map_err(|e| ("row 1 (header)".to_string(), e.to_string()))?
        .clone();
    if headers.is_empty() || (headers.len() == 1 && headers[0].is_empty()) {
        return Err((
            "row 1 (header)".into(),
            "empty file, expected a header row".into(),
        ));
    }
    let mut seen = std::collections::HashMap::new();
    for (i, h) in headers.iter().enumerate() {
        if let Some(first) = seen.insert(h.to_string(), i) {
            return Err((
                format!("row 1 (header), column {}", i + 1),
                format!(
                    "column name \"{h}\" appears twice (also column {})",
                    first + 1
                ),
            ));
        }
    }
    let label_index = headers
        .iter()
        .position(|h| h == options.label_column)
        .ok_or_else(|| {
            (
                "row 1 (header)".to_string(),
                format!(
                    "no label column \"{}\" (use --label-column to name it)",
                    options.label_column
                ),
            )
        })?;
    let dim = model.input.dim;
    // feature_columns[k] = CSV column of model input k
    let feature_columns: Vec<usize> = match &model.input.names {
        Some(names) => {
            let mut columns = Vec::with_capacity(dim);
            for name in names {
                let c = headers.iter().position(|h| h == name).ok_or_else(|| {
                    (
                        "row 1 (header)".to_string(),
                        format!("missing feature column \"{name}\""),
                    )
                })?;
                columns.push(c);
            }
            if let Some((c, extra)) = headers
                .iter()
                .enumerate()
                .find(|(c, h)| *c != label_index && !names.iter().any(|n| n == h))
            {
                return Err((
                    format!("row 1 (header), column {}", c + 1),
                    format!("column \"{extra}\" is not an input of the model"),
                ));
            }
            columns
        }
        None => {
            let columns: Vec<usize> = (0..headers.len()).filter(|c| *c != label_index).collect();
            if columns.len() != dim {
                return Err((
                    "row 1 (header)".into(),
                    format!(
                        "{} feature columns, expected {dim} (the model's input.dim)",
                        columns.len()
                    ),
                ));
            }
            columns
        }
    };
    let classes = model.class_count();
    let mut values: Vec<f64> = Vec::new();
    let mut labels = Vec::new();
    let mut counts = RangeCounts {
        policy: options.out_of_range,
        ..RangeCounts::default()
    };
    for (r, record) in reader.records().enumerate() {
        let row = r + 2;
        let record = record.map_err(|e| (format!("row {row}"), e.to_string()))?;
        if record.len() == 1 && record[0].is_empty() {
            continue; // blank line
        }
        if record.len() != headers.len() {
            return Err((
                format!("row {row}"),
                format!(
                    "has {} fields, expected {} (as in the header)",
                    record.len(),
                    headers.len()
                ),
            ));
        }
        let label_text = &record[label_index];
        let label = parse_label(label_text, model, classes)
            .map_err(|m| (format!("row {row}, column \"{}\"", options.label_column), m))?;
        let mut row_values = Vec::with_capacity(dim);
        let mut clipped = false;
        let mut skipped = false;
        for (k, &c) in feature_columns.iter().enumerate() {
            let field = &record[c];
            let place = || format!("row {row}, column \"{}\"", &headers[c]);
            let v: f64 = field
                .parse()
                .map_err(|_| (place(), format!("\"{field}\" is not a number")))?;
            if !v.is_finite() {
                return Err((place(), format!("\"{field}\" is not a finite number")));
            }
            let (lower, upper) = (model.input.lower[k], model.input.upper[k]);
            let v = match (place_in_range(v, lower, upper), options.out_of_range) {
                (Ok(v), _) => v,
                (Err(end), OutOfRange::Clip) => {
                    clipped = true;
                    end
                }
                (Err(_), OutOfRange::Skip) => {
                    skipped = true;
                    v
                }
                (Err(_), OutOfRange::Error) => {
                    return Err((
                        place(),
                        format!(
                            "{field} lies outside the model's input range [{lower}, {upper}] \
                             (--out-of-range clip or skip accepts such rows)"
                        ),
                    ))
                }
            };
            row_values.push(v);
        }
        counts.rows_in_file += 1;
        if skipped {
            counts.skipped.push(row);
            continue;
        }
        if clipped {
            counts.clipped.push(row);
        }
        labels.push(label);
        values.extend(row_values);
    }
    if labels.is_empty() && !counts.skipped.is_empty() {
        return Err((
            "file".into(),
            "every row lies outside the model's input range and was skipped".into(),
        ));
    }
    if labels.is_empty() {
        return Err(("file".into(), "no data rows after the header".into()));
    }
    Ok((
        Dataset {
            features: DMatrix::from_vec(dim, labels.len(), values),
            labels,
        },
        counts,
    ))
}

fn parse_label(text: &str, model: &Model, classes: usize) -> Result<usize, String> {
    if let Some(names) = &model.classes {
        if let Some(i) = names.iter().position(|n| n == text) {
            return Ok(i);
        }
    }
    match text.parse::<usize>() {
        Ok(i) if i < classes => Ok(i),
        Ok(i) => Err(format!(
            "class index {i} is out of range, expected 0..{}",
            classes - 1
        )),
        Err(_) => Err(match &model.classes {
            Some(names) => format!(
                "\"{text}\" is neither a class index nor one of the classes {}",
                names.join(", ")
            ),
            None => format!("\"{text}\" is not a class index (the model names no classes)"),
        }),
    }
}
