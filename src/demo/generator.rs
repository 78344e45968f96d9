//! The seeded generator of the pump-fleet data (training and acceptance CSV).
//!
//! Each row draws an operating point (load fraction of the pump), the healthy readings it implies, and
//! for a fault class a severity that shifts the readings the fault affects; sensor noise on top makes
//! mild faults overlap with `normal`, so robustness is not trivial. The output is **identical on every
//! platform** for a given seed: random numbers come from ChaCha8 (`rand_chacha`), turned into floats by
//! integer arithmetic only, Gaussian noise is the sum of twelve uniforms (Irwin–Hall, mean 0, variance
//! 1, no `exp`/`ln`), only `+ − ×` are used on floats, and values are written rounded to
//! [`super::scenario::DECIMALS`] decimals. It never reads or writes files.

use nalgebra::DMatrix;
use rand_chacha::rand_core::{RngCore, SeedableRng};
use rand_chacha::ChaCha8Rng;

use super::scenario::{ACCEPTANCE_ROWS, CLASSES, DECIMALS, FEATURES, TRAIN_ROWS};
use crate::data::Dataset;

/// ChaCha stream of the training rows (the acceptance rows use another stream of the same seed).
const TRAIN_STREAM: u64 = 1;
/// ChaCha stream of the acceptance rows.
const ACCEPTANCE_STREAM: u64 = 2;

/// Generated rows: features rounded as written, labels as class indices.
#[derive(Debug, Clone, PartialEq)]
pub struct GeneratedSet {
    /// The feature (column) names, in input order.
    pub names: Vec<String>,
    /// One row of feature values per sample, in input order, already rounded.
    pub rows: Vec<Vec<f64>>,
    /// Class index of each row.
    pub labels: Vec<usize>,
}

impl GeneratedSet {
    /// The CSV text: header `label,<feature names>`, labels as class names, fixed decimals, `\n` endings.
    pub fn to_csv(&self) -> String {
        let mut text = String::from("label");
        for name in &self.names {
            text.push(',');
            text.push_str(name);
        }
        text.push('\n');
        for (row, &label) in self.rows.iter().zip(&self.labels) {
            text.push_str(CLASSES[label]);
            for v in row {
                text.push(',');
                text.push_str(&format!("{v:.DECIMALS$}"));
            }
            text.push('\n');
        }
        text
    }

    /// The rows as a [`Dataset`] (one column per sample).
    pub fn to_dataset(&self) -> Dataset {
        let values: Vec<f64> = self.rows.iter().flat_map(|r| r.iter().copied()).collect();
        Dataset {
            features: DMatrix::from_vec(self.names.len(), self.rows.len(), values),
            labels: self.labels.clone(),
        }
    }
}

/// The bundled sets for one seed: the twelve-feature readings and the spectra.
#[derive(Debug, Clone, PartialEq)]
pub struct GeneratedData {
    /// Training rows ([`TRAIN_ROWS`]).
    pub train: GeneratedSet,
    /// Acceptance rows ([`ACCEPTANCE_ROWS`]), drawn independently of the training rows.
    pub acceptance: GeneratedSet,
    /// Spectrum training rows ([`super::spectrum`]; [`TRAIN_ROWS`]).
    pub spectrum_train: GeneratedSet,
    /// Spectrum acceptance rows ([`ACCEPTANCE_ROWS`]), from their own stream.
    pub spectrum_acceptance: GeneratedSet,
}

/// Generates the training and acceptance sets of both input forms for `seed`.
pub fn generate(seed: u64) -> GeneratedData {
    let (spectrum_train, spectrum_acceptance) = super::spectrum::generate(seed);
    GeneratedData {
        train: generate_set(seed, TRAIN_STREAM, TRAIN_ROWS),
        acceptance: generate_set(seed, ACCEPTANCE_STREAM, ACCEPTANCE_ROWS),
        spectrum_train,
        spectrum_acceptance,
    }
}

/// Generates `rows` rows (rounded down to a multiple of the class count, equal counts per class, in
/// shuffled order) from ChaCha stream `stream` of `seed`.
pub fn generate_set(seed: u64, stream: u64, rows: usize) -> GeneratedSet {
    draw_set(
        seed,
        stream,
        rows,
        super::scenario::feature_names(),
        |source, c| draw_row(source, c).to_vec(),
    )
}

