//! A progress bar on standard error (indicatif) showing finished samples and the running counts of
//! certified, counterexample and open samples. It is only drawn when standard error is a terminal;
//! otherwise it stays silent. It never touches standard output.

use std::io::IsTerminal;
use std::sync::atomic::{AtomicUsize, Ordering};

use indicatif::{ProgressBar, ProgressDrawTarget, ProgressStyle};

use super::pipeline::Observer;
use super::report::{SampleRecord, Status};

/// The terminal progress bar observer.
#[derive(Debug)]
pub struct TerminalProgress {
    bar: ProgressBar,
    certified: AtomicUsize,
    counterexample: AtomicUsize,
    open: AtomicUsize,
}

impl TerminalProgress {
    /// A progress bar that draws only when standard error is a terminal.
    pub fn new() -> TerminalProgress {
        let target = if std::io::stderr().is_terminal() {
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
            certified: AtomicUsize::new(0),
            counterexample: AtomicUsize::new(0),
            open: AtomicUsize::new(0),
        }
    }
}

impl Default for TerminalProgress {
    fn default() -> Self {
        TerminalProgress::new()
    }
}

impl Observer for TerminalProgress {
    fn begin(&self, total: usize, _pending: usize) {
        self.bar.set_length(total as u64);
    }

    fn sample_done(&self, record: &SampleRecord) {
        match record.status {
            Status::Certified => &self.certified,
            Status::Counterexample | Status::Misclassified => &self.counterexample,
            Status::Unresolved => &self.open,
        }
        .fetch_add(1, Ordering::Relaxed);
        self.bar.set_message(format!(
            "certified {}  counterexample/misclassified {}  open {}",
            self.certified.load(Ordering::Relaxed),
            self.counterexample.load(Ordering::Relaxed),
            self.open.load(Ordering::Relaxed)
        ));
        self.bar.inc(1);
    }

    fn end(&self) {
        self.bar.finish_and_clear();
    }
}
