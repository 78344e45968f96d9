//! Argument pieces shared by several subcommands: loading models and data with their context, and
//! turning `--eps` / `--norm` into a checked [`Budget`].

use std::path::Path;

use anyhow::bail;

use crate::data::{load_csv_counted, DataOptions, Dataset, OutOfRange, RangeCounts};
use crate::model::Model;
use crate::threat::{Budget, Norm};

/// Loads a model file (the JSON layout, or ONNX when the name ends in `.onnx`), refusing models above the parameter limit unless allowed.
pub fn load_model(path: &Path, allow_large: bool) -> anyhow::Result<Model> {
    let max_bytes = if allow_large {
        u64::MAX
    } else {
        crate::limits::MAX_MODEL_FILE_BYTES
    };
    let model = if crate::model::onnx::is_onnx_path(path) {
        // ONNX is converted in memory; its input range is unbounded unless the file's metadata says so.
        crate::model::onnx::load_onnx(path, max_bytes, &Default::default())?
    } else {
        Model::load_with_limit(path, max_bytes)?
    };
    let parameters = model.parameter_count().max(model.network_parameter_count());
    if !allow_large && parameters > crate::limits::MAX_PARAMETERS {
        bail!(
            "{}: the model has {parameters} parameters, above the limit of {} (use --allow-large)",
            path.display(),
            crate::limits::MAX_PARAMETERS
        );
    }
    Ok(model)
}

/// Loads a data file for `model` under the input-range policy `out_of_range` (`--out-of-range`);
/// says on stderr how many rows the policy clipped or skipped and returns what it did (for the report).
pub fn load_data_counted(
    path: &Path,
    model: &Model,
    label_column: &str,
    out_of_range: &str,
    allow_large: bool,
) -> anyhow::Result<(Dataset, RangeCounts)> {
    let options = DataOptions {
        label_column: label_column.to_owned(),
        out_of_range: out_of_range
            .parse::<OutOfRange>()
            .map_err(|m| anyhow::anyhow!("--out-of-range: {m}"))?,
        max_bytes: if allow_large {
            u64::MAX
        } else {
            crate::limits::MAX_DATA_FILE_BYTES
        },
    };
    let (data, counts) = load_csv_counted(path, model, &options)?;
    if counts.clipped_rows() > 0 {
        eprintln!(
            "note: {}: {} of {} rows had values outside the model's input range, set to its nearest end (--out-of-range clip)",
            path.display(),
            counts.clipped_rows(),
            data.len()
        );
    }
    if counts.skipped_rows() > 0 {
        eprintln!(
            "note: {}: {} rows lie outside the model's input range and were left out (--out-of-range skip); {} remain",
            path.display(),
            counts.skipped_rows(),
            data.len()
        );
    }
    Ok((data, counts))
}

/// [`load_data_counted`] without the record of what the policy did.
pub fn load_data(
    path: &Path,
    model: &Model,
    label_column: &str,
    out_of_range: &str,
    allow_large: bool,
) -> anyhow::Result<Dataset> {
    load_data_counted(path, model, label_column, out_of_range, allow_large).map(|(d, _)| d)
}

/// Parses `--norm`.
pub fn parse_norm(text: &str) -> anyhow::Result<Norm> {
    text.parse::<Norm>()
        .map_err(|m| anyhow::anyhow!("--norm: {m}"))
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
    Ok(Budget::uniform(
        parse_norm(norm)?,
        parse_epsilon(eps)?,
        model.input.dim,
    ))
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

/// What a `--eps` value names: epsilon values (one number, a comma list or a `start:stop:step` range)
/// or a per-feature tolerance file (JSON or CSV; an existing path or a name ending in `.json`/`.csv`).
#[derive(Debug, Clone, PartialEq)]
pub enum EpsilonArgument {
    /// One or more epsilon values (several = a sweep).
    Values(Vec<f64>),
    /// A per-feature tolerance file; the scale defaults to 1.
    ToleranceFile(std::path::PathBuf),
}

/// Parses `--eps`: a number, a list `0.01,0.02,0.05`, a range `0.01:0.05:0.01`, or a tolerance file.
pub fn parse_epsilon_argument(text: &str) -> anyhow::Result<EpsilonArgument> {
    let trimmed = text.trim();
    let is_number_list = trimmed
        .chars()
        .all(|c| c.is_ascii_digit() || matches!(c, '.' | ',' | ':' | 'e' | 'E' | '-' | '+' | ' '));
    let looks_like_file = !is_number_list && {
        let lower = trimmed.to_ascii_lowercase();
        lower.ends_with(".json") || lower.ends_with(".csv") || Path::new(trimmed).is_file()
    };
    if looks_like_file {
        if !Path::new(trimmed).is_file() {
            bail!("--eps: the tolerance file \"{trimmed}\" does not exist");
        }
        return Ok(EpsilonArgument::ToleranceFile(trimmed.into()));
    }
    Ok(EpsilonArgument::Values(
        crate::threat::requirement::parse_epsilon_list(trimmed, "--eps")?,
    ))
}

/// Parses a comma-separated list of class names or indices (for `--forbid-into` / `--forbid-from`).
pub fn parse_class_list(text: &str, flag: &str) -> anyhow::Result<Vec<String>> {
    let list: Vec<String> = text
        .split(',')
        .map(|s| s.trim().to_string())
        .filter(|s| !s.is_empty())
        .collect();
    if list.is_empty() {
        bail!("{flag}: \"{text}\" names no class, expected a comma-separated list of class names or indices");
    }
    Ok(list)
}

/// Adds `--forbid-into` / `--forbid-from` (comma-separated class names or indices) to a flag spec.
pub fn add_class_change_flags(
    spec: &mut crate::threat::requirement::RequirementSpec,
    forbid_into: Option<&str>,
    forbid_from: Option<&str>,
) -> anyhow::Result<()> {
    if let Some(f) = forbid_into {
        spec.forbid_into = Some((
            parse_class_list(f, "--forbid-into")?,
            "--forbid-into".into(),
        ));
    }
    if let Some(f) = forbid_from {
        spec.forbid_from = Some((
            parse_class_list(f, "--forbid-from")?,
            "--forbid-from".into(),
        ));
    }
    Ok(())
}

/// The requirement of a run: the requirement file's values (if a file is given), overridden by the
/// command-line flags, resolved against `model`.
pub fn resolve_requirement(
    file: Option<&Path>,
    flags: crate::threat::requirement::RequirementSpec,
    model: &Model,
) -> anyhow::Result<crate::threat::requirement::Requirement> {
    let file_spec = match file {
        Some(p) => crate::threat::requirement::RequirementSpec::from_file(p)?,
        None => crate::threat::requirement::RequirementSpec::default(),
    };
    Ok(file_spec.overridden_by(flags).resolve(model)?)
}
