//! `ballast attack --model M --data D --eps E`: search for counterexamples with FGSM and PGD, print
//! clean and empirical robust accuracy, and write the counterexamples found as CSV.
//!
//! An attack can only refute a floor, never prove it: with `--floor`, an empirical robust accuracy below
//! the floor is "not met" (exit 1); otherwise the run is "undecided" (exit 3).

use std::path::{Path, PathBuf};

use anyhow::{bail, Context};

use crate::attack::{
    attack_batch, AttackOutcome, AttackProblem, AttackSettings, Counterexample, SearchPrecision,
};
use crate::model::{predicted_class, Model};
use crate::threat::Targets;

/// Arguments of `ballast attack`.
#[derive(Debug, clap::Args)]
#[command(
    allow_negative_numbers = true,
    after_help = "Example: ballast attack --model tests/data/digits_mlp.model.json --data tests/data/digits_test.csv --eps 0.05 --out counterexamples.csv"
)]
pub struct Args {
    /// The model file.
    #[arg(long)]
    pub model: PathBuf,
    /// The labelled data (CSV).
    #[arg(long)]
    pub data: PathBuf,
    /// Perturbation radius for every feature, in raw input units.
    #[arg(long, allow_hyphen_values = true)]
    pub eps: String,
    /// Norm of the perturbation ball: linf or l2.
    #[arg(long, default_value = "linf")]
    pub norm: String,
    /// Gradient steps per PGD run.
    #[arg(long, default_value_t = 100)]
    pub steps: usize,
    /// Untargeted PGD runs per sample (the first from the sample, the others from random points).
    #[arg(long, default_value_t = 5)]
    pub restarts: usize,
    /// Seed of the random starts (per-sample seeds are derived from it).
    #[arg(long, default_value_t = 0)]
    pub seed: u64,
    /// Arithmetic of the search's forward and gradient passes: single (f32, faster) or double (f64).
    /// Every counterexample is confirmed by an f64 forward pass either way.
    #[arg(long, default_value = "single")]
    pub precision: String,
    /// Write the counterexamples found to this CSV file.
    #[arg(long)]
    pub out: Option<PathBuf>,
    /// Required fraction of samples that keep their answer (an attack can only refute it).
    #[arg(long, allow_hyphen_values = true)]
    pub floor: Option<f64>,
    /// Name of the label column.
    #[arg(long, default_value = "label")]
    pub label_column: String,
    /// Values outside the model's input range: error, clip (to the nearest end) or skip (the row).
    /// Values within a few units in the last place of an end count as on it.
    #[arg(long, default_value = "error", value_name = "error|clip|skip")]
    pub out_of_range: String,
    /// Accept inputs above the size limits.
    #[arg(long)]
    pub allow_large: bool,
}

/// Counts of one attack run over a data set.
#[derive(Debug, Clone, PartialEq)]
pub struct AttackSummary {
    /// Number of samples.
    pub samples: usize,
    /// Samples already misclassified without perturbation (not attacked).
    pub misclassified: usize,
    /// `(sample index, label, counterexample)` for every sample where one was found.
    pub counterexamples: Vec<(usize, usize, Counterexample)>,
}

impl AttackSummary {
    /// Fraction of samples predicted correctly without perturbation.
    pub fn clean_accuracy(&self) -> f64 {
        (self.samples - self.misclassified) as f64 / self.samples as f64
    }

    /// `1 − (misclassified + counterexamples) / samples`: an upper bound on robust accuracy.
    pub fn empirical_robust_accuracy(&self) -> f64 {
        1.0 - (self.misclassified + self.counterexamples.len()) as f64 / self.samples as f64
    }
}

/// Runs `ballast attack`.
pub fn run(args: Args) -> anyhow::Result<super::Outcome> {
    let floor = super::common::check_floor(args.floor)?;
    if args.steps == 0 {
        bail!("--steps: 0 is not allowed, expected at least 1 step");
    }
    let precision = match args.precision.as_str() {
        "single" => SearchPrecision::Single,
        "double" => SearchPrecision::Double,
        other => bail!("--precision: '{other}' is not allowed, expected single or double"),
    };
    let model = super::common::load_model(&args.model, args.allow_large)?;
    let budget = super::common::uniform_budget(&args.eps, &args.norm, &model)?;
    let data = super::common::load_data(
        &args.data,
        &model,
        &args.label_column,
        &args.out_of_range,
        args.allow_large,
    )?;
    let settings = AttackSettings {
        steps: args.steps,
        restarts: args.restarts,
        seed: args.seed,
        precision,
        ..AttackSettings::default()
    };

    let network = model.classifier();
    let classes = model.class_count();
    let clean = network.forward_batch(&data.features);
    let mut misclassified = 0;
    let mut problems = Vec::new();
    for (i, &label) in data.labels.iter().enumerate() {
        if predicted_class(clean.column(i).as_slice()) != label {
            misclassified += 1;
            continue;
        }
        problems.push(AttackProblem {
            index: i,
            region: budget.region(data.sample(i), &model.input.lower, &model.input.upper),
            label,
            forbidden: Targets::Any.forbidden_for(label, classes),
            extra_starts: Vec::new(),
        });
    }
    let outcomes = attack_batch(&network, &problems, &settings)?;
    let counterexamples: Vec<(usize, usize, Counterexample)> = problems
        .iter()
        .zip(outcomes)
        .filter_map(|(p, outcome)| match outcome {
            AttackOutcome::Found(c) => Some((p.index, p.label, c)),
            AttackOutcome::NotFound { .. } => None,
        })
        .collect();
    let summary = AttackSummary {
        samples: data.len(),
        misclassified,
        counterexamples,
    };

    println!("samples: {}", summary.samples);
    println!(
        "budget: {} eps {} (PGD {} steps, {} restarts, seed {}, {} precision)",
        budget.norm, args.eps, settings.steps, settings.restarts, settings.seed, args.precision
    );
    println!("clean accuracy: {:.4}", summary.clean_accuracy());
    println!("misclassified: {}", summary.misclassified);
    println!("counterexamples: {}", summary.counterexamples.len());
    println!(
        "empirical robust accuracy: {:.4} (an upper bound)",
        summary.empirical_robust_accuracy()
    );
    if let Some(path) = &args.out {
        write_counterexamples(path, &model, &summary)?;
        println!("counterexamples written to {}", path.display());
    }

    Ok(match floor {
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

/// Writes the counterexamples CSV atomically: `sample,label,new_class,distance`, then one column per
/// feature (named by [`Model::feature_name`]). Classes are written by name ([`Model::class_name`]),
/// numbers in shortest round-trip form.
pub fn write_counterexamples(
    path: &Path,
    model: &Model,
    summary: &AttackSummary,
) -> anyhow::Result<()> {
    let mut writer = csv::Writer::from_writer(Vec::new());
    let mut header = vec![
        "sample".to_string(),
        "label".to_string(),
        "new_class".to_string(),
        "distance".to_string(),
    ];
    header.extend((0..model.input.dim).map(|i| model.feature_name(i)));
    writer.write_record(&header)?;
    for (index, label, c) in &summary.counterexamples {
        let mut record = vec![
            index.to_string(),
            model.class_name(*label),
            model.class_name(c.predicted),
            c.distance.to_string(),
        ];
        record.extend(c.input.iter().map(|v| v.to_string()));
        writer.write_record(&record)?;
    }
    let bytes = writer
        .into_inner()
        .map_err(|e| anyhow::anyhow!("building the counterexamples CSV: {e}"))?;
    crate::atomic::write_file(path, &bytes).with_context(|| format!("writing {}", path.display()))
}
