//! Sound pre-activation bounds of every hidden layer for a batch of domains, by interval propagation
//! (Gowal et al., 2018) and, optionally, tightened by the backward linear relaxation of each unstable
//! unit (objectives `±eᵢ`), layer by layer; plus the ReLU relaxation and the magnitude vectors the
//! rounding allowance needs.
//!
//! Guarantee: `lower[k][(i, d)] ≤ z_k,i(x) ≤ upper[k][(i, d)]` for every input `x` of domain `d` that
//! meets its splits, for the real-number network (interval images are widened by
//! `factor·(|W| H + |b|)` and the fold error). Split units have their bounds clipped to the forced side;
//! a clip that empties an interval marks the domain empty (no input meets its splits).

use nalgebra::DMatrix;
use rayon::prelude::*;

use super::backward::{self, Keep};
use super::{Domains, Engine};
use crate::bound::LayerBounds;

/// Columns per backward pass (bounds memory: inputs × columns doubles per pass).
const MAX_COLUMNS: usize = 2048;

/// How intermediate bounds are computed.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Tightness {
    /// Interval propagation only.
    Interval,
    /// Interval, then the backward linear relaxation for every unit the interval leaves unstable.
    Linear,
}

/// The ReLU relaxation of one hidden layer for every domain (units × domains):
/// `lower_slope·z ≤ h ≤ upper_slope·z + upper_intercept`, with `upper_intercept > 0` exactly for
/// unstable units.
#[derive(Debug, Clone)]
pub struct Relaxation {
    /// Lower line slope (adaptive choice for unstable units: 1 when `u ≥ −l`, else 0).
    pub lower_slope: DMatrix<f64>,
    /// Upper line slope.
    pub upper_slope: DMatrix<f64>,
    /// Upper line intercept, nudged up so the line is above the ReLU in exact arithmetic.
    pub upper_intercept: DMatrix<f64>,
}

/// Bounds of every hidden layer for a batch of domains.
#[derive(Debug, Clone)]
pub struct HiddenBounds {
    /// Lower bounds per hidden layer (units × domains).
    pub lower: Vec<DMatrix<f64>>,
    /// Upper bounds per hidden layer (units × domains).
    pub upper: Vec<DMatrix<f64>>,
    /// Per domain, the first unit whose clipped interval is empty (`(layer, unit)`), if any.
    pub empty: Vec<Option<(usize, usize)>>,
    /// ReLU relaxation per hidden layer.
    pub relax: Vec<Relaxation>,
    /// `vₖ = |Wₖ| (H + T) + |bₖ|` per layer (every layer, including the last).
    pub rounding: Vec<DMatrix<f64>>,
    /// Fold error terms per layer (`None` = exact layer).
    pub fold: Vec<Option<DMatrix<f64>>>,
}

impl HiddenBounds {
    /// Entry `i` of the box layer `k` reads in domain `d`: the input box for `k = 0`, else the ReLU
    /// image `[max(l, 0), max(u, 0)]` of hidden layer `k − 1`.
    pub fn box_entry(&self, domains: &Domains, k: usize, i: usize, d: usize) -> (f64, f64) {
        if k == 0 {
            (domains.lower[(i, d)], domains.upper[(i, d)])
        } else {
            (
                self.lower[k - 1][(i, d)].max(0.0),
                self.upper[k - 1][(i, d)].max(0.0),
            )
        }
    }

    /// The bounds of domain `d` as per-layer vectors.
    pub fn layer_bounds(&self, d: usize) -> Vec<LayerBounds> {
        self.lower
            .iter()
            .zip(&self.upper)
            .map(|(l, u)| LayerBounds {
                lower: l.column(d).iter().copied().collect(),
                upper: u.column(d).iter().copied().collect(),
            })
            .collect()
    }
}

/// The relaxation of one layer from clipped bounds.
fn relax(lower: &DMatrix<f64>, upper: &DMatrix<f64>) -> Relaxation {
    let u64 = super::rounding::UNIT_ROUNDOFF_F64;
    let (n, m) = lower.shape();
    let mut lower_slope = DMatrix::zeros(n, m);
    let mut upper_slope = DMatrix::zeros(n, m);
    let mut upper_intercept = DMatrix::zeros(n, m);
    for d in 0..m {
        for i in 0..n {
            let (l, u) = (lower[(i, d)], upper[(i, d)]);
            if l >= 0.0 {
                lower_slope[(i, d)] = 1.0;
                upper_slope[(i, d)] = 1.0;
            } else if u > 0.0 {
                let s = u / (u - l);
                // Exactly above the ReLU at both ends: s·l + t ≥ 0 and s·u + t ≥ u (docs/bounds.md).
                let t = (-s * l).max(u - s * u) + 4.0 * u64 * (u.abs() + l.abs());
                lower_slope[(i, d)] = if u >= -l { 1.0 } else { 0.0 };
                upper_slope[(i, d)] = s;
                upper_intercept[(i, d)] = t;
            }
        }
    }
    Relaxation {
        lower_slope,
        upper_slope,
        upper_intercept,
    }
}

/// Given bounds to start from: layers below `start` are taken as they are, layers from `start` on are
/// recomputed and intersected with the given ones (sound when the given bounds hold on a superset of
/// every domain, e.g. a parent sub-domain's).
#[derive(Debug, Clone, Copy)]
pub struct Given<'a> {
    /// Lower bounds per hidden layer (units × domains).
    pub lower: &'a [DMatrix<f64>],
    /// Upper bounds per hidden layer (units × domains).
    pub upper: &'a [DMatrix<f64>],
    /// First layer to recompute.
    pub start: usize,
}

