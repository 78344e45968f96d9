//! The command-line interface: one file per subcommand; each parses plain values with clap, validates
//! them into checked settings, calls the library and returns an [`Outcome`] that maps to the exit code.

pub mod attack;
pub mod certify;
pub mod common;
pub mod compare;
pub mod demo;
pub mod evaluate;
pub mod export;
pub mod generate_demo;
pub mod import;
pub mod inspect;
pub mod merge;
pub mod retrain;
pub mod retrain_args;
pub mod retrain_sheet;
pub mod sheet;

use clap::{Parser, Subcommand};

/// How a successful run ended; [`Outcome::exit_code`] gives the documented exit code.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Outcome {
    /// The run finished and no requirement floor was checked.
    Finished,
    /// The requirement holds (exit 0).
    Met,
    /// The requirement does not hold (exit 1).
    NotMet,
    /// Unresolved samples leave the floor neither proven nor refuted (exit 3).
    Undecided,
    /// Stopped by a signal after saving what was finished (exit 128 + signal).
    Interrupted(i32),
}

impl Outcome {
    /// The process exit code of this outcome (usage and input errors exit 2).
    pub fn exit_code(self) -> u8 {
        match self {
            Outcome::Finished | Outcome::Met => 0,
            Outcome::NotMet => 1,
            Outcome::Undecided => 3,
            Outcome::Interrupted(signal) => (128 + signal).clamp(0, 255) as u8,
        }
    }
}

/// Exit code for usage and input errors.
pub const EXIT_INPUT_ERROR: u8 = 2;

/// ballast certifies small linear and ReLU classifiers against a robustness requirement.
#[derive(Debug, Parser)]
#[command(name = "ballast", version, about, long_about = None)]
#[command(
    after_help = "Exit codes: 0 requirement met (or finished), 1 not met, 2 usage or input error, 3 undecided."
)]
pub struct Cli {
    /// The subcommand.
    #[command(subcommand)]
    pub command: Command,
}

/// The subcommands.
#[derive(Debug, Subcommand)]
pub enum Command {
    /// Run the whole job on the bundled pump-fleet demo.
    Demo(demo::Args),
    /// Regenerate the bundled demo's data, files and models.
    GenerateDemo(generate_demo::Args),
    /// Decide every sample and check the requirement's floor.
    Certify(certify::Args),
    /// Attacks only: search for counterexamples.
    Attack(attack::Args),
    /// Retrain a model until the certified floor holds.
    Retrain(Box<retrain::Args>),
    /// Render Markdown and HTML from a saved report.
    Sheet(sheet::Args),
    /// Before/after table of two reports of the same data.
    Compare(compare::Args),
    /// Combine the reports of `--shard K/N` runs into one report.
    Merge(merge::Args),
    /// Show a model's layers, parameter count, input range and classes.
    Inspect(inspect::Args),
    /// Clean accuracy and confusion matrix of a model on a data set.
    Evaluate(evaluate::Args),
    /// Convert an ONNX graph of fully connected layers into the model layout.
    Import(import::Args),
    /// Write a model as a plain ONNX graph.
    Export(export::Args),
}

/// Runs a parsed command line.
pub fn run(cli: Cli) -> anyhow::Result<Outcome> {
    match cli.command {
        Command::Demo(a) => demo::run(a),
        Command::GenerateDemo(a) => generate_demo::run(a),
        Command::Certify(a) => certify::run(a),
        Command::Attack(a) => attack::run(a),
        Command::Retrain(a) => retrain::run(*a),
        Command::Sheet(a) => sheet::run(a),
        Command::Compare(a) => compare::run(a),
        Command::Merge(a) => merge::run(a),
        Command::Inspect(a) => inspect::run(a),
        Command::Evaluate(a) => evaluate::run(a),
        Command::Import(a) => import::run(a),
        Command::Export(a) => export::run(a),
    }
}
