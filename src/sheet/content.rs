//! What a sheet says, independent of the output format: the verdict and why, the requirement in words,
//! the figures with their meaning, the tables, the plot data, the digests, the command line and the
//! cautions. Every string here is raw (unescaped); the renderers escape it. Nothing here formats markup.

pub use super::histogram::Histogram;
use crate::certify::report::{DecidedBy, Report, Verdict};

/// A table: headers and rows of cells.
#[derive(Debug, Clone, PartialEq)]
pub struct Table {
    /// Column headers.
    pub headers: Vec<String>,
    /// Rows of cells (same length as the headers).
    pub rows: Vec<Vec<String>>,
}

/// One headline figure.
#[derive(Debug, Clone, PartialEq)]
pub struct Figure {
    /// Its name.
    pub name: String,
    /// Its value, formatted.
    pub value: String,
    /// What it means.
    pub meaning: String,
}

/// The data of the accuracy-versus-epsilon plot.
#[derive(Debug, Clone, PartialEq)]
pub struct SweepPlot {
    /// Epsilon values (ascending).
    pub epsilons: Vec<f64>,
    /// Certified accuracy at each epsilon (lower bound).
    pub certified: Vec<f64>,
    /// Empirical robust accuracy at each epsilon (upper bound).
    pub empirical: Vec<f64>,
    /// The floor, if any.
    pub floor: Option<f64>,
}

/// Everything a sheet shows.
#[derive(Debug, Clone, PartialEq)]
pub struct SheetContent {
    /// The title.
    pub title: String,
    /// The verdict.
    pub verdict: Verdict,
    /// The verdict in one word or two.
    pub headline: String,
    /// Why, in a sentence.
    pub reason: String,
    /// Which rule decided.
    pub rule: String,
    /// A warning for an incomplete (interrupted) report.
    pub incomplete: Option<String>,
    /// The requirement in words.
    pub requirement: String,
    /// The norm, range, class-change rule, release rule and arithmetic, labelled.
    pub requirement_facts: Vec<(String, String)>,
    /// Each feature's unit, tolerance, radius at every epsilon and valid range.
    pub budget: Table,
    /// One row per line of a requirement list: requirement, measured, floor, verdict.
    pub requirement_lines: Option<Table>,
    /// For a model retrained by ballast: its lineage and which data decided what.
    pub lineage: Option<super::lineage::LineageContent>,
    /// The headline figures.
    pub figures: Vec<Figure>,
    /// Whether the figures are exact (nothing unresolved).
    pub exactness: String,
    /// Per-class figures.
    pub classes: Table,
    /// The sweep table (more than one epsilon).
    pub sweep_table: Option<Table>,
    /// The sweep plot data.
    pub sweep_plot: Option<SweepPlot>,
    /// How far the counterexamples moved each feature: the explanation, the table and the chart.
    pub fragility: Option<(String, Table, super::bars::BarChart)>,
    /// Margin or radius histogram.
    pub histogram: Option<Histogram>,
    /// Per-stage counts and times.
    pub stages: Table,
    /// Inputs and their digests.
    pub inputs: Vec<(String, String)>,
    /// The command line to reproduce the run (shell-quoted).
    pub command: String,
    /// The cautions.
    pub cautions: Vec<String>,
}

pub(super) fn percent(v: f64) -> String {
    format!("{:.2}%", v * 100.0)
}

fn optional_percent(v: Option<f64>) -> String {
    v.map(percent).unwrap_or_else(|| "–".into())
}

