//! The robustness requirement: which budget (one or several epsilons, optionally scaled per-feature
//! tolerances), which class changes count, and the release rule (floor, minimum clean accuracy,
//! confidence).
//!
//! A requirement is assembled in two steps. A [`RequirementSpec`] holds plain, unchecked values as read
//! from a requirement file (TOML or JSON) or from command-line flags; [`RequirementSpec::overridden_by`]
//! lets flags win over the file. [`RequirementSpec::resolve`] then checks every value against the model
//! (feature and class names, ranges) and gives a [`Requirement`]. Every error names the flag or file and
//! the field. Nothing here computes bounds or verdicts.
//!
//! Budget rule: with per-feature tolerances `t_i` (raw input units) and a scale `eps`, the radius of
//! feature `i` is `eps × t_i`; the scale defaults to 1. Without tolerances the radius is `eps` for every
//! feature.

mod list;
mod tolerances;

use std::path::{Path, PathBuf};

use serde::Deserialize;

use crate::model::Model;
use crate::threat::{Budget, Norm, Targets};
pub use list::{parse_line, CertifiedFloor, LineSpec, RequirementLine};
use tolerances::resolve_tolerances;
pub use tolerances::{load_tolerances, Tolerances};

/// Why a requirement could not be read or checked.
#[derive(Debug, thiserror::Error)]
pub enum RequirementError {
    /// A file could not be read.
    #[error("{path}: {message}")]
    Io {
        /// The file.
        path: String,
        /// What the system said.
        message: String,
    },
    /// A value is missing, malformed or out of range.
    #[error("{place}: {message}")]
    Invalid {
        /// The flag or `file: field` where the value came from.
        place: String,
        /// What is wrong and what was expected.
        message: String,
    },
}

pub(super) fn invalid(place: impl Into<String>, message: impl Into<String>) -> RequirementError {
    RequirementError::Invalid {
        place: place.into(),
        message: message.into(),
    }
}

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

    /// Checks every line of the requirement list against `model` (empty without a list).
    pub fn resolve_lines(&self, model: &Model) -> Result<Vec<RequirementLine>, RequirementError> {
        self.lines.iter().map(|l| l.resolve(model)).collect()
    }

    /// Checks every value against `model` and builds the requirement. With a requirement list the
    /// top level holds only the ball (epsilon, norm, tolerances): a floor, clean-accuracy minimum,
    /// confidence or class restriction there is an error; without a top-level epsilon the run sweeps the
    /// lines' epsilons.
    pub fn resolve(&self, model: &Model) -> Result<Requirement, RequirementError> {
        let tolerances = match &self.tolerances {
            None => None,
            Some((source, place)) => Some(resolve_tolerances(source, place, model)?),
        };
        if !self.lines.is_empty() {
            let rules = [
                self.floor.as_ref().map(|(_, p)| p),
                self.min_clean_accuracy.as_ref().map(|(_, p)| p),
                self.confidence.as_ref().map(|(_, p)| p),
                self.forbid_into.as_ref().map(|(_, p)| p),
                self.forbid_from.as_ref().map(|(_, p)| p),
            ];
            if let Some(place) = rules.into_iter().flatten().next() {
                return Err(invalid(
                    place.as_str(),
                    "the requirement file holds a list of requirements; state this rule as an entry of the list",
                ));
            }
        }
        let line_epsilons: Vec<f64> = self.lines.iter().filter_map(|l| l.epsilon).collect();
        let (mut epsilons, eps_place) = match &self.epsilons {
            Some((values, place)) => (values.clone(), place.clone()),
            None if !line_epsilons.is_empty() => (line_epsilons, "requirements".to_string()),
            None if tolerances.is_some() => (vec![1.0], "epsilon".to_string()),
            None => {
                return Err(invalid(
                    "--eps",
                    "no budget given: pass --eps (a number, a list, a range or a tolerance file) or a requirement file with epsilon",
                ))
            }
        };
        if epsilons.is_empty() {
            return Err(invalid(
                eps_place,
                "empty list, expected at least one epsilon",
            ));
        }
        for e in &epsilons {
            if !e.is_finite() || *e < 0.0 {
                return Err(invalid(
                    &eps_place,
                    format!("{e} is not allowed, expected a finite number ≥ 0"),
                ));
            }
        }
        epsilons.sort_by(f64::total_cmp);
        // Values within rounding of each other (relative, so a sweep of tiny radii keeps its values).
        epsilons.dedup_by(|a, b| (*a - *b).abs() <= 1e-15 * b.abs());
        let fraction = |value: &Option<(f64, String)>,
                        open_ends: bool|
         -> Result<Option<f64>, RequirementError> {
            match value {
                None => Ok(None),
                Some((v, place)) => {
                    let ok = if open_ends {
                        v.is_finite() && *v > 0.0 && *v < 1.0
                    } else {
                        v.is_finite() && (0.0..=1.0).contains(v)
                    };
                    if ok {
                        Ok(Some(*v))
                    } else if open_ends {
                        Err(invalid(place, format!("{v} is not allowed, expected a level strictly between 0 and 1 (e.g. 0.95)")))
                    } else {
                        Err(invalid(
                            place,
                            format!("{v} is not allowed, expected a fraction in [0, 1]"),
                        ))
                    }
                }
            }
        };
        let floor = fraction(&self.floor, false)?;
        let min_clean_accuracy = fraction(&self.min_clean_accuracy, false)?;
        let confidence = fraction(&self.confidence, true)?;
        let resolve_classes =
            |value: &Option<(Vec<String>, String)>| -> Result<Vec<usize>, RequirementError> {
                match value {
                    Some((names, place)) => class_indices(model, names, place),
                    None => Ok(Vec::new()),
                }
            };
        let into = resolve_classes(&self.forbid_into)?;
        let from = resolve_classes(&self.forbid_from)?;
        if let Some((list, place)) = &self.forbid_into {
            if list.is_empty() {
                return Err(invalid(place, "empty list, expected at least one class"));
            }
        }
        if let (Some((_, place)), None) = (&self.forbid_from, &self.forbid_into) {
            return Err(invalid(place, "restricts which classes the rule applies to, but no --forbid-into classes are given"));
        }
        let targets = if into.is_empty() {
            Targets::Any
        } else {
            Targets::Into {
                classes: into,
                from: if self.forbid_from.is_some() {
                    Some(from)
                } else {
                    None
                },
            }
        };
        Ok(Requirement {
            norm: self.norm.as_ref().map(|(n, _)| *n).unwrap_or(Norm::Linf),
            epsilons,
            tolerances,
            floor,
            min_clean_accuracy,
            confidence,
            targets,
        })
    }
}

