//! Merging shard reports (`--shard K/N`) into the report of one run over all samples.
//!
//! Every shard must come from the same model file, data file, requirement and settings (compared by
//! digest and value), the shards must be exactly 1..N of the same N, each complete, and no sample may
//! appear twice. The merged summary is recomputed from the per-sample results by the same rule as a
//! single run, so it is identical to the summary of an unsharded run. Nothing is re-certified here.

use super::journal::first_difference;
use super::report::Report;
use super::CertifyError;

/// Combines shard reports into one report (settings without a shard, samples by index).
pub fn merge(reports: &[Report]) -> Result<Report, CertifyError> {
    let Some(first) = reports.first() else {
        return Err(CertifyError::Mismatch("no reports to merge".into()));
    };
    let comparable = |r: &Report| {
        let mut settings = r.settings.clone();
        settings.shard = None;
        serde_json::json!({
            "model.sha256": r.model.sha256,
            "data.sha256": r.data.sha256,
            "data.rows": r.data.rows,
            "requirement": r.requirement,
            "settings": settings,
            "tool.version": r.tool.version,
        })
    };
    let expected = comparable(first);
    let count = match first.settings.shard {
        Some(s) => s.count,
        None => {
            return Err(CertifyError::Mismatch(
                "report 1 is not a shard report (no --shard in its settings)".into(),
            ))
        }
    };
    let mut seen = vec![false; count];
    for (n, r) in reports.iter().enumerate() {
        if let Some(d) = first_difference(&expected, &comparable(r), "") {
            return Err(CertifyError::Mismatch(format!(
                "report {} does not belong to the same run as report 1 ({d})",
                n + 1
            )));
        }
        let Some(s) = r.settings.shard else {
            return Err(CertifyError::Mismatch(format!(
                "report {} is not a shard report",
                n + 1
            )));
        };
        if s.count != count || s.index == 0 || s.index > count {
            return Err(CertifyError::Mismatch(format!(
                "report {} is shard {}/{}, expected a shard of {count}",
                n + 1,
                s.index,
                s.count
            )));
        }
        if seen[s.index - 1] {
            return Err(CertifyError::Mismatch(format!(
                "shard {}/{count} is given twice",
                s.index
            )));
        }
        seen[s.index - 1] = true;
        if !r.complete {
            return Err(CertifyError::Mismatch(format!(
                "report {} (shard {}/{count}) is incomplete; resume it first",
                n + 1,
                s.index
            )));
        }
    }
    if let Some(missing) = seen.iter().position(|s| !s) {
        return Err(CertifyError::Mismatch(format!(
            "shard {}/{count} is missing",
            missing + 1
        )));
    }
    let mut merged = first.clone();
    merged.settings.shard = None;
    merged.samples = reports
        .iter()
        .flat_map(|r| r.samples.iter().cloned())
        .collect();
    merged.samples.sort_by_key(|s| s.index);
    if let Some(w) = merged.samples.windows(2).find(|w| w[0].index == w[1].index) {
        return Err(CertifyError::Mismatch(format!(
            "sample {} appears in two shards",
            w[0].index
        )));
    }
    merged.data.samples = merged.data.rows;
    if merged.samples.len() != merged.data.rows {
        return Err(CertifyError::Mismatch(format!(
            "the shards hold {} samples, the data file has {}",
            merged.samples.len(),
            merged.data.rows
        )));
    }
    merged.seconds = reports.iter().map(|r| r.seconds).sum();
    merged.complete = true;
    merged.counterexamples = None;
    merged.date = super::report::utc_now();
    merged.recompute();
    let parts: Vec<_> = reports
        .iter()
        .filter_map(|r| r.counterexample_movement.as_ref())
        .collect();
    merged.counterexample_movement = super::perturbation::combine(&parts);
    Ok(merged)
}
