//! The retraining sheet's plots: validation accuracy per epoch (clean and certified) with the floor
//! as a line, the training losses with the largest multiplier, and with several constraints each
//! one's multiplier (its price history). Both mark where each round's kept
//! weights were taken and count epochs in whole numbers. They draw the retrainer's log as it is; the
//! certified curve is the validation check's sound linear-bound figure, not the acceptance verdict.

use crate::train::constrained::ConstrainedEpoch;
use crate::train::curves::{Guide, Plot, Series};
use crate::train::retrain::RetrainResult;

/// One vertical guide per round at the position (in epochs) of the weights it kept.
fn kept_markers(result: &RetrainResult) -> Vec<Guide> {
    let several = result.rounds.len() > 1;
    result
        .rounds
        .iter()
        .map(|r| Guide::Vertical {
            x: r.selected_epoch,
            label: if several {
                format!("kept (round {})", r.round)
            } else {
                "kept".to_string()
            },
        })
        .collect()
}

/// `(accuracy.svg, loss_and_multiplier.svg)` for `result` against `floor`.
pub fn retrain_plots(result: &RetrainResult, floor: f64) -> (String, String) {
    let series = |name: &str, f: &dyn Fn(&ConstrainedEpoch) -> Option<f64>| Series {
        name: name.into(),
        points: result
            .epochs
            .iter()
            .filter_map(|e| f(e).map(|v| (e.epoch as f64, v)))
            .collect(),
        markers_only: false,
    };
    let kept = kept_markers(result);
    let mut accuracy_guides = vec![Guide::Horizontal {
        y: floor,
        label: format!("floor {floor}"),
    }];
    accuracy_guides.extend(kept.iter().cloned());
    let accuracy = Plot {
        title: "Validation accuracy per epoch",
        x_label: "epoch",
        y_label: "accuracy (validation)",
        series: &[
            series("clean", &|e| e.validation_clean_accuracy),
            series("certified", &|e| e.validation_certified_accuracy),
        ],
        guides: &accuracy_guides,
        integer_x: true,
    }
    .svg();
    let losses = Plot {
        title: "Training losses and multiplier λ",
        x_label: "epoch",
        y_label: "loss / multiplier",
        series: &[
            series("clean loss", &|e| Some(e.clean_loss)),
            series("robust loss", &|e| Some(e.robust_loss)),
            series("λ (largest)", &|e| {
                e.multipliers.iter().copied().reduce(f64::max)
            }),
        ],
        guides: &kept,
        integer_x: true,
    }
    .svg();
    (accuracy, losses)
}

/// `multipliers.svg`: the multiplier of each constraint per epoch, named by `names` (one per
/// constraint, in multiplier order). `None` with a single constraint (the losses plot shows it).
pub fn multiplier_plot(result: &RetrainResult, names: &[String]) -> Option<String> {
    if names.len() < 2 {
        return None;
    }
    let series: Vec<Series> = names
        .iter()
        .enumerate()
        .map(|(k, name)| Series {
            name: format!("λ{}: {name}", k + 1),
            points: result
                .epochs
                .iter()
                .filter_map(|e| e.multipliers.get(k).map(|m| (e.epoch as f64, *m)))
                .collect(),
            markers_only: false,
        })
        .collect();
    Some(
        Plot {
            title: "Multiplier of each requirement per epoch",
            x_label: "epoch",
            y_label: "multiplier (clean loss per unit of the constraint)",
            series: &series,
            guides: &kept_markers(result),
            integer_x: true,
        }
        .svg(),
    )
}
