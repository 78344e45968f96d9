//! Judging a list of requirements: each line's verdict from the per-sample statuses of a run, and the
//! list's verdict as the conjunction of its lines.
//!
//! A certified line at epsilon `e` is judged exactly as a single run with that floor would be judged at
//! `e` (the same rule, [`super::report::decide`], on the statuses at `e`), restricted to the samples of
//! its class when it names one. A clean-accuracy line uses the clean predictions. The conjunction is
//! `fail` when any line fails, else `undecided` when any line is undecided, else `pass`.
//! [`judge_list`] reuses the main run for every line whose class rule is the main run's (its sweep holds
//! their epsilons, see [`with_line_epsilons`]) and runs the pipeline once per other class rule, sweeping
//! that rule's epsilons; those extra runs are not journaled and their counterexamples are not saved.

use std::sync::atomic::AtomicBool;

use serde::{Deserialize, Serialize};

use super::report::{decide, Counts, Report, Verdict};
use super::{certify_run, CertifyError, CertifyOptions, Observer, Silent, Sources};
use crate::data::Dataset;
use crate::model::Model;
use crate::threat::requirement::{CertifiedFloor, Requirement, RequirementLine, NO_FLOOR_RULE};
use crate::threat::Targets;

/// One line's verdict, as written in the report's `requirements` list.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct LineVerdict {
    /// The line in words.
    pub requirement: String,
    /// `certified` or `clean_accuracy`.
    pub kind: String,
    /// The budget (certified lines).
    pub epsilon: Option<f64>,
    /// The true class the line is restricted to (certified lines).
    pub class: Option<usize>,
    /// Only changes into these classes count (empty: any change).
    pub forbid_into: Vec<usize>,
    /// Classes `forbid_into` applies to (`None`: all).
    pub forbid_from: Option<Vec<usize>>,
    /// Samples the line is judged on.
    pub samples: usize,
    /// The measured value: the certified fraction (a lower bound on robust accuracy) or clean accuracy.
    pub measured: f64,
    /// The empirical robust fraction (an upper bound; certified lines) or clean accuracy.
    pub upper: f64,
    /// The one-sided Clopper–Pearson lower bound on the certified fraction (with a confidence level).
    pub lower_bound: Option<f64>,
    /// Confidence level (certified lines judged by the lower bound).
    pub confidence: Option<f64>,
    /// The required level.
    pub floor: f64,
    /// The line's verdict.
    pub verdict: Verdict,
}

/// The conjunction of line verdicts: fail if any fails, else undecided if any is, else pass.
pub fn conjunction<'a>(verdicts: impl IntoIterator<Item = &'a Verdict>) -> Verdict {
    let mut all = Verdict::Pass;
    for v in verdicts {
        match v {
            Verdict::Fail => return Verdict::Fail,
            Verdict::Undecided => all = Verdict::Undecided,
            Verdict::Pass | Verdict::None => {}
        }
    }
    all
}

/// The position of `epsilon` among `epsilons` (equal up to rounding), if present.
pub fn epsilon_position(epsilons: &[f64], epsilon: f64) -> Option<usize> {
    epsilons
        .iter()
        .position(|e| (e - epsilon).abs() <= 1e-12 * epsilon.abs().max(1.0))
}

/// Judges `line` on `run`, a report over the same data whose sweep holds the line's epsilon and whose
/// class rule equals the line's. `labels` are the true classes of all samples of the data (to count
/// samples a partial run did not reach). `None` when `run` does not hold the line's epsilon.
pub fn judge(
    line: &RequirementLine,
    run: &Report,
    labels: &[usize],
    class_name: &dyn Fn(usize) -> String,
) -> Option<LineVerdict> {
    match line {
        RequirementLine::CleanAccuracy { minimum } => {
            let counts = Counts::from_statuses(run.samples.iter().map(|s| s.status), labels.len());
            let rule = Requirement {
                min_clean_accuracy: Some(*minimum),
                ..Requirement::uniform(run.requirement.norm, 0.0)
            };
            let (verdict, _, _) = decide(&counts, &rule);
            let n = labels.len().max(1) as f64;
            let clean = 1.0 - counts.misclassified as f64 / n;
            Some(LineVerdict {
                requirement: describe_line(line, class_name),
                kind: "clean_accuracy".into(),
                epsilon: None,
                class: None,
                forbid_into: Vec::new(),
                forbid_from: None,
                samples: labels.len(),
                measured: clean,
                upper: clean,
                lower_bound: None,
                confidence: None,
                floor: *minimum,
                verdict,
            })
        }
        RequirementLine::Certified(c) => judge_certified(c, run, labels, class_name),
    }
}

