//! The retraining sheet's two plots: validation accuracy per epoch (clean and certified) with the floor
//! as a line, and the training losses with the largest multiplier. Both mark where each round's kept
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
