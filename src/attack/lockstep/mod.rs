//! The attack schedule of [`super::runner`] executed in lockstep over a batch of samples.
//!
//! Each phase of the schedule — the clean points, the FGSM points, the `e`-th extra start, the restart
//! from the centre, the random restarts (all of a sample's side by side), the `t`-th targeted run —
//! advances every still-open sample together: one PGD step is one batched
//! forward pass and one batched input-gradient pass ([`super::evaluate`]) over the columns of the open
//! runs. A sample whose counterexample is found (with `stop_at_first`) leaves the batch at once, and the
//! columns are compacted, so the matrix products shrink as samples drop out.
//!
//! Guarantees: a sample follows exactly the schedule it would follow alone — the same starts, the same
//! random draws from its own ChaCha8 stream, the same steps and step halvings — and, because a column's
//! values never depend on its batch ([`super::evaluate`]), the same points bit for bit; a batch of one
//! is the single-sample attack. Every counterexample comes from [`validate`] (plain forward pass, point
//! inside the region). The deadline is checked before every step and after every evaluated point; when
//! it passes, every sample still open stops with [`StopReason::DeadlineReached`].

use std::time::Instant;

use nalgebra::DMatrix;
use rand::SeedableRng;
use rand_chacha::ChaCha8Rng;

use super::counterexample::{forbidden_margin, validate, Counterexample};
use super::evaluate::{evaluate, Against, MarginSpec};
use super::runner::{AttackOutcome, AttackSettings, SearchPrecision, StopReason};
use super::step::{fgsm_point, random_start};
use crate::engine::Engine;
use crate::model::{predicted_class, Network};
use crate::threat::Region;

mod pgd;

use pgd::{column, column_mut};

/// In f32 searches, a point whose forbidden margin is at most this fraction of its largest logit
/// magnitude (plus one) is checked in f64 even when f32 does not see a forbidden class winning. A
/// heuristic band (the f32 rounding of a forward pass is usually far smaller): a near tie it misses is
/// a missed counterexample, never a wrong one.
const SINGLE_TIE: f64 = 1e-4;

/// One sample of a lockstep batch (already checked against the network).
#[derive(Debug, Clone, Copy)]
pub(super) struct Sample<'a> {
    pub region: &'a Region,
    pub label: usize,
    pub forbidden: &'a [usize],
    pub extra_starts: &'a [Vec<f64>],
    pub seed: u64,
}

/// What the search knows about one sample.
struct State {
    rng: ChaCha8Rng,
    best_margin: f64,
    best_input: Vec<f64>,
    found: Option<Counterexample>,
    /// Still scheduled for further points.
    open: bool,
    deadline_hit: bool,
}

/// Runs the whole schedule for every sample of the batch.
pub(super) fn attack_lockstep(
    network: &Network,
    samples: &[Sample<'_>],
    settings: &AttackSettings,
) -> Vec<AttackOutcome> {
    let mut search = Lockstep {
        network,
        engine: Engine::new(network),
        settings,
        samples,
        states: samples
            .iter()
            .map(|s| State {
                rng: ChaCha8Rng::seed_from_u64(s.seed),
                best_margin: f64::INFINITY,
                best_input: s.region.center.clone(),
                found: None,
                open: !s.forbidden.is_empty(),
                deadline_hit: false,
            })
            .collect(),
    };
    search.schedule();
    search.recheck_best();
    search
        .states
        .into_iter()
        .map(|s| match s.found {
            Some(c) => AttackOutcome::Found(c),
            None => AttackOutcome::NotFound {
                best_margin: s.best_margin,
                best_input: s.best_input,
                stop: if s.deadline_hit {
                    StopReason::DeadlineReached
                } else {
                    StopReason::BudgetSpent
                },
            },
        })
        .collect()
}

struct Lockstep<'a> {
    network: &'a Network,
    engine: Engine,
    settings: &'a AttackSettings,
    samples: &'a [Sample<'a>],
    states: Vec<State>,
}

