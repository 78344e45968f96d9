//! `ballast retrain`'s arguments (clap, grouped under help headings) and the first of its two
//! argument steps (design.md: clap parses plain values, a validation step builds the checked
//! settings): every plain value is checked with a message that names its flag, the named preset is
//! applied, and the loss, constraint, keep rule and hidden sizes are parsed. What it guarantees: nothing is read from disk and nothing is written; a value that
//! passes here is in the range the library accepts.

use std::path::PathBuf;

use anyhow::bail;

use super::common::{DataArgs, RequirementArgs};
use crate::train::constrained::Constraint;
use crate::train::retrain::Keep;
use crate::train::robust::RobustLoss;

/// Arguments of `ballast retrain`.
#[derive(Debug, clap::Args)]
#[command(
    allow_negative_numbers = true,
    after_help = "Examples:\n  ballast retrain --model m.json --train train.csv --eps 0.05 --floor 0.8 --out m2.json\n  ballast retrain --model m.json --requirement release.toml --train train.csv --acceptance acc.csv --out m2.json\n  ballast retrain --model m.json --requirement release.toml --train train.csv --relax --out m2.json\n  ballast retrain --model m.json --train train.csv --acceptance acc.csv --eps 0.05 --floor 0.8 --hidden 32,32 --out m2.json\n  ballast retrain --model m.json --train train.csv --eps 0.05 --floor 0.8 --penalty 1 --out m-penalty.json\n  ballast retrain --model m.json --train train.csv --eps 0.05 --floor 0.85 --confidence 0.95 --acceptance-size 360 --out m2.json\n\nExit codes: 0 floor proven on the acceptance data (with --confidence: the reviewer's check passed on --acceptance, or is expected to pass on a set of --acceptance-size), 1 not met, 2 usage or input error."
)]
pub struct Args {
    /// The model to fine-tune (with --hidden: only its input range, names and classes are used).
    /// Required: a requirement file names no model.
    #[arg(long, help_heading = "Inputs")]
    pub model: Option<PathBuf>,
    /// Training data (CSV).
    #[arg(long, help_heading = "Inputs")]
    pub train: PathBuf,
    /// Validation data (CSV): decides which weights each round keeps and, by the certify check after
    /// each round, whether another round runs [default: 20% of --train held out].
    #[arg(long, help_heading = "Inputs")]
    pub val: Option<PathBuf>,
    /// Acceptance data: certified once, after the last round, for the verdict; it never steers the
    /// rounds [default: the validation data, with a caution].
    #[arg(long, help_heading = "Inputs")]
    pub acceptance: Option<PathBuf>,
    /// Label column, input-range policy, size limits.
    #[command(flatten)]
    pub input: DataArgs,
    /// Budget, norm, floor, class-change rule, requirement file.
    #[command(flatten)]
    pub requirement: RequirementArgs,
    /// Train from scratch with these hidden layer sizes (e.g. 32,32; "none" for softmax regression).
    #[arg(long, help_heading = "Training")]
    pub hidden: Option<String>,
    /// Judge the floor as a reviewer will: the one-sided Clopper–Pearson lower bound at this level
    /// (e.g. 0.95) on the acceptance set; training aims at the level that makes that check pass. Needs
    /// --acceptance or --acceptance-size.
    #[arg(long, allow_hyphen_values = true, help_heading = "Requirement")]
    pub confidence: Option<f64>,
    /// Size of the reviewer's acceptance set, when the set itself stays with the reviewer (with
    /// --confidence; not with --acceptance).
    #[arg(long, help_heading = "Requirement")]
    pub acceptance_size: Option<usize>,
    /// Wanted probability that the reviewer's check passes (with --confidence) [default: the
    /// confidence level].
    #[arg(long, allow_hyphen_values = true, help_heading = "Requirement")]
    pub pass_probability: Option<f64>,
    /// Epochs of the first round.
    #[arg(long, default_value_t = 30, help_heading = "Training")]
    pub epochs: usize,
    /// Epochs of every further round [default: half of --epochs].
    #[arg(long, help_heading = "Training")]
    pub round_epochs: Option<usize>,
    /// Largest number of train-then-certify rounds.
    #[arg(long, default_value_t = 3, help_heading = "Training")]
    pub max_rounds: usize,
    /// Epochs over which epsilon ramps up from 0 [default: 40% of --epochs].
    #[arg(long, help_heading = "Training")]
    pub ramp_epochs: Option<usize>,
    /// Adam learning rate.
    #[arg(
        long,
        default_value_t = 0.002,
        allow_hyphen_values = true,
        help_heading = "Training"
    )]
    pub learning_rate: f64,
    /// Step-size factor at the end of --epochs: the rate is held through the epsilon ramp, then
    /// decays linearly to this fraction of --learning-rate (later rounds keep it); 1 = constant.
    #[arg(
        long,
        default_value_t = 1.0,
        allow_hyphen_values = true,
        help_heading = "Training"
    )]
    pub final_rate: f64,
    /// Mini-batch size.
    #[arg(long, default_value_t = 64, help_heading = "Training")]
    pub batch_size: usize,
    /// Seed of initialisation, shuffling and attacks.
    #[arg(long, default_value_t = 0, help_heading = "Training")]
    pub seed: u64,
    /// Robust loss: certified (linear + interval bounds), interval, or adversarial (PGD).
    #[arg(
        long,
        default_value = "certified",
        help_heading = "Formulation (advanced)"
    )]
    pub loss: String,
    /// Constraint: error (robust error rate ≤ 1 − floor − slack) or loss (robust loss ≤ --level).
    #[arg(long, default_value = "error", help_heading = "Formulation (advanced)")]
    pub constraint: String,
    /// Robust loss level for --constraint loss.
    #[arg(
        long,
        allow_hyphen_values = true,
        help_heading = "Formulation (advanced)"
    )]
    pub level: Option<f64>,
    /// Extra margin on the robust-error constraint in the first round.
    #[arg(
        long,
        default_value_t = 0.02,
        allow_hyphen_values = true,
        help_heading = "Formulation (advanced)"
    )]
    pub slack: f64,
    /// Slack added in every further round.
    #[arg(
        long,
        default_value_t = 0.03,
        allow_hyphen_values = true,
        help_heading = "Formulation (advanced)"
    )]
    pub slack_step: f64,
    /// Fixed penalty weight instead of the primal-dual multiplier (for comparison).
    #[arg(
        long,
        allow_hyphen_values = true,
        help_heading = "Formulation (advanced)"
    )]
    pub penalty: Option<f64>,
    /// One constraint and multiplier per class.
    #[arg(long, help_heading = "Formulation (advanced)")]
    pub per_class: bool,
    /// Dual step size of the multiplier update.
    #[arg(
        long,
        default_value_t = 0.05,
        allow_hyphen_values = true,
        help_heading = "Formulation (advanced)"
    )]
    pub dual_step: f64,
    /// Which epoch's weights each round returns: best-feasible (lowest validation clean loss among
    /// epochs whose validation certified accuracy reaches the floor), earliest-feasible (the earliest
    /// of them within one standard error of that loss), both primal-dual only; or last.
    #[arg(long, default_value = "best-feasible", help_heading = "Kept weights")]
    pub keep: String,
    /// Validation checks per epoch (≥ 1): each is a candidate for --keep; more checks follow
    /// certified accuracy more finely at the cost of one linear-bound pass over the validation data
    /// each.
    #[arg(long, default_value_t = 4, help_heading = "Kept weights")]
    pub checks_per_epoch: usize,
    /// Checks up to this fraction below the floor by linear bounds are candidates for --keep too,
    /// kept only when the certify pipeline proves the floor for them on the validation data; 0 = off.
    #[arg(
        long,
        default_value_t = 0.0,
        allow_hyphen_values = true,
        help_heading = "Kept weights"
    )]
    pub near_miss: f64,
    /// Most certify runs on the validation data per round to judge near misses.
    #[arg(long, default_value_t = 3, help_heading = "Kept weights")]
    pub near_miss_tries: usize,
    /// Average the weights and multipliers over this last fraction of --epochs' steps and use the
    /// average with --keep last (primal recovery; docs/retrain.md); 0 = off.
    #[arg(
        long,
        default_value_t = 0.0,
        allow_hyphen_values = true,
        help_heading = "Formulation (advanced)"
    )]
    pub average_tail: f64,
    /// Resilient relaxation (Hounie et al., 2023): every constraint may loosen by a slack that costs
    /// COST/2 · slack² in the objective, learned with the weights; when the floors cannot all hold,
    /// training settles on the closest levels it can reach and the result names the lines that fail.
    /// The verdict stays strict [COST default: 10].
    #[arg(long, num_args = 0..=1, default_missing_value = "10", value_name = "COST", help_heading = "Requirement")]
    pub relax: Option<f64>,
    /// A named group of settings: `landing` = --slack 0 --checks-per-epoch 16 --final-rate 0.1
    /// --keep earliest-feasible --near-miss 0.03 (lands close to the floor, docs/retrain.md §7);
    /// flags given explicitly still win.
    #[arg(long, value_name = "NAME", help_heading = "Training")]
    pub preset: Option<String>,
    /// Where to write the retrained model (the log and sheet go to a folder beside it).
    #[arg(long, help_heading = "Output")]
    pub out: PathBuf,
}

