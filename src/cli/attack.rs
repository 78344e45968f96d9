//! `ballast attack --model M --data D --eps E`: search for counterexamples with FGSM and PGD, print
//! clean and empirical robust accuracy, and write the counterexamples found as CSV. It takes the same
//! requirement flags as `certify` (budget or tolerance file, norm, floor, class-change rule,
//! requirement file; one epsilon); the work is [`crate::attack::survey::attack_data_set`].
//!
//! An attack can only refute a floor, never prove it: with a floor, an empirical robust accuracy below
//! the floor is "not met" (exit 1); otherwise the run is "undecided" (exit 3).

use std::path::PathBuf;

use anyhow::{bail, Context};

use super::common::{load_data, load_model, DataArgs, Epsilons, RequirementArgs};
use crate::attack::survey::{attack_data_set, counterexamples_csv};
use crate::attack::{AttackSettings, SearchPrecision};

/// Arguments of `ballast attack`.
#[derive(Debug, clap::Args)]
#[command(
    allow_negative_numbers = true,
    after_help = "Examples:\n  ballast attack --model m.json --data acceptance.csv --eps 0.05 --out counterexamples.csv\n  ballast attack --model m.json --data acceptance.csv --eps tolerances.csv --forbid-into normal --floor 0.95\n  ballast attack --model m.json --data acceptance.csv --requirement requirement.toml\n\nExit codes: 0 finished (no floor), 1 floor refuted, 2 usage or input error, 3 floor not refuted (an attack cannot prove it)."
)]
pub struct Args {
    /// The model file (ballast.model/1 JSON, or ONNX).
    #[arg(long, help_heading = "Inputs")]
    pub model: PathBuf,
    /// The labelled data (CSV).
    #[arg(long, help_heading = "Inputs")]
    pub data: PathBuf,
    /// Label column, input-range policy, size limits.
    #[command(flatten)]
    pub input: DataArgs,
    /// Budget, norm, floor, class-change rule, requirement file.
    #[command(flatten)]
    pub requirement: RequirementArgs,
    /// Gradient steps per PGD run.
    #[arg(long, default_value_t = 100, help_heading = "Attack")]
    pub steps: usize,
    /// Untargeted PGD runs per sample (the first from the sample, the others from random points).
    #[arg(long, default_value_t = 5, help_heading = "Attack")]
    pub restarts: usize,
    /// Only the untargeted PGD runs: no FGSM point first, no targeted run per other class when they
    /// fail (finds fewer counterexamples on some samples; the plain PGD-steps×restarts schedule).
    #[arg(long, help_heading = "Attack")]
    pub untargeted_only: bool,
    /// Seed of the random starts (per-sample seeds are derived from it).
    #[arg(long, default_value_t = 0, help_heading = "Attack")]
    pub seed: u64,
    /// Arithmetic of the search's forward and gradient passes: single (f32, faster) or double (f64).
    /// Every counterexample is confirmed by an f64 forward pass either way.
    #[arg(
        long,
        default_value = "single",
        value_name = "single|double",
        help_heading = "Attack"
    )]
    pub precision: String,
    /// Write the counterexamples found to this CSV file.
    #[arg(long, help_heading = "Output")]
    pub out: Option<PathBuf>,
}

/// Runs `ballast attack`.
pub fn run(args: Args) -> anyhow::Result<super::Outcome> {
    if args.steps == 0 {
        bail!("--steps: 0 is not allowed, expected at least 1 step");
    }
    let precision = match args.precision.as_str() {
        "single" => SearchPrecision::Single,
        "double" => SearchPrecision::Double,
        other => bail!("--precision: '{other}' is not allowed, expected single or double"),
    };
    if let Some(out) = &args.out {
        crate::atomic::check_writable(out)
            .map_err(|m| anyhow::anyhow!("--out: {}: {m}", out.display()))?;
    }
    let model = load_model(&args.model, args.input.allow_large)?;
    let requirement = args.requirement.resolve(&model, Epsilons::One, |_| {})?;
    let data = load_data(&args.data, &model, &args.input)?;
    let settings = AttackSettings {
        steps: args.steps,
        restarts: args.restarts,
        seed: args.seed,
        precision,
        fgsm_first: !args.untargeted_only,
        targeted: !args.untargeted_only,
        ..AttackSettings::default()
    };
    let summary = attack_data_set(&model, &data, &requirement, &settings)?;

    println!("samples: {}", summary.samples);
    println!(
        "requirement: {}",
        requirement.describe(&|c| model.class_name(c))
    );
    println!(
        "attack: PGD {} steps, {} restarts, seed {}, {} precision",
        settings.steps, settings.restarts, settings.seed, args.precision
    );
    println!("clean accuracy: {:.4}", summary.clean_accuracy());
    println!("misclassified: {}", summary.misclassified);
    if summary.nothing_forbidden > 0 {
        println!(
            "not attacked (no forbidden class for their class): {}",
            summary.nothing_forbidden
        );
    }
    println!("counterexamples: {}", summary.counterexamples.len());
    println!(
        "empirical robust accuracy: {:.4} (an upper bound)",
        summary.empirical_robust_accuracy()
    );
    if let Some(path) = &args.out {
        let bytes = counterexamples_csv(&model, &summary)
            .map_err(|e| anyhow::anyhow!("building the counterexamples CSV: {e}"))?;
        crate::atomic::write_file(path, &bytes)
            .with_context(|| format!("writing {}", path.display()))?;
        println!("counterexamples written to {}", path.display());
    }

    Ok(match requirement.floor {
        None => super::Outcome::Finished,
        Some(f) if summary.empirical_robust_accuracy() < f => {
            eprintln!(
                "requirement not met: empirical robust accuracy {:.4} is below the floor {f} (refuted by validated counterexamples)",
                summary.empirical_robust_accuracy()
            );
            super::Outcome::NotMet
        }
        Some(f) => {
            eprintln!(
                "undecided: empirical robust accuracy {:.4} is not below the floor {f}, but an attack can only refute a floor, never prove it (use `ballast certify`)",
                summary.empirical_robust_accuracy()
            );
            super::Outcome::Undecided
        }
    })
}
