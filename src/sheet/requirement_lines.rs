//! The sheet's table of a requirement list: one row per line (requirement, measured, floor, verdict),
//! restated from the report's `requirements`; nothing is recomputed.

use super::content::{percent, Table};
use crate::certify::report::Report;

/// The table of a requirement list's lines (none for a single requirement).
pub fn table(report: &Report) -> Option<Table> {
    if report.requirements.is_empty() {
        return None;
    }
    Some(Table {
        headers: ["requirement", "measured", "floor", "verdict"]
            .map(String::from)
            .to_vec(),
        rows: report
            .requirements
            .iter()
            .map(|l| {
                let measured = match l.lower_bound {
                    Some(b) => format!("{} (lower bound {})", percent(l.measured), percent(b)),
                    None if l.kind == "certified" => {
                        format!("{} (empirical {})", percent(l.measured), percent(l.upper))
                    }
                    None => percent(l.measured),
                };
                vec![
                    l.requirement.clone(),
                    measured,
                    percent(l.floor),
                    l.verdict.name().to_string(),
                ]
            })
            .collect(),
    })
}