/// The parsed values of the flags that name a choice.
pub(super) struct Checked {
    /// `--loss`.
    pub loss: RobustLoss,
    /// `--constraint` with `--floor` / `--slack` or `--level`.
    pub constraint: Constraint,
    /// `--keep`.
    pub keep: Keep,
    /// `--hidden` (None: fine-tune the model as given).
    pub hidden: Option<Vec<usize>>,
}

/// Applies `--preset`, checks every plain value and parses the choices.
pub(super) fn check(args: &mut Args) -> anyhow::Result<Checked> {
    if let Some(name) = args.preset.clone() {
        apply_preset(args, &name, &std::env::args().collect::<Vec<_>>())?;
    }
    if let Some(cost) = args.relax {
        if !(cost.is_finite() && cost > 0.0) {
            bail!("--relax: {cost} is not allowed, expected a slack cost > 0");
        }
    }
    // Validate the plain values first.
    if let Some(floor) = args.requirement.floor {
        if !(0.0..=1.0).contains(&floor) {
            bail!("--floor: {floor} is not allowed, expected a fraction in [0, 1]");
        }
    }
    if args.epochs == 0 {
        bail!("--epochs: must be at least 1");
    }
    if args.max_rounds == 0 {
        bail!("--max-rounds: must be at least 1");
    }
    if args.batch_size == 0 {
        bail!("--batch-size: must be at least 1");
    }
    if !(args.learning_rate.is_finite() && args.learning_rate > 0.0) {
        bail!(
            "--learning-rate: {} is not allowed, expected a number > 0",
            args.learning_rate
        );
    }
    if !(args.slack.is_finite()
        && args.slack >= 0.0
        && args.slack_step.is_finite()
        && args.slack_step >= 0.0)
    {
        bail!("--slack / --slack-step: expected finite numbers ≥ 0");
    }
    if !(args.final_rate > 0.0 && args.final_rate <= 1.0) {
        bail!(
            "--final-rate: {} is not allowed, expected a number in (0, 1]",
            args.final_rate
        );
    }
    if !(args.near_miss.is_finite() && (0.0..1.0).contains(&args.near_miss)) {
        bail!(
            "--near-miss: {} is not allowed, expected a fraction in [0, 1)",
            args.near_miss
        );
    }
    if args.acceptance_size.is_some() && args.acceptance.is_some() {
        bail!(
            "--acceptance-size: not allowed with --acceptance, whose size is the acceptance set's"
        );
    }
    if args.acceptance_size == Some(0) {
        bail!("--acceptance-size: 0 is not allowed, expected a whole number ≥ 1");
    }
    if let Some(q) = args.pass_probability {
        if !(q > 0.0 && q < 1.0) {
            bail!("--pass-probability: {q} is not allowed, expected a level strictly between 0 and 1 (e.g. 0.95)");
        }
    }
    if args.checks_per_epoch == 0 {
        bail!("--checks-per-epoch: 0 is not allowed, expected a whole number ≥ 1");
    }
    if !(args.dual_step.is_finite() && args.dual_step > 0.0) {
        bail!(
            "--dual-step: {} is not allowed, expected a number > 0",
            args.dual_step
        );
    }
    if !(0.0..=1.0).contains(&args.average_tail) {
        bail!(
            "--average-tail: {} is not allowed, expected a fraction in [0, 1]",
            args.average_tail
        );
    }
    if let Some(w) = args.penalty {
        if !(w.is_finite() && w >= 0.0) {
            bail!("--penalty: {w} is not allowed, expected a weight ≥ 0");
        }
    }
    let loss = match args.loss.as_str() {
        "certified" => RobustLoss::LinearInterval {
            final_linear_weight: 0.0,
        },
        "interval" => RobustLoss::Interval,
        "adversarial" => RobustLoss::Adversarial { steps: 7 },
        other => {
            bail!("--loss: \"{other}\" is not allowed, expected certified, interval or adversarial")
        }
    };
    let constraint = match args.constraint.as_str() {
        "error" => Constraint::RobustError {
            floor: args.requirement.floor.unwrap_or(0.0),
            slack: args.slack,
        },
        "loss" => match args.level {
            Some(level) if level.is_finite() && level >= 0.0 => {
                Constraint::RobustLossLevel { level }
            }
            Some(level) => bail!("--level: {level} is not allowed, expected a number ≥ 0"),
            None => bail!("--constraint loss needs --level (the allowed mean robust loss)"),
        },
        other => bail!("--constraint: \"{other}\" is not allowed, expected error or loss"),
    };
    let keep = match args.keep.as_str() {
        "best-feasible" => Keep::BestFeasible,
        "earliest-feasible" => Keep::EarliestFeasible,
        "last" => Keep::Last,
        other => bail!(
            "--keep: \"{other}\" is not allowed, expected best-feasible, earliest-feasible or last"
        ),
    };
    let hidden = args.hidden.as_deref().map(parse_hidden).transpose()?;
    Ok(Checked {
        loss,
        constraint,
        keep,
        hidden,
    })
}