/// `rows` rows (rounded down to a multiple of the class count, equal counts per class, in shuffled
/// order) drawn by `draw` from ChaCha stream `stream` of `seed`, with columns `names`.
pub(super) fn draw_set(
    seed: u64,
    stream: u64,
    rows: usize,
    names: Vec<String>,
    mut draw: impl FnMut(&mut Source, usize) -> Vec<f64>,
) -> GeneratedSet {
    let mut source = Source::new(seed, stream);
    let per_class = rows / CLASSES.len();
    let mut labels: Vec<usize> = (0..CLASSES.len())
        .flat_map(|c| std::iter::repeat_n(c, per_class))
        .collect();
    // Fisher–Yates shuffle with an unbiased integer draw.
    for i in (1..labels.len()).rev() {
        let j = source.below(i as u64 + 1) as usize;
        labels.swap(i, j);
    }
    let rows = labels.iter().map(|&c| draw(&mut source, c)).collect();
    GeneratedSet {
        names,
        rows,
        labels,
    }
}

/// Random numbers from ChaCha8 using integer arithmetic only.
pub(super) struct Source {
    rng: ChaCha8Rng,
}

impl Source {
    fn new(seed: u64, stream: u64) -> Source {
        let mut key = [0u8; 32];
        key[..8].copy_from_slice(&seed.to_le_bytes());
        let mut rng = ChaCha8Rng::from_seed(key);
        rng.set_stream(stream);
        Source { rng }
    }

    /// Uniform in [0, 1): the top 53 bits of a 64-bit draw, scaled exactly by 2⁻⁵³.
    fn uniform(&mut self) -> f64 {
        (self.rng.next_u64() >> 11) as f64 * (1.0 / (1u64 << 53) as f64)
    }

    /// Uniform in [low, high).
    pub(super) fn between(&mut self, low: f64, high: f64) -> f64 {
        low + (high - low) * self.uniform()
    }

    /// Approximately standard normal: sum of twelve uniforms minus 6 (Irwin–Hall; mean 0, variance 1,
    /// support [−6, 6]).
    pub(super) fn gaussian(&mut self) -> f64 {
        let mut sum = 0.0;
        for _ in 0..12 {
            sum += self.uniform();
        }
        sum - 6.0
    }

    /// Uniform integer in `0..n` (rejection sampling, no modulo bias).
    fn below(&mut self, n: u64) -> u64 {
        let zone = u64::MAX - (u64::MAX % n);
        loop {
            let v = self.rng.next_u64();
            if v < zone {
                return v % n;
            }
        }
    }
}

/// Overall strength of the fault effects relative to the healthy spread (sets how much classes overlap).
const EFFECT: f64 = 1.6;

/// Feature indices, in [`FEATURES`] order.
mod index {
    pub const VEL_1X: usize = 0;
    pub const VEL_2X: usize = 1;
    pub const VEL_HIGH: usize = 2;
    pub const VEL_AXIAL: usize = 3;
    pub const CREST: usize = 4;
    pub const KURTOSIS: usize = 5;
    pub const TEMP_RISE: usize = 6;
    pub const CURRENT: usize = 7;
    pub const SUCTION: usize = 8;
    pub const DISCHARGE: usize = 9;
    pub const FLOW: usize = 10;
    pub const ACOUSTIC: usize = 11;
}

