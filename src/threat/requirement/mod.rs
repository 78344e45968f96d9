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

mod checked;
mod epsilon;
mod list;
mod resolve;
mod spec;
mod tolerances;

pub use checked::{Requirement, NO_FLOOR_RULE};
pub use epsilon::parse_epsilon_list;
pub use list::{parse_line, CertifiedFloor, LineSpec, RequirementLine};
pub use spec::{RequirementSpec, ToleranceSource};
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

#[cfg(test)]
mod tests {
    use super::*;
    use crate::model::Model;

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
