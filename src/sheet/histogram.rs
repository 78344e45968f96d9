//! The sheet's histogram: certified radii (with `--radius`) or certified margins, in bins of a nice
//! width (1, 2 or 5 times a power of ten, [`super::axis`]) starting at a multiple of the width at or
//! below 0, so every bin edge reads as a round number. Every finite value lands in exactly one bin.

use super::axis::{label, nice_number};
use crate::certify::report::{Report, Status};

/// A histogram.
#[derive(Debug, Clone, PartialEq)]
pub struct Histogram {
    /// What is counted.
    pub title: String,
    /// The x axis label.
    pub axis: String,
    /// Bin edges (`counts.len() + 1` values), multiples of the bin width.
    pub edges: Vec<f64>,
    /// Count per bin.
    pub counts: Vec<usize>,
}

/// Most bins used by the histogram.
const MAX_BINS: usize = 20;

/// Counts `values` (finite) in at most `MAX_BINS` bins of a nice width covering `[min(values, 0),
/// max(values)]`. A value on an inner edge goes to the bin above it.
pub fn bin(values: &[f64]) -> (Vec<f64>, Vec<usize>) {
    let low = values.iter().copied().fold(0.0, f64::min);
    let mut high = values.iter().copied().fold(f64::NEG_INFINITY, f64::max);
    if high <= low {
        high = low + 1.0;
    }
    let width = nice_number((high - low) / MAX_BINS as f64, false);
    let first = (low / width).floor() as i64;
    let bins = (((high / width).ceil() as i64 - first).max(1)) as usize;
    let edges: Vec<f64> = (0..=bins)
        .map(|k| {
            let v = (first + k as i64) as f64 * width;
            label(v, width).parse().unwrap_or(v)
        })
        .collect();
    let mut counts = vec![0usize; bins];
    for &v in values {
        // The edge lookup (not a division) keeps values on an edge in the bin above it.
        let k = edges[1..bins].partition_point(|e| *e <= v);
        counts[k] += 1;
    }
    (edges, counts)
}

/// The radius histogram when the report has radii, else the certified-margin histogram; `None` when
/// there is nothing to count.
pub fn histogram(report: &Report) -> Option<Histogram> {
    let radii: Vec<f64> = report
        .samples
        .iter()
        .filter_map(|s| s.radius)
        .filter(|r| r.is_finite())
        .collect();
    let (values, title, axis) = if !radii.is_empty() {
        (
            radii,
            "Certified radius per correctly classified sample",
            "largest epsilon proven by the sound bounds",
        )
    } else {
        let margins: Vec<f64> = report
            .samples
            .iter()
            .filter(|s| s.status == Status::Certified)
            .filter_map(|s| s.margin_lower)
            .filter(|m| m.is_finite())
            .collect();
        (
            margins,
            "Certified margin per certified sample",
            "sound lower bound on the logit margin over the budget",
        )
    };
    if values.is_empty() {
        return None;
    }
    let (edges, counts) = bin(&values);
    Some(Histogram {
        title: title.into(),
        axis: axis.into(),
        edges,
        counts,
    })
}

#[cfg(test)]
mod tests {
    use super::bin;

    #[test]
    fn bins_have_round_edges_and_count_every_value() {
        // Margins up to 17.0121: a width of 1 (17.0121 / 20 rounded up to a nice number) gives 18 bins.
        let values = [0.3, 1.0, 8.5061, 17.0121, 0.0];
        let (edges, counts) = bin(&values);
        assert_eq!(edges.len(), 19);
        assert_eq!(edges[0], 0.0);
        assert_eq!(edges[18], 18.0);
        assert_eq!(counts.iter().sum::<usize>(), values.len());
        assert_eq!(counts[0], 2); // 0.0 and 0.3
        assert_eq!(counts[1], 1); // 1.0 sits on an edge: the bin above it
        assert_eq!(counts[8], 1);
        assert_eq!(counts[17], 1);
        let (edges, counts) = bin(&[0.004, 0.0123]);
        assert!(edges.iter().all(|e| format!("{e}").len() <= 6), "{edges:?}");
        assert_eq!(counts.iter().sum::<usize>(), 2);
    }
}
