//! A list of requirements: several release rules judged together, each line one rule. A line is a
//! certified floor at one budget (optionally for one true class, optionally counting only changes into
//! some classes) or a clean-accuracy floor. All lines share the file's ball (norm and tolerances).
//!
//! Lines are read in two steps like the rest of the requirement: [`parse_line`] turns one entry of
//! `[[requirements]]` (TOML) or `"requirements": [...]` (JSON) into an unchecked [`LineSpec`], naming the
//! file, the entry and the field in every error; [`LineSpec::resolve`] checks it against the model and
//! gives a [`RequirementLine`]. Nothing here computes bounds or verdicts.

use serde_json::Value;

use super::resolve::class_indices;
use super::{invalid, RequirementError};
use crate::model::Model;
use crate::threat::Targets;

/// One unchecked line with the place it came from (`file: requirement #k`).
#[derive(Debug, Clone, Default, PartialEq)]
pub struct LineSpec {
    /// `file: requirement #k` (k counts from 1).
    pub place: String,
    /// The budget (a single epsilon; with tolerances a scale).
    pub epsilon: Option<f64>,
    /// Required certified fraction.
    pub floor: Option<f64>,
    /// Judge the floor by the one-sided Clopper–Pearson lower bound at this level.
    pub confidence: Option<f64>,
    /// Only samples of this true class (name or index) count.
    pub class: Option<String>,
    /// Only changes into these classes count.
    pub forbid_into: Option<Vec<String>>,
    /// Apply `forbid_into` only to samples of these true classes.
    pub forbid_from: Option<Vec<String>>,
    /// Required clean accuracy (a line of its own).
    pub min_clean_accuracy: Option<f64>,
}

/// A certified floor at one budget.
#[derive(Debug, Clone, PartialEq)]
pub struct CertifiedFloor {
    /// The epsilon (scale of the tolerances when the requirement has them).
    pub epsilon: f64,
    /// Required certified fraction in [0, 1].
    pub floor: f64,
    /// Confidence level of the one-sided lower bound, when the floor is judged by it.
    pub confidence: Option<f64>,
    /// Only samples of this true class count (`None`: all samples).
    pub class: Option<usize>,
    /// Which class changes count.
    pub targets: Targets,
}

/// One checked line of a requirement list.
#[derive(Debug, Clone, PartialEq)]
pub enum RequirementLine {
    /// A certified floor at one budget (whole set or one class).
    Certified(CertifiedFloor),
    /// A floor on clean accuracy.
    CleanAccuracy {
        /// Required clean accuracy in [0, 1].
        minimum: f64,
    },
}

const FIELDS: &str =
    "epsilon, floor, confidence, class, forbid_into, forbid_from, min_clean_accuracy";

/// Reads entry `k` (counting from 1) of a requirement list in file `file`.
pub fn parse_line(value: &Value, file: &str, k: usize) -> Result<LineSpec, RequirementError> {
    let place = format!("{file}: requirement #{k}");
    let Some(map) = value.as_object() else {
        return Err(invalid(
            &place,
            format!("expected a table of keys ({FIELDS}), found {value}"),
        ));
    };
    let field = |key: &str| format!("{place}: {key}");
    let number = |key: &str, v: &Value| {
        v.as_f64()
            .ok_or_else(|| invalid(field(key), format!("{v} is not a number")))
    };
    let names = |key: &str, v: &Value| -> Result<Vec<String>, RequirementError> {
        let one = |x: &Value| match x {
            Value::String(s) => Ok(s.clone()),
            Value::Number(n) => Ok(n.to_string()),
            other => Err(invalid(
                field(key),
                format!("{other} is not a class name or index"),
            )),
        };
        match v {
            Value::Array(items) => items.iter().map(one).collect(),
            other => Ok(vec![one(other)?]),
        }
    };
    let mut line = LineSpec {
        place: place.clone(),
        ..LineSpec::default()
    };
    for (key, v) in map {
        match key.as_str() {
            "epsilon" | "eps" => line.epsilon = Some(number("epsilon", v)?),
            "floor" => line.floor = Some(number(key, v)?),
            "confidence" => line.confidence = Some(number(key, v)?),
            "min_clean_accuracy" => line.min_clean_accuracy = Some(number(key, v)?),
            "class" => {
                let mut list = names(key, v)?;
                if list.len() != 1 {
                    return Err(invalid(
                        field(key),
                        "expected one class (a name or an index)",
                    ));
                }
                line.class = list.pop();
            }
            "forbid_into" => line.forbid_into = Some(names(key, v)?),
            "forbid_from" => line.forbid_from = Some(names(key, v)?),
            other => {
                return Err(invalid(
                    field(other),
                    format!("unknown key, expected one of {FIELDS}"),
                ))
            }
        }
    }
    Ok(line)
}

fn fraction(value: f64, place: String) -> Result<f64, RequirementError> {
    if value.is_finite() && (0.0..=1.0).contains(&value) {
        Ok(value)
    } else {
        Err(invalid(
            place,
            format!("{value} is not allowed, expected a fraction in [0, 1]"),
        ))
    }
}

