//! Optimised relaxations: lower slopes of unstable ReLUs (Xu et al., 2021) and split multipliers
//! (Wang et al., 2021), improved per column by projected gradient ascent (Adam steps).
//!
//! Every slope in `[0, 1]` and every multiplier `β ≥ 0` gives a sound bound (see [`super::backward`]):
//! for a unit forced active (`z ≥ 0`) the objective gains `−β z`, for one forced inactive (`z ≤ 0`) it
//! gains `+β z`, both ≤ 0 on the domain. So the best bound seen is sound and never below the starting
//! (adaptive-slope, zero-multiplier) bound. The ascent direction is exact where the bound is
//! differentiable: by Danskin's theorem the derivative of `min_x f(x; α, β)` is that of `f` at the
//! minimiser, which is the column's coefficient on the unit times the unit's value in a forward pass of
//! the relaxed network at the minimiser.

use nalgebra::{DMatrix, DVector};

use super::backward::{self, Backward, Choices, Keep, Objectives};
use super::intermediate::HiddenBounds;
use super::{Domains, Engine};

/// Settings of the ascent.
#[derive(Debug, Clone, PartialEq)]
pub struct SlopeSettings {
    /// Gradient steps.
    pub iterations: usize,
    /// Adam step size.
    pub step: f64,
}

impl Default for SlopeSettings {
    fn default() -> SlopeSettings {
        SlopeSettings {
            iterations: 20,
            step: 0.2,
        }
    }
}

struct Adam {
    first: Vec<DMatrix<f64>>,
    second: Vec<DMatrix<f64>>,
}

impl Adam {
    fn new(shape: &[DMatrix<f64>]) -> Adam {
        let zeros: Vec<DMatrix<f64>> = shape.iter().map(|m| m.map(|_| 0.0)).collect();
        Adam {
            first: zeros.clone(),
            second: zeros,
        }
    }

    /// One ascent step on `values` with `gradient`, then `project`.
    fn step(
        &mut self,
        values: &mut [DMatrix<f64>],
        gradient: &[DMatrix<f64>],
        rate: f64,
        t: i32,
        project: fn(f64) -> f64,
    ) {
        let (b1, b2) = (0.9f64, 0.999f64);
        let (c1, c2) = (1.0 - b1.powi(t), 1.0 - b2.powi(t));
        for k in 0..values.len() {
            for ((v, g), (m, s)) in values[k]
                .iter_mut()
                .zip(gradient[k].iter())
                .zip(self.first[k].iter_mut().zip(self.second[k].iter_mut()))
            {
                *m = b1 * *m + (1.0 - b1) * g;
                *s = b2 * *s + (1.0 - b2) * g * g;
                *v = project(*v + rate * (*m / c1) / ((*s / c2).sqrt() + 1e-12));
            }
        }
    }
}

/// The sign `σ` of each split unit's multiplier term per domain (units × domains): −1 forced active,
/// +1 forced inactive, 0 free.
fn split_signs(domains: &Domains, hidden: &HiddenBounds) -> Vec<DMatrix<f64>> {
    hidden
        .lower
        .iter()
        .enumerate()
        .map(|(k, l)| {
            DMatrix::from_fn(l.nrows(), domains.len(), |i, d| {
                -(domains.split(k, i, d) as f64)
            })
        })
        .collect()
}

/// One column's lower slopes and split multipliers, one vector per hidden layer: the choices behind
/// its best bound, kept to start a related column's ascent from (a sub-domain's from its parent's).
/// Any values give a sound bound: slopes are clamped to `[0, 1]` and multipliers to `≥ 0` on use.
#[derive(Debug, Clone, PartialEq)]
pub struct Warm {
    /// Lower slope per hidden unit and layer.
    pub slopes: Vec<DVector<f64>>,
    /// Split multiplier per hidden unit and layer.
    pub multipliers: Vec<DVector<f64>>,
}

/// Optimises slopes and multipliers of the columns of `objectives` (which must be written on the last
/// layer or any layer above every hidden layer they cross) and returns the best sound bound per column.
/// A column stops once its bound exceeds `threshold[j]`.
pub fn optimise(
    engine: &Engine,
    hidden: &HiddenBounds,
    domains: &Domains,
    objectives: &Objectives,
    threshold: &[f64],
    settings: &SlopeSettings,
) -> Backward {
    optimise_from(
        engine,
        hidden,
        domains,
        objectives,
        threshold,
        settings,
        &[],
    )
    .0
}

