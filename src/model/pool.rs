//! Pooling over channel × height × width features: average pooling as a fixed sparse map, and max
//! pooling written exactly as ReLUs, so every stage that handles ReLUs handles it.
//!
//! Guarantee: a window holds the in-range input positions it covers (padding is ignored, as ONNX
//! `MaxPool` and `AveragePool` with `count_include_pad = 0` do). [`Pool::average`] divides by that
//! count. [`Pool::max_as_relus`] uses `max(a, b) = relu(a − b) + b` and `b = relu(b) − relu(−b)`
//! (the last term dropped when the inputs are known non-negative, e.g. right after a ReLU): for real
//! numbers the lowered layers compute exactly the window maxima.

use nalgebra::DVector;

use super::sparse::Sparse;

/// Which pooling.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum PoolOp {
    /// The mean of the window.
    Average,
    /// The maximum of the window.
    Max,
}

/// A pooling layer's geometry.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct Pool {
    /// Average or max.
    pub op: PoolOp,
    /// Channels (unchanged by pooling).
    pub channels: usize,
    /// Input height (1 for 1-D).
    pub in_height: usize,
    /// Input width.
    pub in_width: usize,
    /// Window (height, width).
    pub kernel: (usize, usize),
    /// Stride (height, width).
    pub stride: (usize, usize),
    /// Padding (top, left, bottom, right).
    pub padding: (usize, usize, usize, usize),
}

/// A max pool written as ReLU layers: `hidden[0]` is applied to the pool's input and each later map to
/// the previous map's ReLU outputs; `output` maps the last ReLU outputs to the pooled values.
#[derive(Debug, Clone, PartialEq)]
pub struct MaxAsRelus {
    /// Maps each followed by a ReLU.
    pub hidden: Vec<Sparse>,
    /// The final linear map (no ReLU after it).
    pub output: Sparse,
}

impl Pool {
    /// Output (height, width), or `None` when the window does not fit or a step is zero.
    pub fn output_size(&self) -> Option<(usize, usize)> {
        let extent = |size: usize, before: usize, after: usize, k: usize, s: usize| {
            let padded = size + before + after;
            (k > 0 && s > 0 && padded >= k && k > before.max(after)).then(|| (padded - k) / s + 1)
        };
        let (top, left, bottom, right) = self.padding;
        Some((
            extent(self.in_height, top, bottom, self.kernel.0, self.stride.0)?,
            extent(self.in_width, left, right, self.kernel.1, self.stride.1)?,
        ))
    }

    /// Input features.
    pub fn input_dim(&self) -> usize {
        self.channels * self.in_height * self.in_width
    }

    /// Output features.
    pub fn output_dim(&self) -> usize {
        let (h, w) = self.output_size().expect("validated geometry");
        self.channels * h * w
    }

    /// Per output (channel-major), the input features of its window.
    pub fn windows(&self) -> Vec<Vec<usize>> {
        let (out_h, out_w) = self.output_size().expect("validated geometry");
        let (top, left, _, _) = self.padding;
        let mut windows = Vec::with_capacity(self.output_dim());
        for c in 0..self.channels {
            for y in 0..out_h {
                for x in 0..out_w {
                    let mut window = Vec::new();
                    for i in 0..self.kernel.0 {
                        for j in 0..self.kernel.1 {
                            let row = (y * self.stride.0 + i) as isize - top as isize;
                            let col = (x * self.stride.1 + j) as isize - left as isize;
                            if row >= 0
                                && col >= 0
                                && (row as usize) < self.in_height
                                && (col as usize) < self.in_width
                            {
                                window.push(
                                    (c * self.in_height + row as usize) * self.in_width
                                        + col as usize,
                                );
                            }
                        }
                    }
                    windows.push(window);
                }
            }
        }
        windows
    }

    /// Average pooling as a sparse map (`1/count` per entry; one rounding unless every count is a
    /// power of two, when `1/count` is exact).
    pub fn average(&self) -> Sparse {
        let windows = self.windows();
        let exact = windows.iter().all(|w| w.len().is_power_of_two());
        let rows: Vec<Vec<(usize, f64)>> = windows
            .iter()
            .map(|w| w.iter().map(|i| (*i, 1.0 / w.len() as f64)).collect())
            .collect();
        let outputs = rows.len();
        Sparse::new(self.input_dim(), rows, DVector::zeros(outputs)).rounded(usize::from(!exact))
    }

