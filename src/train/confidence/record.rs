//! How a [`Plan`] and its [`Assessment`]s are written down: the probability model in words, a JSON
//! record for the retrained model's provenance and a Markdown section for the retraining sheet. Every
//! figure printed is one the plan or an assessment holds; nothing here computes.

use std::fmt::Write as _;

use super::{Assessment, Evidence, Plan};

/// The probability model behind the aimed level and the predictions, with the source of each formula.
pub const PROBABILITY_MODEL: &str = "The retrained model certifies an unknown fraction p of the inputs the validation and acceptance samples are drawn from, independently. Prior p ~ Beta(1, 1) (uniform, Bayes 1763 and Laplace 1774; a choice). Validation: V of n certified, V | p ~ Bin(n, p), so p | V ~ Beta(V + 1, n - V + 1). Acceptance: K | p ~ Bin(m, p), so K | V ~ BetaBinomial(m, V + 1, n - V + 1) (Skellam 1948). The reviewer passes when the one-sided Clopper-Pearson lower bound L(K) at confidence C (Clopper & Pearson 1934; the 1 - C quantile of Beta(K, m - K + 1)) is at least the floor, i.e. K >= k*; the pass probability is P(K >= k* | V), the aimed count the least V where it reaches the wanted probability q, the expected lower bound the mean of L(K) given V. Not modelled: the choice of the kept weights on the validation rows (makes V optimistic) and the gap between the sound bounds that count V and an exact check (makes V pessimistic).";

/// The plan, the probability model and each round's assessment as JSON (for the provenance).
pub fn json(plan: &Plan, rounds: &[Option<Assessment>]) -> serde_json::Value {
    serde_json::json!({
        "plan": plan,
        "probability_model": PROBABILITY_MODEL,
        "rounds": rounds,
    })
}

fn percent(x: f64) -> String {
    format!("{:.0}%", x * 100.0)
}

/// One line for the terminal: the reviewer's figure of the returned model.
pub fn summary_line(plan: &Plan, last: &Assessment) -> String {
    let rule = &plan.rule;
    let figure = match (last.lower_bound, last.pass_probability) {
        (Some(bound), _) => format!(
            "{} lower bound {bound:.4} on {} acceptance samples",
            percent(rule.confidence),
            last.samples
        ),
        (None, Some(p)) => format!(
            "predicted probability {p:.3} that the reviewer's check passes on {} samples (wanted {})",
            rule.acceptance_size, plan.pass_probability
        ),
        (None, None) => String::new(),
    };
    format!(
        "reviewer's rule (floor {} at {}): aimed level {:.4} on validation; {figure}; highest floor expected to pass {:.4}",
        rule.floor,
        percent(rule.confidence),
        plan.aimed_level,
        last.highest_floor
    )
}

/// The sheet's verdict line under the reviewer's rule.
pub fn verdict_text(plan: &Plan, met: bool) -> &'static str {
    match (plan.evidence, met) {
        (Evidence::AcceptanceData, true) => "**met**: the reviewer's check passed on the acceptance data",
        (Evidence::AcceptanceData, false) => "**not met**: the reviewer's check did not pass on the acceptance data",
        (Evidence::Prediction, true) => "**met**: the reviewer's check is expected to pass with the wanted probability (prediction from the validation data)",
        (Evidence::Prediction, false) => "**not met**: the reviewer's check is not expected to pass with the wanted probability (prediction from the validation data)",
    }
}

/// The sheet's section on the reviewer's rule: the aim, the model, each round's assessment.
pub fn markdown(plan: &Plan, rounds: &[Option<Assessment>]) -> String {
    let rule = &plan.rule;
    let mut md = String::new();
    let _ = writeln!(md, "## The reviewer's check\n");
    let _ = writeln!(
        md,
        "- rule: the {} one-sided Clopper–Pearson lower bound (Clopper & Pearson, 1934) on the certified fraction of {} acceptance samples must be at least {}: at least {} of {} certified.",
        percent(rule.confidence),
        rule.acceptance_size,
        rule.floor,
        plan.passing_count,
        rule.acceptance_size
    );
    let _ = writeln!(
        md,
        "- aimed level on the {} validation samples: **{:.4}** ({} certified), the least count at which the reviewer's check passes with probability at least {} under the model below (there: {:.4}); expected lower bound there: {:.4}. Training and the choice of the kept weights aim at this level instead of the bare floor.",
        plan.validation_size,
        plan.aimed_level,
        plan.aimed_count,
        plan.pass_probability,
        plan.pass_probability_at_aim,
        plan.expected_lower_bound
    );
    let _ = writeln!(
        md,
        "- verdict from: {}",
        match plan.evidence {
            Evidence::AcceptanceData => "the certify pipeline on the acceptance data under the reviewer's rule",
            Evidence::Prediction => "the pass probability predicted from the certify pipeline's count on the validation data (the reviewer's acceptance set is not used)",
        }
    );
    let _ = writeln!(md, "- probability model: {PROBABILITY_MODEL}\n");
    let _ = writeln!(
        md,
        "| round | certified (pipeline) | lower bound | predicted pass probability | expected lower bound | highest floor expected to pass | reviewer's rule |"
    );
    let _ = writeln!(md, "| --- | --- | --- | --- | --- | --- | --- |");
    let show = |x: Option<f64>| x.map(|v| format!("{v:.4}")).unwrap_or_else(|| "–".into());
    for (i, a) in rounds.iter().enumerate() {
        let Some(a) = a else { continue };
        let _ = writeln!(
            md,
            "| {} | {} of {} | {} | {} | {} | {:.4} | {} |",
            i + 1,
            a.certified,
            a.samples,
            show(a.lower_bound),
            show(a.pass_probability),
            show(a.expected_lower_bound),
            a.highest_floor,
            if a.met { "met" } else { "not met" }
        );
    }
    md
}