fn judge_certified(
    line: &CertifiedFloor,
    run: &Report,
    labels: &[usize],
    class_name: &dyn Fn(usize) -> String,
) -> Option<LineVerdict> {
    let k = epsilon_position(&run.requirement.epsilons, line.epsilon)?;
    let of_class = |label: usize| line.class.map(|c| c == label).unwrap_or(true);
    let total = labels.iter().filter(|l| of_class(**l)).count();
    let counts = Counts::from_statuses(
        run.samples
            .iter()
            .filter(|s| of_class(s.label))
            .map(|s| s.status_at(k)),
        total,
    );
    let rule = Requirement {
        floor: Some(line.floor),
        confidence: line.confidence,
        ..Requirement::uniform(run.requirement.norm, line.epsilon)
    };
    let (verdict, _, lower_bound) = decide(&counts, &rule);
    let n = total.max(1) as f64;
    let (forbid_into, forbid_from) = match &line.targets {
        Targets::Any => (Vec::new(), None),
        Targets::Into { classes, from } => (classes.clone(), from.clone()),
    };
    let words = describe_line(&RequirementLine::Certified(line.clone()), class_name);
    Some(LineVerdict {
        requirement: words,
        kind: "certified".into(),
        epsilon: Some(line.epsilon),
        class: line.class,
        forbid_into,
        forbid_from,
        samples: total,
        measured: counts.certified as f64 / n,
        upper: 1.0 - (counts.misclassified + counts.counterexample) as f64 / n,
        lower_bound,
        confidence: line.confidence,
        floor: line.floor,
        verdict,
    })
}

/// A line in words, as the report's `requirements` list and the retrain sheet name it.
pub fn describe_line(line: &RequirementLine, class_name: &dyn Fn(usize) -> String) -> String {
    let line = match line {
        RequirementLine::CleanAccuracy { minimum } => {
            return format!("clean accuracy at least {:.2}%", minimum * 100.0)
        }
        RequirementLine::Certified(c) => c,
    };
    let names = |list: &[usize]| -> String {
        list.iter()
            .map(|c| class_name(*c))
            .collect::<Vec<_>>()
            .join(" or ")
    };
    let mut words = match line.confidence {
        None => format!(
            "certified at least {:.2}% at epsilon {}",
            line.floor * 100.0,
            line.epsilon
        ),
        Some(c) => format!(
            "{:.0}% lower confidence bound on certified at least {:.2}% at epsilon {}",
            c * 100.0,
            line.floor * 100.0,
            line.epsilon
        ),
    };
    if let Some(c) = line.class {
        words.push_str(&format!(", samples of class {}", class_name(c)));
    }
    if let Targets::Into { classes, from } = &line.targets {
        words.push_str(&format!(", only changes into {} count", names(classes)));
        if let Some(f) = from {
            words.push_str(&format!(" (for class {})", names(f)));
        }
    }
    words
}

