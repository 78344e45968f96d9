//! `ballast inspect --model MODEL` (or `ballast inspect MODEL`): layers, parameter count, input range and classes of a model.

use std::path::PathBuf;

use crate::model::{Layer, Model};

/// Arguments of `ballast inspect`.
#[derive(Debug, clap::Args)]
#[command(after_help = "Example: ballast inspect --model models/pump-mlp.json")]
pub struct Args {
    /// The model file (as every other command takes it).
    #[arg(
        long = "model",
        value_name = "MODEL",
        conflicts_with = "model_path",
        required_unless_present = "model_path"
    )]
    pub model: Option<PathBuf>,
    /// The model file, given without --model.
    #[arg(value_name = "MODEL")]
    pub model_path: Option<PathBuf>,
    /// Accept models above the size limits.
    #[arg(long)]
    pub allow_large: bool,
}

/// Runs `ballast inspect`.
pub fn run(args: Args) -> anyhow::Result<super::Outcome> {
    let path = args
        .model
        .or(args.model_path)
        .ok_or_else(|| anyhow::anyhow!("--model: no model file given"))?;
    let model = super::common::load_model(&path, args.allow_large)?;
    print!("{}", describe(&model));
    Ok(super::Outcome::Finished)
}

/// A plain-text description of a model.
pub fn describe(model: &Model) -> String {
    use std::fmt::Write;
    let mut s = String::new();
    let _ = writeln!(s, "model: {}", model.name.as_deref().unwrap_or("(unnamed)"));
    let unnamed = match &model.input.names {
        Some(_) => String::new(),
        None => format!(
            " (unnamed: tolerance files call them x0 … x{}, data columns are taken in order)",
            model.input.dim.saturating_sub(1)
        ),
    };
    let shape = match &model.input.shape {
        Some(dims) => format!(
            " of shape [{}] (channels first, flattened row-major)",
            dims.iter()
                .map(usize::to_string)
                .collect::<Vec<_>>()
                .join(", ")
        ),
        None => String::new(),
    };
    let _ = writeln!(s, "inputs: {}{shape}{unnamed}", model.input.dim);
    let mut width = model.input.dim;
    for (i, layer) in model.layers.iter().enumerate() {
        match layer {
            Layer::Normalize { .. } => {
                let _ = writeln!(s, "  layers[{i}] normalize ({width})");
            }
            Layer::Dense { weights, .. } => {
                let _ = writeln!(
                    s,
                    "  layers[{i}] dense {} -> {}",
                    weights.ncols(),
                    weights.nrows()
                );
                width = weights.nrows();
            }
            Layer::Relu => {
                let _ = writeln!(s, "  layers[{i}] relu ({width})");
            }
            Layer::Conv(c) => {
                let g = c.shape;
                let _ = writeln!(
                    s,
                    "  layers[{i}] conv {}x{}x{} -> {}x{:?}, kernel {}x{}, stride {:?}",
                    g.in_channels,
                    g.in_height,
                    g.in_width,
                    g.out_channels,
                    g.output_size().unwrap_or((0, 0)),
                    g.kernel_height,
                    g.kernel_width,
                    g.stride
                );
                width = g.output_dim();
            }
            Layer::BatchNorm { scale, .. } => {
                let _ = writeln!(s, "  layers[{i}] batchnorm ({} channels)", scale.len());
            }
            Layer::Pool(p) => {
                let op = match p.op {
                    crate::model::pool::PoolOp::Max => "maxpool",
                    crate::model::pool::PoolOp::Average => "averagepool",
                };
                let _ = writeln!(
                    s,
                    "  layers[{i}] {op} {:?} stride {:?} ({width} -> {})",
                    p.kernel,
                    p.stride,
                    p.output_dim()
                );
                width = p.output_dim();
            }
            Layer::Flatten => {
                let _ = writeln!(s, "  layers[{i}] flatten ({width})");
            }
        }
    }
    let network = model.network();
    let _ = writeln!(s, "parameters: {}", model.parameter_count());
    let _ = writeln!(s, "relu units: {}", network.relu_count());
    let kind = if model.output_dim() == 1 {
        " (binary: class 1 iff logit > 0)"
    } else {
        ""
    };
    let _ = writeln!(s, "outputs: {}{kind}", model.output_dim());
    let classes: Vec<String> = (0..model.class_count())
        .map(|c| model.class_name(c))
        .collect();
    let _ = writeln!(s, "classes: {}", classes.join(", "));
    let _ = writeln!(
        s,
        "deployed arithmetic: {} (certificates cover evaluation in it)",
        model.arithmetic.name()
    );
    let _ = writeln!(s, "input range:");
    for i in 0..model.input.dim {
        let _ = writeln!(
            s,
            "  {:<24} [{}, {}]",
            model.feature_name(i),
            model.input.lower[i],
            model.input.upper[i]
        );
    }
    s
}