impl<'a> Lockstep<'a> {
    fn open(&self) -> Vec<usize> {
        (0..self.samples.len())
            .filter(|&s| self.states[s].open)
            .collect()
    }

    fn schedule(&mut self) {
        if self.past_deadline() {
            return;
        }
        let clean_logits = self.clean_and_fgsm();
        if self.past_deadline() {
            return;
        }
        let most_starts = self.samples.iter().map(|s| s.extra_starts.len()).max();
        for e in 0..most_starts.unwrap_or(0) {
            let samples = self.samples;
            let runs = self
                .open()
                .into_iter()
                .filter_map(|s| {
                    let start = samples[s].extra_starts.get(e)?;
                    Some((s, start.clone(), Against::Strongest(samples[s].forbidden)))
                })
                .collect();
            if !self.pgd_phase(runs) {
                return;
            }
        }
        // Restart 0 from the centre; then the random restarts side by side, as one phase (wider
        // products; a sample's restarts all stop when one of them finds its counterexample).
        if self.settings.restarts > 0 {
            let runs = self
                .open()
                .into_iter()
                .map(|s| {
                    let sample = self.samples[s];
                    (
                        s,
                        sample.region.center.clone(),
                        Against::Strongest(sample.forbidden),
                    )
                })
                .collect();
            if !self.pgd_phase(runs) {
                return;
            }
        }
        let mut runs = Vec::new();
        for s in self.open() {
            let sample = self.samples[s];
            for _ in 1..self.settings.restarts {
                let mut start = sample.region.center.clone();
                random_start(sample.region, &mut self.states[s].rng, &mut start);
                runs.push((s, start, Against::Strongest(sample.forbidden)));
            }
        }
        if !self.pgd_phase(runs) {
            return;
        }
        if !self.settings.targeted {
            return;
        }
        // Most dangerous (largest clean logit) first, ties to the lower class.
        let orders: Vec<Vec<usize>> = self
            .samples
            .iter()
            .zip(&clean_logits)
            .map(|(sample, logits)| {
                if sample.forbidden.len() < 2 {
                    return Vec::new();
                }
                let mut order = sample.forbidden.to_vec();
                order.sort_by(|a, b| logits[*b].total_cmp(&logits[*a]).then(a.cmp(b)));
                order
            })
            .collect();
        let most = orders.iter().map(Vec::len).max().unwrap_or(0);
        for t in 0..most {
            let runs = self
                .open()
                .into_iter()
                .filter_map(|s| {
                    let target = *orders[s].get(t)?;
                    Some((
                        s,
                        self.samples[s].region.center.clone(),
                        Against::Class(target),
                    ))
                })
                .collect();
            if !self.pgd_phase(runs) {
                return;
            }
        }
    }

