//! The scenario's second input form: a vibration velocity spectrum of 64 bins (0–400 Hz, 6.25 Hz
//! per bin) per reading, its per-bin valid range and (invented) analyser tolerances, and its seeded
//! generator.
//!
//! Each row draws an operating point (load, running speed of the variable-speed drive), the healthy
//! spectrum it implies (running-speed harmonics, vane pass, a fixed magnetic line, a broadband floor)
//! and, for a fault class, a severity that adds the fault's pattern: misalignment raises the 2× and
//! 3× lines, bearing wear adds lines at a non-integer multiple of the speed and a high-frequency
//! floor, cavitation a random broadband floor. Peaks move with the speed, which is what a
//! convolution is for. Everything here is invented for the demo; no number comes from a real pump,
//! sensor or analyser. The output is identical on every platform for a given seed, by the same rules
//! as [`super::generator`] (ChaCha8, integer-made uniforms, Irwin–Hall noise, `+ − ×` only, values
//! rounded as written). It never reads or writes files.

use super::generator::{draw_set, round, GeneratedSet, Source};
use super::scenario::{ACCEPTANCE_ROWS, TRAIN_ROWS};

/// Number of spectrum bins (the models' `input.shape` is `[1, BINS]`).
pub const BINS: usize = 64;

/// Width of one bin in Hz: bin `k` covers `[k · 6.25, (k + 1) · 6.25)` Hz.
pub const BIN_WIDTH_HZ: f64 = 6.25;

/// Unit of every bin: RMS vibration velocity in the bin's band.
pub const UNIT: &str = "mm/s";

/// Highest valid bin value (mm/s); the lowest is 0.
pub const UPPER: f64 = 20.0;

/// The (invented) analyser sheet: amplitude tolerance per frequency band, as `(first bin, last bin,
/// tolerance in mm/s)`: larger below 12.5 Hz (the sensor's low-frequency roll-off) and above 300 Hz
/// (the mounting resonance).
pub const TOLERANCE_BANDS: [(usize, usize, f64); 3] = [(0, 1, 0.02), (2, 47, 0.01), (48, 63, 0.02)];

/// ChaCha stream of the spectrum training rows (the tabular rows use streams 1 and 2).
const TRAIN_STREAM: u64 = 3;
/// ChaCha stream of the spectrum acceptance rows.
const ACCEPTANCE_STREAM: u64 = 4;

/// The column name of bin `k` (`vel_bin_00` … `vel_bin_63`).
pub fn bin_name(k: usize) -> String {
    format!("vel_bin_{k:02}")
}

/// The bin names in input order.
pub fn bin_names() -> Vec<String> {
    (0..BINS).map(bin_name).collect()
}

/// Per-bin tolerances (budget radii in mm/s), in input order, from [`TOLERANCE_BANDS`].
pub fn tolerances() -> Vec<f64> {
    (0..BINS)
        .map(|k| {
            TOLERANCE_BANDS
                .iter()
                .find(|(first, last, _)| (*first..=*last).contains(&k))
                .map_or(0.0, |band| band.2)
        })
        .collect()
}

/// The spectrum training and acceptance sets for `seed` ([`TRAIN_ROWS`] and [`ACCEPTANCE_ROWS`]
/// rows, equal counts per class, from their own ChaCha streams).
pub fn generate(seed: u64) -> (GeneratedSet, GeneratedSet) {
    let set = |stream, rows| draw_set(seed, stream, rows, bin_names(), draw_spectrum);
    (
        set(TRAIN_STREAM, TRAIN_ROWS),
        set(ACCEPTANCE_STREAM, ACCEPTANCE_ROWS),
    )
}

/// Overall strength of the fault patterns (sets how much the classes overlap).
const EFFECT: f64 = 1.0;

/// `1 / BIN_WIDTH_HZ`: a frequency in Hz times this is its position in bins.
const BINS_PER_HZ: f64 = 0.16;

/// Adds a line of `amplitude` mm/s at `hz`, shared between the two nearest bins in proportion to
/// their distance from it (bin `k`'s centre is at `k + 0.5` bins); lines outside the range are lost.
fn line(spectrum: &mut [f64], hz: f64, amplitude: f64) {
    let position = hz * BINS_PER_HZ;
    for (k, value) in spectrum.iter_mut().enumerate() {
        let distance = (position - (k as f64 + 0.5)).abs();
        if distance < 1.0 {
            *value += amplitude * (1.0 - distance);
        }
    }
}

/// `amount` with relative Gaussian noise of standard deviation `spread`.
fn noisy(amount: f64, spread: f64, source: &mut Source) -> f64 {
    amount * (1.0 + spread * source.gaussian())
}

