//! The `ballast.report/1` document: per-sample results ([`super::sample_record`]), the summary and the
//! verdict rule ([`super::decision`], re-exported here), per-class and per-stage figures, sweep
//! results, digests and settings.
//!
//! Guarantee: plain data serialised as documented in docs/report-format.md; the summary is a pure
//! function of the per-sample statuses and the requirement. Nothing here runs a model.

use std::collections::BTreeMap;

use serde::{Deserialize, Serialize};

use crate::threat::requirement::{Requirement, Tolerances};
use crate::threat::{Norm, Targets};

pub use super::decision::{decide, summarize, Counts, DecidedBy, Summary, Verdict};
pub use super::sample_record::{CounterexampleRecord, EpsilonOutcome, SampleRecord, Stage, Status};

/// The format tag of every report.
pub const REPORT_FORMAT: &str = "ballast.report/1";

/// The tool that wrote the report.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct ToolInfo {
    /// Always `ballast`.
    pub name: String,
    /// The crate version.
    pub version: String,
}

/// The model the report is about.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct ModelInfo {
    /// The file path as given (or `(in memory)`).
    pub path: String,
    /// SHA-256 of the file's bytes (of the model's JSON text when in memory).
    pub sha256: String,
    /// The model's name, if any.
    pub name: Option<String>,
    /// Class names (index order).
    pub classes: Vec<String>,
    /// Feature names (input order).
    pub features: Vec<String>,
    /// Number of weights and biases.
    pub parameters: usize,
    /// The arithmetic the certificates cover (`float64` or `float32`): margins are bounded for the
    /// model evaluated in it, in any order of summation. Absent in reports of earlier versions, which
    /// covered exact arithmetic up to a fixed tolerance.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub arithmetic: Option<String>,
    /// For a model retrained by ballast: its parent, settings, rounds and which data decided what
    /// (copied from the model's `provenance.retrain.lineage`).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub lineage: Option<crate::model::lineage::Lineage>,
    /// The valid input range and feature units (absent in reports of earlier versions).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub input: Option<super::input_record::InputRecord>,
}

/// The acceptance set the report is about.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct DataInfo {
    /// The file path as given (or `(in memory)`).
    pub path: String,
    /// SHA-256 of the file's bytes (of the features and labels when in memory).
    pub sha256: String,
    /// Samples covered by this report.
    pub samples: usize,
    /// Samples in the whole file (differs from `samples` for a shard); rows left out by
    /// `--out-of-range skip` are not counted (see `out_of_range`).
    pub rows: usize,
    /// What the input-range policy (`--out-of-range`) did while reading the file: the rows it set to
    /// the range's nearest end or left out, by row number in the file (header = row 1). Absent in
    /// reports of earlier versions and of data held in memory.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub out_of_range: Option<crate::data::RangeCounts>,
}

/// The requirement as recorded in the report.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct RequirementRecord {
    /// `linf` or `l2`.
    pub norm: Norm,
    /// The epsilon the verdict is stated at (the largest of a sweep; a scale with tolerances).
    pub epsilon: f64,
    /// All epsilons, ascending.
    pub epsilons: Vec<f64>,
    /// The floor, if any.
    pub floor: Option<f64>,
    /// Minimum clean accuracy, if any.
    pub min_clean_accuracy: Option<f64>,
    /// Confidence level of the lower bound, if any.
    pub confidence: Option<f64>,
    /// Per-feature tolerances (raw units), if any; radius = epsilon × tolerance.
    pub tolerances: Option<Tolerances>,
    /// Classes a sample must never move into (empty: any change counts).
    pub forbid_into: Vec<usize>,
    /// True classes the restriction applies to (absent: all).
    pub forbid_from: Option<Vec<usize>>,
    /// The requirement in words.
    pub description: String,
}

impl RequirementRecord {
    /// Records `requirement` (class names for the description from `class_name`).
    pub fn new(
        requirement: &Requirement,
        class_name: &dyn Fn(usize) -> String,
    ) -> RequirementRecord {
        let (forbid_into, forbid_from) = match &requirement.targets {
            Targets::Any => (Vec::new(), None),
            Targets::Into { classes, from } => (classes.clone(), from.clone()),
        };
        RequirementRecord {
            norm: requirement.norm,
            epsilon: requirement.epsilon(),
            epsilons: requirement.epsilons.clone(),
            floor: requirement.floor,
            min_clean_accuracy: requirement.min_clean_accuracy,
            confidence: requirement.confidence,
            tolerances: requirement.tolerances.clone(),
            forbid_into,
            forbid_from,
            description: requirement.describe(class_name),
        }
    }

