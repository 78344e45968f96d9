//! `ballast retrain`: constrained (primal-dual) retraining toward a certified floor or a requirement
//! list (one constraint per line), then an honest check with the certify pipeline. Writes the model
//! (atomically, with provenance), a log CSV and a small sheet (Markdown + SVG curves) in a folder
//! beside the model. Exit 0 when the floor (every line of a list) is proven on the acceptance data, 1
//! when it is not.

use std::path::{Path, PathBuf};

use anyhow::{bail, Context};

use super::common::{load_data, load_model, Epsilons};
pub use super::retrain_args::Args;
use super::retrain_args::{check, Checked};
use super::retrain_sheet::sheet_markdown;
pub use super::retrain_sheet::{checks_csv, log_csv};
use super::Outcome;
use crate::certify::lines::LineVerdict;
use crate::certify::PipelineOptions;
use crate::threat::requirement::RequirementLine;
use crate::train::confidence::{self, ConfidenceSettings};
use crate::train::constrained::{ConstrainedEpoch, ConstrainedSettings, Formulation};
use crate::train::lineage::{lineage, DataSource, RetrainData};
use crate::train::plain::split_validation;
use crate::train::provenance::{final_prices, retrain_provenance, ProvenanceInputs};
use crate::train::retrain::{retrain, NearMisses, RetrainSettings, RetrainVerdict};
use crate::train::{new_mlp, OptimizerKind, TrainSettings};

/// The folder beside `out` that receives the log and the sheet: `m2.json` → `m2.retrain/`.
pub fn sheet_folder(out: &Path) -> PathBuf {
    let stem = out
        .file_stem()
        .map(|s| s.to_string_lossy().into_owned())
        .unwrap_or_else(|| "model".into());
    out.with_file_name(format!("{stem}.retrain"))
}

/// Checks, before any training, that the model can be written at `out` and the log and sheet in the
/// folder beside it.
fn check_outputs(out: &Path) -> anyhow::Result<()> {
    crate::atomic::check_writable(out)
        .map_err(|m| anyhow::anyhow!("--out: {}: {m}", out.display()))?;
    let folder = sheet_folder(out);
    if folder.exists() && !folder.is_dir() {
        bail!(
            "--out: {} is a file, but the log and sheet go into a folder of that name",
            folder.display()
        );
    }
    Ok(())
}

