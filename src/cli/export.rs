//! `ballast export --model M.json --onnx M.onnx [--float64]`: writes a model as a plain ONNX graph (Gemm /
//! Relu, normalisation as Sub / Div, Conv / BatchNormalization / MaxPool / AveragePool / Flatten) so a
//! retrained model goes back into an ONNX inference stack.

use std::path::PathBuf;

use crate::model::onnx::{save_onnx, ExportOptions, FloatPrecision};

/// Arguments of `ballast export`.
#[derive(Debug, clap::Args)]
#[command(after_help = "Example: ballast export --model retrained.json --onnx retrained.onnx")]
pub struct Args {
    /// The model to export (JSON layout, or ONNX).
    #[arg(long)]
    pub model: PathBuf,
    /// Where to write the ONNX file.
    #[arg(long)]
    pub onnx: PathBuf,
    /// Write float64 tensors instead of float32.
    #[arg(long)]
    pub float64: bool,
    /// Accept models above the size limits.
    #[arg(long)]
    pub allow_large: bool,
}

/// Runs `ballast export`.
pub fn run(args: Args) -> anyhow::Result<super::Outcome> {
    let model = super::common::load_model(&args.model, args.allow_large)?;
    let precision = if args.float64 {
        FloatPrecision::Float64
    } else {
        FloatPrecision::Float32
    };
    save_onnx(&model, &args.onnx, &ExportOptions { precision })?;
    println!(
        "exported {} -> {} ({} tensors)",
        args.model.display(),
        args.onnx.display(),
        if args.float64 { "float64" } else { "float32" }
    );
    Ok(super::Outcome::Finished)
}
