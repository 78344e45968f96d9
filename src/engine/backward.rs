//! The backward linear relaxation (Zhang et al., 2018; the dual view of Wong & Kolter, 2018) on a
//! batch: objective coefficients on one layer's output, one column per sub-problem, pushed back to the
//! input through every linear layer (`Wᵀ A`, one product per layer for the whole batch) and every ReLU
//! (each coefficient takes the lower line when ≥ 0, the upper line when < 0, per column), then
//! minimised over the domain's input set.
//!
//! Guarantee: for every column `j`, `lower[j] ≤ aⱼᵀ z_top(x) + cⱼ` for every input `x` of the column's
//! domain that meets its splits, for the real-number network, whatever lower slopes in `[0, 1]` and
//! split multipliers the caller passes. The value computed in f64 is lowered by the rounding allowance
//! `2·factor·Σₖ |Aₖ|ᵀ vₖ` (with `vₖ = |Wₖ| (H + T) + |bₖ|` the magnitudes each product touches, see
//! docs/bounds.md) and by the fold error `Σₖ |Aₖ|ᵀ fₖ`.

use nalgebra::{DMatrix, DVector};

use super::intermediate::HiddenBounds;
use super::{Domains, Engine};
use crate::bound::concretise;
use crate::threat::Norm;

/// Objectives for [`run`]: coefficients on the output of layer `top`, a constant, and the domain of
/// each column.
#[derive(Debug, Clone)]
pub struct Objectives {
    /// The layer whose output the objectives are written on.
    pub top: usize,
    /// Coefficients (output size of `top` × columns).
    pub coefficients: DMatrix<f64>,
    /// Constant per column.
    pub constant: DVector<f64>,
    /// Domain index per column.
    pub domain: Vec<usize>,
}

/// Per-column choices for the relaxation: optimised lower slopes of unstable units and split
/// multiplier terms, one matrix per hidden layer (units × columns).
#[derive(Debug, Clone, Copy, Default)]
pub struct Choices<'a> {
    /// Lower slope per unstable unit and column (each in `[0, 1]`); `None` = the adaptive slopes.
    pub slopes: Option<&'a [DMatrix<f64>]>,
    /// Added to the coefficient on each hidden pre-activation (`σβ`, sound only when the caller's
    /// objective with these terms is ≤ the original one on the domain).
    pub multipliers: Option<&'a [DMatrix<f64>]>,
}

/// What [`run`] returns besides the bounds.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Keep {
    /// Only the lower bounds (the minimiser matrix has no rows).
    Bounds,
    /// The bounds and each column's minimiser.
    Minimisers,
    /// Also the coefficients on every hidden layer's output.
    Everything,
}

/// The result of a backward pass.
#[derive(Debug, Clone)]
pub struct Backward {
    /// Sound lower bound per column (`+∞` for a column of an empty domain).
    pub lower: Vec<f64>,
    /// Per column, the input minimising the final linear function over the domain's input set (no
    /// rows unless asked for).
    pub minimiser: DMatrix<f64>,
    /// When recorded: per hidden layer, the coefficients on its ReLU output (units × columns).
    pub on_hidden: Vec<DMatrix<f64>>,
}

/// Adds `|a[:, j]|ᵀ m[:, domain[j]]` to `sum[j]` for every column.
fn accumulate(sum: &mut [f64], a: &DMatrix<f64>, m: &DMatrix<f64>, domain: &[usize]) {
    for (j, column) in a.column_iter().enumerate() {
        sum[j] += weighted_abs(column.as_slice(), m.column(domain[j]).as_slice());
    }
}

/// `Σᵢ |aᵢ| mᵢ`.
fn weighted_abs(a: &[f64], m: &[f64]) -> f64 {
    a.iter().zip(m).map(|(x, w)| x.abs() * w).sum()
}

