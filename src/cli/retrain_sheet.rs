//! The written outputs of `ballast retrain` besides the model: the per-epoch log and the checks as
//! CSV, the price of each constraint and the retraining sheet (`retrain.md`). They restate the
//! retrainer's result; nothing here trains or certifies.

use std::fmt::Write as _;

use super::retrain::Args;
use crate::train::confidence::{self, Assessment};
use crate::train::price::Price;
use crate::train::retrain::{RetrainResult, RetrainVerdict};

/// Each round's assessment under the reviewer's rule (with a confidence level).
pub fn round_assessments(result: &RetrainResult) -> Vec<Option<Assessment>> {
    result.rounds.iter().map(|r| r.confidence).collect()
}

fn option(v: Option<f64>) -> String {
    v.map(|x| format!("{x:.6}")).unwrap_or_default()
}

/// The per-epoch log as CSV (epoch, epsilon scale, clean loss, robust loss, robust error, λ, gap
/// correction, validation clean loss and its standard error, clean and certified accuracy); per-class multipliers are joined with `;`.
pub fn log_csv(result: &RetrainResult) -> String {
    let mut text = String::from(
        "epoch,epsilon_scale,clean_loss,robust_loss,robust_error,lambda,gap_correction,val_clean_loss,val_clean_loss_error,val_clean_accuracy,val_certified_accuracy\n",
    );
    for e in &result.epochs {
        let lambda: Vec<String> = e.multipliers.iter().map(|m| format!("{m:.6}")).collect();
        let _ = writeln!(
            text,
            "{},{:.4},{:.6},{:.6},{:.6},{},{:.6},{},{},{},{}",
            e.epoch,
            e.epsilon_scale,
            e.clean_loss,
            e.robust_loss,
            e.robust_error,
            lambda.join(";"),
            e.gap_correction,
            option(e.validation_clean_loss),
            option(e.validation_clean_loss_error),
            option(e.validation_clean_accuracy),
            option(e.validation_certified_accuracy)
        );
    }
    text
}

/// The validation checks as CSV: position in epochs, validation clean loss and its standard error,
/// validation certified accuracy (sound linear bounds at the full budget).
pub fn checks_csv(result: &RetrainResult) -> String {
    let mut text =
        String::from("epoch_position,val_clean_loss,val_clean_loss_error,val_certified_accuracy\n");
    for c in &result.checks {
        let _ = writeln!(
            text,
            "{},{:.6},{:.6},{:.6}",
            c.epoch_position, c.clean_loss, c.clean_loss_error, c.certified_accuracy
        );
    }
    text
}

