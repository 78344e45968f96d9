//! `ballast generate-demo --out DIR [--seed S]`: regenerate the bundled pump-fleet demo: data,
//! tolerance and requirement files of both input forms under `DIR/demo-data/`, and the three models,
//! trained from scratch by the plain cross-entropy trainer, under `DIR/models/`.

use std::path::PathBuf;

use crate::cli::evaluate::evaluate;
use crate::demo::{files, generator, models, scenario};

/// Arguments of `ballast generate-demo`.
#[derive(Debug, clap::Args)]
#[command(after_help = "Example (regenerates the committed files): ballast generate-demo --out .")]
pub struct Args {
    /// Folder that receives `demo-data/` and `models/`.
    #[arg(long)]
    pub out: PathBuf,
    /// Seed of the data generator (and of the trainer).
    #[arg(long, default_value_t = scenario::DEFAULT_SEED)]
    pub seed: u64,
    /// Write the data files only; do not train the models.
    #[arg(long)]
    pub data_only: bool,
}

/// Runs `ballast generate-demo`.
pub fn run(args: Args) -> anyhow::Result<super::Outcome> {
    let data = generator::generate(args.seed);
    let written = files::write_data_files(&args.out.join("demo-data"), &data)?;
    for path in written {
        println!("wrote {}", path.display());
    }
    if args.data_only {
        return Ok(super::Outcome::Finished);
    }
    let folder = args.out.join("models");
    std::fs::create_dir_all(&folder).map_err(|e| anyhow::anyhow!("{}: {e}", folder.display()))?;
    let (linear, mlp) = models::train_demo_models(&data.train, args.seed)?;
    let cnn = models::train_cnn_model(&data.spectrum_train, args.seed, args.seed)?;
    let acceptance = data.acceptance.to_dataset();
    let spectrum_acceptance = data.spectrum_acceptance.to_dataset();
    for (file, trained, acceptance, acceptance_file) in [
        (
            models::LINEAR_FILE,
            &linear,
            &acceptance,
            files::ACCEPTANCE_FILE,
        ),
        (models::MLP_FILE, &mlp, &acceptance, files::ACCEPTANCE_FILE),
        (
            models::CNN_FILE,
            &cnn,
            &spectrum_acceptance,
            files::SPECTRUM_ACCEPTANCE_FILE,
        ),
    ] {
        let path = folder.join(file);
        trained.model.save(&path)?;
        let accuracy = evaluate(&trained.model, acceptance).accuracy;
        println!(
            "wrote {} ({} epochs, best {}, clean accuracy on {acceptance_file} {:.4})",
            path.display(),
            trained.log.epochs.len(),
            trained.log.best_epoch,
            accuracy
        );
    }
    Ok(super::Outcome::Finished)
}