    /// The requirement back from its record.
    pub fn requirement(&self) -> Requirement {
        Requirement {
            norm: self.norm,
            epsilons: self.epsilons.clone(),
            tolerances: self.tolerances.clone(),
            floor: self.floor,
            min_clean_accuracy: self.min_clean_accuracy,
            confidence: self.confidence,
            targets: if self.forbid_into.is_empty() {
                Targets::Any
            } else {
                Targets::Into {
                    classes: self.forbid_into.clone(),
                    from: self.forbid_from.clone(),
                }
            },
        }
    }
}

/// A slice of the samples: the `index`-th (1-based) of `count` disjoint slices.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
pub struct Shard {
    /// 1-based slice number.
    pub index: usize,
    /// Number of slices.
    pub count: usize,
}

impl Shard {
    /// True when sample `i` belongs to this slice (round robin: `i mod count == index − 1`).
    pub fn contains(&self, i: usize) -> bool {
        i % self.count == self.index - 1
    }
}

/// Every setting that influences per-sample results.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Settings {
    /// Seconds per sample for branch and bound (0 = bounds only).
    pub budget_seconds: f64,
    /// Seed of the attacks.
    pub seed: u64,
    /// Whether the certified radius was computed.
    pub radius: bool,
    /// The stages the pipeline ran, in order.
    pub stages: Vec<Stage>,
    /// The slice this report covers (absent: all samples).
    pub shard: Option<Shard>,
    /// Name of the label column read.
    pub label_column: String,
}

/// Per-class figures.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct ClassFigures {
    /// Class index.
    pub class: usize,
    /// Class name.
    pub name: String,
    /// Samples of this true class.
    pub samples: usize,
    /// Certified samples.
    pub certified: usize,
    /// Samples with a counterexample.
    pub counterexample: usize,
    /// Misclassified samples.
    pub misclassified: usize,
    /// Unresolved samples.
    pub unresolved: usize,
    /// Clean accuracy within the class (absent without samples).
    pub clean_accuracy: Option<f64>,
    /// Certified fraction within the class.
    pub certified_accuracy: Option<f64>,
    /// Empirical robust fraction within the class.
    pub empirical_robust_accuracy: Option<f64>,
}

/// Per-stage figures.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct StageFigures {
    /// The stage.
    pub stage: Stage,
    /// Samples it certified.
    pub certified: usize,
    /// Samples it refuted (counterexample or misclassified).
    pub refuted: usize,
    /// Samples left unresolved after it (it was the last stage tried).
    pub unresolved: usize,
    /// Seconds spent in it over all samples (varies between runs).
    pub seconds: f64,
}

/// Figures at one epsilon of a sweep.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct SweepPoint {
    /// The epsilon.
    pub epsilon: f64,
    /// The summary at this epsilon.
    pub summary: Summary,
}

/// A whole `ballast.report/1` document.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Report {
    /// Always [`REPORT_FORMAT`].
    pub format: String,
    /// The tool.
    pub tool: ToolInfo,
    /// UTC time the report was written (ISO 8601).
    pub date: String,
    /// False for a partial report of an interrupted run.
    pub complete: bool,
    /// The model.
    pub model: ModelInfo,
    /// The data.
    pub data: DataInfo,
    /// The requirement.
    pub requirement: RequirementRecord,
    /// The settings.
    pub settings: Settings,
    /// The command line that produced the report (for the sheet; not compared by merge or resume).
    pub command_line: Vec<String>,
    /// The summary at the requirement's epsilon.
    pub summary: Summary,
    /// Per-class figures at the requirement's epsilon.
    pub per_class: Vec<ClassFigures>,
    /// Per-stage figures at the requirement's epsilon.
    pub stages: Vec<StageFigures>,
    /// Figures per epsilon (one entry without a sweep).
    pub sweep: Vec<SweepPoint>,
    /// For a sweep with a floor: the largest swept epsilons that meet it, proven and not refuted.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub floor_epsilons: Option<super::floor_epsilon::FloorEpsilons>,
    /// How far the counterexamples moved each feature, in units of its radius (absent without any).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub counterexample_movement: Option<super::perturbation::CounterexampleMovement>,
    /// Total wall-clock seconds of the run (sum over merged shards).
    pub seconds: f64,
    /// File name of the counterexample CSV beside the report, if one was written.
    pub counterexamples: Option<String>,
    /// Each line's verdict when the requirement is a list (absent for a single requirement); the
    /// summary's verdict is then their conjunction.
    #[serde(default, skip_serializing_if = "Vec::is_empty")]
    pub requirements: Vec<super::lines::LineVerdict>,
    /// Per-sample results, by index.
    pub samples: Vec<SampleRecord>,
}

