//! `ballast sheet --report R.json --out DIR`: re-renders the Markdown and HTML sheet from a saved report.

use std::path::PathBuf;

use anyhow::Context;

use crate::certify::Report;

/// Arguments of `ballast sheet`.
#[derive(Debug, clap::Args)]
#[command(after_help = "Example: ballast sheet --report report.json --out sheet/")]
pub struct Args {
    /// The report (ballast.report/1 JSON).
    #[arg(long)]
    pub report: PathBuf,
    /// The folder to write sheet.md and sheet.html into (created if missing).
    #[arg(long)]
    pub out: PathBuf,
}

/// Reads a report file with a clear error.
pub fn read_report(path: &std::path::Path) -> anyhow::Result<Report> {
    let text = crate::limits::read_text_file(path, crate::limits::MAX_DATA_FILE_BYTES)
        .with_context(|| format!("reading {}", path.display()))?;
    Report::from_json_str(&text).map_err(|e| anyhow::anyhow!("{}: {e}", path.display()))
}

/// Runs `ballast sheet`.
pub fn run(args: Args) -> anyhow::Result<super::Outcome> {
    let report = read_report(&args.report)?;
    let (md, html) = crate::sheet::write_sheet(&report, &args.out)?;
    println!("wrote {}", md.display());
    println!("wrote {}", html.display());
    Ok(super::Outcome::Finished)
}
