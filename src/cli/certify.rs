//! `ballast certify`: decide every sample, check the requirement's floor, write the report, the
//! counterexamples, the journal and optionally the sheet; exit with the verdict's code.
//!
//! Every argument is validated before any work starts, so a usage error writes nothing. SIGINT and
//! SIGTERM stop the run after the samples in progress: the journal keeps every finished sample, a
//! partial report marked `"complete": false` is written, and the exit code is 128 + the signal.

use std::path::{Path, PathBuf};
use std::sync::atomic::{AtomicBool, AtomicUsize, Ordering};
use std::sync::Arc;

use anyhow::{bail, Context};

use super::common::{load_data_counted, load_model, DataArgs, Epsilons, RequirementArgs};
use super::Outcome;
use crate::certify::journal::journal_path;
use crate::certify::lines::{judge_list, with_line_epsilons};
use crate::certify::progress::{ProgressMode, TerminalProgress};
use crate::certify::{
    certify_run, write_counterexamples, CertifyOptions, JournalOptions, PipelineOptions, Report,
    Shard, Sources, Verdict,
};

/// Arguments of `ballast certify`.
#[derive(Debug, clap::Args)]
#[command(
    allow_negative_numbers = true,
    after_help = "Examples:\n  ballast certify --model m.json --data acceptance.csv --eps 0.05 --floor 0.9 --report r.json --sheet sheet/\n  ballast certify --model m.json --data d.csv --eps tolerances.csv --forbid-into normal --floor 0.95\n  ballast certify --model m.json --data d.csv --eps 0.01,0.02,0.05 --radius --report sweep.json\n\nExit codes: 0 requirement met (or no floor and finished), 1 not met, 2 usage or input error, 3 undecided, 130/143 interrupted."
)]
pub struct Args {
    /// The model file (ballast.model/1 JSON, or ONNX).
    #[arg(long, help_heading = "Inputs")]
    pub model: PathBuf,
    /// The acceptance set (CSV with a label column).
    #[arg(long, help_heading = "Inputs")]
    pub data: PathBuf,
    /// Label column, input-range policy, size limits.
    #[command(flatten)]
    pub input: DataArgs,
    /// Budget, norm, floor, class-change rule, requirement file.
    #[command(flatten)]
    pub requirement: RequirementArgs,
    /// Required clean accuracy in [0, 1].
    #[arg(long, allow_hyphen_values = true, help_heading = "Requirement")]
    pub min_clean_accuracy: Option<f64>,
    /// Judge the floor by the one-sided Clopper–Pearson lower bound at this level (e.g. 0.95).
    #[arg(long, allow_hyphen_values = true, help_heading = "Requirement")]
    pub confidence: Option<f64>,
    /// Seconds of branch and bound per sample and epsilon (0 = bounds only).
    #[arg(
        long,
        default_value_t = 0.0,
        allow_hyphen_values = true,
        help_heading = "Search"
    )]
    pub budget: f64,
    /// Also compute each sample's certified radius (bisection with the sound bounds).
    #[arg(long, help_heading = "Search")]
    pub radius: bool,
    /// Seed of the attacks.
    #[arg(long, default_value_t = 0, help_heading = "Search")]
    pub seed: u64,
    /// Skip the quick attack.
    #[arg(long, help_heading = "Search")]
    pub no_attack: bool,
    /// Certify only the K-th of N disjoint slices of the samples (round robin by row index).
    #[arg(long, value_name = "K/N", help_heading = "Search")]
    pub shard: Option<String>,
    /// Continue from the journal beside --report.
    #[arg(long, help_heading = "Search")]
    pub resume: bool,
    /// Write the report here (JSON); the journal and counterexamples go beside it.
    #[arg(long, help_heading = "Output")]
    pub report: Option<PathBuf>,
    /// Also render the sheet (Markdown + HTML) into this folder.
    #[arg(long, help_heading = "Output")]
    pub sheet: Option<PathBuf>,
    /// Write the progress line (rate, estimated time left) to standard error even when it is not a
    /// terminal: one line every 10 s and one at the end (on a terminal it is always drawn).
    #[arg(long, help_heading = "Output")]
    pub progress: bool,
}