impl Report {
    /// Fills `summary`, `per_class`, `stages` and `sweep` from `samples` (total = `data.samples`).
    pub fn recompute(&mut self) {
        let requirement = self.requirement.requirement();
        let total = self.data.samples;
        let counts = Counts::from_statuses(self.samples.iter().map(|s| s.status), total);
        self.summary = summarize(&counts, &requirement);
        if !self.requirements.is_empty() {
            self.summary.verdict =
                super::lines::conjunction(self.requirements.iter().map(|l| &l.verdict));
            self.summary.decided_by = DecidedBy::RequirementList;
        }
        self.sweep = (0..requirement.epsilons.len())
            .map(|k| {
                let counts =
                    Counts::from_statuses(self.samples.iter().map(|s| s.status_at(k)), total);
                SweepPoint {
                    epsilon: requirement.epsilons[k],
                    summary: summarize(&counts, &requirement),
                }
            })
            .collect();
        self.floor_epsilons = super::floor_epsilon::floor_epsilons(&self.sweep, requirement.floor);
        self.per_class = (0..self.model.classes.len())
            .map(|c| {
                let of: Vec<&SampleRecord> = self.samples.iter().filter(|s| s.label == c).collect();
                let n = of.len();
                let count = |st: Status| of.iter().filter(|s| s.status == st).count();
                let (cert, cex, mis, unr) = (
                    count(Status::Certified),
                    count(Status::Counterexample),
                    count(Status::Misclassified),
                    count(Status::Unresolved),
                );
                let frac = |k: usize| {
                    if n == 0 {
                        None
                    } else {
                        Some(k as f64 / n as f64)
                    }
                };
                ClassFigures {
                    class: c,
                    name: self.model.classes[c].clone(),
                    samples: n,
                    certified: cert,
                    counterexample: cex,
                    misclassified: mis,
                    unresolved: unr,
                    clean_accuracy: frac(n - mis),
                    certified_accuracy: frac(cert),
                    empirical_robust_accuracy: frac(n - mis - cex),
                }
            })
            .collect();
        let mut stages: BTreeMap<Stage, StageFigures> = BTreeMap::new();
        for s in &self.samples {
            for (stage, seconds) in &s.stage_seconds {
                stages
                    .entry(*stage)
                    .or_insert_with(|| StageFigures::empty(*stage))
                    .seconds += seconds;
            }
            let entry = stages
                .entry(s.stage)
                .or_insert_with(|| StageFigures::empty(s.stage));
            match s.status {
                Status::Certified => entry.certified += 1,
                Status::Counterexample | Status::Misclassified => entry.refuted += 1,
                Status::Unresolved => entry.unresolved += 1,
            }
        }
        self.stages = stages.into_values().collect();
    }

    /// The report as pretty JSON text (with a final newline).
    pub fn to_json_string(&self) -> String {
        let mut text = serde_json::to_string_pretty(self).expect("a report always serialises");
        text.push('\n');
        text
    }

    /// Parses a report, checking the format tag.
    pub fn from_json_str(text: &str) -> Result<Report, String> {
        let value: serde_json::Value = serde_json::from_str(text).map_err(|e| e.to_string())?;
        match value.get("format").and_then(|f| f.as_str()) {
            Some(REPORT_FORMAT) => {}
            Some(other) => return Err(format!("format \"{other}\" is not {REPORT_FORMAT}")),
            None => return Err(format!("no \"format\" key, expected \"{REPORT_FORMAT}\"")),
        }
        serde_json::from_value(value).map_err(|e| e.to_string())
    }

    /// The summary alone as JSON text (what shard merging must reproduce byte for byte).
    pub fn summary_json(&self) -> String {
        serde_json::to_string_pretty(&self.summary).expect("a summary always serialises")
    }
}

