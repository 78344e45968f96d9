//! Which weights a retrain against a requirement list keeps, on three overlapping 2-D classes with a
//! validation set and a separate acceptance set. Each line is aimed at its floor plus one standard
//! error of the validation–acceptance difference (the normal approximation of two binomial
//! proportions, common practice), and a validation check is feasible when its worst line margin over
//! those aimed floors is ≥ 0: the kept weights are the keep rule's choice among the feasible checks,
//! recomputed here from the recorded checks. Near misses of a list are judged by the certify
//! pipeline on the same worst margin, and a kept one holds every aimed floor in the pipeline's report.

mod common;

use ballast::certify::PipelineOptions;
use ballast::data::Dataset;
use ballast::threat::requirement::{CertifiedFloor, Requirement, RequirementLine};
use ballast::threat::{Budget, Norm, Targets};
use ballast::train::constrained::{ConstrainedSettings, Constraint, Formulation};
use ballast::train::retrain::{retrain, Keep, NearMisses, RetrainResult, RetrainSettings};
use ballast::train::robust::RobustLoss;
use ballast::train::TrainSettings;
use common::fixtures::{three_class_mlp, three_classes};

/// Rows `from..to` of the seeded three-class set.
fn rows(from: usize, to: usize) -> Dataset {
    let all = three_classes(to);
    Dataset {
        features: all.features.columns(from, to - from).into_owned(),
        labels: all.labels[from..to].to_vec(),
    }
}

/// The lines: certified ≥ 0.5 at L-inf 0.1 and ≥ 0.25 at 0.2.
const LINES: [(f64, f64); 2] = [(0.1, 0.5), (0.2, 0.25)];

/// Retrains the three-class MLP for 12 epochs against `lines` (epsilon, floor), checked twice an epoch.
fn run(lines: &[(f64, f64)], keep: Keep, near_misses: NearMisses) -> RetrainResult {
    let train = rows(0, 240);
    let validation = rows(240, 480);
    let acceptance = rows(480, 780);
    let model = three_class_mlp(&train);
    let lines: Vec<RequirementLine> = lines
        .iter()
        .map(|&(epsilon, floor)| {
            RequirementLine::Certified(CertifiedFloor {
                epsilon,
                floor,
                confidence: None,
                class: None,
                targets: Targets::Any,
            })
        })
        .collect();
    let constrained = ConstrainedSettings {
        train: TrainSettings {
            epochs: 12,
            batch_size: 32,
            patience: None,
            validation_fraction: 0.0,
            ..TrainSettings::default()
        },
        budget: Budget::uniform(Norm::Linf, 0.1, 2),
        targets: Targets::Any,
        loss: RobustLoss::Interval,
        constraint: Constraint::RobustError {
            floor: 0.0,
            slack: 0.0,
        },
        terms: Vec::new(),
        relax: None,
        formulation: Formulation::PrimalDual {
            dual_step: 0.1,
            initial_multiplier: 0.0,
            per_class: false,
        },
        ramp_epochs: 0,
        measure_certified: true,
        gap_correction: false,
        checks_per_epoch: 2,
        final_rate_factor: 1.0,
        average_tail: 0.0,
    };
    let settings = RetrainSettings {
        constrained,
        round_epochs: 1,
        max_rounds: 1,
        slack_step: 0.0,
        pipeline: PipelineOptions::default(),
        keep,
        near_misses,
        confidence: Default::default(),
        lines,
    };
    retrain(
        &model,
        &train,
        Some(&validation),
        &acceptance,
        &Requirement::uniform(Norm::Linf, 0.1),
        &settings,
        &mut |_| {},
    )
    .expect("retrain runs")
}

/// One standard error of the difference of two binomial proportions at `p` over `n` and `m` rows.
fn standard_error(p: f64, n: f64, m: f64) -> f64 {
    (p * (1.0 - p) * (1.0 / n + 1.0 / m)).sqrt()
}

#[test]
fn a_list_keeps_the_rules_check_among_those_reaching_every_aimed_floor() {
    let result = run(&LINES, Keep::EarliestFeasible, NearMisses::OFF);
    let aimed: Vec<f64> = LINES
        .iter()
        .map(|&(_, floor)| floor + standard_error(floor, 240.0, 300.0))
        .collect();
    for (margin, &(_, floor)) in result.generalisation_margins.iter().zip(&LINES) {
        let expected = standard_error(floor, 240.0, 300.0);
        assert!((margin - expected).abs() < 1e-12, "{margin} vs {expected}");
    }
    for (term, aim) in result.terms.iter().zip(&aimed) {
        assert!((term.floor().expect("a floor") - aim).abs() < 1e-12);
    }
    // The one-standard-error rule (Breiman, Friedman, Olshen & Stone, 1984) over the checks whose
    // worst margin reaches `threshold`: the lowest validation clean loss sets a window of one
    // standard error above it, and the earliest check inside is kept; without any, the last epoch.
    let kept_at = |threshold: f64| {
        let feasible: Vec<_> = result
            .checks
            .iter()
            .filter(|c| c.worst_margin.expect("a list's check") >= threshold)
            .collect();
        let Some(best) = feasible
            .iter()
            .min_by(|a, b| a.clean_loss.total_cmp(&b.clean_loss))
        else {
            return 12.0;
        };
        let window = best.clean_loss + best.clean_loss_error;
        feasible
            .iter()
            .filter(|c| c.clean_loss <= window)
            .map(|c| c.epoch_position)
            .fold(f64::INFINITY, f64::min)
    };
    let expected = kept_at(0.0);
    assert_eq!(result.rounds[0].selected_epoch, expected);
    // The check this test hinges on: demanding a margin more would keep other weights (seeded; as
    // measured), so keeping the right ones is not a coincidence of the data.
    assert_ne!(kept_at(result.generalisation_margins[0]), expected);
}

#[test]
fn a_lists_near_misses_are_judged_by_the_worst_line_margin() {
    let margin = 0.2;
    // A floor the last check misses by a little by linear bounds (seeded; as measured), so the
    // lowest-loss candidate is a near miss to judge.
    let lines = [(0.1, 0.518), (0.2, 0.25)];
    let result = run(&lines, Keep::BestFeasible, NearMisses { margin, tries: 3 });
    let round = &result.rounds[0];
    assert!(round.near_misses_judged.len() <= 3);
    for judged in &round.near_misses_judged {
        assert!(
            judged.linear_certified < 0.0 && judged.linear_certified >= -margin,
            "{judged:?}"
        );
        // The pipeline runs the checks' linear bounds among others: never a lower figure.
        assert!(
            judged.pipeline_certified >= judged.linear_certified - 1e-12,
            "{judged:?}"
        );
    }
    // At this floor the last check is a near miss the pipeline proves (seeded; as measured), and
    // the round's validation report is the judged one: every line holds its aimed floor there.
    assert!(round.near_miss, "{round:?}");
    assert_eq!(round.selected_epoch, 12.0);
    for (line, term) in round.requirements.iter().zip(&result.terms) {
        assert!(line.measured >= term.floor().expect("a floor"), "{line:?}");
    }
}
