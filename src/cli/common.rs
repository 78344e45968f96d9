//! Argument pieces shared by several subcommands: loading models and data with their context, and
//! turning `--eps` / `--norm` into a checked [`Budget`].

use std::path::Path;

use anyhow::bail;

use crate::data::{load_csv, DataOptions, Dataset};
use crate::model::Model;
use crate::threat::{Budget, Norm};

/// Loads a model file (the JSON layout), refusing models above the parameter limit unless allowed.
pub fn load_model(path: &Path, allow_large: bool) -> anyhow::Result<Model> {
    let model = Model::load(path)?;
    let parameters = model.parameter_count();
    if !allow_large && parameters > crate::limits::MAX_PARAMETERS {
        bail!(
            "{}: the model has {parameters} parameters, above the limit of {} (use --allow-large)",
            path.display(),
            crate::limits::MAX_PARAMETERS
        );
    }
    Ok(model)
}

/// Loads a data file for `model`.
pub fn load_data(path: &Path, model: &Model, label_column: &str, allow_large: bool) -> anyhow::Result<Dataset> {
    let options = DataOptions {
        label_column: label_column.to_owned(),
        max_bytes: if allow_large { u64::MAX } else { crate::limits::MAX_DATA_FILE_BYTES },
        ..DataOptions::default()
    };
    Ok(load_csv(path, model, &options)?)
}

/// Parses `--norm`.
pub fn parse_norm(text: &str) -> anyhow::Result<Norm> {
    text.parse::<Norm>().map_err(|m| anyhow::anyhow!("--norm: {m}"))
}

/// Parses `--eps` as one non-negative finite number for all features.
pub fn parse_epsilon(text: &str) -> anyhow::Result<f64> {
    let value: f64 = text
        .trim()
        .parse()
        .map_err(|_| anyhow::anyhow!("--eps: \"{text}\" is not a number"))?;
    if !value.is_finite() || value < 0.0 {
        bail!("--eps: {value} is not allowed, expected a finite number ≥ 0");
    }
    Ok(value)
}

/// The uniform budget of `--eps E --norm N` for `model`.
pub fn uniform_budget(eps: &str, norm: &str, model: &Model) -> anyhow::Result<Budget> {
    Ok(Budget::uniform(parse_norm(norm)?, parse_epsilon(eps)?, model.input.dim))
}

/// Checks `--floor` lies in [0, 1].
pub fn check_floor(floor: Option<f64>) -> anyhow::Result<Option<f64>> {
    if let Some(f) = floor {
        if !(0.0..=1.0).contains(&f) {
            bail!("--floor: {f} is not allowed, expected a fraction in [0, 1]");
        }
    }
    Ok(floor)
}