    /// The clean points of every open sample and then (with `fgsm_first`) their FGSM points. Returns
    /// the clean logits per sample (empty for samples with nothing forbidden).
    fn clean_and_fgsm(&mut self) -> Vec<Vec<f64>> {
        let open = self.open();
        let mut clean_logits = vec![Vec::new(); self.samples.len()];
        if open.is_empty() {
            return clean_logits;
        }
        let dim = self.engine.input_dim();
        let mut points = DMatrix::zeros(dim, open.len());
        for (j, &s) in open.iter().enumerate() {
            column_mut(&mut points, j).copy_from_slice(&self.samples[s].region.center);
        }
        let specs = self.specs_for(&open, |s| Against::Strongest(self.samples[s].forbidden));
        let clean = evaluate(
            &self.engine,
            &points,
            &specs,
            self.settings.fgsm_first,
            self.settings.precision,
        );
        for (j, &s) in open.iter().enumerate() {
            clean_logits[s] = clean.logits.column(j).iter().copied().collect();
            self.observe(s, column(&points, j), &clean_logits[s]);
            if self.states[s].found.is_some() {
                self.states[s].open = false; // already in a forbidden class without any change
            }
        }
        if !self.settings.fgsm_first {
            return clean_logits;
        }
        let still: Vec<usize> = (0..open.len())
            .filter(|&j| self.states[open[j]].open)
            .collect();
        let fgsm_samples: Vec<usize> = still.iter().map(|&j| open[j]).collect();
        let mut fgsm = DMatrix::zeros(dim, still.len());
        for (i, &j) in still.iter().enumerate() {
            let region = self.samples[open[j]].region;
            fgsm_point(
                region,
                column(&clean.gradients, j),
                column_mut(&mut fgsm, i),
            );
        }
        let specs = self.specs_for(&fgsm_samples, |s| {
            Against::Strongest(self.samples[s].forbidden)
        });
        let at_fgsm = evaluate(&self.engine, &fgsm, &specs, false, self.settings.precision);
        for (i, &s) in fgsm_samples.iter().enumerate() {
            let logits: Vec<f64> = at_fgsm.logits.column(i).iter().copied().collect();
            self.observe(s, column(&fgsm, i), &logits);
            self.after_point(s);
        }
        clean_logits
    }

    fn specs_for(
        &self,
        samples: &[usize],
        against: impl Fn(usize) -> Against<'a>,
    ) -> Vec<MarginSpec<'a>> {
        samples
            .iter()
            .map(|&s| MarginSpec {
                label: self.samples[s].label,
                against: against(s),
            })
            .collect()
    }

    /// The best margin of every sample without a counterexample, recomputed by a plain forward pass
    /// at its best point (which is validated too, should that pass put it in a forbidden class).
    fn recheck_best(&mut self) {
        for (sample, state) in self.samples.iter().zip(&mut self.states) {
            // Nothing forbidden, or no point seen before the deadline: nothing to recheck.
            if state.found.is_some() || !state.best_margin.is_finite() {
                continue;
            }
            let logits = self.network.forward(&state.best_input);
            state.best_margin = forbidden_margin(logits.as_slice(), sample.label, sample.forbidden);
            state.found = validate(
                self.network,
                sample.region,
                sample.label,
                sample.forbidden,
                &state.best_input,
            );
        }
    }

    /// True once the deadline has passed; then every open sample is closed as stopped by it.
    fn past_deadline(&mut self) -> bool {
        let Some(deadline) = self.settings.deadline else {
            return false;
        };
        if Instant::now() < deadline {
            return false;
        }
        for state in &mut self.states {
            if state.open {
                state.open = false;
                state.deadline_hit = true;
            }
        }
        true
    }

    /// Closes sample `s` when its counterexample is in hand and early exit is on.
    fn after_point(&mut self, s: usize) {
        let state = &mut self.states[s];
        if state.found.is_some() && self.settings.stop_at_first {
            state.open = false;
        }
    }

    /// Records the point `x` of sample `s` with its `logits`: keeps the best forbidden margin and
    /// validates a candidate with a plain forward pass.
    fn observe(&mut self, s: usize, x: &[f64], logits: &[f64]) {
        let sample = self.samples[s];
        let state = &mut self.states[s];
        let margin = forbidden_margin(logits, sample.label, sample.forbidden);
        if margin < state.best_margin {
            state.best_margin = margin;
            state.best_input.copy_from_slice(x);
        }
        let predicted = predicted_class(logits);
        let candidate = (predicted != sample.label && sample.forbidden.contains(&predicted))
            || (self.settings.precision == SearchPrecision::Single
                && margin
                    <= SINGLE_TIE * (1.0 + logits.iter().fold(0.0f64, |m, z| m.max(z.abs()))));
        if state.found.is_none() && candidate {
            state.found = validate(
                self.network,
                sample.region,
                sample.label,
                sample.forbidden,
                x,
            );
        }
    }
}
