//! Reading a requirement: the unchecked [`RequirementSpec`] as read from a requirement file (TOML or
//! JSON, by extension) or built from command-line flags, and the rule that flags win over the file.
//! Every value keeps the flag or `file: field` it came from so later errors can name it; nothing here
//! checks a value against a model (that is [`super::resolve`]).

use std::path::{Path, PathBuf};

use serde::Deserialize;

use super::epsilon::parse_epsilon_list;
use super::list::parse_line;
use super::{invalid, LineSpec, RequirementError};
use crate::threat::Norm;

/// Where the per-feature tolerances come from.
#[derive(Debug, Clone, PartialEq)]
pub enum ToleranceSource {
    /// A file: JSON object `{"feature": tolerance}` or CSV with header `feature,tolerance`.
    File(PathBuf),
    /// Given inline (e.g. a table in the requirement file): feature name → tolerance.
    Inline(Vec<(String, f64)>),
}

/// Unchecked requirement values with the place each came from (for error messages).
#[derive(Debug, Clone, Default, PartialEq)]
pub struct RequirementSpec {
    /// Epsilon (scale) values; several mean a sweep.
    pub epsilons: Option<(Vec<f64>, String)>,
    /// Per-feature tolerances.
    pub tolerances: Option<(ToleranceSource, String)>,
    /// Norm.
    pub norm: Option<(Norm, String)>,
    /// Floor on the robust fraction.
    pub floor: Option<(f64, String)>,
    /// Minimum clean accuracy.
    pub min_clean_accuracy: Option<(f64, String)>,
    /// Confidence level of the one-sided lower bound.
    pub confidence: Option<(f64, String)>,
    /// Classes a sample must never be moved into (names or indices).
    pub forbid_into: Option<(Vec<String>, String)>,
    /// True classes the restriction applies to (names or indices).
    pub forbid_from: Option<(Vec<String>, String)>,
    /// A list of requirements (`[[requirements]]`), each line one rule; empty for a single requirement.
    pub lines: Vec<LineSpec>,
}

#[derive(Deserialize)]
#[serde(deny_unknown_fields)]
struct RawRequirement {
    #[serde(default, alias = "eps")]
    epsilon: Option<RawEpsilon>,
    #[serde(default)]
    tolerances: Option<RawTolerances>,
    #[serde(default)]
    norm: Option<String>,
    #[serde(default)]
    floor: Option<f64>,
    #[serde(default)]
    min_clean_accuracy: Option<f64>,
    #[serde(default)]
    confidence: Option<f64>,
    #[serde(default)]
    forbid_into: Option<Vec<String>>,
    #[serde(default)]
    forbid_from: Option<Vec<String>>,
    #[serde(default)]
    requirements: Option<Vec<serde_json::Value>>,
}

#[derive(Deserialize)]
#[serde(untagged)]
enum RawEpsilon {
    One(f64),
    Many(Vec<f64>),
    Text(String),
}

#[derive(Deserialize)]
#[serde(untagged)]
enum RawTolerances {
    Path(String),
    Table(std::collections::BTreeMap<String, f64>),
}

