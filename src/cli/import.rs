//! `ballast import --onnx M.onnx --out M.json`: converts an ONNX graph of fully connected or
//! convolutional layers into the `ballast.model/1` layout, adding the valid input range, class names
//! and a name.

use std::path::{Path, PathBuf};

use anyhow::{bail, Context};

use crate::model::onnx::{load_onnx, ImportOptions};

/// Arguments of `ballast import`.
#[derive(Debug, clap::Args)]
#[command(
    after_help = "Example: ballast import --onnx mlp.onnx --out mlp.json --input-range 0,1 --classes normal,worn"
)]
pub struct Args {
    /// The ONNX file to convert.
    #[arg(long)]
    pub onnx: PathBuf,
    /// Where to write the model (JSON layout).
    #[arg(long)]
    pub out: PathBuf,
    /// Valid input range for every feature, as `LOWER,UPPER` (raw input units).
    #[arg(
        long,
        value_name = "L,U",
        allow_hyphen_values = true,
        conflicts_with = "input_range_file"
    )]
    pub input_range: Option<String>,
    /// JSON file with `lower` and `upper` (a number or one per feature) and optional feature `names`.
    #[arg(long, value_name = "FILE")]
    pub input_range_file: Option<PathBuf>,
    /// Class names, comma-separated, one per class (overrides labels found in the graph).
    #[arg(long, value_name = "A,B,..")]
    pub classes: Option<String>,
    /// Model name [default: the graph name].
    #[arg(long)]
    pub name: Option<String>,
    /// The graph output holding the scores, when the graph has several floating-point outputs.
    #[arg(long, value_name = "NAME")]
    pub output: Option<String>,
    /// Accept files above the size limits.
    #[arg(long)]
    pub allow_large: bool,
}

/// Runs `ballast import`.
pub fn run(args: Args) -> anyhow::Result<super::Outcome> {
    let mut options = ImportOptions {
        name: args.name.clone(),
        score_output: args.output.clone(),
        allow_large: args.allow_large,
        ..ImportOptions::default()
    };
    if let Some(classes) = &args.classes {
        options.classes = Some(super::common::parse_class_list(classes, "--classes")?);
    }
    let range = match (&args.input_range, &args.input_range_file) {
        (Some(text), _) => Some(parse_range(text)?),
        (None, Some(file)) => Some(read_range_file(file)?),
        (None, None) => None,
    };
    // Import once without the range to learn the input size, then expand the range to it.
    let max_bytes = if args.allow_large {
        u64::MAX
    } else {
        crate::limits::MAX_MODEL_FILE_BYTES
    };
    let probe = load_onnx(&args.onnx, max_bytes, &options)?;
    if let Some(range) = range {
        let dim = probe.input.dim;
        options.lower = Some(range.lower.expand(dim, "lower")?);
        options.upper = Some(range.upper.expand(dim, "upper")?);
        if let Some(names) = range.names {
            if names.len() != dim {
                bail!(
                    "input range file: names has {} entries, the model has {dim} features",
                    names.len()
                );
            }
            options.feature_names = Some(names);
        }
    }
    let model = load_onnx(&args.onnx, max_bytes, &options)?;
    if !args.allow_large
        && model.parameter_count().max(model.network_parameter_count())
            > crate::limits::MAX_PARAMETERS
    {
        bail!(
            "{}: the model has {} parameters, above the limit of {} (use --allow-large)",
            args.onnx.display(),
            model.parameter_count(),
            crate::limits::MAX_PARAMETERS
        );
    }
    let text = serde_json::to_string_pretty(&model.to_json_value())? + "\n";
    crate::atomic::write_file(&args.out, text.as_bytes())
        .with_context(|| format!("writing {}", args.out.display()))?;
    println!(
        "imported {} -> {}: {} inputs, {} outputs, {} layers, {} parameters",
        args.onnx.display(),
        args.out.display(),
        model.input.dim,
        model.output_dim(),
        model.layers.len(),
        model.parameter_count()
    );
    Ok(super::Outcome::Finished)
}

enum Bound {
    All(f64),
    Each(Vec<f64>),
}

impl Bound {
    fn expand(self, dim: usize, what: &str) -> anyhow::Result<Vec<f64>> {
        match self {
            Bound::All(v) => Ok(vec![v; dim]),
            Bound::Each(v) if v.len() == dim => Ok(v),
            Bound::Each(v) => bail!(
                "input range: {what} has {} values, the model has {dim} features",
                v.len()
            ),
        }
    }
}

struct Range {
    lower: Bound,
    upper: Bound,
    names: Option<Vec<String>>,
}

fn parse_range(text: &str) -> anyhow::Result<Range> {
    let parts: Vec<&str> = text.split(',').map(str::trim).collect();
    if parts.len() != 2 {
        bail!("--input-range: \"{text}\" is not LOWER,UPPER");
    }
    let number = |s: &str| -> anyhow::Result<f64> {
        let v: f64 = s
            .parse()
            .map_err(|_| anyhow::anyhow!("--input-range: \"{s}\" is not a number"))?;
        if !v.is_finite() {
            bail!("--input-range: {v} is not a finite number");
        }
        Ok(v)
    };
    let (lower, upper) = (number(parts[0])?, number(parts[1])?);
    if lower > upper {
        bail!("--input-range: lower {lower} is above upper {upper}");
    }
    Ok(Range {
        lower: Bound::All(lower),
        upper: Bound::All(upper),
        names: None,
    })
}

fn read_range_file(path: &Path) -> anyhow::Result<Range> {
    let text = crate::limits::read_text_file(path, crate::limits::MAX_SMALL_FILE_BYTES)
        .with_context(|| format!("reading {}", path.display()))?;
    let value: serde_json::Value = serde_json::from_str(&text)
        .with_context(|| format!("{}: not valid JSON", path.display()))?;
    let object = value.as_object().ok_or_else(|| {
        anyhow::anyhow!(
            "{}: expected a JSON object with lower and upper",
            path.display()
        )
    })?;
    for key in object.keys() {
        if !matches!(key.as_str(), "lower" | "upper" | "names") {
            bail!(
                "{}: unknown key \"{key}\" (expected lower, upper, names)",
                path.display()
            );
        }
    }
    let bound = |key: &str| -> anyhow::Result<Bound> {
        let place = format!("{}: {key}", path.display());
        match object.get(key) {
            None => bail!("{place} is missing"),
            Some(serde_json::Value::Number(n)) => Ok(Bound::All(n.as_f64().unwrap_or(f64::NAN))),
            Some(serde_json::Value::Array(items)) => items
                .iter()
                .enumerate()
                .map(|(i, v)| {
                    v.as_f64()
                        .ok_or_else(|| anyhow::anyhow!("{place}[{i}] is not a number"))
                })
                .collect::<anyhow::Result<Vec<f64>>>()
                .map(Bound::Each),
            Some(_) => bail!("{place}: expected a number or a list of numbers"),
        }
    };
    let names = match object.get("names") {
        None => None,
        Some(v) => Some(
            serde_json::from_value::<Vec<String>>(v.clone())
                .with_context(|| format!("{}: names must be a list of strings", path.display()))?,
        ),
    };
    Ok(Range {
        lower: bound("lower")?,
        upper: bound("upper")?,
        names,
    })
}
