//! Argument pieces shared by several subcommands: loading models and data with their context, the
//! requirement flags that `certify`, `attack` and `retrain` share ([`RequirementArgs`]: budget, norm,
//! floor, class-change rule, requirement file) parsed by one function.

use std::path::{Path, PathBuf};

use anyhow::bail;

use crate::data::{load_csv_counted, DataOptions, Dataset, OutOfRange, RangeCounts};
use crate::model::Model;
use crate::threat::requirement::{Requirement, RequirementLine, RequirementSpec, ToleranceSource};
use crate::threat::Norm;

/// Loads a model file (the JSON layout, or ONNX when the name ends in `.onnx`), refusing models above the parameter limit unless allowed.
pub fn load_model(path: &Path, allow_large: bool) -> anyhow::Result<Model> {
    let max_bytes = if allow_large {
        u64::MAX
    } else {
        crate::limits::MAX_MODEL_FILE_BYTES
    };
    let model = if crate::model::onnx::is_onnx_path(path) {
        // ONNX is converted in memory; its input range is unbounded unless the file's metadata says so.
        let options = crate::model::onnx::ImportOptions {
            allow_large,
            ..Default::default()
        };
        crate::model::onnx::load_onnx(path, max_bytes, &options)?
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
    input: &DataArgs,
) -> anyhow::Result<(Dataset, RangeCounts)> {
    let DataArgs {
        label_column,
        out_of_range,
        allow_large,
    } = input;
    let allow_large = *allow_large;
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
pub fn load_data(path: &Path, model: &Model, input: &DataArgs) -> anyhow::Result<Dataset> {
    load_data_counted(path, model, input).map(|(d, _)| d)
}

/// How the data files of `certify`, `attack`, `retrain` and `evaluate` are read: one set of flags.
#[derive(Debug, Clone, clap::Args)]
#[command(next_help_heading = "Inputs")]
pub struct DataArgs {
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

/// Parses `--norm`.
pub fn parse_norm(text: &str) -> anyhow::Result<Norm> {
    text.parse::<Norm>()
        .map_err(|m| anyhow::anyhow!("--norm: {m}"))
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
    spec: &mut RequirementSpec,
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

/// How many epsilons a command takes.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Epsilons {
    /// One or a sweep (a list or a range).
    Sweep,
    /// Exactly one.
    One,
}

/// The requirement flags shared by `certify`, `attack` and `retrain`; parsed by one function
/// ([`RequirementArgs::spec`]) so every command reads them the same way.
#[derive(Debug, Clone, clap::Args)]
#[command(next_help_heading = "Requirement")]
pub struct RequirementArgs {
    /// The budget: a number (raw input units), a sweep `0.01,0.02,0.05` or `start:stop:step`
    /// (certify only), or a per-feature tolerance file (JSON or CSV; radius = scale × tolerance, scale 1).
    #[arg(long, allow_hyphen_values = true, value_name = "E|FILE")]
    pub eps: Option<String>,
    /// Per-feature tolerance file (JSON or CSV); --eps then gives the scale [default: 1].
    #[arg(long, value_name = "FILE")]
    pub tolerances: Option<PathBuf>,
    /// A requirement file (TOML or JSON: epsilon, tolerances, norm, floor, forbid_into, forbid_from, …);
    /// flags override its values.
    #[arg(long, value_name = "FILE")]
    pub requirement: Option<PathBuf>,
    /// The norm of the ball: linf or l2 [default: linf].
    #[arg(long, value_name = "linf|l2")]
    pub norm: Option<String>,
    /// Required robust fraction in [0, 1].
    #[arg(long, allow_hyphen_values = true, value_name = "F")]
    pub floor: Option<f64>,
    /// Only changes into these classes count (comma-separated names or indices) [default: any change].
    #[arg(long, value_name = "CLASSES")]
    pub forbid_into: Option<String>,
    /// Apply --forbid-into only to samples of these true classes (others: any change counts).
    #[arg(long, value_name = "CLASSES")]
    pub forbid_from: Option<String>,
}

impl RequirementArgs {
    /// The flags as an unchecked spec (values named by their flag), taking `epsilons` of them.
    pub fn spec(&self, epsilons: Epsilons) -> anyhow::Result<RequirementSpec> {
        let mut spec = RequirementSpec::default();
        if let Some(e) = &self.eps {
            match parse_epsilon_argument(e)? {
                EpsilonArgument::Values(v) if v.len() > 1 && epsilons == Epsilons::One => {
                    bail!("--eps: \"{e}\" is a sweep, expected one number or a tolerance file (only certify sweeps)")
                }
                EpsilonArgument::Values(v) => spec.epsilons = Some((v, "--eps".into())),
                EpsilonArgument::ToleranceFile(p) => {
                    if self.tolerances.is_some() {
                        bail!("--eps names a tolerance file and --tolerances is given too; give the file once and the scale with --eps");
                    }
                    spec.tolerances = Some((ToleranceSource::File(p), "--eps".into()));
                }
            }
        }
        if let Some(t) = &self.tolerances {
            spec.tolerances = Some((ToleranceSource::File(t.clone()), "--tolerances".into()));
        }
        if let Some(n) = &self.norm {
            spec.norm = Some((parse_norm(n)?, "--norm".into()));
        }
        spec.floor = self.floor.map(|v| (v, "--floor".to_string()));
        add_class_change_flags(
            &mut spec,
            self.forbid_into.as_deref(),
            self.forbid_from.as_deref(),
        )?;
        Ok(spec)
    }

    /// The requirement of the run: the requirement file's values overridden by the flags (`extra`
    /// adds command-specific flags to the spec), resolved against `model`. Without any budget the
    /// error lists only the forms this command accepts.
    pub fn resolve(
        &self,
        model: &Model,
        epsilons: Epsilons,
        extra: impl FnOnce(&mut RequirementSpec),
    ) -> anyhow::Result<Requirement> {
        Ok(self.resolve_with_lines(model, epsilons, extra)?.0)
    }

    /// As [`RequirementArgs::resolve`], with the checked lines of the file's requirement list (empty
    /// without a list). With a list the top-level budget may be absent: the lines carry theirs.
    pub fn resolve_with_lines(
        &self,
        model: &Model,
        epsilons: Epsilons,
        extra: impl FnOnce(&mut RequirementSpec),
    ) -> anyhow::Result<(Requirement, Vec<RequirementLine>)> {
        let mut flags = self.spec(epsilons)?;
        extra(&mut flags);
        let file = match &self.requirement {
            Some(p) => RequirementSpec::from_file(p)?,
            None => RequirementSpec::default(),
        };
        let merged = file.overridden_by(flags);
        if merged.epsilons.is_none() && merged.tolerances.is_none() && merged.lines.is_empty() {
            bail!(
                "--eps: no budget given: pass --eps with {}, or --tolerances FILE, or --requirement FILE with epsilon or tolerances",
                match epsilons {
                    Epsilons::Sweep => "a number, a list, a range or a tolerance file",
                    Epsilons::One => "one number or a tolerance file",
                }
            );
        }
        if epsilons == Epsilons::One {
            if let Some((values, place)) = &merged.epsilons {
                if values.len() > 1 {
                    bail!(
                        "{place}: {} epsilons, expected one (only certify sweeps)",
                        values.len()
                    );
                }
            }
        }
        let lines = merged.resolve_lines(model)?;
        Ok((merged.resolve(model)?, lines))
    }
}
