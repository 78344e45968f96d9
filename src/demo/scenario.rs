//! The invented pump-fleet scenario: its twelve sensor features (physical units, valid ranges, sensor
//! tolerances), its four condition classes and the fixed sizes and seed of the bundled data.
//!
//! Everything here is invented for the demo; no number comes from a real pump, sensor or sheet. The
//! tables are the single source for the generator, the bundled tolerance file and the documentation,
//! so they never disagree. Nothing here reads or writes files.

/// One sensor feature of the scenario.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Feature {
    /// Column name in the CSV files and `input.names` of the models.
    pub name: &'static str,
    /// Physical unit of the raw value.
    pub unit: &'static str,
    /// What the value measures.
    pub description: &'static str,
    /// Lowest valid value (the models' `input.lower`).
    pub lower: f64,
    /// Highest valid value (the models' `input.upper`).
    pub upper: f64,
    /// Tolerance of the (invented) sensor sheet in the feature's unit: the per-feature budget radius.
    pub tolerance: f64,
}

/// The twelve features in model input order.
pub const FEATURES: [Feature; 12] = [
    Feature {
        name: "vel_1x_mm_s",
        unit: "mm/s",
        description: "RMS vibration velocity in the band around running speed (1x), radial",
        lower: 0.0,
        upper: 20.0,
        tolerance: 0.15,
    },
    Feature {
        name: "vel_2x_mm_s",
        unit: "mm/s",
        description: "RMS vibration velocity in the band around twice running speed (2x), radial",
        lower: 0.0,
        upper: 20.0,
        tolerance: 0.15,
    },
    Feature {
        name: "vel_high_band_mm_s",
        unit: "mm/s",
        description: "RMS vibration velocity in the high band (bearing defect frequencies), radial",
        lower: 0.0,
        upper: 10.0,
        tolerance: 0.08,
    },
    Feature {
        name: "vel_axial_mm_s",
        unit: "mm/s",
        description: "overall RMS vibration velocity, axial direction",
        lower: 0.0,
        upper: 20.0,
        tolerance: 0.15,
    },
    Feature {
        name: "crest_factor",
        unit: "1",
        description: "peak over RMS of the acceleration signal",
        lower: 1.0,
        upper: 12.0,
        tolerance: 0.1,
    },
    Feature {
        name: "kurtosis",
        unit: "1",
        description: "kurtosis of the acceleration signal (3 for Gaussian noise)",
        lower: 1.0,
        upper: 20.0,
        tolerance: 0.2,
    },
    Feature {
        name: "bearing_temp_rise_c",
        unit: "°C",
        description: "drive-end bearing temperature above ambient",
        lower: 0.0,
        upper: 60.0,
        tolerance: 0.5,
    },
    Feature {
        name: "motor_current_a",
        unit: "A",
        description: "RMS motor phase current",
        lower: 0.0,
        upper: 80.0,
        tolerance: 0.4,
    },
    Feature {
        name: "suction_pressure_bar",
        unit: "bar",
        description: "absolute pressure at the pump inlet",
        lower: 0.0,
        upper: 6.0,
        tolerance: 0.03,
    },
    Feature {
        name: "discharge_pressure_bar",
        unit: "bar",
        description: "gauge pressure at the pump outlet",
        lower: 0.0,
        upper: 16.0,
        tolerance: 0.06,
    },
    Feature {
        name: "flow_m3_h",
        unit: "m³/h",
        description: "volume flow through the pump",
        lower: 0.0,
        upper: 450.0,
        tolerance: 2.0,
    },
    Feature {
        name: "acoustic_level_db",
        unit: "dB",
        description: "high-frequency acoustic level at the casing",
        lower: 40.0,
        upper: 120.0,
        tolerance: 0.5,
    },
];

/// The condition classes in model output order; index 0 is the healthy class.
pub const CLASSES: [&str; 4] = ["normal", "misalignment", "bearing-wear", "cavitation"];

/// Index of the healthy class `normal` in [`CLASSES`].
pub const NORMAL_CLASS: usize = 0;

/// The seed the bundled data were generated with.
pub const DEFAULT_SEED: u64 = 20_260_412;

/// Rows of the bundled training set (equal counts per class).
pub const TRAIN_ROWS: usize = 1600;

/// Rows of the bundled acceptance set (equal counts per class).
pub const ACCEPTANCE_ROWS: usize = 360;

/// Decimals every generated value is rounded to when written.
pub const DECIMALS: usize = 3;

/// The feature names in model input order.
pub fn feature_names() -> Vec<String> {
    FEATURES.iter().map(|f| f.name.to_owned()).collect()
}

/// The class names in model output order.
pub fn class_names() -> Vec<String> {
    CLASSES.iter().map(|c| (*c).to_owned()).collect()
}

/// Per-feature valid lower ends, in input order.
pub fn lower_bounds() -> Vec<f64> {
    FEATURES.iter().map(|f| f.lower).collect()
}

/// Per-feature valid upper ends, in input order.
pub fn upper_bounds() -> Vec<f64> {
    FEATURES.iter().map(|f| f.upper).collect()
}

/// Per-feature sensor tolerances (budget radii in raw units), in input order.
pub fn tolerances() -> Vec<f64> {
    FEATURES.iter().map(|f| f.tolerance).collect()
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn tables_are_consistent() {
        let mut names = std::collections::HashSet::new();
        for f in &FEATURES {
            assert!(names.insert(f.name), "duplicate feature {}", f.name);
            assert!(f.lower < f.upper, "{}: empty range", f.name);
            assert!(f.tolerance > 0.0, "{}: tolerance must be positive", f.name);
            assert!(
                f.tolerance < (f.upper - f.lower) / 20.0,
                "{}: tolerance too wide",
                f.name
            );
        }
        assert_eq!(CLASSES[NORMAL_CLASS], "normal");
        assert_eq!(TRAIN_ROWS % CLASSES.len(), 0);
        assert_eq!(ACCEPTANCE_ROWS % CLASSES.len(), 0);
    }
}
