//! `ballast merge R1.json R2.json ... --out R.json`: combines the reports of `--shard K/N` runs into the
//! report of one run (checking they share model, data, requirement and settings) and exits with the
//! merged verdict's code.

use std::path::PathBuf;

use anyhow::Context;

use super::certify::{outcome_of, print_summary};
use super::sheet::read_report;

/// Arguments of `ballast merge`.
#[derive(Debug, clap::Args)]
#[command(
    after_help = "Example: ballast merge shard-1.json shard-2.json shard-3.json --out report.json --sheet sheet/"
)]
pub struct Args {
    /// The shard reports (all N of them, any order).
    #[arg(required = true)]
    pub reports: Vec<PathBuf>,
    /// Write the merged report here.
    #[arg(long)]
    pub out: PathBuf,
    /// Also render the sheet into this folder.
    #[arg(long)]
    pub sheet: Option<PathBuf>,
}

/// Runs `ballast merge`.
pub fn run(args: Args) -> anyhow::Result<super::Outcome> {
    let mut reports = Vec::with_capacity(args.reports.len());
    for p in &args.reports {
        reports.push(read_report(p)?);
    }
    let mut merged = crate::certify::merge::merge(&reports)?;
    merged.command_line = std::env::args().collect();
    let has_counterexamples = merged
        .samples
        .iter()
        .any(|s| s.counterexample.is_some() || s.sweep.iter().any(|o| o.counterexample.is_some()));
    if has_counterexamples {
        let csv = super::certify::counterexample_path(&args.out);
        crate::certify::write_counterexamples(&merged, &csv)?;
        merged.counterexamples = csv.file_name().map(|n| n.to_string_lossy().into_owned());
    }
    crate::atomic::write_file(&args.out, merged.to_json_string().as_bytes())
        .with_context(|| format!("writing {}", args.out.display()))?;
    if let Some(folder) = &args.sheet {
        crate::sheet::write_sheet(&merged, folder)?;
    }
    print_summary(&merged);
    Ok(outcome_of(merged.summary.verdict))
}
