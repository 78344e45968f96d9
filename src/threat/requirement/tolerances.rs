//! Per-feature tolerances: reading them from a JSON or CSV file, or from an inline table of a
//! requirement file, and matching them to a model's input features. Every feature must appear exactly
//! once; negative or non-finite tolerances are errors that name the file and the row or key. Nothing here
//! scales them (the budget rule lives in [`super::Requirement::budget`]).

use std::path::Path;

use serde::{Deserialize, Serialize};

use super::{invalid, RequirementError, ToleranceSource};
use crate::model::Model;

/// Reads a per-feature tolerance file for `model`: JSON object `{"feature": tolerance}` or CSV with header
/// `feature,tolerance`. Every model feature must appear exactly once (give 0 to hold a feature fixed).
pub fn load_tolerances(path: &Path, model: &Model) -> Result<Vec<f64>, RequirementError> {
    resolve_tolerances(
        &ToleranceSource::File(path.to_path_buf()),
        &path.display().to_string(),
        model,
    )
    .map(|t| t.values)
}

pub(super) fn resolve_tolerances(
    source: &ToleranceSource,
    place: &str,
    model: &Model,
) -> Result<Tolerances, RequirementError> {
    let (entries, where_from): (Vec<(String, f64, String)>, String) = match source {
        ToleranceSource::Inline(list) => (
            list.iter()
                .map(|(n, v)| (n.clone(), *v, format!("{place}.{n}")))
                .collect(),
            place.to_string(),
        ),
        ToleranceSource::File(path) => {
            let shown = path.display().to_string();
            let text = crate::limits::read_text_file(path, crate::limits::MAX_SMALL_FILE_BYTES)
                .map_err(|e| RequirementError::Io {
                    path: format!("{place}: tolerance file {shown}"),
                    message: e.to_string(),
                })?;
            let is_json = path
                .extension()
                .map(|e| e.eq_ignore_ascii_case("json"))
                .unwrap_or(false)
                || text.trim_start().starts_with('{');
            let entries = if is_json {
                let map: serde_json::Map<String, serde_json::Value> = serde_json::from_str(&text)
                    .map_err(|e| {
                    invalid(
                        &shown,
                        format!("{e} (expected a JSON object {{\"feature\": tolerance}})"),
                    )
                })?;
                let mut out = Vec::new();
                for (name, value) in map {
                    let v = value.as_f64().ok_or_else(|| {
                        invalid(
                            format!("{shown}: \"{name}\""),
                            format!("{value} is not a number"),
                        )
                    })?;
                    out.push((name.clone(), v, format!("{shown}: \"{name}\"")));
                }
                out
            } else {
                parse_tolerance_csv(&text, &shown)?
            };
            (entries, shown)
        }
    };
    let dim = model.input.dim;
    let mut values = vec![f64::NAN; dim];
    for (name, value, at) in &entries {
        let index = (0..dim)
            .find(|i| model.feature_name(*i) == *name)
            .ok_or_else(|| invalid(at, unknown_feature(name, model)))?;
        if !values[index].is_nan() {
            return Err(invalid(at, format!("feature \"{name}\" is given twice")));
        }
        if !value.is_finite() || *value < 0.0 {
            return Err(invalid(at, format!("{value} is not allowed, expected a finite tolerance ≥ 0 in the feature's raw units")));
        }
        values[index] = *value;
    }
    if let Some(missing) = (0..dim).find(|i| values[*i].is_nan()) {
        return Err(invalid(
            &where_from,
            format!(
                "no tolerance for feature \"{}\" (every feature needs one; give 0 to hold it fixed)",
                model.feature_name(missing)
            ),
        ));
    }
    let origin = match source {
        ToleranceSource::File(p) => Some(p.display().to_string()),
        ToleranceSource::Inline(_) => None,
    };
    Ok(Tolerances {
        names: (0..dim).map(|i| model.feature_name(i)).collect(),
        values,
        origin,
    })
}

/// The message for a tolerance naming no input of `model`, with what the inputs are called and, when
/// the model names none (as after importing ONNX without names), how to name them.
fn unknown_feature(name: &str, model: &Model) -> String {
    let dim = model.input.dim;
    match &model.input.names {
        None => format!(
            "\"{name}\" is not an input feature of the model: the model names no inputs, so they are \
             x0 … x{} (an ONNX file imports without names unless its metadata has them); name them with \
             `ballast import --onnx FILE --input-range-file R.json --out M.json`, R.json holding \
             lower, upper and names, or key the tolerances by x0 … x{}",
            dim.saturating_sub(1),
            dim.saturating_sub(1)
        ),
        Some(names) => {
            let shown: Vec<&str> = names.iter().take(4).map(String::as_str).collect();
            format!(
                "\"{name}\" is not an input feature of the model, expected one of its {dim} input names ({}{})",
                shown.join(", "),
                if dim > shown.len() { ", …" } else { "" }
            )
        }
    }
}

fn parse_tolerance_csv(
    text: &str,
    shown: &str,
) -> Result<Vec<(String, f64, String)>, RequirementError> {
    let mut reader = csv::ReaderBuilder::new()
        .has_headers(true)
        .trim(csv::Trim::All)
        .from_reader(text.as_bytes());
    let headers = reader
        .headers()
        .map_err(|e| invalid(format!("{shown}: row 1 (header)"), e.to_string()))?
        .clone();
    let column = |name: &str| headers.iter().position(|h| h.eq_ignore_ascii_case(name));
    let (Some(fc), Some(tc)) = (column("feature"), column("tolerance")) else {
        return Err(invalid(
            format!("{shown}: row 1 (header)"),
            "expected the columns \"feature\" and \"tolerance\"",
        ));
    };
    let mut out = Vec::new();
    for (r, record) in reader.records().enumerate() {
        let row = r + 2;
        let record = record.map_err(|e| invalid(format!("{shown}: row {row}"), e.to_string()))?;
        let (Some(name), Some(value)) = (record.get(fc), record.get(tc)) else {
            return Err(invalid(
                format!("{shown}: row {row}"),
                "missing the feature or tolerance field",
            ));
        };
        let at = format!("{shown}: row {row}, column \"tolerance\"");
        let v: f64 = value
            .parse()
            .map_err(|_| invalid(&at, format!("\"{value}\" is not a number")))?;
        out.push((name.to_string(), v, at));
    }
    Ok(out)
}

/// Per-feature tolerances in raw input units, in model input order.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Tolerances {
    /// Feature names in model input order.
    pub names: Vec<String>,
    /// Tolerance per feature (raw units, ≥ 0; 0 holds the feature fixed).
    pub values: Vec<f64>,
    /// The file they were read from (absent when given inline).
    pub origin: Option<String>,
}