/// Bounds of every hidden layer for `domains`.
pub fn compute(
    engine: &Engine,
    domains: &Domains,
    tightness: Tightness,
    given: Option<Given>,
) -> HiddenBounds {
    let count = domains.len();
    let hidden_layers = engine.depth() - 1;
    let factor = engine.allowance_factor();
    let mut out = HiddenBounds {
        lower: Vec::with_capacity(hidden_layers),
        upper: Vec::with_capacity(hidden_layers),
        empty: vec![None; count],
        relax: Vec::with_capacity(hidden_layers),
        rounding: Vec::with_capacity(hidden_layers + 1),
        fold: Vec::with_capacity(hidden_layers + 1),
    };
    let mut box_lower = domains.lower.clone();
    let mut box_upper = domains.upper.clone();
    let mut magnitude = domains.magnitude.clone();
    let mut intercepts: Option<DMatrix<f64>> = None;
    for k in 0..engine.depth() {
        let layer = engine.layer(k);
        let touched = match &intercepts {
            Some(t) => &magnitude + t,
            None => magnitude.clone(),
        };
        let v = layer.magnitude_apply(&touched);
        let f = engine.fold_term(k, &magnitude);
        if k + 1 == engine.depth() {
            out.rounding.push(v);
            out.fold.push(f);
            break;
        }
        let (mut lower, mut upper) = match given {
            Some(g) if k < g.start => (g.lower[k].clone(), g.upper[k].clone()),
            _ => {
                let (mut lo, mut hi) = layer.interval(&box_lower, &box_upper);
                let mut widen = &v * factor;
                if let Some(f) = &f {
                    widen += f;
                }
                lo -= &widen;
                hi += &widen;
                if let Some(g) = given {
                    lo = lo.zip_map(&g.lower[k], f64::max);
                    hi = hi.zip_map(&g.upper[k], f64::min);
                }
                (lo, hi)
            }
        };
        out.rounding.push(v);
        out.fold.push(f);
        let recompute = given.map(|g| k >= g.start).unwrap_or(true);
        let exact_first = k == 0 && domains.all_boxes();
        if recompute && tightness == Tightness::Linear && !exact_first {
            refine(engine, &out, domains, k, &mut lower, &mut upper);
        }
        for d in 0..count {
            for i in 0..lower.nrows() {
                match domains.split(k, i, d) {
                    1 => lower[(i, d)] = lower[(i, d)].max(0.0),
                    -1 => upper[(i, d)] = upper[(i, d)].min(0.0),
                    _ => {}
                }
                if lower[(i, d)] > upper[(i, d)] && out.empty[d].is_none() {
                    out.empty[d] = Some((k, i));
                }
            }
        }
        let relaxation = relax(&lower, &upper);
        box_lower = lower.map(|v| v.max(0.0));
        box_upper = upper.map(|v| v.max(0.0));
        magnitude = box_upper.clone();
        intercepts = Some(relaxation.upper_intercept.clone());
        out.relax.push(relaxation);
        out.lower.push(lower);
        out.upper.push(upper);
    }
    out
}

/// Tightens layer `k`'s unstable units by the backward linear relaxation (both directions).
fn refine(
    engine: &Engine,
    partial: &HiddenBounds,
    domains: &Domains,
    k: usize,
    lower: &mut DMatrix<f64>,
    upper: &mut DMatrix<f64>,
) {
    let n = lower.nrows();
    // (domain, unit) pairs to refine, grouped in chunks of at most MAX_COLUMNS / 2 pairs.
    let mut pairs: Vec<(usize, usize)> = Vec::new();
    for d in 0..domains.len() {
        if partial.empty[d].is_some() {
            continue;
        }
        for i in 0..n {
            let free = domains.split(k, i, d) == 0;
            if free && lower[(i, d)] < 0.0 && upper[(i, d)] > 0.0 {
                pairs.push((d, i));
            }
        }
    }
    if pairs.is_empty() {
        return;
    }
    // Chunks end at domain boundaries where they can: the units a domain's relaxation zeroes are
    // then zero rows of the whole chunk, which the backward pass skips.
    let mut chunks: Vec<&[(usize, usize)]> = Vec::new();
    let mut rest = &pairs[..];
    while !rest.is_empty() {
        let first = rest[0].0;
        let same = rest.iter().take_while(|p| p.0 == first).count();
        let take = same.min(MAX_COLUMNS / 2);
        chunks.push(&rest[..take]);
        rest = &rest[take..];
    }
    let results: Vec<Vec<(usize, usize, f64, f64)>> = chunks
        .par_iter()
        .map(|chunk| {
            let mut units = Vec::with_capacity(2 * chunk.len());
            let mut domain = Vec::with_capacity(2 * chunk.len());
            for &(d, i) in chunk.iter() {
                units.extend([(i, 1.0), (i, -1.0)]);
                domain.extend([d, d]);
            }
            let result =
                backward::run_units(engine, partial, domains, k, &units, &domain, Keep::Bounds);
            chunk
                .iter()
                .enumerate()
                .map(|(c, &(d, i))| (d, i, result.lower[2 * c], -result.lower[2 * c + 1]))
                .collect()
        })
        .collect();
    for (d, i, lo, hi) in results.into_iter().flatten() {
        lower[(i, d)] = lower[(i, d)].max(lo);
        upper[(i, d)] = upper[(i, d)].min(hi);
    }
}
