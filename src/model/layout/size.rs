//! Parameter counts of a model, read from the layer shapes without building anything: the count in
//! the file, and the count of the folded network, so a file that would multiply out past a limit is
//! refused before it is folded.

use super::{Layer, Model};

impl Model {
    /// Number of weights and biases in all dense and conv layers.
    pub fn parameter_count(&self) -> usize {
        self.layers
            .iter()
            .map(|l| match l {
                Layer::Dense { weights, bias } => weights.len() + bias.len(),
                Layer::Conv(c) => c.kernel.len() + c.bias.len(),
                _ => 0,
            })
            .sum()
    }

    /// Number of weights and biases the folded canonical network holds (see
    /// [`Model::network`](crate::model::Model::network)), counting also the intermediate maps built while
    /// folding (a `normalize` layer of width `w` folds through a `w × w` map). Computed from the layer
    /// shapes without building anything, so it can be checked against a limit first: a chain of dense
    /// layers without a ReLU between them multiplies out and may hold far more numbers than the file.
    /// Saturates at `usize::MAX`.
    pub fn network_parameter_count(&self) -> usize {
        let size = |out: usize, input: usize| out.saturating_mul(input).saturating_add(out);
        let mut total = 0usize;
        // (outputs, inputs) of the affine map being composed since the last ReLU
        let mut pending: Option<(usize, usize)> = None;
        let mut width = self.input.dim;
        let mut last_was_relu = false;
        for layer in &self.layers {
            match layer {
                Layer::Normalize { .. } => {
                    total = total.saturating_add(size(width, width));
                    let input = pending.map_or(width, |(_, input)| input);
                    total = total.saturating_add(size(width, input));
                    pending = Some((width, input));
                    last_was_relu = false;
                }
                Layer::Dense { weights, .. } => {
                    let input = pending.map_or(width, |(_, input)| input);
                    width = weights.nrows();
                    total = total.saturating_add(size(width, input));
                    pending = Some((width, input));
                    last_was_relu = false;
                }
                Layer::Relu => {
                    if !last_was_relu && pending.take().is_none() {
                        total = total.saturating_add(size(width, width));
                    }
                    last_was_relu = true;
                }
                // Kept as structured parts (never multiplied out): their own size, plus the
                // lowering of a max pool (at most three units per window entry).
                Layer::Conv(c) => {
                    width = c.shape.output_dim();
                    total = total.saturating_add(c.kernel.len() + c.bias.len());
                    pending = None;
                    last_was_relu = false;
                }
                Layer::Pool(p) => {
                    let entries = p.output_dim() * p.kernel.0 * p.kernel.1;
                    total = total.saturating_add(entries.saturating_mul(6));
                    width = p.output_dim();
                    pending = None;
                    last_was_relu = false;
                }
                Layer::BatchNorm { .. } => {
                    total = total.saturating_add(width.saturating_mul(4));
                    pending = None;
                    last_was_relu = false;
                }
                Layer::Flatten => {}
            }
        }
        if pending.is_none() {
            total = total.saturating_add(size(width, width));
        }
        total
    }
}