/// Parses `--shard K/N`.
pub fn parse_shard(text: &str) -> anyhow::Result<Shard> {
    let parts: Vec<&str> = text.split('/').collect();
    let parsed = if parts.len() == 2 {
        parts[0]
            .trim()
            .parse::<usize>()
            .ok()
            .zip(parts[1].trim().parse::<usize>().ok())
    } else {
        None
    };
    match parsed {
        Some((index, count)) if count >= 1 && (1..=count).contains(&index) => {
            Ok(Shard { index, count })
        }
        _ => bail!("--shard: \"{text}\" is not allowed, expected K/N with 1 ≤ K ≤ N (e.g. 2/4)"),
    }
}

/// The exit outcome of a verdict.
pub fn outcome_of(verdict: Verdict) -> Outcome {
    match verdict {
        Verdict::Pass => Outcome::Met,
        Verdict::Fail => Outcome::NotMet,
        Verdict::Undecided => Outcome::Undecided,
        Verdict::None => Outcome::Finished,
    }
}

/// The counterexample CSV beside a report: `R.json` → `R.counterexamples.csv`.
pub fn counterexample_path(report: &Path) -> PathBuf {
    let stem = report
        .file_stem()
        .map(|s| s.to_string_lossy().into_owned())
        .unwrap_or_else(|| "report".into());
    report.with_file_name(format!("{stem}.counterexamples.csv"))
}

/// Runs `ballast certify`.
pub fn run(args: Args) -> anyhow::Result<Outcome> {
    // Validate everything before any work or output.
    if !(args.budget.is_finite() && args.budget >= 0.0) {
        bail!(
            "--budget: {} is not allowed, expected seconds ≥ 0",
            args.budget
        );
    }
    if args.resume && args.report.is_none() {
        bail!("--resume needs --report (the journal lives beside the report)");
    }
    let shard = args.shard.as_deref().map(parse_shard).transpose()?;
    let model = load_model(&args.model, args.input.allow_large)?;
    let (data, range) = load_data_counted(&args.data, &model, &args.input)?;
    let (requirement, lines) =
        args.requirement
            .resolve_with_lines(&model, Epsilons::Sweep, |spec| {
                spec.min_clean_accuracy = args
                    .min_clean_accuracy
                    .map(|v| (v, "--min-clean-accuracy".to_string()));
                spec.confidence = args.confidence.map(|v| (v, "--confidence".to_string()));
            })?;
    let requirement = with_line_epsilons(&requirement, &lines);
    if !lines.is_empty() && shard.is_some() {
        bail!(
            "--shard: not available with a list of requirements (certify the whole set in one run)"
        );
    }
    if let Some(report) = &args.report {
        check_writable_folder(report)?;
        if args.resume && !journal_path(report).is_file() {
            bail!(
                "--resume: no journal at {} to continue from",
                journal_path(report).display()
            );
        }
    }
    let sources = Sources {
        data_range: Some(range),
        ..Sources::from_files(&args.model, &args.data)
            .context("reading inputs for their digests")?
    };
    let options = CertifyOptions {
        pipeline: PipelineOptions {
            budget_seconds: args.budget,
            seed: args.seed,
            radius: args.radius,
            attack: !args.no_attack,
            ..PipelineOptions::default()
        },
        shard,
        label_column: args.input.label_column.clone(),
        command_line: std::env::args().collect(),
    };
    let journal = args.report.as_ref().map(|r| JournalOptions {
        path: journal_path(r),
        resume: args.resume,
    });

    let cancel = Arc::new(AtomicBool::new(false));
    let signal = Arc::new(AtomicUsize::new(0));
    for s in [signal_hook::consts::SIGINT, signal_hook::consts::SIGTERM] {
        // A second signal while stopping ends the process at once.
        signal_hook::flag::register_conditional_shutdown(s, 128 + s, Arc::clone(&cancel))?;
        signal_hook::flag::register(s, Arc::clone(&cancel))?;
        signal_hook::flag::register_usize(s, Arc::clone(&signal), s as usize)?;
    }
    let progress = TerminalProgress::new(if args.progress {
        ProgressMode::Lines
    } else {
        ProgressMode::Terminal
    });
    let mut report = certify_run(
        &model,
        &data,
        &requirement,
        &sources,
        &options,
        journal.as_ref(),
        &progress,
        &cancel,
    )?;
    if !lines.is_empty() && report.complete && !cancel.load(Ordering::SeqCst) {
        judge_list(
            &mut report,
            &lines,
            &model,
            &data,
            &requirement,
            &sources,
            &options,
            &progress,
            &cancel,
        )?;
    }
    let interrupted = signal.load(Ordering::SeqCst);

    if let Some(path) = &args.report {
        if report.summary.counterexample > 0
            || report
                .samples
                .iter()
                .any(|s| s.sweep.iter().any(|o| o.counterexample.is_some()))
        {
            let csv = counterexample_path(path);
            write_counterexamples(&report, &csv)?;
            report.counterexamples = csv.file_name().map(|n| n.to_string_lossy().into_owned());
        }
        crate::atomic::write_file(path, report.to_json_string().as_bytes())
            .with_context(|| format!("writing {}", path.display()))?;
    }
    if let Some(folder) = &args.sheet {
        crate::sheet::write_sheet(&report, folder)?;
    }
    print_summary(&report);
    if interrupted != 0 || !report.complete {
        let s = if interrupted != 0 {
            interrupted as i32
        } else {
            signal_hook::consts::SIGINT
        };
        eprintln!(
            "interrupted: {} of {} samples finished; continue with --resume",
            report.samples.len(),
            report.data.samples
        );
        return Ok(Outcome::Interrupted(s));
    }
    Ok(outcome_of(report.summary.verdict))
}

