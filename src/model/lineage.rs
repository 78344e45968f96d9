//! The lineage of a retrained model: which model it was retrained from (path and SHA-256), with which
//! settings, in how many rounds and epochs, with which final multipliers, and which data decided what
//! (training data the weights, validation data the kept weights and whether another round ran,
//! acceptance data the final verdict). `ballast retrain` writes it into the model's `provenance.retrain.lineage`; certify copies it
//! into the report so the sheet can say the model was retrained and whether the data it certifies on
//! steered that retraining (then the figure on it is optimistically biased).
//!
//! It only records and reads; it never judges a model.

use serde::{Deserialize, Serialize};

use super::Model;

/// What a data set did in a retraining run.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum Role {
    /// Gradient steps were taken on it.
    Train,
    /// Measured during training; may choose the kept weights and tighten the constraint.
    Validation,
    /// The certify check after each round.
    Acceptance,
}

impl Role {
    /// The role's name.
    pub fn name(self) -> &'static str {
        match self {
            Role::Train => "training",
            Role::Validation => "validation",
            Role::Acceptance => "acceptance",
        }
    }
}

/// One data set of a retraining run and what it decided.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct DataUse {
    /// Its role.
    pub role: Role,
    /// Where the rows came from: a file path, or a description such as "20% of train.csv held out".
    pub source: String,
    /// SHA-256 of the file the rows came from (absent for data held in memory).
    pub sha256: Option<String>,
    /// Number of rows used in this role.
    pub rows: usize,
    /// What it decided, in words.
    pub decided: String,
    /// True when what it decided includes a choice of the returned weights (which weights to keep,
    /// or whether to train on): figures measured on it afterwards are optimistically biased.
    pub steered: bool,
}

/// The retraining record of a model.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Lineage {
    /// The tool and version that retrained it.
    pub retrained_by: String,
    /// The parent model's path as given.
    pub parent_path: String,
    /// SHA-256 of the parent model file.
    pub parent_sha256: String,
    /// The settings in words.
    pub settings: String,
    /// Rounds run.
    pub rounds: usize,
    /// Largest number of rounds allowed.
    pub max_rounds: usize,
    /// Epochs run in all rounds.
    pub epochs: usize,
    /// Where each round's kept weights were taken, in epochs.
    pub kept_epochs: Vec<f64>,
    /// The multipliers (λ) after the last epoch (one, or one per class).
    pub multipliers: Vec<f64>,
    /// The retrainer's own verdict on its acceptance data (`met` or `not met`).
    pub verdict: String,
    /// Every data set used and what it decided.
    pub data: Vec<DataUse>,
}

/// The key under `provenance.retrain` that holds the lineage.
pub const LINEAGE_KEY: &str = "lineage";

impl Lineage {
    /// The lineage recorded in `model`'s provenance, if any (an unreadable record counts as none).
    pub fn of(model: &Model) -> Option<Lineage> {
        let value = model
            .provenance
            .as_ref()?
            .get("retrain")?
            .get(LINEAGE_KEY)?;
        serde_json::from_value(value.clone()).ok()
    }

    /// The data uses whose file has the digest `sha256`.
    pub fn uses_of(&self, sha256: &str) -> Vec<&DataUse> {
        self.data
            .iter()
            .filter(|d| d.sha256.as_deref() == Some(sha256))
            .collect()
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn lineage_reads_back_from_the_provenance_and_finds_data_by_digest() {
        let lineage = Lineage {
            retrained_by: "ballast 0".into(),
            parent_path: "m.json".into(),
            parent_sha256: "ab".into(),
            settings: "s".into(),
            rounds: 2,
            max_rounds: 3,
            epochs: 45,
            kept_epochs: vec![20.75, 44.0],
            multipliers: vec![0.5],
            verdict: "met".into(),
            data: vec![DataUse {
                role: Role::Acceptance,
                source: "acc.csv".into(),
                sha256: Some("cd".into()),
                rows: 10,
                decided: "whether another round ran".into(),
                steered: true,
            }],
        };
        let json = format!(
            r#"{{"format":"ballast.model/1","input":{{"dim":1}},"layers":[{{"kind":"dense","weights":[[1.0]],"bias":[0.0]}}],
                "provenance":{{"retrain":{{"lineage":{}}}}}}}"#,
            serde_json::to_string(&lineage).unwrap()
        );
        let model = Model::from_json_str(&json).unwrap();
        assert_eq!(Lineage::of(&model), Some(lineage.clone()));
        assert_eq!(lineage.uses_of("cd").len(), 1);
        assert!(lineage.uses_of("ab").is_empty());
    }
}
