//! Axis ticks at "nice numbers" for every plot ballast draws: steps of 1, 2 or 5 times a power of ten
//! (the loose labelling of Heckbert, "Nice numbers for graph labels", Graphics Gems, 1990), an axis that
//! covers the data, labels with just the decimals the step needs, integer-only ticks for counts and
//! epochs, and the text anchor that keeps a label inside the picture. Nothing here draws.

/// Ticks of one axis: the axis runs from the first value to the last, in equal nice steps.
#[derive(Debug, Clone, PartialEq)]
pub struct Ticks {
    /// Tick positions, ascending; the first and last are the ends of the axis.
    pub values: Vec<f64>,
    /// The step between ticks (1, 2 or 5 times a power of ten).
    pub step: f64,
}

impl Ticks {
    /// The lower end of the axis.
    pub fn low(&self) -> f64 {
        self.values[0]
    }

    /// The upper end of the axis.
    pub fn high(&self) -> f64 {
        self.values[self.values.len() - 1]
    }

    /// The label of tick value `v`: as many decimals as the step needs, no more (`0.25`, `10`, `1.5`).
    pub fn label(&self, v: f64) -> String {
        label(v, self.step)
    }
}

/// The nice number nearest `x` (> 0) when `round`, else the smallest nice number ≥ `x`: 1, 2, 5 (or 10)
/// times a power of ten.
pub fn nice_number(x: f64, round: bool) -> f64 {
    let exponent = x.log10().floor();
    let power = 10f64.powf(exponent);
    let fraction = x / power;
    let nice = if round {
        if fraction < 1.5 {
            1.0
        } else if fraction < 3.0 {
            2.0
        } else if fraction < 7.0 {
            5.0
        } else {
            10.0
        }
    } else if fraction <= 1.0 {
        1.0
    } else if fraction <= 2.0 {
        2.0
    } else if fraction <= 5.0 {
        5.0
    } else {
        10.0
    };
    nice * power
}

/// About `count` (≥ 2) ticks at nice steps on an axis covering `[low, high]`. A degenerate or
/// non-finite range gets the axis [0, 1] (or one around the single value).
pub fn nice_ticks(low: f64, high: f64, count: usize) -> Ticks {
    ticks(low, high, count, false)
}

/// Like [`nice_ticks`], with whole-number steps only (counts, epochs).
pub fn integer_ticks(low: f64, high: f64, count: usize) -> Ticks {
    ticks(low, high, count, true)
}

fn ticks(low: f64, high: f64, count: usize, integer: bool) -> Ticks {
    let (mut low, mut high) = if low.is_finite() && high.is_finite() {
        (low.min(high), low.max(high))
    } else {
        (0.0, 1.0)
    };
    if high - low <= f64::EPSILON * high.abs().max(low.abs()) {
        if low == 0.0 {
            high = 1.0;
        } else {
            let pad = low.abs() * 0.1;
            low -= pad;
            high += pad;
        }
    }
    let count = count.max(2);
    let range = nice_number(high - low, false);
    let mut step = nice_number(range / (count - 1) as f64, true);
    if integer {
        step = step.round().max(1.0);
    }
    let first = (low / step).floor() as i64;
    let last = (high / step).ceil() as i64;
    let values = (first..=last.max(first + 1))
        .map(|k| {
            // k × step is exact for integers; for decimal steps, rounding through the label's
            // decimals removes the representation error (0.30000000000000004 → 0.3).
            let v = k as f64 * step;
            label(v, step).parse().unwrap_or(v)
        })
        .collect();
    Ticks { values, step }
}

/// `v` with the decimals a tick `step` needs (none for steps ≥ 1).
pub fn label(v: f64, step: f64) -> String {
    let decimals = if step > 0.0 && step.is_finite() {
        (-step.log10().floor()).max(0.0) as usize
    } else {
        0
    };
    let text = format!("{v:.decimals$}");
    // "-0" and "-0.00" read as 0.
    if text
        .trim_start_matches('-')
        .chars()
        .all(|c| c == '0' || c == '.')
    {
        text.trim_start_matches('-').to_string()
    } else {
        text
    }
}

/// The SVG `text-anchor` that keeps a label of `chars` characters at 11-12 px centred on `x` inside
/// `[0, width]`: `start` near the left edge, `end` near the right edge, `middle` otherwise.
pub fn anchor(x: f64, chars: usize, width: f64) -> &'static str {
    let half = chars as f64 * 3.6;
    if x + half > width - 2.0 {
        "end"
    } else if x - half < 2.0 {
        "start"
    } else {
        "middle"
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn is_nice(step: f64) -> bool {
        let power = 10f64.powf(step.log10().floor());
        let m = step / power;
        [1.0, 2.0, 5.0, 10.0].iter().any(|n| (m - n).abs() < 1e-9)
    }

    #[test]
    fn heckbert_loose_labels() {
        // Heckbert (1990): the range 105..543 with about 5 ticks is labelled 100 to 600 by 100
        // (the worked example as recalled from memory).
        let t = nice_ticks(105.0, 543.0, 5);
        assert_eq!(t.values, vec![100.0, 200.0, 300.0, 400.0, 500.0, 600.0]);
        assert_eq!(t.label(300.0), "300");
    }

    #[test]
    fn ticks_cover_the_data_in_nice_steps() {
        for (low, high) in [
            (0.0, 17.0121),
            (0.475, 1.0),
            (0.0, 0.05),
            (0.001, 0.0023),
            (-3.2, 7.9),
            (8.5061, 8.5061),
            (0.0, 0.0),
        ] {
            let t = nice_ticks(low, high, 5);
            assert!(t.low() <= low && t.high() >= high, "{low}..{high}: {t:?}");
            assert!(is_nice(t.step), "{t:?}");
            assert!((2..=12).contains(&t.values.len()), "{t:?}");
            for w in t.values.windows(2) {
                assert!(
                    (w[1] - w[0] - t.step).abs() < 1e-9 * t.step.max(1.0),
                    "{t:?}"
                );
            }
            // Every label reads back as its tick, with no representation noise.
            for v in &t.values {
                let text = t.label(*v);
                assert!(text.len() <= 8, "{text}");
                assert!((text.parse::<f64>().unwrap() - v).abs() < 1e-12, "{text}");
            }
        }
        assert_eq!(nice_ticks(0.475, 1.0, 5).label(0.5), "0.5");
    }

    #[test]
    fn integer_ticks_are_whole_numbers() {
        // 20.75 epochs must never appear as a tick.
        for high in [3.0, 20.75, 83.0, 1.0] {
            let t = integer_ticks(0.0, high, 6);
            assert!(t.step >= 1.0 && t.step.fract() == 0.0, "{t:?}");
            assert!(t.values.iter().all(|v| v.fract() == 0.0), "{t:?}");
            assert!(t.high() >= high);
            assert!(!t.label(t.high()).contains('.'));
        }
    }

    #[test]
    fn labels_stay_inside_the_picture() {
        assert_eq!(anchor(620.0, 6, 640.0), "end");
        assert_eq!(anchor(3.0, 4, 640.0), "start");
        assert_eq!(anchor(320.0, 6, 640.0), "middle");
    }
}
