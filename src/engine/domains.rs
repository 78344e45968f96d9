//! A batch of sub-problems' input sets ("domains"): the input region of each, its ReLU split
//! constraints, and the input box as matrices (one column per domain).
//!
//! The box columns are the regions' outer boxes (`Region::outer_lower`, `Region::outer_upper`, rounded
//! outward, so they hold every real point of the region); every bound of the engine holds for every
//! input of that box that lies in the region and meets the splits. Points the engine returns
//! (minimisers) are clipped to the inner boxes, whose every double lies in the region.

use nalgebra::DMatrix;

use crate::bound::{ReluSplit, SplitState};
use crate::threat::{Norm, Region};

/// The input sets of a batch of sub-problems.
#[derive(Debug, Clone)]
pub struct Domains<'r> {
    /// The region of each domain (several domains may share one).
    pub regions: Vec<&'r Region>,
    /// Split constraints per domain and hidden layer, encoded `+1` active, `−1` inactive, `0` free;
    /// `splits[k]` is units × domains. Empty when no domain has splits.
    pub splits: Vec<DMatrix<i8>>,
    /// Lower corner of each domain's input box (inputs × domains).
    pub lower: DMatrix<f64>,
    /// Upper corner of each domain's input box (inputs × domains).
    pub upper: DMatrix<f64>,
    /// `max(|lower|, |upper|)` per input and domain.
    pub magnitude: DMatrix<f64>,
    /// Lower corner of each domain's inner box (for returned points).
    pub inner_lower: DMatrix<f64>,
    /// Upper corner of each domain's inner box (for returned points).
    pub inner_upper: DMatrix<f64>,
}

fn code(split: ReluSplit) -> i8 {
    match split {
        ReluSplit::Free => 0,
        ReluSplit::Active => 1,
        ReluSplit::Inactive => -1,
    }
}

impl<'r> Domains<'r> {
    /// Domains for `regions` with the given split states (`None` = no constraint); `hidden` gives the
    /// hidden layer sizes.
    pub fn new(
        regions: Vec<&'r Region>,
        splits: &[Option<&SplitState>],
        hidden: &[usize],
    ) -> Domains<'r> {
        let count = regions.len();
        let dim = regions.first().map(|r| r.dim()).unwrap_or(0);
        let mut lower = DMatrix::zeros(dim, count);
        let mut upper = DMatrix::zeros(dim, count);
        let mut inner_lower = DMatrix::zeros(dim, count);
        let mut inner_upper = DMatrix::zeros(dim, count);
        for (d, region) in regions.iter().enumerate() {
            lower.column_mut(d).copy_from_slice(&region.outer_lower);
            upper.column_mut(d).copy_from_slice(&region.outer_upper);
            inner_lower
                .column_mut(d)
                .copy_from_slice(&region.inner_lower);
            inner_upper
                .column_mut(d)
                .copy_from_slice(&region.inner_upper);
        }
        let magnitude = lower.zip_map(&upper, |l, u| l.abs().max(u.abs()));
        let any = splits.iter().any(|s| s.is_some());
        let splits = if any {
            hidden
                .iter()
                .enumerate()
                .map(|(k, &n)| {
                    DMatrix::from_fn(n, count, |i, d| {
                        splits
                            .get(d)
                            .copied()
                            .flatten()
                            .map(|s| code(s.layers[k][i]))
                            .unwrap_or(0)
                    })
                })
                .collect()
        } else {
            Vec::new()
        };
        Domains {
            regions,
            splits,
            lower,
            upper,
            magnitude,
            inner_lower,
            inner_upper,
        }
    }

    /// Number of domains.
    pub fn len(&self) -> usize {
        self.regions.len()
    }

    /// True for an empty batch.
    pub fn is_empty(&self) -> bool {
        self.regions.is_empty()
    }

    /// The split code of unit `i` of hidden layer `k` in domain `d`.
    pub fn split(&self, k: usize, i: usize, d: usize) -> i8 {
        if self.splits.is_empty() {
            0
        } else {
            self.splits[k][(i, d)]
        }
    }

    /// True when every domain's region is an L-inf ball (its box is the whole region).
    pub fn all_boxes(&self) -> bool {
        self.regions.iter().all(|r| r.norm == Norm::Linf)
    }
}
