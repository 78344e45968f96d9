//! The progress line of a certification run on standard error: finished samples, the rate over this
//! run, an estimate of the time left, and the running counts of certified, counterexample and open
//! samples. By default it is drawn (indicatif) only when standard error is a terminal and stays silent
//! otherwise; when asked for ([`ProgressMode::Lines`]) and standard error is not a terminal, it writes one
//! plain line at most every [`LINE_INTERVAL`] and a last line at the end. It never touches standard
//! output.
//!
//! The estimate is the plain average over the current phase: remaining samples ÷ (samples finished ÷
//! seconds since the phase began). The bound stages finish most samples together; the samples left for
//! branch and bound then finish one by one, so from the start of the search the rate counts only them,
//! and until the first of them finishes the estimate is the search budget: ⌈remaining ÷ threads⌉ × the
//! longest budget of a sample. Before 5 % of the samples finished the estimate reads `?`. Samples taken
//! over from a journal count as finished but not in the rate.

use std::io::IsTerminal;
use std::sync::atomic::{AtomicUsize, Ordering};
use std::sync::Mutex;
use std::time::{Duration, Instant};

use indicatif::{ProgressBar, ProgressDrawTarget, ProgressStyle};

use super::pipeline::Observer;
use super::report::{SampleRecord, Status};

/// Shortest time between two plain progress lines.
pub const LINE_INTERVAL: Duration = Duration::from_secs(10);

/// When the progress line is written.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum ProgressMode {
    /// Drawn only when standard error is a terminal.
    Terminal,
    /// Drawn on a terminal; otherwise plain lines (at most one per [`LINE_INTERVAL`], and one at the end).
    Lines,
}

/// Counts and times of the run so far.
#[derive(Debug)]
struct Tally {
    started: Instant,
    /// Samples taken over from a journal (reported through `sample_done` right after `begin`, not
    /// counted in the rate).
    resumed: usize,
    total: usize,
    last_line: Option<Instant>,
    /// Once branch and bound started: when, finished samples before it, and the budget of a sample.
    search: Option<(Instant, usize, f64)>,
}

/// The progress observer.
#[derive(Debug)]
pub struct TerminalProgress {
    bar: ProgressBar,
    /// Plain lines instead of a drawn bar.
    lines: bool,
    tally: Mutex<Tally>,
    done: AtomicUsize,
    certified: AtomicUsize,
    counterexample: AtomicUsize,
    open: AtomicUsize,
}

/// `1h 02m`, `3m 07s` or `12s`.
pub fn format_duration(seconds: f64) -> String {
    let s = seconds.max(0.0).round() as u64;
    match (s / 3600, (s / 60) % 60, s % 60) {
        (0, 0, sec) => format!("{sec}s"),
        (0, min, sec) => format!("{min}m {sec:02}s"),
        (h, min, _) => format!("{h}h {min:02}m"),
    }
}

/// The rate and estimate part of the line: `2.41 samples/s, ETA 1m 12s` (`ETA ?` before the first
/// sample of this run finishes).
pub fn rate_and_eta(finished_here: usize, remaining: usize, elapsed: f64) -> String {
    if finished_here == 0 || elapsed <= 0.0 {
        return "— samples/s, ETA ?".into();
    }
    let rate = finished_here as f64 / elapsed;
    format!(
        "{rate:.2} samples/s, ETA {}",
        format_duration(remaining as f64 / rate)
    )
}

impl TerminalProgress {
    /// A progress line written as `mode` says.
    pub fn new(mode: ProgressMode) -> TerminalProgress {
        let terminal = std::io::stderr().is_terminal();
        let target = if terminal {
            ProgressDrawTarget::stderr()
        } else {
            ProgressDrawTarget::hidden()
        };
        let bar = ProgressBar::with_draw_target(Some(0), target);
        bar.set_style(
            ProgressStyle::with_template(
                "{bar:30} {pos}/{len} samples  {msg}  [{elapsed_precise}]",
            )
            .unwrap_or_else(|_| ProgressStyle::default_bar()),
        );
        TerminalProgress {
            bar,
            lines: !terminal && mode == ProgressMode::Lines,
            tally: Mutex::new(Tally {
                started: Instant::now(),
                resumed: 0,
                total: 0,
                last_line: None,
                search: None,
            }),
            done: AtomicUsize::new(0),
            certified: AtomicUsize::new(0),
            counterexample: AtomicUsize::new(0),
            open: AtomicUsize::new(0),
        }
    }

