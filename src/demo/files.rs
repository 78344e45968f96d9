//! The demo's text files, made from the scenario tables: the per-feature tolerance file, the
//! requirement file, and the writer that puts data, tolerances and requirement into a folder.
//!
//! The tolerance file follows the project's tolerance format (a JSON object `{"feature": tolerance}`,
//! raw units) and the requirement file the requirement format (TOML), so the ordinary `certify` and
//! `retrain` commands read them unchanged. Every file is written atomically.

use std::path::{Path, PathBuf};

use super::generator::GeneratedData;
use super::scenario::{CLASSES, FEATURES, NORMAL_CLASS};
use super::spectrum;
use super::DemoError;

/// File name of the training data inside the data folder.
pub const TRAIN_FILE: &str = "train.csv";
/// File name of the acceptance data inside the data folder.
pub const ACCEPTANCE_FILE: &str = "acceptance.csv";
/// File name of the per-feature tolerance file inside the data folder.
pub const TOLERANCE_FILE: &str = "tolerances.json";
/// File name of the requirement file inside the data folder.
pub const REQUIREMENT_FILE: &str = "requirement.toml";
/// File name of the spectrum training data inside the data folder.
pub const SPECTRUM_TRAIN_FILE: &str = "spectrum-train.csv";
/// File name of the spectrum acceptance data inside the data folder.
pub const SPECTRUM_ACCEPTANCE_FILE: &str = "spectrum-acceptance.csv";
/// File name of the per-bin tolerance file inside the data folder.
pub const SPECTRUM_TOLERANCE_FILE: &str = "spectrum-tolerances.json";
/// File name of the spectrum requirement file inside the data folder.
pub const SPECTRUM_REQUIREMENT_FILE: &str = "spectrum-requirement.toml";

/// The release floor of the demo requirement: the fraction of acceptance samples that must be certified.
pub const DEMO_FLOOR: f64 = 0.80;

/// The tolerance file: one entry per feature in input order, each the sensor tolerance in raw units.
pub fn tolerance_json() -> String {
    let entries: Vec<(&str, f64)> = FEATURES.iter().map(|f| (f.name, f.tolerance)).collect();
    tolerance_object(&entries)
}

/// The per-bin tolerance file of the spectra: one entry per bin, in mm/s.
pub fn spectrum_tolerance_json() -> String {
    let names = spectrum::bin_names();
    let entries: Vec<(&str, f64)> = names
        .iter()
        .map(String::as_str)
        .zip(spectrum::tolerances())
        .collect();
    tolerance_object(&entries)
}

fn tolerance_object(entries: &[(&str, f64)]) -> String {
    let mut text = String::from("{\n");
    for (i, (name, tolerance)) in entries.iter().enumerate() {
        let comma = if i + 1 < entries.len() { "," } else { "" };
        text.push_str(&format!("  \"{name}\": {tolerance}{comma}\n"));
    }
    text.push_str("}\n");
    text
}

/// The requirement file (TOML): L-inf ball of one sensor tolerance per feature, the floor
/// [`DEMO_FLOOR`], and only "a fault sample moved to `normal`" counts as a failure for fault samples
/// (a `normal` sample must not change at all).
pub fn requirement_toml() -> String {
    requirement_for(
        TOLERANCE_FILE,
        "Every feature may be off by up to its sensor tolerance (tolerances.json, raw units) at once.",
    )
}

/// The spectrum requirement file: the same rule over the spectra, one analyser tolerance per bin.
pub fn spectrum_requirement_toml() -> String {
    requirement_for(
        SPECTRUM_TOLERANCE_FILE,
        "Every bin may be off by up to its analyser tolerance (spectrum-tolerances.json, mm/s) at once.",
    )
}