/// [`optimise`], starting column `j` from `start[j]` when given (an empty `start` starts every column
/// from the adaptive slopes and zero multipliers), and returning each column's choices at its best
/// bound.
pub fn optimise_from(
    engine: &Engine,
    hidden: &HiddenBounds,
    domains: &Domains,
    objectives: &Objectives,
    threshold: &[f64],
    settings: &SlopeSettings,
    start: &[Option<&Warm>],
) -> (Backward, Vec<Warm>) {
    let columns = objectives.domain.len();
    let layers = objectives.top;
    let signs = split_signs(domains, hidden);
    let has_splits = !domains.splits.is_empty();
    let mut slopes: Vec<DMatrix<f64>> = (0..layers)
        .map(|k| {
            let relax = &hidden.relax[k].lower_slope;
            DMatrix::from_fn(relax.nrows(), columns, |i, j| {
                relax[(i, objectives.domain[j])]
            })
        })
        .collect();
    let mut multipliers: Vec<DMatrix<f64>> = slopes
        .iter()
        .map(|m| DMatrix::zeros(m.nrows(), columns))
        .collect();
    // The choices behind each column's best bound so far: the adaptive slopes of the first pass.
    let mut best_warm: Vec<Warm> = (0..columns)
        .map(|j| column_choices(&slopes, &multipliers, j))
        .collect();
    for (j, warm) in start.iter().enumerate() {
        let Some(warm) = warm else { continue };
        for k in 0..layers {
            if warm.slopes.get(k).map(DVector::len) == Some(slopes[k].nrows()) {
                let column = warm.slopes[k].map(|v| v.clamp(0.0, 1.0));
                slopes[k].set_column(j, &column);
            }
            if has_splits && warm.multipliers.get(k).map(DVector::len) == Some(slopes[k].nrows()) {
                let column = warm.multipliers[k].map(|v| v.max(0.0));
                multipliers[k].set_column(j, &column);
            }
        }
    }
    let mut best = backward::run(
        engine,
        hidden,
        domains,
        objectives.clone(),
        Choices::default(),
        Keep::Minimisers,
    );
    let mut open: Vec<usize> = (0..columns)
        .filter(|&j| best.lower[j] <= threshold[j] && best.lower[j].is_finite())
        .collect();
    if open.is_empty() || layers == 0 || settings.iterations == 0 {
        return (best, best_warm);
    }
    let mut adam_slopes = Adam::new(&slopes);
    let mut adam_multipliers = Adam::new(&multipliers);
    for t in 1..=settings.iterations as i32 {
        let pick = |m: &DMatrix<f64>| m.select_columns(open.iter());
        let sub_slopes: Vec<DMatrix<f64>> = slopes.iter().map(pick).collect();
        let sub_multipliers: Vec<DMatrix<f64>> = multipliers
            .iter()
            .enumerate()
            .map(|(k, m)| {
                DMatrix::from_fn(m.nrows(), open.len(), |i, c| {
                    let j = open[c];
                    m[(i, j)] * signs[k][(i, objectives.domain[j])]
                })
            })
            .collect();
        let sub = Objectives {
            top: objectives.top,
            coefficients: pick(&objectives.coefficients),
            constant: DVector::from_iterator(
                open.len(),
                open.iter().map(|&j| objectives.constant[j]),
            ),
            domain: open.iter().map(|&j| objectives.domain[j]).collect(),
        };
        let result = backward::run(
            engine,
            hidden,
            domains,
            sub.clone(),
            Choices {
                slopes: Some(&sub_slopes),
                multipliers: has_splits.then_some(&sub_multipliers[..]),
            },
            Keep::Everything,
        );
        for (c, &j) in open.iter().enumerate() {
            if result.lower[c] > best.lower[j] {
                best.lower[j] = result.lower[c];
                best.minimiser.set_column(j, &result.minimiser.column(c));
                best_warm[j] = column_choices(&slopes, &multipliers, j);
            }
        }
        // Relaxed forward pass at the minimisers gives every unit's value.
        let values = relaxed_forward(engine, hidden, &sub, &result, &sub_slopes);
        let mut slope_gradient: Vec<DMatrix<f64>> = slopes
            .iter()
            .map(|m| DMatrix::zeros(m.nrows(), columns))
            .collect();
        let mut multiplier_gradient = slope_gradient.clone();
        for k in 0..layers {
            let intercept = &hidden.relax[k].upper_intercept;
            for (c, &j) in open.iter().enumerate() {
                let d = objectives.domain[j];
                for i in 0..intercept.nrows() {
                    let g = result.on_hidden[k][(i, c)];
                    if intercept[(i, d)] > 0.0 && g >= 0.0 {
                        slope_gradient[k][(i, j)] = g * values[k][(i, c)];
                    }
                    multiplier_gradient[k][(i, j)] = signs[k][(i, d)] * values[k][(i, c)];
                }
            }
        }
        adam_slopes.step(&mut slopes, &slope_gradient, settings.step, t, |v| {
            v.clamp(0.0, 1.0)
        });
        if has_splits {
            adam_multipliers.step(
                &mut multipliers,
                &multiplier_gradient,
                settings.step,
                t,
                |v| v.max(0.0),
            );
        }
        open.retain(|&j| best.lower[j] <= threshold[j]);
        if open.is_empty() {
            break;
        }
    }
    (best, best_warm)
}

/// Column `j` of every layer's slopes and multipliers.
fn column_choices(slopes: &[DMatrix<f64>], multipliers: &[DMatrix<f64>], j: usize) -> Warm {
    Warm {
        slopes: slopes.iter().map(|m| m.column(j).into_owned()).collect(),
        multipliers: multipliers
            .iter()
            .map(|m| m.column(j).into_owned())
            .collect(),
    }
}

/// Each hidden unit's value in the relaxed network at each column's minimiser (units × columns per
/// hidden layer), with the line each column chose at each unit.
#[allow(clippy::needless_range_loop)] // k indexes several per-layer lists at once
fn relaxed_forward(
    engine: &Engine,
    hidden: &HiddenBounds,
    objectives: &Objectives,
    result: &Backward,
    slopes: &[DMatrix<f64>],
) -> Vec<DMatrix<f64>> {
    let mut values = Vec::with_capacity(objectives.top);
    let mut z = engine.layer(0).apply(&result.minimiser);
    for k in 0..objectives.top {
        let relax = &hidden.relax[k];
        let mut h = z.clone();
        for (c, &d) in objectives.domain.iter().enumerate() {
            for i in 0..h.nrows() {
                let t = relax.upper_intercept[(i, d)];
                let g = result.on_hidden[k][(i, c)];
                h[(i, c)] = if t > 0.0 {
                    if g >= 0.0 {
                        slopes[k][(i, c)] * z[(i, c)]
                    } else {
                        relax.upper_slope[(i, d)] * z[(i, c)] + t
                    }
                } else {
                    relax.lower_slope[(i, d)] * z[(i, c)]
                };
            }
        }
        values.push(z);
        z = engine.layer(k + 1).apply(&h);
    }
    values
}
