//! A progress bar on stderr for long runs: only on a terminal, never under --quiet.

use std::io::IsTerminal;

use indicatif::{ProgressBar, ProgressDrawTarget, ProgressStyle};

use crate::output::Settings;

/// Runs shorter than this many steps finish too fast to need a bar.
const MIN_STEPS: usize = 2_000;

pub struct Progress {
    bar: Option<ProgressBar>,
}

impl Progress {
    /// A bar that appears once the total is known to be large enough.
    pub fn new(settings: &Settings, what: &str) -> Progress {
        let show = !settings.quiet && std::io::stderr().is_terminal();
        let bar = show.then(|| {
            let bar = ProgressBar::with_draw_target(Some(0), ProgressDrawTarget::hidden());
            bar.set_style(
                ProgressStyle::with_template("{msg} [{bar:40}] {pos}/{len} ({eta} left)")
                    .expect("a valid template")
                    .progress_chars("=> "),
            );
            bar.set_message(what.to_string());
            bar
        });
        Progress { bar }
    }

    /// Records that `done` of `total` steps are finished (callable from any thread).
    pub fn update(&self, done: usize, total: usize) {
        if let Some(b) = &self.bar {
            if b.length() != Some(total as u64) {
                b.set_length(total as u64);
                if total >= MIN_STEPS {
                    b.set_draw_target(ProgressDrawTarget::stderr());
                }
            }
            b.set_position(done as u64);
        }
    }

    pub fn finish(self) {
        if let Some(b) = self.bar {
            b.finish_and_clear();
        }
    }
}
