//! Checking a requirement against a model: [`RequirementSpec::resolve`] turns the unchecked values
//! into a [`Requirement`], and class names or indices into sorted, distinct class indices. Every value
//! is checked (finite, in range, known feature and class names) and every error names the flag or
//! `file: field` the value came from; nothing here reads files except through the tolerance source.

use super::tolerances::resolve_tolerances;
use super::{invalid, Requirement, RequirementError, RequirementLine, RequirementSpec};
use crate::model::Model;
use crate::threat::{Norm, Targets};

impl RequirementSpec {
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

fn class_index(model: &Model, name: &str) -> Option<usize> {
    let classes = model.class_count();
    if let Some(names) = &model.classes {
        if let Some(i) = names.iter().position(|n| n == name) {
            return Some(i);
        }
    }
    name.trim().parse::<usize>().ok().filter(|i| *i < classes)
}
