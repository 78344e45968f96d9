//! Batched margin evaluation for the attacks: logits at many points and the exact input gradients of
//! their margins, through the engine's batched forward and input-gradient passes
//! ([`Engine::forward`], [`Engine::input_gradient`]).
//!
//! The margin of a column with label `y` against class `t` is `z_y(x) − z_t(x)` (the logit difference
//! of Carlini & Wagner, 2017); it is negative exactly when `t` beats `y`. Its gradient is the chain rule
//! through every layer (at a ReLU input of exactly 0 the derivative taken is 0), never a finite
//! difference.
//!
//! Guarantee: a column's logits and gradient depend only on that column's point, never on the other
//! columns, the batch size or the number of threads: the batch is cut into one block per thread, each
//! block padded to at least [`MIN_COLUMNS`] columns (narrower products would go column by column
//! through a different summation order) and run through the same blocked matrix products, the blocks
//! in parallel (rayon). Nothing
//! here decides whether a point is a counterexample: that is [`super::counterexample::validate`]'s job,
//! with a plain forward pass.

use nalgebra::DMatrix;
use rayon::prelude::*;

use super::runner::SearchPrecision;
use crate::engine::forward::Precision;
use crate::engine::Engine;
use crate::model::Network;

/// The narrowest block evaluated: nalgebra multiplies products with at most five columns column by
/// column, so narrower blocks are padded with zero columns to keep one summation order for every
/// batch size.
pub const MIN_COLUMNS: usize = 6;

/// The narrowest block worth a thread of its own.
const PARALLEL_COLUMNS: usize = 16;

/// Which class a column's margin is taken against.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Against<'a> {
    /// The forbidden class with the largest logit at the point (the first of them on ties).
    Strongest(&'a [usize]),
    /// One given class.
    Class(usize),
}

impl Against<'_> {
    /// The class chosen at a point with `logits`.
    pub fn target(&self, logits: &[f64]) -> usize {
        match *self {
            Against::Class(t) => t,
            Against::Strongest(forbidden) => {
                let mut best = forbidden[0];
                for &j in forbidden {
                    if logits[j] > logits[best] {
                        best = j;
                    }
                }
                best
            }
        }
    }
}

/// What one column asks for.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct MarginSpec<'a> {
    /// The sample's class.
    pub label: usize,
    /// The class the margin is taken against (must be non-empty when [`Against::Strongest`]).
    pub against: Against<'a>,
}

/// Logits, margins and (when asked) margin gradients of a batch.
#[derive(Debug, Clone)]
pub struct Evaluation {
    /// Logits, classes × points.
    pub logits: DMatrix<f64>,
    /// `z_label − z_target` per column.
    pub margins: Vec<f64>,
    /// Input gradient of each column's margin, input size × points (empty when not asked for).
    pub gradients: DMatrix<f64>,
}