/// One row of class `class`: healthy readings at a random load, the fault's shifts scaled by a random
/// severity, then clipping to the valid range and rounding.
fn draw_row(source: &mut Source, class: usize) -> [f64; 12] {
    use index::*;
    let load = source.between(0.55, 1.0);
    let mut x = [0.0; 12];
    // Healthy pump at this load (invented relations: flow and current grow with load, head falls).
    x[FLOW] = 380.0 * load + 10.0 * source.gaussian();
    x[DISCHARGE] = 11.0 - 3.0 * load + 0.3 * source.gaussian();
    x[SUCTION] = 2.2 + 0.3 * source.gaussian();
    x[CURRENT] = 22.0 + 30.0 * load + 1.5 * source.gaussian();
    x[TEMP_RISE] = 10.0 + 12.0 * load + 2.5 * source.gaussian();
    x[VEL_1X] = 1.6 + 1.0 * load + 0.4 * source.gaussian();
    x[VEL_2X] = 0.6 + 0.2 * source.gaussian();
    x[VEL_HIGH] = 0.35 + 0.1 * source.gaussian();
    x[VEL_AXIAL] = 0.8 + 0.25 * source.gaussian();
    x[CREST] = 3.1 + 0.35 * source.gaussian();
    x[KURTOSIS] = 3.0 + 0.35 * source.gaussian();
    x[ACOUSTIC] = 70.0 + 8.0 * load + 2.5 * source.gaussian();
    // Fault severity in (0, 1]; mild faults look almost healthy.
    let severity = source.between(0.03, 1.0);
    let mut shift = |feature: usize, amount: f64, source: &mut Source| {
        x[feature] += EFFECT * amount * severity * (1.0 + 0.25 * source.gaussian());
    };
    match class {
        1 => {
            // misalignment: 2x and axial vibration, some 1x, warmer bearing, more current
            shift(VEL_1X, 1.2, source);
            shift(VEL_2X, 2.4, source);
            shift(VEL_AXIAL, 2.8, source);
            shift(TEMP_RISE, 5.0, source);
            shift(CURRENT, 2.0, source);
            shift(CREST, 0.2, source);
        }
        2 => {
            // bearing wear: high-band vibration, impulsive signal, hot bearing
            shift(VEL_HIGH, 1.6, source);
            shift(CREST, 2.2, source);
            shift(KURTOSIS, 4.5, source);
            shift(TEMP_RISE, 9.0, source);
            shift(VEL_1X, 0.4, source);
            shift(ACOUSTIC, 3.0, source);
        }
        3 => {
            // cavitation: low inlet pressure, lost flow and head, broadband noise
            shift(SUCTION, -1.3, source);
            shift(FLOW, -45.0, source);
            shift(DISCHARGE, -0.9, source);
            shift(CURRENT, -2.5, source);
            shift(ACOUSTIC, 10.0, source);
            shift(VEL_HIGH, 1.0, source);
            shift(KURTOSIS, 1.2, source);
            shift(CREST, 0.8, source);
            shift(VEL_1X, 0.5, source);
        }
        _ => {}
    }
    for (value, feature) in x.iter_mut().zip(&FEATURES) {
        *value = round(value.clamp(feature.lower, feature.upper));
    }
    x
}

/// Rounds to [`DECIMALS`] decimals exactly as the CSV writes it (decimal formatting, then parsing).
pub(super) fn round(value: f64) -> f64 {
    format!("{value:.DECIMALS$}")
        .parse()
        .expect("a formatted finite number parses")
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn same_seed_same_rows_other_seed_other_rows() {
        let a = generate_set(7, 1, 40);
        let b = generate_set(7, 1, 40);
        let c = generate_set(8, 1, 40);
        assert_eq!(a.to_csv(), b.to_csv());
        assert_ne!(a.to_csv(), c.to_csv());
    }

    #[test]
    fn classes_are_balanced_and_values_in_range() {
        let set = generate_set(3, 2, 400);
        for c in 0..CLASSES.len() {
            assert_eq!(set.labels.iter().filter(|&&l| l == c).count(), 100);
        }
        for row in &set.rows {
            for (v, f) in row.iter().zip(&FEATURES) {
                assert!(*v >= f.lower && *v <= f.upper, "{} = {v}", f.name);
            }
        }
    }

    #[test]
    fn gaussian_has_unit_variance() {
        let mut source = Source::new(1, 0);
        let n = 20_000;
        let draws: Vec<f64> = (0..n).map(|_| source.gaussian()).collect();
        let mean = draws.iter().sum::<f64>() / n as f64;
        let variance = draws.iter().map(|d| (d - mean) * (d - mean)).sum::<f64>() / n as f64;
        // Irwin–Hall with 12 terms: mean 0, variance 12 · 1/12 = 1 (common practice).
        assert!(mean.abs() < 0.03, "mean {mean}");
        assert!((variance - 1.0).abs() < 0.05, "variance {variance}");
    }
}
