//! The checked [`Requirement`] for one model: the ball (norm, ascending epsilons, optional per-feature
//! tolerances), which class changes count, and the release rule. It turns a scale into a [`Budget`]
//! and states itself in plain words; it never checks values (that happened when it was resolved).

use super::Tolerances;
use crate::threat::{Budget, Norm, Targets};

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
