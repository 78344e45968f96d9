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
use super::products::{transpose_nonzero, transpose_paired};
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

/// Pushes one column of coefficients on a ReLU's output back to its input: each coefficient takes
/// the lower line (slope from `chosen` for unstable units when given) when ≥ 0 and the upper line when
/// < 0; returns the constant the upper lines' intercepts add. Branch-free: `max(v, 0)` and `min(v, 0)`
/// pick the line (the other product is an exact zero), so the values equal the case-by-case ones.
fn relax_column(
    column: &mut [f64],
    lower_slope: &[f64],
    upper_slope: &[f64],
    intercept: &[f64],
    chosen: Option<&[f64]>,
) -> f64 {
    let mut add = 0.0;
    let n = column.len();
    let (lower_slope, upper_slope, intercept) =
        (&lower_slope[..n], &upper_slope[..n], &intercept[..n]);
    match chosen {
        None => {
            for i in 0..n {
                let v = column[i];
                let negative = v.min(0.0);
                add += negative * intercept[i];
                column[i] = v.max(0.0) * lower_slope[i] + negative * upper_slope[i];
            }
        }
        Some(chosen) => {
            let chosen = &chosen[..n];
            for i in 0..n {
                let v = column[i];
                let t = intercept[i];
                let slope = if t > 0.0 { chosen[i] } else { lower_slope[i] };
                let negative = v.min(0.0);
                add += negative * t;
                column[i] = v.max(0.0) * slope + negative * upper_slope[i];
            }
        }
    }
    add
}

/// `(c + min over the box [lo, hi] of wᵀx, Σ |wᵢ| mᵢ)`, summed in index order; branch-free as in
/// [`relax_column`].
fn linf_minimum(c: f64, w: &[f64], lo: &[f64], hi: &[f64], m: &[f64]) -> (f64, f64) {
    let n = w.len();
    let (lo, hi, m) = (&lo[..n], &hi[..n], &m[..n]);
    let mut value = c;
    let mut size = 0.0;
    for i in 0..n {
        let x = w[i];
        value += x.max(0.0) * lo[i] + x.min(0.0) * hi[i];
        size += x.abs() * m[i];
    }
    (value, size)
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
        coefficients: a,
        constant,
        domain,
    } = objectives;
    let columns = a.ncols();
    let mut sums = Sums {
        magnitude: vec![0.0; columns],
        fold: vec![0.0; columns],
    };
    accumulate(&mut sums.magnitude, &a, &hidden.rounding[top], &domain);
    if let Some(f) = &hidden.fold[top] {
        accumulate(&mut sums.fold, &a, f, &domain);
    }
    let constant = constant + engine.layer(top).bias_dot(&a);
    let g = transpose_nonzero(engine.layer(top), &a);
    descend(
        engine, hidden, domains, top, g, constant, sums, &domain, choices, keep, false,
    )
}

/// [`run`] for unit objectives: column `j` is `signⱼ · z_top,unitⱼ` (`units[j] = (unitⱼ, signⱼ)`,
/// signs ±1) on domain `domain[j]`. The first product is a selection of the layer's rows
/// ([`crate::engine::LinearLayer::transpose_units`]); the result equals [`run`]'s on the same unit columns.
pub fn run_units(
    engine: &Engine,
    hidden: &HiddenBounds,
    domains: &Domains,
    top: usize,
    units: &[(usize, f64)],
    domain: &[usize],
    keep: Keep,
) -> Backward {
    let mut sums = Sums {
        magnitude: Vec::with_capacity(units.len()),
        fold: Vec::with_capacity(units.len()),
    };
    for (&(i, _), &d) in units.iter().zip(domain) {
        sums.magnitude.push(hidden.rounding[top][(i, d)]);
        sums.fold
            .push(hidden.fold[top].as_ref().map_or(0.0, |f| f[(i, d)]));
    }
    let (g, constant) = engine.layer(top).transpose_units(units);
    // Columns (2c, 2c + 1) the same unit with opposite signs on the same domain (as intermediate
    // bounds ask for them): their first product below is shared where they agree up to sign.
    let paired = units.len().is_multiple_of(2)
        && units
            .chunks(2)
            .zip(domain.chunks(2))
            .all(|(u, d)| u[0].0 == u[1].0 && u[0].1 == -u[1].1 && d[0] == d[1]);
    descend(
        engine,
        hidden,
        domains,
        top,
        g,
        constant,
        sums,
        domain,
        Choices::default(),
        keep,
        paired,
    )
}

/// Per column: `Σₖ |Aₖ|ᵀ vₖ` and `Σₖ |Aₖ|ᵀ fₖ` so far.
struct Sums {
    magnitude: Vec<f64>,
    fold: Vec<f64>,
}

/// The rest of a backward pass from `g = W_topᵀ A_top` (input coefficients of layer `top`) with the
/// constant and sums taken so far: through the ReLUs and layers below `top`, then the minimum over
/// each domain's input set.
#[allow(clippy::too_many_arguments)]
fn descend(
    engine: &Engine,
    hidden: &HiddenBounds,
    domains: &Domains,
    top: usize,
    mut g: DMatrix<f64>,
    mut constant: DVector<f64>,
    sums: Sums,
    domain: &[usize],
    choices: Choices,
    keep: Keep,
    paired: bool,
) -> Backward {
    let columns = g.ncols();
    let Sums {
        mut magnitude,
        mut fold,
    } = sums;
    let mut on_hidden: Vec<DMatrix<f64>> = Vec::new();
    let mut k = top;
    let g = loop {
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
            let mut column = next.column_mut(j);
            let add = relax_column(
                column.as_mut_slice(),
                relax.lower_slope.column(d).as_slice(),
                relax.upper_slope.column(d).as_slice(),
                relax.upper_intercept.column(d).as_slice(),
                choices
                    .slopes
                    .map(|s| s[k].column(j))
                    .as_ref()
                    .map(|c| c.as_slice()),
            );
            if let Some(m) = choices.multipliers {
                column += m[k].column(j);
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
        constant += engine.layer(k).bias_dot(&next);
        // Below the first ReLU, paired columns are the same up to sign on the stable units only.
        g = if paired && k + 1 == top {
            transpose_paired(engine.layer(k), &next)
        } else {
            transpose_nonzero(engine.layer(k), &next)
        };
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
                let coefficients = coefficients.as_slice();
                let (value, size) = linf_minimum(
                    constant[j],
                    coefficients,
                    domains.lower.column(d).as_slice(),
                    domains.upper.column(d).as_slice(),
                    domains.magnitude.column(d).as_slice(),
                );
                lower[j] = value;
                magnitude[j] += size;
                if minimisers {
                    let inner_lo = domains.inner_lower.column(d);
                    let inner_hi = domains.inner_upper.column(d);
                    for i in 0..dim {
                        let w = coefficients[i];
                        minimiser[(i, j)] = if w > 0.0 {
                            inner_lo[i]
                        } else if w < 0.0 {
                            inner_hi[i]
                        } else {
                            region.center[i].max(inner_lo[i]).min(inner_hi[i])
                        };
                    }
                }
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