/// Builds the content of the sheet for `report`.
pub fn build(report: &Report) -> SheetContent {
    let s = &report.summary;
    let r = &report.requirement;
    let floor = r.floor;
    let headline = match s.verdict {
        Verdict::Pass => "PASS",
        Verdict::Fail => "FAIL",
        Verdict::Undecided => "UNDECIDED",
        Verdict::None => "NO FLOOR SET",
    }
    .to_string();
    let confidence = r
        .confidence
        .map(|c| format!("{:.0}%", c * 100.0))
        .unwrap_or_default();
    let reason = match (s.verdict, s.decided_by) {
        (_, DecidedBy::RequirementList) => {
            let count = |v: Verdict| report.requirements.iter().filter(|l| l.verdict == v).count();
            format!(
                "Of {} requirements, {} pass, {} fail and {} are undecided; the release needs every one.",
                report.requirements.len(),
                count(Verdict::Pass),
                count(Verdict::Fail),
                count(Verdict::Undecided)
            )
        }
        (Verdict::Pass, DecidedBy::ConfidenceBound) => format!(
            "The {confidence} lower confidence bound on the certified fraction, {}, is at least the floor {}.",
            optional_percent(s.certified_lower_bound),
            optional_percent(floor)
        ),
        (Verdict::Pass, DecidedBy::CleanAccuracy) => format!(
            "Clean accuracy {} meets the minimum {}; no floor was set.",
            percent(s.clean_accuracy),
            optional_percent(r.min_clean_accuracy)
        ),
        (Verdict::Pass, _) => format!(
            "{} of the samples are certified, at least the floor {}.",
            percent(s.certified_accuracy),
            optional_percent(floor)
        ),
        (Verdict::Fail, DecidedBy::CleanAccuracy) => format!(
            "Clean accuracy {} is below the required minimum {}.",
            percent(s.clean_accuracy),
            optional_percent(r.min_clean_accuracy)
        ),
        (Verdict::Fail, DecidedBy::ConfidenceBound) => format!(
            "Even if every unresolved sample were certified, the {confidence} lower confidence bound would stay below the floor {}.",
            optional_percent(floor)
        ),
        (Verdict::Fail, _) => format!(
            "The empirical robust accuracy {} (an upper bound) is below the floor {}: counterexamples and misclassified samples already rule it out.",
            percent(s.empirical_robust_accuracy),
            optional_percent(floor)
        ),
        (Verdict::Undecided, _) if s.not_run > 0 => format!(
            "{} of {} samples were not run (the run was interrupted), so the floor {} is neither proven nor refuted. Resume the run with --resume to decide them{}.",
            s.not_run,
            s.samples,
            optional_percent(floor),
            if s.unresolved > s.not_run {
                "; more search time (--budget) may decide the finished samples left unresolved"
            } else {
                ""
            }
        ),
        (Verdict::Undecided, _) => format!(
            "{} unresolved samples straddle the floor {}: certified {} is below it, empirical {} is not. More search time (--budget) may decide them.",
            s.unresolved,
            optional_percent(floor),
            percent(s.certified_accuracy),
            percent(s.empirical_robust_accuracy)
        ),
        (Verdict::None, _) => "No floor and no minimum clean accuracy were set: the sheet reports figures only.".into(),
    };
    let rule = match s.decided_by {
        DecidedBy::SampleFraction => "decided by the sample fraction (certified and empirical fractions of this acceptance set)",
        DecidedBy::ConfidenceBound => "decided by the one-sided Clopper–Pearson lower confidence bound",
        DecidedBy::CleanAccuracy => "decided by the clean accuracy",
        DecidedBy::NoRule => "no rule to decide",
        DecidedBy::RequirementList => "decided by every line of the requirement list (all must pass)",
    }
    .to_string();
    let finished = super::finished::Finished::of(report);
    let incomplete = finished.map(|f| {
        format!(
            "This report is INCOMPLETE: the run was interrupted after {} of {} samples. The figures and tables below are over the {} finished samples only; the verdict counts the {} samples not run as unresolved. Resume the run with --resume.",
            f.finished, f.planned, f.finished, s.not_run
        )
    });
    let (samples, clean, certified, empirical, unresolved) = match finished {
        Some(f) => (
            format!("{} of {} finished", f.finished, f.planned),
            f.clean_accuracy,
            f.certified_accuracy,
            f.empirical_robust_accuracy,
            f.unresolved,
        ),
        None => (
            s.samples.to_string(),
            s.clean_accuracy,
            s.certified_accuracy,
            s.empirical_robust_accuracy,
            s.unresolved,
        ),
    };
    let mut figures = vec![
        Figure {
            name: "Samples".into(),
            value: samples,
            meaning: "size of the acceptance set checked".into(),
        },
        Figure {
            name: "Clean accuracy".into(),
            value: percent(clean),
            meaning: "right without any perturbation".into(),
        },
        Figure {
            name: "Certified accuracy".into(),
            value: percent(certified),
            meaning: "LOWER bound on robust accuracy: a sound proof that no input within the budget changes the answer".into(),
        },
        Figure {
            name: "Empirical robust accuracy".into(),
            value: percent(empirical),
            meaning: "UPPER bound on robust accuracy: every sample not counted has a checked counterexample or is already wrong".into(),
        },
        Figure {
            name: "Unresolved".into(),
            value: unresolved.to_string(),
            meaning: "samples neither proven nor refuted within the time budget".into(),
        },
        Figure {
            name: "Counts".into(),
            value: format!("{} / {} / {}", s.certified, s.counterexample, s.misclassified),
            meaning: "certified / counterexample / misclassified; with the unresolved they add up to the samples".into(),
        },
    ];
    if finished.is_some() {
        figures.push(Figure {
            name: "Not run".into(),
            value: s.not_run.to_string(),
            meaning: "samples the interrupted run did not reach; in none of the figures above, open in the verdict".into(),
        });
    }
    if let Some(f) = report.floor_epsilons {
        let shown = |e: Option<f64>| e.map_or("none".to_string(), |e| format!("{e}"));
        figures.push(Figure {
            name: "Largest epsilon meeting the floor".into(),
            value: format!(
                "proven {}; not refuted {}",
                shown(f.certified),
                shown(f.empirical)
            ),
            meaning: "of the swept epsilons: the largest up to which the floor is proven at every one (sound bounds), and the largest up to which it is refuted at none (counterexamples); the true largest lies between the first and the swept epsilon after the second".into(),
        });
    }
    let (range_figures, range_cautions) = super::range_policy::range_notes(report);
    figures.extend(range_figures);
    if let Some(l) = s.certified_lower_bound {
        figures.push(Figure {
            name: format!("{confidence} lower confidence bound"),
            value: percent(l),
            meaning: "one-sided Clopper–Pearson bound on the certified fraction of the population the samples were drawn from (valid only if they are an independent draw)".into(),
        });
    }
    let exactness = if let Some(f) = finished {
        format!(
            "Over the {} finished samples the robust accuracy lies between {} and {}; the {} samples not run are in none of these figures.",
            f.finished,
            percent(f.certified_accuracy),
            percent(f.empirical_robust_accuracy),
            s.not_run
        )
    } else if s.exact {
        "Nothing is unresolved, so the two bounds coincide: the robust accuracy on these samples is exact.".to_string()
    } else {
        format!(
            "The robust accuracy on these samples lies between {} and {}.",
            percent(s.certified_accuracy),
            percent(s.empirical_robust_accuracy)
        )
    };
    let classes = Table {
        headers: [
            "class",
            "samples",
            "clean",
            "certified",
            "empirical",
            "counterexample",
            "unresolved",
        ]
        .map(String::from)
        .to_vec(),
        rows: report
            .per_class
            .iter()
            .map(|c| {
                vec![
                    c.name.clone(),
                    c.samples.to_string(),
                    optional_percent(c.clean_accuracy),
                    optional_percent(c.certified_accuracy),
                    optional_percent(c.empirical_robust_accuracy),
                    c.counterexample.to_string(),
                    c.unresolved.to_string(),
                ]
            })
            .collect(),
    };
    let (sweep_table, sweep_plot) = if report.sweep.len() > 1 {
        let table = Table {
            headers: ["epsilon", "certified", "empirical", "unresolved", "verdict"]
                .map(String::from)
                .to_vec(),
            rows: report
                .sweep
                .iter()
                .map(|p| {
                    vec![
                        format!("{}", p.epsilon),
                        percent(p.summary.certified_accuracy),
                        percent(p.summary.empirical_robust_accuracy),
                        p.summary.unresolved.to_string(),
                        p.summary.verdict.name().to_string(),
                    ]
                })
                .collect(),
        };
        let plot = SweepPlot {
            epsilons: report.sweep.iter().map(|p| p.epsilon).collect(),
            certified: report
                .sweep
                .iter()
                .map(|p| p.summary.certified_accuracy)
                .collect(),
            empirical: report
                .sweep
                .iter()
                .map(|p| p.summary.empirical_robust_accuracy)
                .collect(),
            floor,
        };
        (Some(table), Some(plot))
    } else {
        (None, None)
    };
    let histogram = super::histogram::histogram(report);
    let stages = Table {
        headers: [
            "stage",
            "certified",
            "refuted",
            "left unresolved",
            "seconds",
        ]
        .map(String::from)
        .to_vec(),
        rows: report
            .stages
            .iter()
            .map(|st| {
                vec![
                    st.stage.name().to_string(),
                    st.certified.to_string(),
                    st.refuted.to_string(),
                    st.unresolved.to_string(),
                    format!("{:.3}", st.seconds),
                ]
            })
            .collect(),
    };
    let mut inputs = vec![
        ("Model".to_string(), report.model.path.clone()),
        ("Model SHA-256".to_string(), report.model.sha256.clone()),
        ("Data".to_string(), report.data.path.clone()),
        ("Data SHA-256".to_string(), report.data.sha256.clone()),
        (
            "Samples in file".to_string(),
            match &report.data.out_of_range {
                Some(r) if !r.skipped.is_empty() => format!(
                    "{} of {} rows ({} left out by --out-of-range skip)",
                    report.data.rows,
                    r.rows_in_file,
                    r.skipped.len()
                ),
                _ => report.data.rows.to_string(),
            },
        ),
        (
            "Tool".to_string(),
            format!("{} {}", report.tool.name, report.tool.version),
        ),
        ("Date (UTC)".to_string(), report.date.clone()),
        (
            "Time budget per sample".to_string(),
            format!("{} s of branch and bound", report.settings.budget_seconds),
        ),
        (
            "Stages".to_string(),
            report
                .settings
                .stages
                .iter()
                .map(|s| s.name())
                .collect::<Vec<_>>()
                .join(" → "),
        ),
    ];
    if let Some(shard) = report.settings.shard {
        inputs.push((
            "Shard".into(),
            format!(
                "{}/{} (this sheet covers one slice only)",
                shard.index, shard.count
            ),
        ));
    }
    if let Some(c) = &report.counterexamples {
        inputs.push(("Counterexamples".into(), c.clone()));
    }
    let command = report
        .command_line
        .iter()
        .map(|w| super::escape::shell_word(w))
        .collect::<Vec<_>>()
        .join(" ");
    let budget = if report.requirement.tolerances.is_some() {
        format!(
            "epsilon {} times the stated per-feature tolerances",
            report.requirement.epsilon
        )
    } else {
        format!(
            "epsilon {} in the {} norm",
            report.requirement.epsilon, report.requirement.norm
        )
    };
    let mut cautions = vec![
        format!("A certificate covers only the stated budget ({budget}, inside the model's valid input range) and nothing beyond it."),
        "It covers only this model file (the SHA-256 above) and only these samples; any change to either voids it.".into(),
        "Certified and empirical figures describe this acceptance set. Statements about other inputs need the confidence bound, and that bound assumes the samples were drawn independently from the inputs met in service.".into(),
        "This sheet is no safety case. Robustness to small input changes is one piece of evidence; defer to the standards that apply to the system and to licensed engineering practice.".into(),
    ];
    cautions.splice(2..2, range_cautions);
    let lineage = super::lineage::lineage_content(report).map(|(content, caution)| {
        cautions.splice(2..2, caution);
        content
    });
    SheetContent {
        title: format!(
            "Robustness release sheet: {}",
            report
                .model
                .name
                .clone()
                .unwrap_or_else(|| report.model.path.clone())
        ),
        verdict: s.verdict,
        headline,
        reason,
        rule,
        incomplete,
        requirement: report.requirement.description.clone(),
        requirement_facts: super::requirement_facts::requirement_facts(report),
        budget: super::budget::budget_table(report),
        requirement_lines: super::requirement_lines::table(report),
        lineage,
        figures,
        exactness,
        classes,
        sweep_table,
        sweep_plot,
        fragility: report
            .counterexample_movement
            .as_ref()
            .map(super::fragility::fragility),
        histogram,
        stages,
        inputs,
        command,
        cautions,
    }
}