fn requirement_for(tolerance_file: &str, budget: &str) -> String {
    let faults: Vec<String> = (0..CLASSES.len())
        .filter(|c| *c != NORMAL_CLASS)
        .map(|c| format!("\"{}\"", CLASSES[c]))
        .collect();
    format!(
        "# Release rule of the invented pump-fleet demo (see docs/demo-scenario.md).\n\
         # {budget}\n\
         norm = \"linf\"\n\
         tolerances = \"{tolerance_file}\"\n\
         epsilon = 1.0\n\
         # At least this fraction of the acceptance set must be certified.\n\
         floor = {DEMO_FLOOR}\n\
         # The dangerous confusion: a faulty pump reported as normal.\n\
         forbid_into = [\"{normal}\"]\n\
         forbid_from = [{faults}]\n",
        normal = CLASSES[NORMAL_CLASS],
        faults = faults.join(", "),
    )
}

/// Writes `train.csv`, `acceptance.csv`, `tolerances.json`, `requirement.toml` and their spectrum
/// counterparts into `folder` (created if missing) and returns the paths written.
pub fn write_data_files(folder: &Path, data: &GeneratedData) -> Result<Vec<PathBuf>, DemoError> {
    let files = [
        (TRAIN_FILE, data.train.to_csv()),
        (ACCEPTANCE_FILE, data.acceptance.to_csv()),
        (TOLERANCE_FILE, tolerance_json()),
        (REQUIREMENT_FILE, requirement_toml()),
        (SPECTRUM_TRAIN_FILE, data.spectrum_train.to_csv()),
        (SPECTRUM_ACCEPTANCE_FILE, data.spectrum_acceptance.to_csv()),
        (SPECTRUM_TOLERANCE_FILE, spectrum_tolerance_json()),
        (SPECTRUM_REQUIREMENT_FILE, spectrum_requirement_toml()),
    ];
    write_all(folder, files.iter().map(|(n, t)| (*n, t.as_str())))
}

/// Writes `(name, text)` pairs into `folder` (created if missing), atomically, and returns the paths.
pub fn write_all<'a>(
    folder: &Path,
    files: impl IntoIterator<Item = (&'a str, &'a str)>,
) -> Result<Vec<PathBuf>, DemoError> {
    std::fs::create_dir_all(folder).map_err(|cause| DemoError::Io {
        path: folder.display().to_string(),
        cause,
    })?;
    let mut written = Vec::new();
    for (name, text) in files {
        let path = folder.join(name);
        crate::atomic::write_file(&path, text.as_bytes()).map_err(|cause| DemoError::Io {
            path: path.display().to_string(),
            cause,
        })?;
        written.push(path);
    }
    Ok(written)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn tolerance_file_is_json_with_every_feature() {
        let value: serde_json::Value = serde_json::from_str(&tolerance_json()).expect("valid JSON");
        let object = value.as_object().expect("an object");
        assert_eq!(object.len(), FEATURES.len());
        for f in &FEATURES {
            let t = object[f.name].as_f64().expect("a number");
            approx::assert_relative_eq!(t, f.tolerance);
        }
    }

    #[test]
    fn spectrum_tolerance_file_has_every_bin() {
        let value: serde_json::Value =
            serde_json::from_str(&spectrum_tolerance_json()).expect("valid JSON");
        let object = value.as_object().expect("an object");
        assert_eq!(object.len(), spectrum::BINS);
        for (name, t) in spectrum::bin_names().iter().zip(spectrum::tolerances()) {
            approx::assert_relative_eq!(object[name].as_f64().expect("a number"), t);
        }
        let requirement: toml::Value =
            toml::from_str(&spectrum_requirement_toml()).expect("valid TOML");
        assert_eq!(
            requirement["tolerances"].as_str(),
            Some(SPECTRUM_TOLERANCE_FILE)
        );
    }

    #[test]
    fn requirement_file_is_toml() {
        let value: toml::Value = toml::from_str(&requirement_toml()).expect("valid TOML");
        assert_eq!(value["norm"].as_str(), Some("linf"));
        approx::assert_relative_eq!(value["floor"].as_float().expect("a number"), DEMO_FLOOR);
        assert_eq!(value["forbid_from"].as_array().map(Vec::len), Some(3));
    }
}