    /// The line's text after the sample counter: rate, estimate and counts.
    fn message(&self, tally: &Tally) -> String {
        let done = self.done.load(Ordering::Relaxed);
        let remaining = tally.total.saturating_sub(done);
        let here = done.saturating_sub(tally.resumed);
        let pending = tally.total.saturating_sub(tally.resumed);
        let rate = match tally.search {
            // Before 5 % of the samples finished, a rate says little (one early sample gave "1 h").
            None if here * 20 < pending => rate_and_eta(0, remaining, 0.0),
            None => rate_and_eta(here, remaining, tally.started.elapsed().as_secs_f64()),
            Some((_, before, each)) if done == before => {
                let rounds = remaining.div_ceil(rayon::current_num_threads().max(1));
                format!(
                    "branch and bound, ETA {}",
                    format_duration(rounds as f64 * each)
                )
            }
            Some((started, before, _)) => {
                rate_and_eta(done - before, remaining, started.elapsed().as_secs_f64())
            }
        };
        format!(
            "{rate}  certified {}  counterexample/misclassified {}  open {}",
            self.certified.load(Ordering::Relaxed),
            self.counterexample.load(Ordering::Relaxed),
            self.open.load(Ordering::Relaxed)
        )
    }

    fn write_line(&self, tally: &Tally) {
        eprintln!(
            "progress: {}/{} samples  {}  [{}]",
            self.done.load(Ordering::Relaxed),
            tally.total,
            self.message(tally),
            format_duration(tally.started.elapsed().as_secs_f64())
        );
    }
}

impl Observer for TerminalProgress {
    fn begin(&self, total: usize, pending: usize) {
        let mut tally = self.tally.lock().unwrap_or_else(|e| e.into_inner());
        tally.started = Instant::now();
        tally.total = total;
        tally.resumed = total.saturating_sub(pending);
        self.bar.set_length(total as u64);
        self.bar.set_message(self.message(&tally));
        if !self.lines {
            self.bar.enable_steady_tick(Duration::from_secs(1));
        }
    }

    fn sample_done(&self, record: &SampleRecord) {
        match record.status {
            Status::Certified => &self.certified,
            Status::Counterexample | Status::Misclassified => &self.counterexample,
            Status::Unresolved => &self.open,
        }
        .fetch_add(1, Ordering::Relaxed);
        self.done.fetch_add(1, Ordering::Relaxed);
        let mut tally = self.tally.lock().unwrap_or_else(|e| e.into_inner());
        self.bar.set_message(self.message(&tally));
        self.bar.inc(1);
        if self.lines {
            let now = Instant::now();
            let due = tally
                .last_line
                .map_or(now.duration_since(tally.started), |t| now.duration_since(t))
                >= LINE_INTERVAL;
            if due {
                tally.last_line = Some(now);
                self.write_line(&tally);
            }
        }
    }

    fn search_started(&self, _samples: usize, seconds_each: f64) {
        let mut tally = self.tally.lock().unwrap_or_else(|e| e.into_inner());
        tally.search = Some((
            Instant::now(),
            self.done.load(Ordering::Relaxed),
            seconds_each,
        ));
        self.bar.set_message(self.message(&tally));
        if self.lines {
            tally.last_line = Some(Instant::now());
            self.write_line(&tally);
        }
    }

    fn end(&self) {
        self.bar.finish_and_clear();
        if self.lines {
            let tally = self.tally.lock().unwrap_or_else(|e| e.into_inner());
            self.write_line(&tally);
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn durations_and_estimates_read_as_written() {
        assert_eq!(format_duration(0.4), "0s");
        assert_eq!(format_duration(72.0), "1m 12s");
        assert_eq!(format_duration(3725.0), "1h 02m");
        // 50 samples in 20 s: 2.5 per second, 150 left take 60 s.
        assert_eq!(rate_and_eta(50, 150, 20.0), "2.50 samples/s, ETA 1m 00s");
        assert_eq!(rate_and_eta(0, 10, 5.0), "— samples/s, ETA ?");
    }
}