impl StageFigures {
    fn empty(stage: Stage) -> StageFigures {
        StageFigures {
            stage,
            certified: 0,
            refuted: 0,
            unresolved: 0,
            seconds: 0.0,
        }
    }
}

/// The current UTC time as ISO 8601 (`2026-01-31T12:00:00Z`), from the system clock.
pub fn utc_now() -> String {
    let seconds = std::time::SystemTime::now()
        .duration_since(std::time::UNIX_EPOCH)
        .map(|d| d.as_secs() as i64)
        .unwrap_or(0);
    format_utc(seconds)
}

/// Formats seconds since the Unix epoch as ISO 8601 UTC. Civil-from-days conversion after
/// H. Hinnant, "chrono-Compatible Low-Level Date Algorithms" (2013).
pub fn format_utc(seconds: i64) -> String {
    let days = seconds.div_euclid(86_400);
    let rest = seconds.rem_euclid(86_400);
    let z = days + 719_468;
    let era = z.div_euclid(146_097);
    let doe = z - era * 146_097;
    let yoe = (doe - doe / 1460 + doe / 36_524 - doe / 146_096) / 365;
    let doy = doe - (365 * yoe + yoe / 4 - yoe / 100);
    let mp = (5 * doy + 2) / 153;
    let day = doy - (153 * mp + 2) / 5 + 1;
    let month = if mp < 10 { mp + 3 } else { mp - 9 };
    let year = yoe + era * 400 + if month <= 2 { 1 } else { 0 };
    format!(
        "{year:04}-{month:02}-{day:02}T{:02}:{:02}:{:02}Z",
        rest / 3600,
        (rest % 3600) / 60,
        rest % 60
    )
}

#[cfg(test)]
mod tests {
    use super::*;

    fn requirement(floor: Option<f64>, confidence: Option<f64>) -> Requirement {
        Requirement {
            floor,
            confidence,
            ..Requirement::uniform(Norm::Linf, 0.1)
        }
    }

    fn counts(
        certified: usize,
        counterexample: usize,
        misclassified: usize,
        unresolved: usize,
    ) -> Counts {
        let statuses = std::iter::repeat_n(Status::Certified, certified)
            .chain(std::iter::repeat_n(Status::Counterexample, counterexample))
            .chain(std::iter::repeat_n(Status::Misclassified, misclassified))
            .chain(std::iter::repeat_n(Status::Unresolved, unresolved));
        Counts::from_statuses(
            statuses,
            certified + counterexample + misclassified + unresolved,
        )
    }

    #[test]
    fn verdict_follows_the_floor() {
        let c = counts(80, 10, 5, 5); // certified 0.80, empirical 0.85
        assert_eq!(decide(&c, &requirement(Some(0.8), None)).0, Verdict::Pass);
        assert_eq!(
            decide(&c, &requirement(Some(0.82), None)).0,
            Verdict::Undecided
        );
        assert_eq!(
            decide(&c, &requirement(Some(0.85), None)).0,
            Verdict::Undecided
        );
        assert_eq!(decide(&c, &requirement(Some(0.86), None)).0, Verdict::Fail);
        assert_eq!(decide(&c, &requirement(None, None)).0, Verdict::None);
        let exact = counts(80, 15, 5, 0);
        assert_eq!(
            decide(&exact, &requirement(Some(0.81), None)).0,
            Verdict::Fail
        );
    }

    #[test]
    fn confidence_bound_is_stricter() {
        let c = counts(100, 0, 0, 0);
        let (v, by, lower) = decide(&c, &requirement(Some(0.98), Some(0.95)));
        assert_eq!((v, by), (Verdict::Fail, DecidedBy::ConfidenceBound));
        approx::assert_abs_diff_eq!(lower.unwrap(), 0.05f64.powf(0.01), epsilon = 1e-12);
        assert_eq!(
            decide(&c, &requirement(Some(0.97), Some(0.95))).0,
            Verdict::Pass
        );
    }

    #[test]
    fn dates_format() {
        assert_eq!(format_utc(0), "1970-01-01T00:00:00Z");
        // 2000-03-01 00:00:00 UTC = 951868800 (common practice: Unix time tables).
        assert_eq!(format_utc(951_868_800), "2000-03-01T00:00:00Z");
    }
}
