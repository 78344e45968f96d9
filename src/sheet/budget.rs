//! The budget the sheet judged, feature by feature: with per-feature tolerances, a table of each
//! feature's tolerance and its radius (epsilon × tolerance) in the input's own units, at the epsilon the
//! verdict is stated at and, for a sweep, at every epsilon. It restates the report; it never widens or
//! narrows a radius (values are shown to 6 significant digits; the report keeps them exactly).

use super::content::Table;
use crate::certify::Report;

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

/// The per-feature budget table, or `None` for a uniform budget (then the requirement's sentence states
/// the one radius).
pub fn budget_table(report: &Report) -> Option<Table> {
    let r = &report.requirement;
    let tolerances = r.tolerances.as_ref()?;
    let mut epsilons = r.epsilons.clone();
    if epsilons.is_empty() {
        epsilons.push(r.epsilon);
    }
    let mut headers = vec!["feature".to_string(), "tolerance".to_string()];
    headers.extend(
        epsilons
            .iter()
            .map(|e| format!("radius at epsilon {}", significant(*e, 6))),
    );
    let rows = tolerances
        .names
        .iter()
        .zip(&tolerances.values)
        .map(|(name, &t)| {
            let mut row = vec![name.clone(), significant(t, 6)];
            row.extend(epsilons.iter().map(|e| significant(e * t, 6)));
            row
        })
        .collect();
    Some(Table { headers, rows })
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
