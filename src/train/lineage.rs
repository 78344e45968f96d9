//! Builds the [`Lineage`] of a retrained model from the retrainer's settings and result and the data it
//! was given: the settings in words, rounds, epochs, kept epochs, final multipliers, and for each data
//! set what it decided. A data set "steered" the retraining when it chose among weights: the
//! validation data when it picks the kept weights, tightens the constraint or its check decides whether
//! another round runs (more than one round allowed); the acceptance data only when it is the validation
//! data (a separate acceptance set is certified once, after the last round). It reads the settings as
//! they were used; it never changes them.

use super::constrained::{Constraint, Formulation};
use super::retrain::{Keep, RetrainResult, RetrainSettings, RetrainVerdict};
use super::OptimizerKind;
use crate::model::lineage::{DataUse, Lineage, Role};

/// Where a data set came from.
#[derive(Debug, Clone, PartialEq)]
pub struct DataSource {
    /// A file path, or a description of the rows.
    pub source: String,
    /// SHA-256 of the file the rows came from.
    pub sha256: Option<String>,
    /// Rows used.
    pub rows: usize,
}

/// The data of a retraining run.
#[derive(Debug, Clone, PartialEq)]
pub struct RetrainData {
    /// The training rows.
    pub train: DataSource,
    /// The validation rows (possibly held out of the training file).
    pub validation: DataSource,
    /// The acceptance rows; `None` when the validation data served as acceptance data.
    pub acceptance: Option<DataSource>,
}

/// The SHA-256 digests of the data a model was trained on, as its provenance records them: the
/// demo's `training_data_sha256`, a retrained model's `retrain.train_sha256`, and the same of every
/// `parent` it was retrained from.
pub fn training_digests(provenance: &serde_json::Value) -> Vec<String> {
    let mut digests = Vec::new();
    let mut node = Some(provenance);
    while let Some(p) = node {
        for digest in [&p["training_data_sha256"], &p["retrain"]["train_sha256"]] {
            if let Some(d) = digest.as_str() {
                digests.push(d.to_string());
            }
        }
        node = p.get("parent");
    }
    digests
}

/// True when the validation rows come from a file whose SHA-256 the parent's provenance names as
/// training data (see [`training_digests`]): the rows are then not new to the model, so its validation
/// figures overstate unseen data, and no generalisation margin covers that.
pub fn validation_seen_by_parent(parent: Option<&serde_json::Value>, data: &RetrainData) -> bool {
    match (parent, &data.validation.sha256) {
        (Some(provenance), Some(digest)) => training_digests(provenance).contains(digest),
        _ => false,
    }
}

/// Cautions about a retraining verdict, in words (the command line prints them and writes them into
/// `retrain.md`; the Python bindings return them): validation rows the parent model was trained on
/// (`seen_by_parent`: how the caller names their source; see [`validation_seen_by_parent`]), and a
/// verdict on data that also steered the rounds (`acceptance`: how the caller names the acceptance
/// set when one was given, which was then the validation data too).
pub fn cautions(
    result: &RetrainResult,
    acceptance: Option<&str>,
    seen_by_parent: Option<&str>,
) -> Vec<String> {
    let mut out = Vec::new();
    if let Some(source) = seen_by_parent {
        out.push(format!("the validation rows come from {source}, which the parent model's provenance names as its training data (same SHA-256): they are not new to the model, so the validation figures that chose the kept weights and ended the rounds overstate unseen data, and the generalisation margin does not cover that; give validation rows the parent never saw (--val)"));
    }
    if !result.verdict_on_unseen_data {
        out.push(match acceptance {
            Some(a) => format!("the acceptance set {a} was also passed as validation data: it steered the rounds and chose the kept weights, so its verdict is optimistic; certify the model on untouched data before release"),
            None => "no acceptance set was given: the verdict is on the validation data, which also steered the rounds and chose the kept weights, so it is optimistic; certify the model on an untouched acceptance set before release".to_string(),
        });
    }
    out
}

/// The settings in one line of words.
pub fn describe_settings(settings: &RetrainSettings) -> String {
    let c = &settings.constrained;
    let formulation = match c.formulation {
        Formulation::PrimalDual {
            dual_step,
            per_class,
            ..
        } => format!(
            "primal-dual multiplier{} (dual step {dual_step})",
            if per_class { " per class" } else { "" }
        ),
        Formulation::Penalty { weight } => format!("fixed penalty weight {weight}"),
    };
    let constraint = match c.constraint {
        Constraint::RobustError { slack, .. } if !settings.lines.is_empty() => format!(
            "one constraint per requirement line ({}), robust or clean error ≤ 1 − floor − slack (slack {slack}, +{} per further round for a line that failed){}",
            settings.lines.len(),
            settings.slack_step,
            match c.relax {
                Some(cost) => format!(", relaxed (slack cost {cost})"),
                None => String::new(),
            }
        ),
        Constraint::CleanError { floor, .. } => format!("clean accuracy ≥ {floor}"),
        Constraint::RobustError { slack, .. } => format!(
            "robust error ≤ 1 − floor − slack (slack {slack}, +{} per further round)",
            settings.slack_step
        ),
        Constraint::RobustLossLevel { level } => format!("robust loss ≤ {level}"),
    };
    let optimizer = match c.train.optimizer {
        OptimizerKind::Adam { learning_rate, .. } => format!("Adam, learning rate {learning_rate}"),
        OptimizerKind::Sgd {
            learning_rate,
            momentum,
        } => format!("SGD, learning rate {learning_rate}, momentum {momentum}"),
    };
    let keep = match settings.keep {
        Keep::BestFeasible => "best-feasible",
        Keep::EarliestFeasible => "earliest-feasible",
        Keep::Last => "last",
    };
    format!(
        "{} robust loss, {formulation}, {constraint}; {} epochs in round 1 and {} in each further round (at most {} rounds), epsilon ramped over {} epochs; {optimizer}, batches of {}, final rate factor {}; kept weights: {keep}, {} validation checks per epoch; seed {}",
        c.loss.name(),
        c.train.epochs,
        settings.round_epochs,
        settings.max_rounds,
        c.ramp_epochs,
        c.train.batch_size,
        c.final_rate_factor,
        c.checks_per_epoch,
        c.train.seed
    )
}