/// Certifies `model` on `data` against `requirement` and, with a requirement list, judges every
/// line ([`judge_list`]; `requirement` built with [`with_line_epsilons`]): the report's verdict is
/// then the lines' conjunction, as `ballast certify` gives it.
pub fn certify_with_lines(
    model: &Model,
    data: &Dataset,
    requirement: &Requirement,
    lines: &[RequirementLine],
    options: &CertifyOptions,
) -> Result<Report, CertifyError> {
    let sources = Sources::in_memory(model, data);
    let cancel = AtomicBool::new(false);
    let mut report = certify_run(
        model,
        data,
        requirement,
        &sources,
        options,
        None,
        &Silent,
        &cancel,
    )?;
    if !lines.is_empty() {
        judge_list(
            &mut report,
            lines,
            model,
            data,
            requirement,
            &sources,
            options,
            &Silent,
            &cancel,
        )?;
    }
    Ok(report)
}

fn add_epsilons(epsilons: &mut Vec<f64>, more: impl Iterator<Item = f64>) {
    for e in more {
        if epsilon_position(epsilons, e).is_none() {
            epsilons.push(e);
        }
    }
    epsilons.sort_by(f64::total_cmp);
}

/// `requirement` with the epsilons of every certified line whose class rule equals its own added to
/// its sweep, so one run decides them all.
pub fn with_line_epsilons(requirement: &Requirement, lines: &[RequirementLine]) -> Requirement {
    let mut out = requirement.clone();
    add_epsilons(
        &mut out.epsilons,
        lines.iter().filter_map(|l| match l {
            RequirementLine::Certified(c) if c.targets == requirement.targets => Some(c.epsilon),
            _ => None,
        }),
    );
    out
}

/// Judges every line of `lines` and stores the verdicts in `report` (the main run of `requirement`,
/// built with [`with_line_epsilons`]), then recomputes its summary: the verdict becomes the lines'
/// conjunction. Lines with another class rule are decided by one extra run per rule.
#[allow(clippy::too_many_arguments)]
pub fn judge_list(
    report: &mut Report,
    lines: &[RequirementLine],
    model: &Model,
    data: &Dataset,
    requirement: &Requirement,
    sources: &Sources,
    options: &CertifyOptions,
    observer: &dyn Observer,
    cancel: &AtomicBool,
) -> Result<(), CertifyError> {
    let class_name = |c: usize| model.class_name(c);
    let mut extra: Vec<(Requirement, Report)> = Vec::new();
    for line in lines {
        let RequirementLine::Certified(c) = line else {
            continue;
        };
        if c.targets == requirement.targets || extra.iter().any(|(r, _)| r.targets == c.targets) {
            continue;
        }
        let mut epsilons = Vec::new();
        add_epsilons(
            &mut epsilons,
            lines.iter().filter_map(|l| match l {
                RequirementLine::Certified(o) if o.targets == c.targets => Some(o.epsilon),
                _ => None,
            }),
        );
        let rule = Requirement {
            epsilons,
            targets: c.targets.clone(),
            floor: None,
            min_clean_accuracy: None,
            confidence: None,
            ..requirement.clone()
        };
        let run = certify_run(model, data, &rule, sources, options, None, observer, cancel)?;
        extra.push((rule, run));
    }
    let mut verdicts = Vec::with_capacity(lines.len());
    for line in lines {
        let run = match line {
            RequirementLine::Certified(c) if c.targets != requirement.targets => extra
                .iter()
                .find(|(r, _)| r.targets == c.targets)
                .map(|(_, run)| run)
                .unwrap_or(report),
            _ => report,
        };
        let verdict = judge(line, run, &data.labels, &class_name).ok_or_else(|| {
            CertifyError::Invalid("a requirement line's epsilon is missing from its run".into())
        })?;
        verdicts.push(verdict);
    }
    report.requirements = verdicts;
    report.requirement.description = report.requirement.description.replace(
        NO_FLOOR_RULE,
        "the release rule is the list of requirements, every one of which must hold",
    );
    report.recompute();
    Ok(())
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn conjunction_fails_before_undecided() {
        use Verdict::*;
        assert_eq!(conjunction(&[Pass, Undecided, Fail]), Fail);
        assert_eq!(conjunction(&[Pass, Undecided]), Undecided);
        assert_eq!(conjunction(&[Pass, Pass]), Pass);
    }
}
