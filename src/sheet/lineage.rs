//! The "Model lineage" part of a sheet: for a model retrained by ballast, from which model (path and
//! SHA-256), with which settings, in how many rounds, which data decided what, and whether the data
//! this sheet certifies on is among them. Data that steered the retraining (chose the kept weights or
//! whether another round ran) gives an optimistically biased figure, and the sheet says so as a
//! caution. Matching is by SHA-256 of the data file only; the sheet restates the report's record.

use super::content::Table;
use crate::certify::Report;
use crate::model::lineage::Lineage;

/// What the sheet says about a retrained model: a paragraph, the data table, and cautions.
#[derive(Debug, Clone, PartialEq)]
pub struct LineageContent {
    /// The paragraph.
    pub text: String,
    /// One row per data use: role, source, the first 16 hex digits of its SHA-256 (the report keeps
    /// the whole digest), rows, what it decided, whether it steered.
    pub data: Table,
    /// Where this sheet's data stands against the retraining's data.
    pub this_data: String,
}

fn kept(lineage: &Lineage) -> String {
    lineage
        .kept_epochs
        .iter()
        .map(|e| super::budget::significant(*e, 6))
        .collect::<Vec<_>>()
        .join(", ")
}

fn summary(lineage: &Lineage) -> String {
    let lambda = lineage
        .multipliers
        .iter()
        .map(|m| super::budget::significant(*m, 4))
        .collect::<Vec<_>>()
        .join(", ");
    format!(
        "Retrained by {} from {} (SHA-256 {}) in {} of at most {} rounds, {} epochs in all; each round's kept weights were taken at epoch {}; final multiplier λ = {}. Settings: {}. The retrainer's own check: floor {} on its acceptance data.",
        lineage.retrained_by,
        lineage.parent_path,
        lineage.parent_sha256,
        lineage.rounds,
        lineage.max_rounds,
        lineage.epochs,
        kept(lineage),
        if lambda.is_empty() { "–".to_string() } else { lambda },
        lineage.settings,
        lineage.verdict
    )
}

fn data_table(lineage: &Lineage) -> Table {
    Table {
        headers: [
            "data",
            "source",
            "SHA-256 (start)",
            "rows",
            "decided",
            "steered",
        ]
        .map(String::from)
        .to_vec(),
        rows: lineage
            .data
            .iter()
            .map(|d| {
                vec![
                    d.role.name().to_string(),
                    d.source.clone(),
                    d.sha256
                        .as_deref()
                        .map_or("–".to_string(), |h| format!("{}…", &h[..h.len().min(16)])),
                    d.rows.to_string(),
                    d.decided.clone(),
                    if d.steered { "yes" } else { "no" }.to_string(),
                ]
            })
            .collect(),
    }
}

/// The lineage part of the sheet for `report`, with the caution to add (if any); `None` when the
/// model carries no retraining record.
pub fn lineage_content(report: &Report) -> Option<(LineageContent, Option<String>)> {
    let lineage = report.model.lineage.as_ref()?;
    let uses = lineage.uses_of(&report.data.sha256);
    let roles: Vec<&str> = uses.iter().map(|u| u.role.name()).collect();
    let steering: Vec<&str> = uses
        .iter()
        .filter(|u| u.steered)
        .map(|u| u.role.name())
        .collect();
    let this_data = if uses.is_empty() {
        "The data of this sheet is none of the retraining's data files (no SHA-256 matches): its figures are not biased by the retraining's choices.".to_string()
    } else {
        format!(
            "The data of this sheet is the file the retraining used as {} data.",
            roles.join(" and ")
        )
    };
    let caution = if !steering.is_empty() {
        Some(format!(
            "The data of this sheet steered the retraining of this model (as its {} data: it chose the weights or whether another round ran), so the figures on it are optimistically biased; an unbiased figure needs data the retraining never saw.",
            steering.join(" and ")
        ))
    } else {
        None
    };
    Some((
        LineageContent {
            text: summary(lineage),
            data: data_table(lineage),
            this_data,
        },
        caution,
    ))
}

/// The retraining sheet's section on the run's lineage and data, in Markdown.
pub fn retrain_sheet_section(lineage: &Lineage) -> String {
    let mut md = String::from("## Lineage and data\n\n");
    md.push_str(&super::escape::markdown(&summary(lineage)));
    md.push_str("\n\nWhich data decided what:\n\n");
    md.push_str(&super::markdown::table(&data_table(lineage)));
    let steered: Vec<&str> = lineage
        .data
        .iter()
        .filter(|d| d.role == crate::model::lineage::Role::Acceptance && d.steered)
        .map(|d| d.source.as_str())
        .collect();
    if !steered.is_empty() {
        md.push_str(&format!(
            "\n**Caution:** the acceptance data ({}) steered this retraining, so the certified figure on it above is optimistically biased. Certify the retrained model on data the retraining never saw for an unbiased figure.\n",
            super::escape::markdown(&steered.join(", "))
        ));
    }
    md
}
