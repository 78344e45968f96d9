//! The provenance record of a retrained model (`provenance` in the model file, design.md §2): the
//! parent's provenance, and under `retrain` the parent's path and SHA-256, the training data's digest,
//! every setting, each round's figures, the prices of the constraints, the generalisation margins,
//! the lineage ([`super::lineage`]), the final verdict with its figures and each requirement line's
//! verdict, and with a confidence level the reviewer's plan. One function builds it for every caller
//! (the command line, the demo and the Python bindings), so the record has one layout. It only reads
//! the settings and the result; it never recomputes a figure.

use crate::model::Model;
use crate::threat::requirement::Requirement;

use super::confidence;
use super::lineage::{lineage, RetrainData};
use super::price::{prices, Price, Standing};
use super::retrain::{RetrainResult, RetrainSettings};

/// What the record describes besides the retraining's own settings and result.
#[derive(Debug, Clone, Copy)]
pub struct ProvenanceInputs<'a> {
    /// The parent model as loaded (its provenance is kept under `parent`).
    pub parent: &'a Model,
    /// Where the parent came from (a path, or a description for an in-memory model).
    pub parent_path: &'a str,
    /// SHA-256 of the parent's file (or of its in-memory layout).
    pub parent_sha256: &'a str,
    /// Hidden layer sizes when the network was trained from scratch.
    pub hidden: Option<&'a [usize]>,
    /// The requirement as resolved (the ball; with a list the floors are in the settings' lines).
    pub requirement: &'a Requirement,
    /// The floor drawn and reported (a list's lowest).
    pub floor: f64,
    /// Where the training, validation and acceptance rows came from.
    pub data: &'a RetrainData,
}

/// The final multipliers read as prices (primal-dual runs; empty for a fixed penalty), each with how
/// its constraint stood in the last epoch.
pub fn final_prices(result: &RetrainResult, settings: &RetrainSettings) -> Vec<Price> {
    match result.epochs.last() {
        Some(last) if settings.constrained.formulation.is_primal_dual() => {
            let standings: Vec<Option<Standing>> = result
                .terms
                .iter()
                .enumerate()
                .map(|(k, term)| {
                    let gap = last.gap_corrections.get(k).copied().unwrap_or(0.0);
                    Some(Standing {
                        measured: *last.measured.get(k)?,
                        allowed: term.allowance(gap) + last.slacks.get(k).copied().unwrap_or(0.0),
                        rows: *result.term_rows.get(k)?,
                    })
                })
                .collect();
            prices(&result.terms, &last.multipliers, &last.slacks, &standings)
        }
        _ => Vec::new(),
    }
}

/// The retrained model's provenance: `{ "parent": …, "retrain": { … } }`.
pub fn retrain_provenance(
    inputs: &ProvenanceInputs,
    settings: &RetrainSettings,
    result: &RetrainResult,
) -> serde_json::Value {
    let requirement = inputs.requirement;
    let record = lineage(
        inputs.parent_path,
        inputs.parent_sha256,
        settings,
        result,
        inputs.data,
    );
    let last = &result.report.summary;
    let assessments: Vec<_> = result.rounds.iter().map(|r| r.confidence).collect();
    serde_json::json!({
        "parent": inputs.parent.provenance.clone().unwrap_or(serde_json::Value::Null),
        "retrain": {
            "parent_sha256": inputs.parent_sha256,
            "parent_path": inputs.parent_path,
            "train_sha256": inputs.data.train.sha256,
            "from_scratch_hidden": inputs.hidden,
            "settings": {
                "epsilon": requirement.epsilon(), "norm": requirement.norm, "floor": inputs.floor,
                "per_feature_tolerances": requirement.tolerances.as_ref().map(|t| t.values.clone()),
                "targets": format!("{:?}", requirement.targets),
                "constrained": settings.constrained, "round_epochs": settings.round_epochs,
                "max_rounds": settings.max_rounds, "slack_step": settings.slack_step,
                "keep": settings.keep, "near_misses": settings.near_misses,
            },
            "rounds": result.rounds,
            "prices": final_prices(result, settings),
            "generalisation_margins": result.generalisation_margins,
            "multipliers": record.multipliers,
            "lineage": record,
            "final": {
                "verdict": result.verdict,
                "clean_accuracy": last.clean_accuracy,
                "certified_accuracy": last.certified_accuracy,
                "empirical_robust_accuracy": last.empirical_robust_accuracy,
                "acceptance_samples": last.samples,
                "on_unseen_data": result.verdict_on_unseen_data,
                "requirements": result.report.requirements,
            },
            "confidence": result.plan.map(|plan| confidence::json(&plan, &assessments)),
        }
    })
}
