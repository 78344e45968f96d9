//! `ballast generate-demo --out DIR [--seed S]`: regenerate the bundled pump-fleet demo (data,
//! tolerance and requirement files under `DIR/demo-data/`).

use std::path::PathBuf;

use crate::demo::{files, generator, scenario};

/// Arguments of `ballast generate-demo`.
#[derive(Debug, clap::Args)]
#[command(after_help = "Example (regenerates the committed files): ballast generate-demo --out .")]
pub struct Args {
    /// Folder that receives `demo-data/`.
    #[arg(long)]
    pub out: PathBuf,
    /// Seed of the data generator.
    #[arg(long, default_value_t = scenario::DEFAULT_SEED)]
    pub seed: u64,
}

/// Runs `ballast generate-demo`.
pub fn run(args: Args) -> anyhow::Result<super::Outcome> {
    let data = generator::generate(args.seed);
    let written = files::write_data_files(&args.out.join("demo-data"), &data)?;
    for path in written {
        println!("wrote {}", path.display());
    }
    Ok(super::Outcome::Finished)
}
