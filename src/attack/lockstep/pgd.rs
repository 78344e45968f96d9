//! One phase of PGD runs of the lockstep attack ([`super`]): every run of the phase is a column of one
//! matrix of points, stepped together.
//!
//! Per step: one batched evaluation (logits, margins, gradients), every point recorded and validated
//! by the search, columns whose sample is closed removed (the matrices are
//! compacted, so the products shrink), then for each remaining column the step-size schedule (halve
//! and go back to the run's best point after `patience` steps without progress) and one projected
//! descent step. After the last step the final points are evaluated once more. The deadline is checked
//! before every step and after every evaluation.

use nalgebra::DMatrix;
use rayon::prelude::*;

use super::Lockstep;
use crate::attack::evaluate::{evaluate, Against, MarginSpec};
use crate::attack::step::descent_step;

/// Columns per parallel task of the step update (a step is cheap next to its evaluation).
const COLUMNS_PER_TASK: usize = 16;

/// One column of a PGD phase.
struct Run<'a> {
    sample: usize,
    against: Against<'a>,
    step: f64,
    best_loss: f64,
    stalled: usize,
}

impl<'a> Lockstep<'a> {
    fn run_specs(&self, runs: &[Run<'a>]) -> Vec<MarginSpec<'a>> {
        runs.iter()
            .map(|r| MarginSpec {
                label: self.samples[r.sample].label,
                against: r.against,
            })
            .collect()
    }

    /// One PGD run per entry `(sample, start, margin)`, all stepped together. Returns false when the
    /// deadline stopped it.
    pub(super) fn pgd_phase(&mut self, entries: Vec<(usize, Vec<f64>, Against<'a>)>) -> bool {
        if entries.is_empty() {
            return true;
        }
        let dim = self.engine.input_dim();
        let mut x = DMatrix::zeros(dim, entries.len());
        let mut runs = Vec::with_capacity(entries.len());
        for (j, (s, start, against)) in entries.into_iter().enumerate() {
            let column = column_mut(&mut x, j);
            column.copy_from_slice(&start);
            self.samples[s].region.project(column);
            runs.push(Run {
                sample: s,
                against,
                step: self.settings.step_fraction,
                best_loss: f64::INFINITY,
                stalled: 0,
            });
        }
        let mut best_x = x.clone();
        let mut best_gradient = DMatrix::zeros(dim, runs.len());
        for _ in 0..self.settings.steps {
            if self.past_deadline() {
                return false;
            }
            let samples: Vec<usize> = runs.iter().map(|r| r.sample).collect();
            let specs = self.run_specs(&runs);
            let out = evaluate(&self.engine, &x, &specs, true, self.settings.precision);
            let mut gradient = out.gradients;
            let mut keep = Vec::with_capacity(runs.len());
            for (j, &s) in samples.iter().enumerate() {
                let logits: Vec<f64> = out.logits.column(j).iter().copied().collect();
                self.observe(s, column(&x, j), &logits);
                self.after_point(s);
                keep.push(self.states[s].open);
            }
            if self.past_deadline() {
                return false;
            }
            let mut margins = out.margins;
            if keep.iter().any(|k| !k) {
                let kept: Vec<usize> = (0..keep.len()).filter(|&j| keep[j]).collect();
                x = x.select_columns(&kept);
                gradient = gradient.select_columns(&kept);
                best_x = best_x.select_columns(&kept);
                best_gradient = best_gradient.select_columns(&kept);
                margins = kept.iter().map(|&j| margins[j]).collect();
                let mut index = 0;
                runs.retain(|_| {
                    index += 1;
                    keep[index - 1]
                });
                if runs.is_empty() {
                    return true;
                }
            }
            // Each column's schedule and step, in parallel (columns are independent).
            let (samples, patience) = (self.samples, self.settings.patience);
            x.as_mut_slice()
                .par_chunks_mut(dim)
                .zip(best_x.as_mut_slice().par_chunks_mut(dim))
                .zip(gradient.as_mut_slice().par_chunks_mut(dim))
                .zip(best_gradient.as_mut_slice().par_chunks_mut(dim))
                .zip(runs.par_iter_mut())
                .zip(margins.par_iter())
                .with_min_len(COLUMNS_PER_TASK)
                .for_each(
                    |(((((x, best_x), gradient), best_gradient), run), &margin)| {
                        if margin < run.best_loss {
                            run.best_loss = margin;
                            best_x.copy_from_slice(x);
                            best_gradient.copy_from_slice(gradient);
                            run.stalled = 0;
                        } else {
                            run.stalled += 1;
                            if run.stalled >= patience {
                                run.step *= 0.5;
                                x.copy_from_slice(best_x);
                                gradient.copy_from_slice(best_gradient);
                                run.stalled = 0;
                            }
                        }
                        descent_step(samples[run.sample].region, x, gradient, run.step);
                    },
                );
        }
        if self.settings.steps > 0 {
            let specs = self.run_specs(&runs);
            let out = evaluate(&self.engine, &x, &specs, false, self.settings.precision);
            for (j, run) in runs.iter().enumerate() {
                let logits: Vec<f64> = out.logits.column(j).iter().copied().collect();
                self.observe(run.sample, column(&x, j), &logits);
                self.after_point(run.sample);
            }
        }
        !self.past_deadline()
    }
}

pub(super) fn column(m: &DMatrix<f64>, j: usize) -> &[f64] {
    let rows = m.nrows();
    &m.as_slice()[j * rows..(j + 1) * rows]
}

pub(super) fn column_mut(m: &mut DMatrix<f64>, j: usize) -> &mut [f64] {
    let rows = m.nrows();
    &mut m.as_mut_slice()[j * rows..(j + 1) * rows]
}