/// One spectrum of class `class` (index into [`super::scenario::CLASSES`]).
fn draw_spectrum(source: &mut Source, class: usize) -> Vec<f64> {
    let load = source.between(0.55, 1.0);
    let speed = source.between(15.0, 25.0); // running speed in Hz (900–1500 rpm)
    let mut x = vec![0.0; BINS];
    // Broadband floor, falling with frequency.
    for (k, value) in x.iter_mut().enumerate() {
        let level = 0.05 + 0.05 * (BINS - 1 - k) as f64 * (1.0 / (BINS - 1) as f64);
        *value = noisy(level, 0.25, source);
    }
    // Healthy lines: running-speed harmonics, vane pass (6 vanes) and its double, and the magnetic
    // line at twice the 50 Hz mains frequency (fixed, whatever the speed).
    let healthy = [
        (1.0, 0.8 + 0.8 * load, 0.1),
        (2.0, 0.22, 0.2),
        (3.0, 0.1, 0.2),
        (6.0, 0.45 * load, 0.2),
        (12.0, 0.12 * load, 0.2),
    ];
    for (harmonic, amplitude, spread) in healthy {
        let a = noisy(amplitude, spread, source);
        line(&mut x, harmonic * speed, a);
    }
    let magnetic = noisy(0.1, 0.2, source);
    line(&mut x, 100.0, magnetic);
    // Fault pattern scaled by a severity in (0, 1]; mild faults look almost healthy.
    let severity = EFFECT * source.between(0.03, 1.0);
    match class {
        1 => {
            // misalignment: strong 2×, some 1×, 3× and 4×
            for (harmonic, amount) in [(1.0, 0.6), (2.0, 1.6), (3.0, 0.7), (4.0, 0.3)] {
                let a = noisy(amount * severity, 0.25, source);
                line(&mut x, harmonic * speed, a);
            }
        }
        2 => {
            // bearing wear: outer-race defect lines at 3.57× the speed and harmonics, high floor
            for (order, amount) in [(1.0, 0.7), (2.0, 0.45), (3.0, 0.3)] {
                let a = noisy(amount * severity, 0.25, source);
                line(&mut x, order * 3.57 * speed, a);
            }
            for value in &mut x[40..] {
                *value += noisy(0.2 * severity, 0.3, source);
            }
        }
        3 => {
            // cavitation: random broadband floor from 125 Hz up, unsteady vane pass, less 1×
            for value in &mut x[20..] {
                *value += noisy(0.35 * severity, 0.5, source).max(0.0);
            }
            let unsteady = 0.3 * severity * source.gaussian();
            line(&mut x, 6.0 * speed, unsteady);
            line(&mut x, speed, -0.15 * severity);
        }
        _ => {}
    }
    x.into_iter().map(|v| round(v.clamp(0.0, UPPER))).collect()
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::demo::scenario::CLASSES;

    #[test]
    fn tolerances_cover_every_bin_once() {
        let t = tolerances();
        assert_eq!(t.len(), BINS);
        assert!(t.iter().all(|v| *v > 0.0 && *v < UPPER / 20.0));
        let covered: usize = TOLERANCE_BANDS.iter().map(|(a, b, _)| b - a + 1).sum();
        assert_eq!(covered, BINS);
        assert_eq!(bin_names()[7], "vel_bin_07");
    }

    #[test]
    fn a_line_is_shared_between_the_two_nearest_bins() {
        let mut x = vec![0.0; BINS];
        // 25 Hz sits at bin position 4, halfway between the centres of bins 3 and 4.
        line(&mut x, 25.0, 2.0);
        assert!((x[3] - 1.0).abs() < 1e-12 && (x[4] - 1.0).abs() < 1e-12);
        assert!((x.iter().sum::<f64>() - 2.0).abs() < 1e-12);
        let mut y = vec![0.0; BINS];
        line(&mut y, 500.0, 1.0); // above 400 Hz: lost
        assert!(y.iter().all(|v| *v == 0.0));
    }

    #[test]
    fn spectra_are_balanced_in_range_and_the_classes_differ_where_the_faults_act() {
        let (train, _) = generate(5);
        assert_eq!(train.rows.len(), TRAIN_ROWS);
        let mut means = vec![vec![0.0; BINS]; CLASSES.len()];
        for (row, &label) in train.rows.iter().zip(&train.labels) {
            assert_eq!(row.len(), BINS);
            assert!(row.iter().all(|v| (0.0..=UPPER).contains(v)));
            for (m, v) in means[label].iter_mut().zip(row) {
                *m += v / (TRAIN_ROWS / CLASSES.len()) as f64;
            }
        }
        let band = |c: usize, bins: std::ops::Range<usize>| -> f64 { means[c][bins].iter().sum() };
        // 2× lines (30–50 Hz: bins 4–8) for misalignment, the high floor for bearing wear and
        // cavitation, compared with healthy pumps.
        assert!(band(1, 4..9) > band(0, 4..9) + 0.5);
        assert!(band(2, 40..64) > band(0, 40..64) + 1.0);
        assert!(band(3, 20..64) > band(0, 20..64) + 3.0);
    }
}
