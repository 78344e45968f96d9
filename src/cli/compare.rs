//! `ballast compare A.json B.json [--out DIR]`: the before/after table of two reports of the same data,
//! a short summary on stdout and, with `--out`, a sheet (Markdown + HTML). The exit code is the second
//! report's verdict (0 pass or no floor, 1 fail, 3 undecided), so a script can gate on the "after"
//! model; reports of different data are an input error (exit 2).

use std::path::PathBuf;

use crate::certify::compare::compare;
use crate::certify::report::Verdict;
use crate::sheet::compare_sheet::{overall_table, write_compare_sheet};

/// Arguments of `ballast compare`.
#[derive(Debug, clap::Args)]
#[command(
    after_help = "Example: ballast compare before/report.json after/report.json --out compare/\nExit code: the second report's verdict (0 pass or no floor, 1 fail, 3 undecided); 2 if the reports are not about the same data."
)]
pub struct Args {
    /// The first report ("before"; ballast.report/1 JSON).
    pub before: PathBuf,
    /// The second report ("after"), of the same data file.
    pub after: PathBuf,
    /// Also write sheet.md and sheet.html of the comparison into this folder (created if missing).
    #[arg(long, value_name = "DIR")]
    pub out: Option<PathBuf>,
}

/// Runs `ballast compare`.
pub fn run(args: Args) -> anyhow::Result<super::Outcome> {
    if let Some(out) = args.out.as_ref().filter(|o| o.exists() && !o.is_dir()) {
        anyhow::bail!("--out: {} exists and is not a folder", out.display());
    }
    let before = super::sheet::read_report(&args.before)?;
    let after = super::sheet::read_report(&args.after)?;
    let comparison = compare(&before, &after).map_err(|e| {
        anyhow::anyhow!(
            "{} and {}: {e}",
            args.before.display(),
            args.after.display()
        )
    })?;
    let table = overall_table(&comparison);
    println!(
        "{:<32} {:>10} {:>10} {:>12}",
        table.headers[0], table.headers[1], table.headers[2], table.headers[3]
    );
    for row in &table.rows {
        println!(
            "{:<32} {:>10} {:>10} {:>12}",
            row[0], row[1], row[2], row[3]
        );
    }
    if !comparison.same_requirement {
        println!("note: the two reports judged different requirements");
    }
    if let Some(out) = &args.out {
        let (md, html) = write_compare_sheet(&comparison, out)?;
        println!("wrote {}", md.display());
        println!("wrote {}", html.display());
    }
    Ok(match comparison.after.verdict {
        Verdict::Pass => super::Outcome::Met,
        Verdict::Fail => super::Outcome::NotMet,
        Verdict::Undecided => super::Outcome::Undecided,
        Verdict::None => super::Outcome::Finished,
    })
}