impl LineSpec {
    /// Checks the line against `model`: one rule per line, values in range, classes known.
    pub fn resolve(&self, model: &Model) -> Result<RequirementLine, RequirementError> {
        let field = |key: &str| format!("{}: {key}", self.place);
        if let Some(minimum) = self.min_clean_accuracy {
            let extra = [
                ("epsilon", self.epsilon.is_some()),
                ("floor", self.floor.is_some()),
                ("confidence", self.confidence.is_some()),
                ("class", self.class.is_some()),
                ("forbid_into", self.forbid_into.is_some()),
                ("forbid_from", self.forbid_from.is_some()),
            ];
            if let Some((key, _)) = extra.iter().find(|(_, given)| *given) {
                return Err(invalid(field(key), "a min_clean_accuracy line holds no other rule; put this in an entry of its own"));
            }
            return Ok(RequirementLine::CleanAccuracy {
                minimum: fraction(minimum, field("min_clean_accuracy"))?,
            });
        }
        let floor = self.floor.ok_or_else(|| {
            invalid(
                &self.place,
                "no rule: expected floor (with epsilon) or min_clean_accuracy",
            )
        })?;
        let floor = fraction(floor, field("floor"))?;
        let epsilon = self.epsilon.ok_or_else(|| {
            invalid(
                field("epsilon"),
                "missing, expected the budget this floor holds at (a number ≥ 0)",
            )
        })?;
        if !epsilon.is_finite() || epsilon < 0.0 {
            return Err(invalid(
                field("epsilon"),
                format!("{epsilon} is not allowed, expected a finite number ≥ 0"),
            ));
        }
        let confidence = match self.confidence {
            None => None,
            Some(c) if c.is_finite() && c > 0.0 && c < 1.0 => Some(c),
            Some(c) => {
                return Err(invalid(
                    field("confidence"),
                    format!(
                        "{c} is not allowed, expected a level strictly between 0 and 1 (e.g. 0.95)"
                    ),
                ))
            }
        };
        let classes = |names: &[String], key: &str| class_indices(model, names, &field(key));
        let class = match &self.class {
            None => None,
            Some(name) => Some(classes(std::slice::from_ref(name), "class")?[0]),
        };
        let targets =
            match (&self.forbid_into, &self.forbid_from) {
                (None, None) => Targets::Any,
                (None, Some(_)) => return Err(invalid(
                    field("forbid_from"),
                    "restricts which classes the rule applies to, but the entry has no forbid_into",
                )),
                (Some(into), from) => {
                    if into.is_empty() {
                        return Err(invalid(
                            field("forbid_into"),
                            "empty list, expected at least one class",
                        ));
                    }
                    Targets::Into {
                        classes: classes(into, "forbid_into")?,
                        from: from
                            .as_ref()
                            .map(|f| classes(f, "forbid_from"))
                            .transpose()?,
                    }
                }
            };
        Ok(RequirementLine::Certified(CertifiedFloor {
            epsilon,
            floor,
            confidence,
            class,
            targets,
        }))
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn model() -> Model {
        Model::from_json_str(
            r#"{"format":"ballast.model/1","input":{"dim":2,"lower":0,"upper":1},
            "classes":["normal","worn"],
            "layers":[{"kind":"dense","weights":[[1,0],[0,1]],"bias":[0,0]}]}"#,
        )
        .expect("valid model")
    }

    #[test]
    fn lines_resolve_and_errors_name_file_entry_and_field() {
        let v: Value = serde_json::json!({"epsilon": 0.02, "floor": 0.9, "class": "worn", "forbid_into": "normal"});
        let line = parse_line(&v, "r.json", 2)
            .unwrap()
            .resolve(&model())
            .unwrap();
        let RequirementLine::Certified(c) = line else {
            panic!("expected a certified line")
        };
        assert_eq!(c.class, Some(1));
        assert_eq!(c.targets.forbidden_for(1, 2), vec![0]);
        let bad = serde_json::json!({"epsilon": 0.02, "floor": 1.5});
        let e = parse_line(&bad, "r.json", 3)
            .unwrap()
            .resolve(&model())
            .unwrap_err()
            .to_string();
        assert!(e.starts_with("r.json: requirement #3: floor: 1.5"), "{e}");
        let typo = serde_json::json!({"epsilon": 0.02, "flor": 0.9});
        let e = parse_line(&typo, "r.toml", 1).unwrap_err().to_string();
        assert!(
            e.starts_with("r.toml: requirement #1: flor: unknown key"),
            "{e}"
        );
        let mixed = serde_json::json!({"min_clean_accuracy": 0.9, "class": 0});
        let e = parse_line(&mixed, "r.toml", 4)
            .unwrap()
            .resolve(&model())
            .unwrap_err()
            .to_string();
        assert!(e.starts_with("r.toml: requirement #4: class:"), "{e}");
        let no_eps = serde_json::json!({"floor": 0.9});
        let e = parse_line(&no_eps, "r.toml", 1)
            .unwrap()
            .resolve(&model())
            .unwrap_err()
            .to_string();
        assert!(e.contains("requirement #1: epsilon: missing"), "{e}");
    }
}