/// The retraining sheet (`retrain.md`) without its lineage section.
pub fn sheet_markdown(
    args: &Args,
    requirement: &str,
    floor: f64,
    result: &RetrainResult,
    acceptance: usize,
    prices: &[Price],
    seen_by_parent: bool,
) -> String {
    let mut md = String::new();
    let met = result.verdict == RetrainVerdict::Met;
    let list = !result.report.requirements.is_empty();
    let verdict = match &result.plan {
        Some(plan) => confidence::verdict_text(plan, met),
        None if met && list => "**met**: the certify pipeline proved every requirement of the list on the acceptance data",
        None if list => "**not met**: not every requirement of the list was proven on the acceptance data",
        None if met => "**met**: the certify pipeline proved the floor on the acceptance data",
        None => "**not met**: the floor was not proven on the acceptance data",
    };
    let _ = writeln!(md, "# Retraining sheet\n");
    if let Some(model) = &args.model {
        let _ = writeln!(md, "- parent model: `{}`", model.display());
    }
    let _ = writeln!(md, "- retrained model: `{}`", args.out.display());
    if list {
        let _ = writeln!(
            md,
            "- requirement: the list below, every line must hold; ball: {requirement}"
        );
    } else {
        let _ = writeln!(md, "- requirement (floor {floor}): {requirement}");
    }
    let formulation = match args.penalty {
        Some(w) => format!("fixed penalty weight {w}"),
        None => format!(
            "primal-dual (dual step {}{})",
            args.dual_step,
            if args.per_class { ", per class" } else { "" }
        ),
    };
    let _ = writeln!(md, "- loss: {}, {formulation}", args.loss);
    let _ = writeln!(md, "- acceptance samples: {acceptance}");
    if result.generalisation_margins.iter().any(|m| *m > 0.0) {
        let margins: Vec<String> = result
            .generalisation_margins
            .iter()
            .map(|m| format!("{:.2}", m * 100.0))
            .collect();
        let _ = writeln!(
            md,
            "- generalisation margin (points above each floor aimed at on the validation data, one standard error of the validation–acceptance difference): {}",
            margins.join(" / ")
        );
    }
    let _ = writeln!(md, "- verdict: {verdict}\n");
    for caution in cautions(args, result, seen_by_parent) {
        let _ = writeln!(md, "> **Caution.** {caution}\n");
    }
    let _ = writeln!(md, "Each round is checked with the certify pipeline on the validation data (it steers the rounds); the verdict above is {}.\n",
        if result.verdict_on_unseen_data { "the acceptance data's, certified once after the last round" } else { "the validation data's" });
    let _ = writeln!(md, "| round | slack | epochs | kept epoch | clean accuracy | certified accuracy | empirical robust accuracy | pipeline verdict |");
    let _ = writeln!(md, "| --- | --- | --- | --- | --- | --- | --- | --- |");
    for r in &result.rounds {
        let _ = writeln!(
            md,
            "| {} | {:.3} | {} | {}{} | {:.4} | {:.4} | {:.4} | {:?} |",
            r.round,
            r.slack,
            r.epochs,
            r.selected_epoch,
            if r.near_miss { " (near miss)" } else { "" },
            r.clean_accuracy,
            r.certified_accuracy,
            r.empirical_robust_accuracy,
            r.verdict
        );
    }
    // With a list the judged figure is the worst line's margin over its aimed floor.
    let figure = match result.report.requirements.is_empty() {
        true => "certified",
        false => "worst line margin over its aimed floor",
    };
    for r in &result.rounds {
        for j in &r.near_misses_judged {
            let _ = writeln!(
                md,
                "\nRound {}: near miss at epoch {} judged by the certify pipeline on the validation data ({figure}): {:.4} by linear bounds, {:.4} by the pipeline.",
                r.round, j.epoch, j.linear_certified, j.pipeline_certified
            );
        }
    }
    if let Some(table) = crate::sheet::requirement_lines::table(&result.report) {
        let _ = writeln!(
            md,
            "\n## Requirements on the {} data\n",
            if result.verdict_on_unseen_data {
                "acceptance"
            } else {
                "validation"
            }
        );
        let _ = writeln!(md, "| {} |", table.headers.join(" | "));
        let _ = writeln!(md, "|{}", " --- |".repeat(table.headers.len()));
        for row in &table.rows {
            let _ = writeln!(md, "| {} |", row.join(" | "));
        }
        infeasible(&mut md, args, result, prices);
    }
    if !prices.is_empty() {
        let _ = writeln!(
            md,
            "\n## Price of {}\n",
            if prices.len() > 1 {
                "each requirement"
            } else {
                "the requirement"
            }
        );
        let _ = writeln!(md, "The final multipliers read as prices: the sensitivity of the best clean training loss to each constraint's level (Boyd & Vandenberghe, *Convex Optimization*, §5.6). A requirement is active (binding) at the end when its multiplier is above 0 and the last epoch held it within two standard errors of its allowance (room: the allowance left on the training batches). A constraint with more room than that should have multiplier 0 at an optimum (complementary slackness), so one whose multiplier is still above 0 is \"not settled\" and its price is an upper estimate.\n");
        let _ = writeln!(
            md,
            "| constraint | multiplier | active | room in the last epoch | relaxed by | meaning |"
        );
        let _ = writeln!(md, "| --- | --- | --- | --- | --- | --- |");
        for p in prices {
            let _ = writeln!(
                md,
                "| {} | {:.4} | {} | {} | {:.4} | {} |",
                p.constraint,
                p.multiplier,
                match (p.binding, p.settled) {
                    (true, _) => "yes",
                    (false, true) => "no",
                    (false, false) => "not settled",
                },
                p.room.map_or("—".into(), |r| format!("{r:.4}")),
                p.relaxed_by,
                p.meaning
            );
        }
        if prices.len() > 1 {
            let _ = writeln!(md, "\n![multiplier of each requirement](multipliers.svg)");
        }
    }
    if let Some(plan) = &result.plan {
        let _ = writeln!(
            md,
            "\n{}",
            confidence::markdown(plan, &round_assessments(result))
        );
    }
    let _ = writeln!(md, "\nCertified accuracy is a sound lower bound (certify pipeline, bounds only); the training losses are not evidence.\n");
    let _ = writeln!(
        md,
        "![accuracy](accuracy.svg)\n\n![losses and multiplier](loss_and_multiplier.svg)\n"
    );
    let _ = writeln!(
        md,
        "Per-epoch figures: `log.csv`; every validation check (the candidates for the kept weights): `checks.csv`."
    );
    md
}

/// The cautions of a retraining sheet ([`crate::train::lineage::cautions`]) with the files named as
/// given: validation rows the parent model was trained on (`seen_by_parent`), a verdict on data that
/// also steered training.
pub fn cautions(args: &Args, result: &RetrainResult, seen_by_parent: bool) -> Vec<String> {
    let validation = args
        .val
        .as_ref()
        .unwrap_or(&args.train)
        .display()
        .to_string();
    let acceptance = args.acceptance.as_ref().map(|a| a.display().to_string());
    crate::train::lineage::cautions(
        result,
        acceptance.as_deref(),
        seen_by_parent.then_some(validation.as_str()),
    )
}

/// With a failed list: which lines failed, the closest level the retrained model reached on each,
/// and, under `--relax`, how far training relaxed it.
fn infeasible(md: &mut String, args: &Args, result: &RetrainResult, prices: &[Price]) {
    let failed: Vec<(usize, &crate::certify::lines::LineVerdict)> = result
        .report
        .requirements
        .iter()
        .enumerate()
        .filter(|(_, l)| l.verdict != crate::certify::Verdict::Pass)
        .collect();
    if failed.is_empty() {
        return;
    }
    let _ = writeln!(
        md,
        "\n{} of {} requirements {} not proven; the closest levels reached:\n",
        failed.len(),
        result.report.requirements.len(),
        if failed.len() == 1 { "is" } else { "are" }
    );
    for (k, line) in failed {
        let relaxed = prices.get(k).map_or(0.0, |p| p.relaxed_by);
        let _ = writeln!(
            md,
            "- {}: reached {:.2}% (floor {:.2}%, short by {:.2} points){}",
            line.requirement,
            line.measured * 100.0,
            line.floor * 100.0,
            (line.floor - line.measured).max(0.0) * 100.0,
            if args.relax.is_some() {
                format!("; training relaxed it by {:.2} points", relaxed * 100.0)
            } else {
                String::new()
            }
        );
    }
    if args.relax.is_some() {
        let _ = writeln!(md, "\nUnder `--relax` these floors could not all hold with this network and these settings: training settled where loosening each further costs more than it saves (resilient constrained learning, Hounie et al., 2023). The verdict stays strict.");
    }
}
