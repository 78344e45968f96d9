//! The budget the sheet judged, feature by feature: each feature's name, unit (when the model states
//! it), tolerance (with per-feature tolerances), its radius in the input's own units at every epsilon of
//! the run, and the valid input range every perturbed input is clipped to. Three or more consecutive
//! features with the same row share one row (`vel_bin_02 … vel_bin_39 (38 features)`; `all N
//! features` when every feature has the same row).
//!
//! It restates the report; it never widens or narrows a radius or a range (values are shown to 6
//! significant digits; the report keeps them exactly).

use super::content::Table;
use crate::certify::Report;

/// Consecutive features with identical rows, at least this many, share one row.
const RUN: usize = 3;

/// `v` to `digits` significant digits, in the shortest form that reads back as the rounded value.
pub fn significant(v: f64, digits: usize) -> String {
    if v == 0.0 || !v.is_finite() {
        return format!("{v}");
    }
    let rounded: f64 = format!("{:.*e}", digits.saturating_sub(1), v)
        .parse()
        .unwrap_or(v);
    format!("{rounded}")
}

/// The header of the radius column at `epsilon`.
pub fn radius_header(epsilon: f64) -> String {
    format!("radius at epsilon {}", significant(epsilon, 6))
}

/// The per-feature budget table: feature, unit (if known), tolerance (if any), the radius at each
/// epsilon, and the lowest and highest valid value (`unbounded` when the model sets none).
pub fn budget_table(report: &Report) -> Table {
    let r = &report.requirement;
    let input = report.model.input.as_ref();
    let dim = report.model.features.len();
    let mut epsilons = r.epsilons.clone();
    if epsilons.is_empty() {
        epsilons.push(r.epsilon);
    }
    let has_units = input.is_some_and(|i| i.units.is_some());
    let mut headers = vec!["feature".to_string()];
    if has_units {
        headers.push("unit".into());
    }
    if r.tolerances.is_some() {
        headers.push("tolerance".into());
    }
    headers.extend(epsilons.iter().map(|e| radius_header(*e)));
    if input.is_some() {
        headers.extend(["lowest valid".to_string(), "highest valid".to_string()]);
    }
    let end = |v: Option<f64>| v.map_or("unbounded".to_string(), |v| significant(v, 6));
    let cells = |i: usize| -> Vec<String> {
        let mut row = Vec::new();
        if has_units {
            // "1" is the SI unit of a quantity of dimension one.
            row.push(match input.and_then(|x| x.unit(i)).unwrap_or_default() {
                "1" => "dimensionless".to_string(),
                unit => unit.to_string(),
            });
        }
        let tolerance = r.tolerances.as_ref().map(|t| t.values[i]);
        if let Some(t) = tolerance {
            row.push(significant(t, 6));
        }
        row.extend(
            epsilons
                .iter()
                .map(|e| significant(e * tolerance.unwrap_or(1.0), 6)),
        );
        if let Some(x) = input {
            row.push(end(x.lower.get(i).copied().flatten()));
            row.push(end(x.upper.get(i).copied().flatten()));
        }
        row
    };
    let rest: Vec<Vec<String>> = (0..dim).map(cells).collect();
    let names = &report.model.features;
    let mut rows = Vec::new();
    let mut start = 0;
    while start < dim {
        let end = (start..dim)
            .find(|&k| rest[k] != rest[start])
            .unwrap_or(dim);
        let run = end - start;
        let name = if run == dim && dim > 1 {
            format!("all {dim} features ({} … {})", names[start], names[end - 1])
        } else if run >= RUN {
            format!("{} … {} ({run} features)", names[start], names[end - 1])
        } else {
            for k in start..end {
                rows.push(
                    std::iter::once(names[k].clone())
                        .chain(rest[k].clone())
                        .collect(),
                );
            }
            start = end;
            continue;
        };
        rows.push(std::iter::once(name).chain(rest[start].clone()).collect());
        start = end;
    }
    Table { headers, rows }
}

#[cfg(test)]
mod tests {
    use super::significant;

    #[test]
    fn significant_digits_drop_rounding_noise() {
        assert_eq!(significant(0.1 * 3.0, 6), "0.3");
        assert_eq!(significant(2.0, 6), "2");
        assert_eq!(significant(0.000123456789, 3), "0.000123");
        assert_eq!(significant(0.0, 6), "0");
    }
}
