//! The model's valid input range and feature units as recorded in a report, so that a sheet can state
//! the whole requirement (every perturbed input is clipped to this range) without the model file.
//!
//! An unbounded end is recorded as `null` (JSON has no infinity). This restates the model; it never
//! widens or narrows a range.

use serde::{Deserialize, Serialize};

use crate::model::Model;

/// Per-feature range and units, in model input order (raw units, before any normalize layer).
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct InputRecord {
    /// Lowest valid value per feature (`None`: unbounded below).
    pub lower: Vec<Option<f64>>,
    /// Highest valid value per feature (`None`: unbounded above).
    pub upper: Vec<Option<f64>>,
    /// Physical unit per feature, when the model states them (`input.units`).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub units: Option<Vec<String>>,
}

impl InputRecord {
    /// The range and units of `model`'s input.
    pub fn of(model: &Model) -> InputRecord {
        let finite = |v: &f64| v.is_finite().then_some(*v);
        InputRecord {
            lower: model.input.lower.iter().map(finite).collect(),
            upper: model.input.upper.iter().map(finite).collect(),
            units: model.input.units.clone(),
        }
    }

    /// The unit of feature `index`, if stated.
    pub fn unit(&self, index: usize) -> Option<&str> {
        self.units
            .as_ref()
            .and_then(|u| u.get(index))
            .map(String::as_str)
    }
}

#[cfg(test)]
mod tests {
    use super::InputRecord;
    use crate::model::Model;

    #[test]
    fn unbounded_ends_are_recorded_as_absent() {
        let model = Model::from_json_str(
            r#"{"format":"ballast.model/1","input":{"dim":2,"lower":[0,-1],"units":["A","bar"]},
               "layers":[{"kind":"dense","weights":[[1,0]],"bias":[0]}]}"#,
        )
        .unwrap();
        let r = InputRecord::of(&model);
        assert_eq!(r.lower, vec![Some(0.0), Some(-1.0)]);
        assert_eq!(r.upper, vec![None, None]);
        assert_eq!(r.unit(1), Some("bar"));
        let json = serde_json::to_string(&r).unwrap();
        assert!(json.contains("\"upper\":[null,null]"), "{json}");
    }
}
