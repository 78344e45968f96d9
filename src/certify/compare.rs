//! Two reports of the same data side by side: the figures before and after (overall and per class) and
//! how each sample's status moved between them (e.g. certified before, counterexample after).
//!
//! [`compare`] refuses reports that are not about the same samples: a different data file (SHA-256),
//! a different number of rows or samples (e.g. another `--out-of-range skip` or shard), or different
//! class names. The models and requirements may differ (that is usually the point); the comparison says
//! when the requirements do. Nothing is re-certified: every figure is copied from a report.

use std::collections::BTreeMap;

use super::report::{Report, Status, Verdict};

/// Why two reports cannot be compared.
#[derive(Debug, thiserror::Error)]
pub enum CompareError {
    /// The reports are not about the same samples.
    #[error("the reports are not about the same data: {0}")]
    DifferentData(String),
}

/// The figures of one group of samples (all, or one true class) in one report.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Figures {
    /// Samples in the group.
    pub samples: usize,
    /// Clean accuracy (absent for an empty group).
    pub clean: Option<f64>,
    /// Certified fraction (a lower bound on robust accuracy).
    pub certified: Option<f64>,
    /// Empirical robust fraction (an upper bound).
    pub empirical: Option<f64>,
    /// Samples with a validated counterexample.
    pub counterexamples: usize,
    /// Samples neither proven nor refuted (in an interrupted report: including those not run).
    pub unresolved: usize,
}

/// One report as a side of the comparison.
#[derive(Debug, Clone, PartialEq)]
pub struct Side {
    /// The model's name, or its path.
    pub model: String,
    /// The model file's SHA-256.
    pub model_sha256: String,
    /// The requirement in words.
    pub requirement: String,
    /// The verdict.
    pub verdict: Verdict,
    /// False for an interrupted run's report.
    pub complete: bool,
    /// Overall figures.
    pub overall: Figures,
    /// Per-class figures, in class order.
    pub classes: Vec<Figures>,
}

/// The comparison of two reports of the same data.
#[derive(Debug, Clone, PartialEq)]
pub struct Comparison {
    /// The first report ("before").
    pub before: Side,
    /// The second report ("after").
    pub after: Side,
    /// Class names, in class order.
    pub class_names: Vec<String>,
    /// The data file (path of the first report) and its SHA-256.
    pub data: (String, String),
    /// True when both reports judged the same requirement (norm, epsilons, tolerances, classes, rule).
    pub same_requirement: bool,
    /// Samples present in both reports, by (status before, status after).
    pub transitions: BTreeMap<(Status, Status), usize>,
}

fn side(report: &Report) -> Side {
    let s = &report.summary;
    let overall = Figures {
        samples: s.samples,
        clean: Some(s.clean_accuracy),
        certified: Some(s.certified_accuracy),
        empirical: Some(s.empirical_robust_accuracy),
        counterexamples: s.counterexample,
        unresolved: s.unresolved,
    };
    let classes = report
        .per_class
        .iter()
        .map(|c| Figures {
            samples: c.samples,
            clean: c.clean_accuracy,
            certified: c.certified_accuracy,
            empirical: c.empirical_robust_accuracy,
            counterexamples: c.counterexample,
            unresolved: c.unresolved,
        })
        .collect();
    Side {
        model: report
            .model
            .name
            .clone()
            .unwrap_or_else(|| report.model.path.clone()),
        model_sha256: report.model.sha256.clone(),
        requirement: report.requirement.description.clone(),
        verdict: s.verdict,
        complete: report.complete,
        overall,
        classes,
    }
}

/// Compares `before` with `after` (two reports of the same data).
pub fn compare(before: &Report, after: &Report) -> Result<Comparison, CompareError> {
    let (a, b) = (&before.data, &after.data);
    if a.sha256 != b.sha256 {
        return Err(CompareError::DifferentData(format!(
            "the first report's data file {} has SHA-256 {}, the second's {} has {}",
            a.path,
            short(&a.sha256),
            b.path,
            short(&b.sha256)
        )));
    }
    if a.rows != b.rows || a.samples != b.samples {
        return Err(CompareError::DifferentData(format!(
            "the first report covers {} samples of {} rows, the second {} of {} (another --out-of-range policy or shard?)",
            a.samples, a.rows, b.samples, b.rows
        )));
    }
    if before.settings.shard != after.settings.shard {
        return Err(CompareError::DifferentData(
            "the reports cover different shards (--shard) of the data".into(),
        ));
    }
    if before.model.classes != after.model.classes {
        return Err(CompareError::DifferentData(format!(
            "the class names differ ({} against {})",
            before.model.classes.join(", "),
            after.model.classes.join(", ")
        )));
    }
    let statuses: BTreeMap<usize, Status> =
        after.samples.iter().map(|s| (s.index, s.status)).collect();
    let mut transitions = BTreeMap::new();
    for s in &before.samples {
        if let Some(later) = statuses.get(&s.index) {
            *transitions.entry((s.status, *later)).or_insert(0) += 1;
        }
    }
    // The same budget and rule, wherever the tolerances were read from.
    let judged = |r: &Report| {
        let mut requirement = r.requirement.requirement();
        if let Some(t) = requirement.tolerances.as_mut() {
            t.origin = None;
        }
        requirement
    };
    let same_requirement = judged(before) == judged(after);
    Ok(Comparison {
        before: side(before),
        after: side(after),
        class_names: before.model.classes.clone(),
        data: (a.path.clone(), a.sha256.clone()),
        same_requirement,
        transitions,
    })
}

/// The first 12 hex digits of a digest (enough to tell two files apart in a message).
fn short(digest: &str) -> String {
    let head: String = digest.chars().take(12).collect();
    format!("{head}…")
}