fn check_writable_folder(path: &Path) -> anyhow::Result<()> {
    let folder = match path.parent() {
        Some(p) if !p.as_os_str().is_empty() => p,
        _ => Path::new("."),
    };
    if !folder.is_dir() {
        bail!("--report: the folder {} does not exist", folder.display());
    }
    Ok(())
}

/// Prints the summary lines of a report on standard output.
pub fn print_summary(report: &Report) {
    let s = &report.summary;
    println!("samples: {}", s.samples);
    println!("clean accuracy: {:.4}", s.clean_accuracy);
    println!(
        "certified accuracy (lower bound): {:.4}",
        s.certified_accuracy
    );
    println!(
        "empirical robust accuracy (upper bound): {:.4}",
        s.empirical_robust_accuracy
    );
    if let Some(l) = s.certified_lower_bound {
        println!("certified lower confidence bound: {l:.4}");
    }
    println!(
        "certified {}, counterexample {}, misclassified {}, unresolved {}",
        s.certified, s.counterexample, s.misclassified, s.unresolved
    );
    if s.not_run > 0 {
        println!("not run (counted as unresolved): {}", s.not_run);
    }
    if report.sweep.len() > 1 {
        for p in &report.sweep {
            println!(
                "  eps {}: certified {:.4}, empirical {:.4}, unresolved {}",
                p.epsilon,
                p.summary.certified_accuracy,
                p.summary.empirical_robust_accuracy,
                p.summary.unresolved
            );
        }
    }
    if let Some(f) = report.floor_epsilons {
        let shown = |e: Option<f64>| e.map_or("none".to_string(), |e| format!("{e}"));
        println!(
            "largest epsilon meeting the floor: proven {}, not refuted {}",
            shown(f.certified),
            shown(f.empirical)
        );
    }
    for l in &report.requirements {
        println!(
            "  {}: measured {:.4}, floor {:.4}: {}",
            l.requirement,
            l.measured,
            l.floor,
            l.verdict.name()
        );
    }
    println!("verdict: {}", s.verdict.name());
}