/// Runs `ballast retrain`.
pub fn run(mut args: Args) -> anyhow::Result<Outcome> {
    let Checked {
        loss,
        constraint,
        keep,
        hidden,
    } = check(&mut args)?;
    let Some(model_path) = args.model.clone() else {
        bail!("--model: missing; retrain fine-tunes a model and a requirement file names none: give --model M.json (with --hidden it supplies only the input range, feature names and classes)");
    };
    check_outputs(&args.out)?;

    let parent = load_model(&model_path, args.input.allow_large)?;
    let (requirement, lines) =
        args.requirement
            .resolve_with_lines(&parent, Epsilons::One, |spec| {
                spec.confidence = args.confidence.map(|c| (c, "--confidence".to_string()));
            })?;
    let floor = match requirement.floor {
        Some(floor) => floor,
        None if !lines.is_empty() => {
            if args.constraint != "error" || args.per_class {
                bail!("--constraint / --per-class: a requirement list gives one constraint per line; leave these at their defaults");
            }
            lowest_floor(&lines)
        }
        None => bail!(
            "--floor: retraining needs a floor (give --floor or a requirement file with floor)"
        ),
    };
    let parent_sha256 = crate::digest::sha256_file(&model_path)
        .with_context(|| format!("{}: reading for the digest", model_path.display()))?;
    let train_all = load_data(&args.train, &parent, &args.input)?;
    let (train, validation) = match &args.val {
        Some(p) => (train_all, load_data(p, &parent, &args.input)?),
        None => {
            let (t, v) = split_validation(&train_all, 0.2, args.seed);
            match v {
                Some(v) => (t, v),
                None => bail!("--train: too few rows to hold out validation data; give --val"),
            }
        }
    };
    let acceptance = match &args.acceptance {
        Some(p) => load_data(p, &parent, &args.input)?,
        None => validation.clone(),
    };

    let confidence = ConfidenceSettings {
        acceptance_size: args.acceptance_size,
        pass_probability: args.pass_probability,
    };
    if requirement.confidence.is_none()
        && (args.acceptance_size.is_some() || args.pass_probability.is_some())
    {
        bail!("--acceptance-size / --pass-probability: only used with --confidence (or confidence in the requirement file)");
    }
    if requirement.confidence.is_some()
        && args.acceptance.is_none()
        && args.acceptance_size.is_none()
    {
        bail!("--confidence: the reviewer's check needs the acceptance set: give --acceptance FILE, or --acceptance-size N when the set stays with the reviewer (the validation data cannot stand in for it)");
    }

    let initial = match &hidden {
        Some(h) => {
            let mut m = new_mlp(&parent.input, parent.class_count(), h, &train, args.seed)?;
            m.name = parent.name.clone();
            m.classes = parent.classes.clone();
            m
        }
        None => parent.clone(),
    };
    let formulation = match args.penalty {
        Some(weight) => Formulation::Penalty { weight },
        None => Formulation::PrimalDual {
            dual_step: args.dual_step,
            initial_multiplier: 0.0,
            per_class: args.per_class,
        },
    };
    let train_settings = TrainSettings {
        epochs: args.epochs,
        batch_size: args.batch_size,
        optimizer: OptimizerKind::adam(args.learning_rate),
        weight_decay: 0.0,
        seed: args.seed,
        validation_fraction: 0.0,
        patience: None,
    };
    let settings = RetrainSettings {
        lines: lines.clone(),
        constrained: ConstrainedSettings {
            train: train_settings,
            budget: requirement.budget(requirement.epsilon(), parent.input.dim),
            targets: requirement.targets.clone(),
            loss,
            constraint,
            terms: Vec::new(),
            relax: args.relax,
            formulation,
            ramp_epochs: args.ramp_epochs.unwrap_or((args.epochs * 2) / 5),
            measure_certified: true,
            gap_correction: true,
            checks_per_epoch: args.checks_per_epoch,
            final_rate_factor: args.final_rate,
            average_tail: args.average_tail,
        },
        round_epochs: args.round_epochs.unwrap_or((args.epochs / 2).max(1)),
        max_rounds: args.max_rounds,
        slack_step: args.slack_step,
        pipeline: PipelineOptions {
            seed: args.seed,
            ..PipelineOptions::default()
        },
        keep,
        near_misses: NearMisses {
            margin: args.near_miss,
            tries: args.near_miss_tries,
        },
        confidence,
    };
    let mut print_epoch = |e: &ConstrainedEpoch| {
        eprintln!(
            "epoch {:>3}  eps×{:.2}  clean loss {:.4}  robust loss {:.4}  λ {:.3}  val clean {:.3}  val certified {:.3}",
            e.epoch,
            e.epsilon_scale,
            e.clean_loss,
            e.robust_loss,
            e.multipliers.iter().copied().fold(0.0, f64::max),
            e.validation_clean_accuracy.unwrap_or(f64::NAN),
            e.validation_certified_accuracy.unwrap_or(f64::NAN)
        );
    };
    let result = retrain(
        &initial,
        &train,
        Some(&validation),
        &acceptance,
        &requirement,
        &settings,
        &mut print_epoch,
    )?;

    // Outputs: model, then log and sheet in the folder beside it.
    let last = &result.report.summary;
    let prices = final_prices(&result, &settings);
    let parent_path = model_path.display().to_string();
    let data = retrain_data(&args, train.len(), validation.len(), acceptance.len());
    let lineage = lineage(&parent_path, &parent_sha256, &settings, &result, &data);
    let seen_by_parent =
        crate::train::lineage::validation_seen_by_parent(parent.provenance.as_ref(), &data);
    let inputs = ProvenanceInputs {
        parent: &parent,
        parent_path: &parent_path,
        parent_sha256: &parent_sha256,
        hidden: hidden.as_deref(),
        requirement: &requirement,
        floor,
        data: &data,
    };
    let mut model = result.model.clone();
    model.provenance = Some(retrain_provenance(&inputs, &settings, &result));
    model.save(&args.out)?;
    let folder = sheet_folder(&args.out);
    std::fs::create_dir_all(&folder)
        .with_context(|| format!("{}: creating the folder", folder.display()))?;
    write(&folder.join("log.csv"), &log_csv(&result))?;
    write(&folder.join("checks.csv"), &checks_csv(&result))?;
    let (accuracy_svg, multiplier_svg) = crate::sheet::retrain_plots::retrain_plots(&result, floor);
    write(&folder.join("accuracy.svg"), &accuracy_svg)?;
    write(&folder.join("loss_and_multiplier.svg"), &multiplier_svg)?;
    let names: Vec<String> = prices.iter().map(|p| p.constraint.clone()).collect();
    if let Some(svg) = crate::sheet::retrain_plots::multiplier_plot(&result, &names) {
        write(&folder.join("multipliers.svg"), &svg)?;
    }
    let described = requirement.describe(&|c| parent.class_name(c));
    write(
        &folder.join("retrain.md"),
        &format!(
            "{}\n{}",
            sheet_markdown(
                &args,
                &described,
                floor,
                &result,
                acceptance.len(),
                &prices,
                seen_by_parent
            ),
            crate::sheet::lineage::retrain_sheet_section(&lineage)
        ),
    )?;
    println!(
        "retrain: {} after {} round(s): certified accuracy {:.4} (floor {}), clean accuracy {:.4}; model {}, sheet {}",
        match result.verdict {
            RetrainVerdict::Met => "floor met",
            RetrainVerdict::NotMet => "floor NOT met",
        },
        result.rounds.len(),
        last.certified_accuracy,
        floor,
        last.clean_accuracy,
        args.out.display(),
        folder.display()
    );
    let last_round = result.rounds.last().expect("at least one round");
    if let (Some(plan), Some(assessment)) = (&result.plan, &last_round.confidence) {
        println!("{}", confidence::summary_line(plan, assessment));
    }
    print_lines(&result.report.requirements, &prices);
    for caution in super::retrain_sheet::cautions(&args, &result, seen_by_parent) {
        eprintln!("caution: {caution}");
    }
    Ok(match result.verdict {
        RetrainVerdict::Met => Outcome::Met,
        RetrainVerdict::NotMet => Outcome::NotMet,
    })
}