/// The sorted, distinct class indices of `names` (class names or indices); an unknown one is an error
/// at `place` listing the model's classes.
pub(super) fn class_indices(
    model: &Model,
    names: &[String],
    place: &str,
) -> Result<Vec<usize>, RequirementError> {
    let mut out = Vec::new();
    for name in names {
        let index = class_index(model, name).ok_or_else(|| {
            let known: Vec<String> = (0..model.class_count())
                .map(|c| model.class_name(c))
                .collect();
            invalid(
                place,
                format!(
                    "\"{name}\" is not a class of the model (classes: {})",
                    known.join(", ")
                ),
            )
        })?;
        if !out.contains(&index) {
            out.push(index);
        }
    }
    out.sort_unstable();
    Ok(out)
}

pub(super) fn class_index(model: &Model, name: &str) -> Option<usize> {
    let classes = model.class_count();
    if let Some(names) = &model.classes {
        if let Some(i) = names.iter().position(|n| n == name) {
            return Some(i);
        }
    }
    name.trim().parse::<usize>().ok().filter(|i| *i < classes)
}

/// Parses an epsilon list: one number, a comma list `0.01,0.02,0.05`, or a range `start:stop:step`
/// (inclusive of `stop` up to rounding). `place` names the flag or field for errors.
pub fn parse_epsilon_list(text: &str, place: &str) -> Result<Vec<f64>, RequirementError> {
    let number = |t: &str| -> Result<f64, RequirementError> {
        let v: f64 = t
            .trim()
            .parse()
            .map_err(|_| invalid(place, format!("\"{}\" is not a number", t.trim())))?;
        if !v.is_finite() || v < 0.0 {
            return Err(invalid(
                place,
                format!("{v} is not allowed, expected a finite number ≥ 0"),
            ));
        }
        Ok(v)
    };
    let text = text.trim();
    if text.contains(':') {
        let parts: Vec<&str> = text.split(':').collect();
        if parts.len() != 3 {
            return Err(invalid(
                place,
                format!(
                    "\"{text}\" is not a range, expected start:stop:step (e.g. 0.01:0.05:0.01)"
                ),
            ));
        }
        let (start, stop, step) = (number(parts[0])?, number(parts[1])?, number(parts[2])?);
        if step <= 0.0 || stop < start {
            return Err(invalid(
                place,
                format!("range \"{text}\" needs step > 0 and stop ≥ start"),
            ));
        }
        let count = (((stop - start) / step + 1e-9).floor() as usize).saturating_add(1);
        if count > 1000 {
            return Err(invalid(
                place,
                format!("range \"{text}\" has {count} values, at most 1000 are allowed"),
            ));
        }
        return Ok((0..count).map(|k| start + k as f64 * step).collect());
    }
    text.split(',').map(number).collect()
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

/// How [`Requirement::describe`] states the release rule when the requirement has no floor.
pub const NO_FLOOR_RULE: &str = "no floor was set, so the run only reports";

/// A checked requirement for one model.
#[derive(Debug, Clone, PartialEq)]
pub struct Requirement {
    /// The ball's norm.
    pub norm: Norm,
    /// Epsilon values in ascending order (one, or several for a sweep). With tolerances these are scales.
    pub epsilons: Vec<f64>,
    /// Per-feature tolerances; the radius of feature `i` is `eps × tolerance_i`.
    pub tolerances: Option<Tolerances>,
    /// Required robust fraction on the acceptance set (`None`: just report).
    pub floor: Option<f64>,
    /// Required clean accuracy.
    pub min_clean_accuracy: Option<f64>,
    /// When given, the floor must hold for the one-sided Clopper–Pearson lower bound at this level.
    pub confidence: Option<f64>,
    /// Which class changes count.
    pub targets: Targets,
}

impl Requirement {
    /// A requirement of one uniform epsilon and nothing else (no floor, any class change counts).
    pub fn uniform(norm: Norm, epsilon: f64) -> Requirement {
        Requirement {
            norm,
            epsilons: vec![epsilon],
            tolerances: None,
            floor: None,
            min_clean_accuracy: None,
            confidence: None,
            targets: Targets::Any,
        }
    }

    /// The largest epsilon: the one the verdict is stated at (it implies every smaller one).
    pub fn epsilon(&self) -> f64 {
        *self.epsilons.last().expect("at least one epsilon")
    }

    /// The budget at scale `epsilon` for a model with `dim` inputs.
    pub fn budget(&self, epsilon: f64, dim: usize) -> Budget {
        match &self.tolerances {
            Some(t) => Budget {
                norm: self.norm,
                radii: t.values.iter().map(|v| v * epsilon).collect(),
            },
            None => Budget::uniform(self.norm, epsilon, dim),
        }
    }

    /// The requirement in one sentence of plain words, with class names from `model`.
    pub fn describe(&self, class_name: &dyn Fn(usize) -> String) -> String {
        let eps = if self.epsilons.len() == 1 {
            format!("{}", self.epsilon())
        } else {
            let list: Vec<String> = self.epsilons.iter().map(|e| format!("{e}")).collect();
            format!("each of {}", list.join(", "))
        };
        let ball = match (&self.tolerances, self.norm) {
            (None, Norm::Linf) => format!("every input feature may change by up to {eps} (L-inf ball)"),
            (None, Norm::L2) => format!("the input may change by an L2 length of up to {eps}"),
            (Some(_), Norm::Linf) => format!("every feature may change by up to {eps} × its tolerance (L-inf ball)"),
            (Some(_), Norm::L2) => format!("the change, measured in units of each feature's tolerance, may have L2 length up to {eps}"),
        };
        let changes = match &self.targets {
            Targets::Any => "any change of the predicted class counts as a failure".to_string(),
            Targets::Into { classes, from } => {
                let into: Vec<String> = classes.iter().map(|c| class_name(*c)).collect();
                match from {
                    None => format!(
                        "only a change into {} counts as a failure",
                        into.join(" or ")
                    ),
                    Some(f) => {
                        let from: Vec<String> = f.iter().map(|c| class_name(*c)).collect();
                        format!(
                            "for samples of class {} only a change into {} counts; for the other classes any change counts",
                            from.join(" or "),
                            into.join(" or ")
                        )
                    }
                }
            }
        };
        let rule = match self.floor {
            None => NO_FLOOR_RULE.to_string(),
            Some(f) => match self.confidence {
                None => format!("at least {:.2}% of the samples must be certified", f * 100.0),
                Some(c) => format!(
                    "the {:.0}% one-sided lower confidence bound on the certified fraction must be at least {:.2}%",
                    c * 100.0,
                    f * 100.0
                ),
            },
        };
        let clean = match self.min_clean_accuracy {
            None => String::new(),
            Some(m) => format!(", and clean accuracy must be at least {:.2}%", m * 100.0),
        };
        format!("Inputs stay within the model's valid range; {ball}; {changes}; {rule}{clean}.")
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn model() -> Model {
        Model::from_json_str(
            r#"{"format":"ballast.model/1","input":{"dim":2,"names":["speed","temp"],"lower":0,"upper":10},
            "classes":["normal","worn","broken"],
            "layers":[{"kind":"dense","weights":[[1,0],[0,1],[1,1]],"bias":[0,0,0]}]}"#,
        )
        .expect("valid model")
    }

    #[test]
    fn epsilon_lists_and_ranges() {
        let v = parse_epsilon_list("0.01, 0.02,0.05", "--eps").unwrap();
        assert_eq!(v.len(), 3);
        approx::assert_abs_diff_eq!(v[2], 0.05);
        let r = parse_epsilon_list("0.01:0.05:0.01", "--eps").unwrap();
        assert_eq!(r.len(), 5);
        approx::assert_abs_diff_eq!(r[4], 0.05, epsilon = 1e-12);
        let e = parse_epsilon_list("0.1,abc", "--eps")
            .unwrap_err()
            .to_string();
        assert!(e.contains("--eps") && e.contains("abc"), "{e}");
        assert!(parse_epsilon_list("-1", "--eps").is_err());
        assert!(parse_epsilon_list("0.1:0.05:0.01", "--eps").is_err());
    }

    #[test]
    fn a_sweep_keeps_tiny_distinct_radii_and_merges_rounding_twins() {
        let spec = |v: Vec<f64>| RequirementSpec {
            epsilons: Some((v, "--eps".into())),
            ..Default::default()
        };
        let r = spec(vec![3e-17, 1e-17, 2e-17]).resolve(&model()).unwrap();
        assert_eq!(r.epsilons.len(), 3, "{:?}", r.epsilons);
        assert!(r.epsilons[0] < r.epsilons[1] && r.epsilons[1] < r.epsilons[2]);
        // 0.1 + 0.2 and 0.3 differ by one unit in the last place: one radius.
        let r = spec(vec![0.1 + 0.2, 0.3]).resolve(&model()).unwrap();
        assert_eq!(r.epsilons.len(), 1);
    }

    #[test]
    fn flags_override_file_and_classes_resolve() {
        let file = RequirementSpec {
            epsilons: Some((vec![0.5], "r.toml: epsilon".into())),
            floor: Some((0.9, "r.toml: floor".into())),
            forbid_into: Some((vec!["normal".into()], "r.toml: forbid_into".into())),
            ..Default::default()
        };
        let flags = RequirementSpec {
            floor: Some((0.8, "--floor".into())),
            ..Default::default()
        };
        let r = file.overridden_by(flags).resolve(&model()).unwrap();
        approx::assert_abs_diff_eq!(r.floor.unwrap(), 0.8);
        approx::assert_abs_diff_eq!(r.epsilon(), 0.5);
        assert_eq!(r.targets.forbidden_for(1, 3), vec![0]);
        assert_eq!(r.targets.forbidden_for(0, 3), Vec::<usize>::new());
    }

    #[test]
    fn bad_values_name_their_place() {
        let spec = RequirementSpec {
            epsilons: Some((vec![0.1], "--eps".into())),
            floor: Some((1.5, "--floor".into())),
            ..Default::default()
        };
        let e = spec.resolve(&model()).unwrap_err().to_string();
        assert!(e.starts_with("--floor"), "{e}");
        let spec = RequirementSpec {
            epsilons: Some((vec![0.1], "--eps".into())),
            forbid_into: Some((vec!["nomral".into()], "--forbid-into".into())),
            ..Default::default()
        };
        let e = spec.resolve(&model()).unwrap_err().to_string();
        assert!(
            e.contains("--forbid-into")
                && e.contains("nomral")
                && e.contains("normal, worn, broken"),
            "{e}"
        );
    }

    #[test]
    fn tolerances_scale_the_budget() {
        let spec = RequirementSpec {
            tolerances: Some((
                ToleranceSource::Inline(vec![("speed".into(), 0.2), ("temp".into(), 1.0)]),
                "r.toml: tolerances".into(),
            )),
            ..Default::default()
        };
        let r = spec.resolve(&model()).unwrap();
        approx::assert_abs_diff_eq!(r.epsilon(), 1.0);
        let b = r.budget(0.5, 2);
        approx::assert_abs_diff_eq!(b.radii[0], 0.1);
        approx::assert_abs_diff_eq!(b.radii[1], 0.5);
        let missing = RequirementSpec {
            tolerances: Some((
                ToleranceSource::Inline(vec![("speed".into(), 0.2)]),
                "t".into(),
            )),
            ..Default::default()
        };
        let e = missing.resolve(&model()).unwrap_err().to_string();
        assert!(e.contains("temp"), "{e}");
    }
}
