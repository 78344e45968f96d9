//! The running feature shape of the spatial layers: channels × height × width, flattened row-major,
//! as `input.shape` states it and as each layer changes it. A shape read from a file always holds
//! exactly `input.dim` features, with no zero extent.

use super::fields::invalid;
use crate::model::ModelError;

/// The running shape: `[C, H, W]` with `H = 1` for 1-D signals; `spatial_rank` 1 or 2, 0 when flat.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct Shape {
    /// Channels (the feature count when flat).
    pub channels: usize,
    /// Height (1 for 1-D and flat).
    pub height: usize,
    /// Width (1 when flat).
    pub width: usize,
    /// 0 flat, 1 for `[C, L]`, 2 for `[C, H, W]`.
    pub spatial_rank: usize,
}

impl Shape {
    /// A flat vector of `n` features.
    pub fn flat(n: usize) -> Shape {
        Shape {
            channels: n,
            height: 1,
            width: 1,
            spatial_rank: 0,
        }
    }

    /// The shape `input.shape` states (its product must be `dim`).
    pub fn from_dims(dims: &[usize], dim: usize) -> Result<Shape, ModelError> {
        let shape = match dims {
            [n] => Shape::flat(*n),
            [c, l] => Shape {
                channels: *c,
                height: 1,
                width: *l,
                spatial_rank: 1,
            },
            [c, h, w] => Shape {
                channels: *c,
                height: *h,
                width: *w,
                spatial_rank: 2,
            },
            _ => {
                return Err(invalid(
                    "input.shape",
                    format!(
                        "has {} entries, expected 1, 2 ([C, L]) or 3 ([C, H, W])",
                        dims.len()
                    ),
                ))
            }
        };
        let product = dims.iter().try_fold(1usize, |a, b| a.checked_mul(*b));
        if product != Some(dim) || dims.contains(&0) {
            return Err(invalid(
                "input.shape",
                format!("{dims:?} holds {product:?} features, expected input.dim = {dim}"),
            ));
        }
        Ok(shape)
    }

    /// Number of features.
    pub fn size(&self) -> usize {
        self.channels * self.height * self.width
    }

    /// The shape as written in a file.
    pub fn dims(&self) -> Vec<usize> {
        match self.spatial_rank {
            0 => vec![self.channels],
            1 => vec![self.channels, self.width],
            _ => vec![self.channels, self.height, self.width],
        }
    }
}
