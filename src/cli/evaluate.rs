//! `ballast evaluate --model M --data D`: clean accuracy and the confusion matrix.

use std::path::PathBuf;

use super::common::DataArgs;

use crate::data::Dataset;
use crate::model::{predicted_class, Model};

/// Arguments of `ballast evaluate`.
#[derive(Debug, clap::Args)]
#[command(
    after_help = "Example: ballast evaluate --model models/pump-mlp.json --data demo-data/acceptance.csv"
)]
pub struct Args {
    /// The model file.
    #[arg(long)]
    pub model: PathBuf,
    /// The labelled data (CSV).
    #[arg(long)]
    pub data: PathBuf,
    /// Label column, input-range policy, size limits.
    #[command(flatten)]
    pub input: DataArgs,
}

/// Clean accuracy and confusion counts (`matrix[true][predicted]`).
#[derive(Debug, Clone, PartialEq)]
pub struct Evaluation {
    /// Fraction of samples predicted correctly.
    pub accuracy: f64,
    /// `matrix[true class][predicted class]` counts.
    pub confusion: Vec<Vec<usize>>,
}

/// Evaluates `model` on `data` without perturbation.
pub fn evaluate(model: &Model, data: &Dataset) -> Evaluation {
    let network = model.classifier();
    let classes = model.class_count();
    let logits = network.forward_batch(&data.features);
    let mut confusion = vec![vec![0usize; classes]; classes];
    let mut correct = 0;
    for (i, &label) in data.labels.iter().enumerate() {
        let predicted = predicted_class(logits.column(i).as_slice());
        confusion[label][predicted] += 1;
        if predicted == label {
            correct += 1;
        }
    }
    Evaluation {
        accuracy: correct as f64 / data.len() as f64,
        confusion,
    }
}

/// Runs `ballast evaluate`.
pub fn run(args: Args) -> anyhow::Result<super::Outcome> {
    let model = super::common::load_model(&args.model, args.input.allow_large)?;
    let data = super::common::load_data(&args.data, &model, &args.input)?;
    let result = evaluate(&model, &data);
    println!("samples: {}", data.len());
    println!("clean accuracy: {:.4}", result.accuracy);
    println!("confusion matrix (rows: true class, columns: predicted):");
    let names: Vec<String> = (0..model.class_count())
        .map(|c| model.class_name(c))
        .collect();
    let width = names.iter().map(|n| n.len()).max().unwrap_or(1).max(5);
    print!("{:>width$} ", "");
    for n in &names {
        print!("{n:>width$} ");
    }
    println!();
    for (t, row) in result.confusion.iter().enumerate() {
        print!("{:>width$} ", names[t]);
        for c in row {
            print!("{c:>width$} ");
        }
        println!();
    }
    Ok(super::Outcome::Finished)
}