fn parse_hidden(text: &str) -> anyhow::Result<Vec<usize>> {
    if text.trim().eq_ignore_ascii_case("none") || text.trim().is_empty() {
        return Ok(Vec::new());
    }
    text.split(',')
        .map(|p| match p.trim().parse::<usize>() {
            Ok(n) if n > 0 => Ok(n),
            _ => bail!(
                "--hidden: \"{p}\" is not allowed, expected layer sizes ≥ 1 like 32,32 (or none)"
            ),
        })
        .collect()
}

/// Applies the named group of settings `name` to `args`, leaving every flag present on
/// `command_line` as given.
fn apply_preset(args: &mut Args, name: &str, command_line: &[String]) -> anyhow::Result<()> {
    let given = |flag: &str| {
        command_line
            .iter()
            .any(|a| a == flag || a.starts_with(&format!("{flag}=")))
    };
    match name {
        "landing" => {
            if !given("--slack") {
                args.slack = 0.0;
            }
            if !given("--checks-per-epoch") {
                args.checks_per_epoch = 16;
            }
            if !given("--final-rate") {
                args.final_rate = 0.1;
            }
            if !given("--keep") {
                args.keep = "earliest-feasible".into();
            }
            if !given("--near-miss") {
                args.near_miss = 0.03;
            }
            Ok(())
        }
        other => bail!("--preset: \"{other}\" is not allowed, expected landing"),
    }
}
