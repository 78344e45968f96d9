//! Attacking a whole labelled data set against a requirement's budget and class-change rule (what
//! `ballast attack` runs): a clean pass, one attack problem per correctly classified sample that has a
//! forbidden class, one batched attack ([`super::attack_batch`]), and the counts. Samples misclassified
//! without perturbation are counted, not attacked; a sample with no forbidden class (the rule does not
//! apply to its class) cannot be moved into one and is not attacked.
//!
//! The empirical robust accuracy it gives is an upper bound: every counterexample was validated by a
//! plain forward pass inside ball ∩ input range, and a sample without one is only "not found".

use super::{
    attack_batch, AttackError, AttackOutcome, AttackProblem, AttackSettings, Counterexample,
};
use crate::data::Dataset;
use crate::model::{predicted_class, Model};
use crate::threat::requirement::Requirement;

/// The counts of one attack run over a data set.
#[derive(Debug, Clone, PartialEq)]
pub struct AttackSummary {
    /// Number of samples.
    pub samples: usize,
    /// Samples already misclassified without perturbation (not attacked).
    pub misclassified: usize,
    /// Correctly classified samples with no forbidden class under the rule (not attacked).
    pub nothing_forbidden: usize,
    /// `(sample index, label, counterexample)` for every sample where one was found.
    pub counterexamples: Vec<(usize, usize, Counterexample)>,
}

impl AttackSummary {
    /// Fraction of samples predicted correctly without perturbation.
    pub fn clean_accuracy(&self) -> f64 {
        (self.samples - self.misclassified) as f64 / self.samples as f64
    }

    /// `1 − (misclassified + counterexamples) / samples`: an upper bound on robust accuracy.
    pub fn empirical_robust_accuracy(&self) -> f64 {
        1.0 - (self.misclassified + self.counterexamples.len()) as f64 / self.samples as f64
    }
}

/// Attacks every sample of `data` within `requirement`'s budget (at its epsilon, the largest of a sweep)
/// and class-change rule.
pub fn attack_data_set(
    model: &Model,
    data: &Dataset,
    requirement: &Requirement,
    settings: &AttackSettings,
) -> Result<AttackSummary, AttackError> {
    let network = model.classifier();
    let classes = model.class_count();
    let budget = requirement.budget(requirement.epsilon(), model.input.dim);
    let clean = network.forward_batch(&data.features);
    let mut misclassified = 0;
    let mut nothing_forbidden = 0;
    let mut problems = Vec::new();
    for (i, &label) in data.labels.iter().enumerate() {
        if predicted_class(clean.column(i).as_slice()) != label {
            misclassified += 1;
            continue;
        }
        let forbidden = requirement.targets.forbidden_for(label, classes);
        if forbidden.is_empty() {
            nothing_forbidden += 1;
            continue;
        }
        problems.push(AttackProblem {
            index: i,
            region: budget.region(data.sample(i), &model.input.lower, &model.input.upper),
            label,
            forbidden,
            extra_starts: Vec::new(),
        });
    }
    let outcomes = attack_batch(&network, &problems, settings)?;
    let counterexamples = problems
        .iter()
        .zip(outcomes)
        .filter_map(|(p, outcome)| match outcome {
            AttackOutcome::Found(c) => Some((p.index, p.label, c)),
            AttackOutcome::NotFound { .. } => None,
        })
        .collect();
    Ok(AttackSummary {
        samples: data.len(),
        misclassified,
        nothing_forbidden,
        counterexamples,
    })
}

/// The counterexamples as CSV text: `sample,label,new_class,distance`, then one column per feature
/// (named by [`Model::feature_name`]). Classes are written by name ([`Model::class_name`]), numbers in
/// shortest round-trip form.
pub fn counterexamples_csv(model: &Model, summary: &AttackSummary) -> Result<Vec<u8>, csv::Error> {
    let mut writer = csv::Writer::from_writer(Vec::new());
    let mut header = vec![
        "sample".to_string(),
        "label".to_string(),
        "new_class".to_string(),
        "distance".to_string(),
    ];
    header.extend((0..model.input.dim).map(|i| model.feature_name(i)));
    writer.write_record(&header)?;
    for (index, label, c) in &summary.counterexamples {
        let mut record = vec![
            index.to_string(),
            model.class_name(*label),
            model.class_name(c.predicted),
            c.distance.to_string(),
        ];
        record.extend(c.input.iter().map(|v| v.to_string()));
        writer.write_record(&record)?;
    }
    writer
        .into_inner()
        .map_err(|e| csv::Error::from(e.into_error()))
}
