//! Progress on stderr for long commands: a spinner while data load, a bar over the
//! cross-validation tasks, a spinner while the ledger is written. Drawn only when stderr is a
//! terminal, never under `--json`, and only once the command has run for a second, so short
//! runs and scripts see nothing. It never touches what is computed or stored.

use indicatif::{ProgressBar, ProgressDrawTarget, ProgressStyle};
use std::io::IsTerminal;
use std::time::Duration;

/// Seconds before anything is drawn.
const DELAY: Duration = Duration::from_secs(1);

pub(crate) struct Progress {
    bar: Option<ProgressBar>,
}

impl Progress {
    /// A progress display, hidden unless stderr is a terminal and `json` is off.
    pub(crate) fn start(json: bool) -> Progress {
        if json || !std::io::stderr().is_terminal() {
            return Progress { bar: None };
        }
        let bar = ProgressBar::with_draw_target(None, ProgressDrawTarget::hidden());
        bar.enable_steady_tick(Duration::from_millis(120));
        let late = bar.clone();
        std::thread::spawn(move || {
            std::thread::sleep(DELAY);
            if !late.is_finished() {
                late.set_draw_target(ProgressDrawTarget::stderr());
            }
        });
        Progress { bar: Some(bar) }
    }

    /// A phase without a count (reading data, writing the ledger).
    pub(crate) fn phase(&self, msg: &str) {
        if let Some(b) = &self.bar {
            b.set_style(
                ProgressStyle::with_template("{spinner} {msg} ({elapsed})")
                    .unwrap_or_else(|_| ProgressStyle::default_spinner()),
            );
            b.set_length(0);
            b.set_message(msg.to_string());
        }
    }

    /// `done` of `total` cross-validation tasks (fold x model entry) finished.
    pub(crate) fn tasks(&self, done: usize, total: usize) {
        if let Some(b) = &self.bar {
            if b.length() != Some(total as u64) {
                b.set_style(
                    ProgressStyle::with_template("{spinner} fitting {bar:30} {pos}/{len} tasks ({elapsed}, about {eta} left)")
                        .unwrap_or_else(|_| ProgressStyle::default_bar()),
                );
                b.set_length(total as u64);
            }
            b.set_position(done as u64);
        }
    }
}

impl Drop for Progress {
    fn drop(&mut self) {
        if let Some(b) = &self.bar {
            b.finish_and_clear();
        }
    }
}