    /// Max pooling as ReLU layers; `non_negative` says every input is known to be `≥ 0`.
    pub fn max_as_relus(&self, non_negative: bool) -> MaxAsRelus {
        let windows = self.windows();
        // Each pooled value as a list of candidates, each a row over the current space.
        let mut values: Vec<Vec<Vec<(usize, f64)>>> = windows
            .iter()
            .map(|w| w.iter().map(|i| vec![(*i, 1.0)]).collect())
            .collect();
        let mut space = self.input_dim();
        let mut hidden = Vec::new();
        while values.iter().any(|v| v.len() > 1) {
            let mut units: Vec<Vec<(usize, f64)>> = Vec::new();
            let mut next = Vec::with_capacity(values.len());
            let negate = |row: &[(usize, f64)]| row.iter().map(|(i, w)| (*i, -w)).collect();
            // Adds relu(row) (and relu(−row) when signs are unknown); returns the row that recovers
            // the value from the new units.
            let pass = |units: &mut Vec<Vec<(usize, f64)>>, row: Vec<(usize, f64)>| {
                let mut recovered = vec![(units.len(), 1.0)];
                if !non_negative {
                    units.push(row.clone());
                    recovered.push((units.len(), -1.0));
                    units.push(negate(&row));
                } else {
                    units.push(row);
                }
                recovered
            };
            for candidates in &values {
                let mut merged = Vec::new();
                for pair in candidates.chunks(2) {
                    if let [a, b] = pair {
                        let mut difference = a.clone();
                        difference.extend(b.iter().map(|(i, w)| (*i, -w)));
                        let mut row = vec![(units.len(), 1.0)];
                        units.push(difference);
                        let rest = pass(&mut units, b.clone());
                        row.extend(rest);
                        merged.push(row);
                    } else {
                        merged.push(pass(&mut units, pair[0].clone()));
                    }
                }
                next.push(merged);
            }
            let count = units.len();
            hidden.push(Sparse::new(space, units, DVector::zeros(count)));
            space = count;
            values = next;
        }
        let rows: Vec<Vec<(usize, f64)>> = values.into_iter().map(|mut v| v.remove(0)).collect();
        let outputs = rows.len();
        MaxAsRelus {
            hidden,
            output: Sparse::new(space, rows, DVector::zeros(outputs)),
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use nalgebra::DMatrix;

    fn pool(op: PoolOp) -> Pool {
        Pool {
            op,
            channels: 2,
            in_height: 3,
            in_width: 5,
            kernel: (2, 3),
            stride: (1, 2),
            padding: (0, 1, 1, 0),
        }
    }

    fn run_relus(lowered: &MaxAsRelus, x: &DMatrix<f64>) -> DMatrix<f64> {
        let mut h = x.clone();
        for map in &lowered.hidden {
            h = map.apply(&h).map(|v| v.max(0.0));
        }
        lowered.output.apply(&h)
    }

    #[test]
    fn max_as_relus_computes_window_maxima() {
        let p = pool(PoolOp::Max);
        let windows = p.windows();
        let x = DMatrix::from_fn(p.input_dim(), 3, |r, b| ((r * 7 + b * 5) % 11) as f64 - 5.0);
        let expected = DMatrix::from_fn(windows.len(), 3, |o, b| {
            windows[o]
                .iter()
                .map(|i| x[(*i, b)])
                .fold(f64::NEG_INFINITY, f64::max)
        });
        assert_eq!(run_relus(&p.max_as_relus(false), &x), expected);
        let positive = x.map(|v| v.max(0.0));
        let expected_positive = expected.map(|v| v.max(0.0));
        assert_eq!(
            run_relus(&p.max_as_relus(true), &positive),
            expected_positive
        );
    }

    #[test]
    fn average_divides_by_the_in_range_count() {
        let p = pool(PoolOp::Average);
        let x = DMatrix::from_fn(p.input_dim(), 1, |r, _| r as f64);
        let out = p.average().apply(&x);
        for (o, window) in p.windows().iter().enumerate() {
            let mean = window.iter().map(|i| *i as f64).sum::<f64>() / window.len() as f64;
            assert!((out[o] - mean).abs() < 1e-12);
        }
    }
}
