//! The sheet's view of [`CounterexampleMovement`]: which features the counterexamples moved, and how
//! far, in units of each feature's radius — a table (mean |δ|/radius, mean signed δ/radius, share at the
//! radius, largest) and a bar chart of the mean relative change, features in input order. It restates
//! the report's statistics and rounds them for reading only.

use super::bars::{BarChart, Series};
use super::content::Table;
use crate::certify::perturbation::CounterexampleMovement;

fn shown(v: Option<f64>) -> String {
    v.map_or("held fixed".into(), |v| format!("{v:.2}"))
}

/// The table and the chart of the counterexamples' movement.
pub fn fragility(m: &CounterexampleMovement) -> (String, Table, BarChart) {
    let text = format!(
        "How far the {} counterexamples found moved each feature, in units of the feature's radius (1 = the whole radius). Attacks in an L-inf ball tend to take every feature to its radius, so the size alone says little there; the chart shows the mean signed change: a bar near −1 or +1 means the counterexamples needed that feature pushed the same way nearly every time (the model is fragile in that direction), a bar near 0 that they pushed it either way.",
        m.counterexamples
    );
    let table = Table {
        headers: [
            "feature",
            "radius",
            "mean |δ| / radius",
            "mean δ / radius",
            "share at the radius",
            "largest |δ| / radius",
        ]
        .map(String::from)
        .to_vec(),
        rows: m
            .features
            .iter()
            .map(|f| {
                vec![
                    f.feature.clone(),
                    super::budget::significant(f.radius, 6),
                    shown(f.mean_relative_change),
                    shown(f.mean_signed_change),
                    f.share_at_radius
                        .map_or("held fixed".into(), |v| format!("{:.0}%", v * 100.0)),
                    shown(f.max_relative_change),
                ]
            })
            .collect(),
    };
    let chart = BarChart {
        title: "mean signed change of each feature in the counterexamples, in units of its radius"
            .into(),
        rows: m.features.iter().map(|f| f.feature.clone()).collect(),
        series: vec![Series {
            name: "mean δ / radius".into(),
            colour: "#c06000",
            values: m
                .features
                .iter()
                .map(|f| f.mean_signed_change.unwrap_or(0.0))
                .collect(),
        }],
        axis: "mean δ / radius over the counterexamples (−1 always down, +1 always up)".into(),
        scale: 1.0,
        suffix: String::new(),
        minimum_high: 1.0,
        minimum_low: -1.0,
    };
    (text, table, chart)
}
