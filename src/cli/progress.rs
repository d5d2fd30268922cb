//! Progress of a long run on standard error: a bar drawn by `indicatif` on a
//! terminal, and off a terminal (cron, CI logs) a plain line every 10% of
//! the work or every 10 seconds, whichever comes first.

use std::io::IsTerminal as _;
use std::sync::Mutex;
use std::time::{Duration, Instant};

use keelson::evaluate::Progress;

/// Seconds between plain lines when the work moves slowly.
const PLAIN_EVERY: Duration = Duration::from_secs(10);

/// A progress reporter for `what` ("fits").
pub(crate) enum Reporter {
    /// A bar on a terminal.
    Bar(indicatif::ProgressBar),
    /// Plain lines: the last tenth reported and when.
    Plain { what: &'static str, state: Mutex<(usize, Instant)>, started: Instant },
}

impl Reporter {
    /// The reporter for standard error as it is.
    pub(crate) fn stderr(what: &'static str) -> Reporter {
        if std::io::stderr().is_terminal() {
            let bar = indicatif::ProgressBar::with_draw_target(None, indicatif::ProgressDrawTarget::stderr());
            let style = indicatif::ProgressStyle::with_template(&format!(
                "{{elapsed_precise}} [{{bar:40}}] {{pos}}/{{len}} {what} (eta {{eta}})"
            ))
            .map(|s| s.progress_chars("=> "));
            if let Ok(style) = style {
                bar.set_style(style);
            }
            Reporter::Bar(bar)
        } else {
            let now = Instant::now();
            Reporter::Plain { what, state: Mutex::new((0, now)), started: now }
        }
    }

    /// Records progress (callable from any worker thread).
    pub(crate) fn update(&self, p: Progress) {
        match self {
            Reporter::Bar(bar) => {
                if bar.length() != Some(p.total as u64) {
                    bar.set_length(p.total as u64);
                }
                bar.set_position(p.done as u64);
                if p.done >= p.total {
                    bar.finish();
                }
            }
            Reporter::Plain { what, state, started } => {
                let Ok(mut s) = state.lock() else { return };
                let tenth = 10 * p.done / p.total.max(1);
                if tenth > s.0 || s.1.elapsed() >= PLAIN_EVERY {
                    s.0 = s.0.max(tenth);
                    s.1 = Instant::now();
                    eprintln!(
                        "progress: {}/{} {what} ({:.0}%), {:.0} s",
                        p.done,
                        p.total,
                        100.0 * p.done as f64 / p.total.max(1) as f64,
                        started.elapsed().as_secs_f64()
                    );
                }
            }
        }
    }
}
