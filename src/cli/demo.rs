//! `ballast demo [--out DIR] [--quick]`: the whole job on the bundled pump-fleet demo (the files are
//! embedded in the binary, so it works from any folder): for `pump-mlp` (twelve readings) and
//! `pump-cnn` (64-bin spectra), certify, retrain toward the floor, certify again, write the reports
//! and sheets, print a short summary with the paths.
//!
//! It exits 0 when every stage ran, whatever the verdicts; the verdicts are in the summary and reports.

use std::path::PathBuf;

use crate::demo::pipeline::{describe, run_demo, DemoOptions, QUICK_ROWS};

/// Arguments of `ballast demo`.
#[derive(Debug, clap::Args)]
#[command(
    after_help = "Example: ballast demo --out ballast-demo\n\nSee docs/demo-scenario.md for the scenario."
)]
pub struct Args {
    /// Folder for the demo files, models, reports and sheets (created if missing).
    #[arg(long, default_value = "ballast-demo")]
    pub out: PathBuf,
    /// Smoke test: only the first acceptance rows (see docs/demo-scenario.md), bounds only, a short retraining.
    #[arg(long)]
    pub quick: bool,
}

/// Runs `ballast demo`.
pub fn run(args: Args) -> anyhow::Result<super::Outcome> {
    if args.out.exists() && !args.out.is_dir() {
        anyhow::bail!("--out: {} exists and is not a folder", args.out.display());
    }
    let options = DemoOptions {
        out: args.out.clone(),
        quick: args.quick,
        command_line: std::env::args().collect(),
    };
    if args.quick {
        println!("quick mode: first {QUICK_ROWS} acceptance rows, bounds only, short retraining");
    }
    let outcome = run_demo(&options, &mut |line| println!("{line}"))?;
    println!();
    println!("summary ({} acceptance samples per model)", outcome.samples);
    for (form, case) in [
        ("twelve readings", &outcome.mlp),
        ("64-bin spectra", &outcome.cnn),
    ] {
        println!("  {form}");
        for (what, certified) in [
            ("bundled model  ", &case.before),
            ("retrained model", &case.after),
        ] {
            println!("    {what} {}", certified.model.display());
            println!("      {}", describe(&certified.summary));
            println!("      report {}", certified.report.display());
            println!("      sheet  {}", certified.sheet_html.display());
        }
    }
    Ok(super::Outcome::Finished)
}