/// Evaluates the points (input size × n) with one [`MarginSpec`] per column, in `precision`; gradients
/// only when `with_gradient`. Results are returned in f64 whatever the precision.
///
/// # Panics
/// If `specs.len()` differs from the number of columns or a class index is out of range.
pub fn evaluate(
    engine: &Engine,
    points: &DMatrix<f64>,
    specs: &[MarginSpec<'_>],
    with_gradient: bool,
    precision: SearchPrecision,
) -> Evaluation {
    let n = points.ncols();
    assert_eq!(specs.len(), n, "one margin per column");
    let classes = engine.output_dim();
    let dim = points.nrows();
    let blocks = block_ranges(n, rayon::current_num_threads());
    let parts: Vec<Evaluation> = blocks
        .par_iter()
        .map(|&(start, width)| {
            let specs = &specs[start..start + width];
            match precision {
                SearchPrecision::Double => {
                    evaluate_block::<f64>(engine, points, start, width, specs, with_gradient)
                }
                SearchPrecision::Single => {
                    evaluate_block::<f32>(engine, points, start, width, specs, with_gradient)
                }
            }
        })
        .collect();
    let mut logits = DMatrix::zeros(classes, n);
    let mut gradients = DMatrix::zeros(if with_gradient { dim } else { 0 }, n);
    let mut margins = Vec::with_capacity(n);
    for (&(start, width), part) in blocks.iter().zip(parts) {
        logits.columns_mut(start, width).copy_from(&part.logits);
        if with_gradient {
            gradients.as_mut_slice()[start * dim..(start + width) * dim]
                .copy_from_slice(part.gradients.as_slice());
        }
        margins.extend(part.margins);
    }
    Evaluation {
        logits,
        margins,
        gradients,
    }
}

/// `(start, width)` of each block: one block per rayon thread, in nearly equal widths, but no block
/// narrower than [`PARALLEL_COLUMNS`] unless the whole batch is (every block packs the weights again,
/// so fewer and wider blocks waste less).
fn block_ranges(n: usize, threads: usize) -> Vec<(usize, usize)> {
    if n == 0 {
        return Vec::new();
    }
    let blocks = threads.clamp(1, (n / PARALLEL_COLUMNS).max(1));
    let (base, extra) = (n / blocks, n % blocks);
    let mut out = Vec::with_capacity(blocks);
    let mut start = 0;
    for b in 0..blocks {
        let width = base + usize::from(b < extra);
        out.push((start, width));
        start += width;
    }
    out
}

fn evaluate_block<T: Precision + Into<f64>>(
    engine: &Engine,
    points: &DMatrix<f64>,
    start: usize,
    width: usize,
    specs: &[MarginSpec<'_>],
    with_gradient: bool,
) -> Evaluation {
    let padded = width.max(MIN_COLUMNS);
    let dim = points.nrows();
    let mut block = DMatrix::<T>::zeros(dim, padded);
    // Column-major storage: the block's columns are one contiguous run of the batch.
    let source = &points.as_slice()[start * dim..(start + width) * dim];
    for (b, p) in block.as_mut_slice().iter_mut().zip(source) {
        *b = T::from_subset(p);
    }
    let activations = engine.forward(&block);
    let logits: DMatrix<f64> = activations.logits().columns(0, width).map(|v| v.into());
    let mut margins = Vec::with_capacity(width);
    let mut coefficients = DMatrix::<T>::zeros(logits.nrows(), padded);
    for (j, spec) in specs.iter().enumerate() {
        let column = logits.column(j);
        let z = column.as_slice();
        let target = spec.against.target(z);
        margins.push(z[spec.label] - z[target]);
        coefficients[(spec.label, j)] += T::one();
        coefficients[(target, j)] -= T::one();
    }
    let gradients = if with_gradient {
        let g = engine.input_gradient(&activations, &coefficients);
        let used = &g.as_slice()[..dim * width];
        DMatrix::from_iterator(dim, width, used.iter().map(|&v| v.into()))
    } else {
        DMatrix::zeros(0, width)
    };
    Evaluation {
        logits,
        margins,
        gradients,
    }
}

/// Margin `z_label − z_target` of `network` (classifier form) at `x` and its exact gradient with respect
/// to `x` (a batch of one; use [`evaluate`] for many points).
///
/// # Panics
/// If `x.len()` differs from the network's input size or `label` / `target` is not a logit index.
pub fn margin_and_gradient(
    network: &Network,
    x: &[f64],
    label: usize,
    target: usize,
) -> (f64, Vec<f64>) {
    assert_eq!(x.len(), network.input_dim(), "input size");
    let engine = Engine::new(network);
    let points = DMatrix::from_column_slice(x.len(), 1, x);
    let spec = MarginSpec {
        label,
        against: Against::Class(target),
    };
    let out = evaluate(&engine, &points, &[spec], true, SearchPrecision::Double);
    (
        out.margins[0],
        out.gradients.column(0).iter().copied().collect(),
    )
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::model::Dense;
    use nalgebra::DVector;
    use rand::{Rng, SeedableRng};

    fn random_network(rng: &mut rand_chacha::ChaCha8Rng, sizes: &[usize]) -> Network {
        Network::from_dense(
            sizes
                .windows(2)
                .map(|w| Dense {
                    weights: DMatrix::from_fn(w[1], w[0], |_, _| rng.gen_range(-1.0..1.0)),
                    bias: DVector::from_fn(w[1], |_, _| rng.gen_range(-0.5..0.5)),
                })
                .collect(),
        )
    }

    #[test]
    fn logits_agree_with_plain_forward() {
        let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(3);
        let network = random_network(&mut rng, &[5, 8, 7, 3]);
        let engine = Engine::new(&network);
        let points = DMatrix::from_fn(5, 9, |_, _| rng.gen_range(-1.0..1.0));
        let forbidden = [1, 2];
        let specs = vec![
            MarginSpec {
                label: 0,
                against: Against::Strongest(&forbidden)
            };
            9
        ];
        let out = evaluate(&engine, &points, &specs, false, SearchPrecision::Double);
        for j in 0..9 {
            let x: Vec<f64> = points.column(j).iter().copied().collect();
            let plain = network.forward(&x);
            for c in 0..3 {
                approx::assert_abs_diff_eq!(out.logits[(c, j)], plain[c], epsilon = 1e-12);
            }
            let strongest = if plain[1] >= plain[2] { 1 } else { 2 };
            approx::assert_abs_diff_eq!(
                out.margins[j],
                plain[0] - plain[strongest],
                epsilon = 1e-12
            );
        }
    }

    #[test]
    fn gradient_matches_central_differences_away_from_kinks() {
        // Finite differences are used here only to check the backpropagated gradient (common practice).
        let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(4);
        let network = random_network(&mut rng, &[4, 6, 3]);
        let x = [0.3, -0.7, 0.1, 0.5];
        let (margin, gradient) = margin_and_gradient(&network, &x, 0, 2);
        let logits = network.forward(&x);
        approx::assert_abs_diff_eq!(margin, logits[0] - logits[2], epsilon = 1e-12);
        let h = 1e-6;
        for i in 0..4 {
            let mut up = x;
            let mut down = x;
            up[i] += h;
            down[i] -= h;
            let fu = network.forward(&up);
            let fd = network.forward(&down);
            let numeric = ((fu[0] - fu[2]) - (fd[0] - fd[2])) / (2.0 * h);
            approx::assert_abs_diff_eq!(gradient[i], numeric, epsilon = 1e-6);
        }
    }

    #[test]
    fn a_column_does_not_depend_on_its_batch() {
        let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(5);
        let network = random_network(&mut rng, &[12, 20, 16, 4]);
        let engine = Engine::new(&network);
        let n = 150;
        let points = DMatrix::from_fn(12, n, |_, _| rng.gen_range(-1.0..1.0));
        let forbidden = [1, 2, 3];
        let specs = vec![
            MarginSpec {
                label: 0,
                against: Against::Strongest(&forbidden)
            };
            n
        ];
        for precision in [SearchPrecision::Double, SearchPrecision::Single] {
            let all = evaluate(&engine, &points, &specs, true, precision);
            for j in [0, 31, 32, 77, 149] {
                let point = points.columns(j, 1).into_owned();
                let one = evaluate(&engine, &point, &specs[..1], true, precision);
                // Bit for bit: the same blocked products whatever the batch.
                assert_eq!(one.logits.column(0), all.logits.column(j));
                assert_eq!(one.gradients.column(0), all.gradients.column(j));
                assert_eq!(one.margins[0], all.margins[j]);
            }
        }
    }

    #[test]
    fn blocks_cover_every_column_once() {
        for threads in [1, 2, 3, 8] {
            for n in [0, 1, 5, 6, 31, 32, 33, 64, 65, 70, 97, 200, 1001] {
                let blocks = block_ranges(n, threads);
                assert!(blocks.len() <= threads);
                let mut next = 0;
                for &(start, width) in &blocks {
                    assert_eq!(start, next);
                    assert!(width >= PARALLEL_COLUMNS.min(n));
                    next += width;
                }
                assert_eq!(next, n);
            }
        }
    }
}