/// Runs the backward pass for `objectives` on domains with hidden bounds `hidden` (which must cover
/// every hidden layer below `objectives.top`).
pub fn run(
    engine: &Engine,
    hidden: &HiddenBounds,
    domains: &Domains,
    objectives: Objectives,
    choices: Choices,
    keep: Keep,
) -> Backward {
    let Objectives {
        top,
        coefficients: mut a,
        mut constant,
        domain,
    } = objectives;
    let columns = a.ncols();
    let mut magnitude = vec![0.0; columns];
    let mut fold = vec![0.0; columns];
    let mut on_hidden: Vec<DMatrix<f64>> = Vec::new();
    let mut k = top;
    accumulate(&mut magnitude, &a, &hidden.rounding[k], &domain);
    if let Some(f) = &hidden.fold[k] {
        accumulate(&mut fold, &a, f, &domain);
    }
    let g = loop {
        constant += engine.layer(k).bias_dot(&a);
        let g = engine.layer(k).transpose_apply(&a);
        if k == 0 {
            break g;
        }
        k -= 1;
        let relax = &hidden.relax[k];
        let (mut next, original) = if keep == Keep::Everything {
            (g.clone(), Some(g))
        } else {
            (g, None)
        };
        // The next layer's rounding and fold terms are accumulated here, while each column of the
        // new coefficients is in cache (the same sums `accumulate` takes).
        let (rounding, fold_terms) = (&hidden.rounding[k], hidden.fold[k].as_ref());
        for j in 0..columns {
            let d = domain[j];
            let lower_slope = relax.lower_slope.column(d);
            let upper_slope = relax.upper_slope.column(d);
            let intercept = relax.upper_intercept.column(d);
            let chosen = choices.slopes.map(|s| s[k].column(j));
            let extra = choices.multipliers.map(|m| m[k].column(j));
            let mut column = next.column_mut(j);
            let mut add = 0.0;
            for i in 0..column.len() {
                let v = column[i];
                let t = intercept[i];
                column[i] = if v >= 0.0 {
                    let slope = match &chosen {
                        Some(c) if t > 0.0 => c[i],
                        _ => lower_slope[i],
                    };
                    v * slope
                } else {
                    add += v * t;
                    v * upper_slope[i]
                };
                if let Some(e) = &extra {
                    column[i] += e[i];
                }
            }
            constant[j] += add;
            magnitude[j] += weighted_abs(column.as_slice(), rounding.column(d).as_slice());
            if let Some(f) = fold_terms {
                fold[j] += weighted_abs(column.as_slice(), f.column(d).as_slice());
            }
        }
        if let Some(g) = original {
            on_hidden.push(g);
        }
        a = next;
    };
    on_hidden.reverse();
    // Concretise over each domain's input set.
    let dim = g.nrows();
    let mut lower = vec![0.0; columns];
    let minimisers = keep != Keep::Bounds;
    let mut minimiser = DMatrix::zeros(if minimisers { dim } else { 0 }, columns);
    for j in 0..columns {
        let d = domain[j];
        let region = domains.regions[d];
        let coefficients = g.column(j);
        match region.norm {
            Norm::Linf => {
                let mut value = constant[j];
                let mut size = 0.0;
                for i in 0..dim {
                    let w = coefficients[i];
                    let (lo, hi) = (domains.lower[(i, d)], domains.upper[(i, d)]);
                    value += if w > 0.0 { w * lo } else { w * hi };
                    size += w.abs() * domains.magnitude[(i, d)];
                    if !minimisers {
                        continue;
                    }
                    let (inner_lo, inner_hi) =
                        (domains.inner_lower[(i, d)], domains.inner_upper[(i, d)]);
                    minimiser[(i, j)] = if w > 0.0 {
                        inner_lo
                    } else if w < 0.0 {
                        inner_hi
                    } else {
                        region.center[i].max(inner_lo).min(inner_hi)
                    };
                }
                lower[j] = value;
                magnitude[j] += size;
            }
            Norm::L2 => {
                let row: Vec<f64> = coefficients.iter().copied().collect();
                let (value, point) = concretise::minimum_with_point(region, &row);
                lower[j] = constant[j] + value;
                if minimisers {
                    minimiser.column_mut(j).copy_from_slice(&point);
                }
                // |aᵀc| + Σ|aᵢ δᵢ| + μ(Σ δᵢ²/rᵢ² + 1) with |δᵢ| ≤ rᵢ and μ ≤ ‖a∘r‖/2 (docs/bounds.md).
                let mut size = 0.0;
                let mut norm = 0.0;
                for i in 0..dim {
                    let (w, r) = (coefficients[i].abs(), region.radii[i]);
                    size += w * (region.center[i].abs() + r);
                    norm += (w * r) * (w * r);
                }
                magnitude[j] += size + norm.sqrt() * (dim as f64 + 1.0) / 2.0;
            }
        }
        magnitude[j] += constant[j].abs();
    }
    let factor = engine.allowance_factor();
    for j in 0..columns {
        if hidden.empty[domain[j]].is_some() {
            lower[j] = f64::INFINITY;
            continue;
        }
        lower[j] -= 2.0 * factor * magnitude[j] + fold[j] * (1.0 + factor);
        if lower[j].is_nan() {
            lower[j] = f64::NEG_INFINITY;
        }
    }
    Backward {
        lower,
        minimiser,
        on_hidden,
    }
}

/// Interval bounds of objectives written on the last layer's output: one product by `Wᵀ`, then the
/// minimum over the box of the last hidden layer's ReLU outputs (or over the input box for a network
/// without hidden layers), with the same rounding allowance and fold error as [`run`].
pub fn over_last_box(
    engine: &Engine,
    hidden: &HiddenBounds,
    domains: &Domains,
    objectives: &Objectives,
) -> Vec<f64> {
    let top = objectives.top;
    let a = &objectives.coefficients;
    let domain = &objectives.domain;
    let columns = a.ncols();
    let mut magnitude = vec![0.0; columns];
    let mut fold = vec![0.0; columns];
    accumulate(&mut magnitude, a, &hidden.rounding[top], domain);
    if let Some(f) = &hidden.fold[top] {
        accumulate(&mut fold, a, f, domain);
    }
    let constant = &objectives.constant + engine.layer(top).bias_dot(a);
    let g = engine.layer(top).transpose_apply(a);
    let factor = engine.allowance_factor();
    (0..columns)
        .map(|j| {
            let d = domain[j];
            if hidden.empty[d].is_some() {
                return f64::INFINITY;
            }
            let mut value = constant[j];
            let mut size = constant[j].abs();
            for i in 0..g.nrows() {
                let (lo, hi) = hidden.box_entry(domains, top, i, d);
                let w = g[(i, j)];
                value += if w > 0.0 { w * lo } else { w * hi };
                size += w.abs() * lo.abs().max(hi.abs());
            }
            let v = value - 2.0 * factor * (magnitude[j] + size) - fold[j] * (1.0 + factor);
            if v.is_nan() {
                f64::NEG_INFINITY
            } else {
                v
            }
        })
        .collect()
}