impl RequirementSpec {
    /// Reads a requirement file (`.toml` or `.json`, by extension). Relative tolerance paths are taken
    /// relative to the requirement file's folder.
    pub fn from_file(path: &Path) -> Result<RequirementSpec, RequirementError> {
        let shown = path.display().to_string();
        let text = crate::limits::read_text_file(path, crate::limits::MAX_SMALL_FILE_BYTES)
            .map_err(|e| RequirementError::Io {
                path: shown.clone(),
                message: e.to_string(),
            })?;
        let extension = path
            .extension()
            .map(|e| e.to_string_lossy().to_ascii_lowercase())
            .unwrap_or_default();
        let raw: RawRequirement = match extension.as_str() {
            "toml" => toml::from_str(&text)
                .map_err(|e| invalid(&shown, one_line_toml_error(&e, &text)))?,
            "json" => {
                let value: serde_json::Value =
                    serde_json::from_str(&text).map_err(|e| invalid(&shown, e.to_string()))?;
                if !value.is_object() {
                    return Err(invalid(
                        &shown,
                        "expected a JSON object with the requirement's keys".to_string(),
                    ));
                }
                serde_json::from_value(value).map_err(|e| invalid(&shown, e.to_string()))?
            }
            other => {
                return Err(invalid(
                    &shown,
                    format!("unknown requirement file type \".{other}\", expected .toml or .json"),
                ))
            }
        };
        let folder = path.parent().map(Path::to_path_buf).unwrap_or_default();
        let place = |field: &str| format!("{shown}: {field}");
        let mut spec = RequirementSpec::default();
        if let Some(e) = raw.epsilon {
            let values = match e {
                RawEpsilon::One(v) => vec![v],
                RawEpsilon::Many(v) => v,
                RawEpsilon::Text(t) => parse_epsilon_list(&t, &place("epsilon"))?,
            };
            spec.epsilons = Some((values, place("epsilon")));
        }
        if let Some(t) = raw.tolerances {
            let source = match t {
                RawTolerances::Path(p) => {
                    let p = PathBuf::from(p);
                    ToleranceSource::File(if p.is_relative() { folder.join(p) } else { p })
                }
                RawTolerances::Table(map) => ToleranceSource::Inline(map.into_iter().collect()),
            };
            spec.tolerances = Some((source, place("tolerances")));
        }
        if let Some(n) = raw.norm {
            let norm = n.parse::<Norm>().map_err(|m| invalid(place("norm"), m))?;
            spec.norm = Some((norm, place("norm")));
        }
        spec.floor = raw.floor.map(|v| (v, place("floor")));
        spec.min_clean_accuracy = raw
            .min_clean_accuracy
            .map(|v| (v, place("min_clean_accuracy")));
        spec.confidence = raw.confidence.map(|v| (v, place("confidence")));
        spec.forbid_into = raw.forbid_into.map(|v| (v, place("forbid_into")));
        spec.forbid_from = raw.forbid_from.map(|v| (v, place("forbid_from")));
        if let Some(entries) = raw.requirements {
            if entries.is_empty() {
                return Err(invalid(
                    place("requirements"),
                    "empty list, expected at least one requirement",
                ));
            }
            spec.lines = entries
                .iter()
                .enumerate()
                .map(|(k, v)| parse_line(v, &shown, k + 1))
                .collect::<Result<_, _>>()?;
        }
        Ok(spec)
    }

    /// This spec with every value that `flags` sets replaced by the flag's value.
    pub fn overridden_by(self, flags: RequirementSpec) -> RequirementSpec {
        RequirementSpec {
            epsilons: flags.epsilons.or(self.epsilons),
            tolerances: flags.tolerances.or(self.tolerances),
            norm: flags.norm.or(self.norm),
            floor: flags.floor.or(self.floor),
            min_clean_accuracy: flags.min_clean_accuracy.or(self.min_clean_accuracy),
            confidence: flags.confidence.or(self.confidence),
            forbid_into: flags.forbid_into.or(self.forbid_into),
            forbid_from: flags.forbid_from.or(self.forbid_from),
            lines: self.lines,
        }
    }
}

/// toml's messages span several lines (a source excerpt with a caret); keep the position and the reason
/// on one line.
fn one_line_toml_error(error: &toml::de::Error, text: &str) -> String {
    let reason = error.message().trim().replace('\n', " ");
    match error.span() {
        Some(span) => {
            let start = span.start.min(text.len());
            let line_number = text[..start].matches('\n').count() + 1;
            let line = text.lines().nth(line_number - 1).unwrap_or("").trim();
            let excerpt: String = line.chars().take(60).collect();
            format!("line {line_number} (`{excerpt}`): {reason}")
        }
        None => reason,
    }
}
