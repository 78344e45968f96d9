//! The requirement as a short list of labelled facts beside the budget table: the norm and what a
//! radius means under it, the input range (clipping), which class changes count, the release rule and
//! the arithmetic the certificates cover. Together with [`super::budget`] this is the whole requirement
//! the verdict was judged against. Everything restates the report; nothing is recomputed.

use crate::certify::Report;
use crate::threat::Norm;

fn class_list(report: &Report, classes: &[usize]) -> String {
    classes
        .iter()
        .map(|c| {
            report
                .model
                .classes
                .get(*c)
                .cloned()
                .unwrap_or_else(|| c.to_string())
        })
        .collect::<Vec<_>>()
        .join(", ")
}

/// The labelled facts (label, text), in reading order.
pub fn requirement_facts(report: &Report) -> Vec<(String, String)> {
    let r = &report.requirement;
    let scaled = r.tolerances.is_some();
    let norm = match (r.norm, scaled) {
        (Norm::Linf, false) => "L-inf: every feature may move by up to its radius, all at once".to_string(),
        (Norm::Linf, true) => "L-inf: every feature may move by up to its radius (epsilon × its tolerance), all at once".to_string(),
        (Norm::L2, false) => "L2: the Euclidean length of the whole change is at most epsilon; the radius column is the most one feature can move alone".to_string(),
        (Norm::L2, true) => "L2 in tolerance units: the Euclidean length of the change, each feature divided by its tolerance, is at most epsilon; the radius column is the most one feature can move alone".to_string(),
    };
    let range = match &report.model.input {
        Some(input) if input.lower.iter().chain(&input.upper).any(Option::is_some) => {
            "every perturbed input is clipped to the model's valid range (the last two columns); points outside it are not part of the budget".to_string()
        }
        Some(_) => "the model sets no valid range: the ball is not clipped".to_string(),
        None => "clipped to the model's valid range (not recorded in reports of earlier versions)".to_string(),
    };
    let changes = if r.forbid_into.is_empty() {
        "any change of the predicted class counts as a failure".to_string()
    } else {
        let into = class_list(report, &r.forbid_into);
        match &r.forbid_from {
            None => format!("only a change into {into} counts as a failure; other changes are allowed"),
            Some(from) => format!(
                "for samples of {} only a change into {into} counts; for samples of the other classes any change counts",
                class_list(report, from)
            ),
        }
    };
    let percent = |v: f64| format!("{:.2}%", v * 100.0);
    let mut rule = match r.floor {
        Some(f) => match r.confidence {
            Some(c) => format!(
                "the {:.0}% one-sided Clopper–Pearson lower bound on the certified fraction must be at least {}",
                c * 100.0,
                percent(f)
            ),
            None => format!("the certified fraction of the samples must be at least {}", percent(f)),
        },
        None => "no floor: figures only".to_string(),
    };
    if let Some(m) = r.min_clean_accuracy {
        rule.push_str(&format!("; clean accuracy at least {}", percent(m)));
    }
    let arithmetic = match &report.model.arithmetic {
        Some(a) => format!(
            "{a}: the class is kept when the model is evaluated in {a}, in any order of summation (rounding, underflow and overflow bounded per layer)"
        ),
        None => "exact arithmetic up to a fixed tolerance (report of an earlier version)".into(),
    };
    vec![
        ("Norm".into(), norm),
        ("Input range".into(), range),
        ("Class changes that count".into(), changes),
        ("Release rule".into(), rule),
        ("Arithmetic covered".into(), arithmetic),
    ]
}