/// The lineage of `result`, retrained from the model at `parent_path` (digest `parent_sha256`) with
/// `settings` on `data`.
pub fn lineage(
    parent_path: &str,
    parent_sha256: &str,
    settings: &RetrainSettings,
    result: &RetrainResult,
    data: &RetrainData,
) -> Lineage {
    let c = &settings.constrained;
    let selecting = settings.keep != Keep::Last
        && c.measure_certified
        && matches!(c.formulation, Formulation::PrimalDual { .. });
    let mut validation_decided = Vec::new();
    if selecting {
        validation_decided.push("which epoch's weights each round kept (best feasible iterate)");
    }
    if c.gap_correction {
        validation_decided.push("the generalisation gap that tightens the constraint");
    }
    let several_rounds = settings.max_rounds > 1;
    if several_rounds {
        validation_decided.push("the certify check after each round: whether another round ran");
    }
    let validation_steered = !validation_decided.is_empty();
    if validation_decided.is_empty() {
        validation_decided.push("nothing (measured only)");
    }
    let acceptance_decided = match &data.acceptance {
        Some(_) => {
            "the final certify check only (certified once, after the last round)".to_string()
        }
        None => {
            "the final certify check, on the validation data that steered the rounds".to_string()
        }
    };
    let use_of = |role, d: &DataSource, decided: String, steered| DataUse {
        role,
        source: d.source.clone(),
        sha256: d.sha256.clone(),
        rows: d.rows,
        decided,
        steered,
    };
    let mut uses = vec![
        use_of(
            Role::Train,
            &data.train,
            "the weights (every gradient step)".into(),
            true,
        ),
        use_of(
            Role::Validation,
            &data.validation,
            validation_decided.join("; "),
            validation_steered,
        ),
    ];
    let (acceptance, steered) = match &data.acceptance {
        Some(a) => (a, false),
        None => (&data.validation, validation_steered),
    };
    uses.push(use_of(
        Role::Acceptance,
        acceptance,
        acceptance_decided,
        steered,
    ));
    Lineage {
        retrained_by: format!("ballast {}", env!("CARGO_PKG_VERSION")),
        parent_path: parent_path.to_string(),
        parent_sha256: parent_sha256.to_string(),
        settings: describe_settings(settings),
        rounds: result.rounds.len(),
        max_rounds: settings.max_rounds,
        epochs: result.epochs.len(),
        kept_epochs: result.rounds.iter().map(|r| r.selected_epoch).collect(),
        multipliers: result
            .epochs
            .last()
            .map(|e| e.multipliers.clone())
            .unwrap_or_default(),
        verdict: match result.verdict {
            RetrainVerdict::Met => "met",
            RetrainVerdict::NotMet => "not met",
        }
        .into(),
        data: uses,
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn source(sha256: Option<&str>) -> DataSource {
        DataSource {
            source: "rows".into(),
            sha256: sha256.map(String::from),
            rows: 10,
        }
    }

    // A retrained model's provenance nests its parent's: the digests of every generation count.
    #[test]
    fn validation_rows_the_parent_was_trained_on_are_found_through_the_generations() {
        let provenance = serde_json::json!({
            "parent": {
                "parent": { "training_data_sha256": "aa" },
                "retrain": { "train_sha256": "bb" }
            },
            "retrain": { "train_sha256": "cc" }
        });
        assert_eq!(training_digests(&provenance), vec!["cc", "bb", "aa"]);
        let data = |validation: Option<&str>| RetrainData {
            train: source(Some("zz")),
            validation: source(validation),
            acceptance: None,
        };
        assert!(validation_seen_by_parent(
            Some(&provenance),
            &data(Some("aa"))
        ));
        assert!(validation_seen_by_parent(
            Some(&provenance),
            &data(Some("cc"))
        ));
        assert!(!validation_seen_by_parent(
            Some(&provenance),
            &data(Some("zz"))
        ));
        assert!(!validation_seen_by_parent(Some(&provenance), &data(None)));
        assert!(!validation_seen_by_parent(None, &data(Some("aa"))));
    }
}