/// Where the training, validation and acceptance rows came from (digests of the files as given).
fn retrain_data(args: &Args, train: usize, validation: usize, acceptance: usize) -> RetrainData {
    let file = |p: &Path, rows| DataSource {
        source: p.display().to_string(),
        sha256: crate::digest::sha256_file(p).ok(),
        rows,
    };
    RetrainData {
        train: file(&args.train, train),
        validation: match &args.val {
            Some(v) => file(v, validation),
            None => DataSource {
                source: format!(
                    "20% of {} held out (seed {})",
                    args.train.display(),
                    args.seed
                ),
                ..file(&args.train, validation)
            },
        },
        acceptance: args.acceptance.as_deref().map(|a| file(a, acceptance)),
    }
}

fn write(path: &Path, text: &str) -> anyhow::Result<()> {
    crate::atomic::write_file(path, text.as_bytes())
        .with_context(|| format!("{}: writing", path.display()))
}

/// Prints each requirement line's verdict with its price (a requirement list only).
fn print_lines(lines: &[LineVerdict], prices: &[crate::train::price::Price]) {
    for (k, l) in lines.iter().enumerate() {
        let price = prices.get(k).map_or(String::new(), |p| {
            format!(
                ", multiplier {:.4}{}",
                p.multiplier,
                if p.relaxed_by > 0.0 {
                    format!(", relaxed by {:.4}", p.relaxed_by)
                } else {
                    String::new()
                }
            )
        });
        println!(
            "  {}: measured {:.4}, floor {:.4}: {}{price}",
            l.requirement,
            l.measured,
            l.floor,
            l.verdict.name()
        );
    }
}

/// The lowest floor of a requirement list (drawn on the accuracy plot).
fn lowest_floor(lines: &[RequirementLine]) -> f64 {
    lines
        .iter()
        .map(|l| match l {
            RequirementLine::Certified(c) => c.floor,
            RequirementLine::CleanAccuracy { minimum } => *minimum,
        })
        .fold(1.0, f64::min)
}
