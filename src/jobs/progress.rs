//! Progress of a job on stderr. Input: units done. Output: a bar on a terminal; on
//! anything else (CI logs, `2> file`, nohup) a plain line every
//! `ASSIZE_PROGRESS_EVERY` seconds (default 30) with done / total, rate and time
//! left; nothing with `--quiet`. Never writes to stdout.

use std::io::IsTerminal as _;
use std::time::{Duration, Instant};

use indicatif::ProgressBar;

/// Seconds between plain progress lines unless `ASSIZE_PROGRESS_EVERY` says otherwise.
const DEFAULT_EVERY: u64 = 30;

/// Where progress goes.
enum Sink {
    Quiet,
    Bar(ProgressBar),
    Lines { every: Duration, last: Instant },
}

/// A job's progress reporter.
pub struct Progress {
    sink: Sink,
    what: String,
    done: u64,
    total: u64,
    start: Instant,
}

impl Progress {
    /// A reporter for `total` units; a bar on a terminal, plain lines elsewhere.
    pub fn new(total: u64, what: &str, quiet: bool) -> Self {
        let sink = if quiet {
            Sink::Quiet
        } else if std::io::stderr().is_terminal() {
            Sink::Bar(crate::cli::common::progress(total, what, false))
        } else {
            let secs = std::env::var("ASSIZE_PROGRESS_EVERY")
                .ok()
                .and_then(|s| s.parse().ok())
                .unwrap_or(DEFAULT_EVERY);
            Sink::Lines {
                every: Duration::from_secs(secs),
                last: Instant::now(),
            }
        };
        Progress {
            sink,
            what: what.to_string(),
            done: 0,
            total,
            start: Instant::now(),
        }
    }

    /// One more unit done.
    pub fn inc(&mut self) {
        self.done += 1;
        match &mut self.sink {
            Sink::Quiet => {}
            Sink::Bar(b) => b.inc(1),
            Sink::Lines { every, last } => {
                if last.elapsed() >= *every {
                    *last = Instant::now();
                    eprintln!("{}", self.line());
                }
            }
        }
    }

    /// Print a message without tearing the bar.
    pub fn note(&self, msg: &str) {
        match &self.sink {
            Sink::Bar(b) => b.suspend(|| eprintln!("{msg}")),
            _ => eprintln!("{msg}"),
        }
    }

    /// Clear the bar, or print the last line.
    pub fn finish(self) {
        match &self.sink {
            Sink::Quiet => {}
            Sink::Bar(b) => b.finish_and_clear(),
            Sink::Lines { .. } => eprintln!("{}", self.line()),
        }
    }

    /// `grading: 40/120 done, 3.1 per minute, about 26 min left`.
    fn line(&self) -> String {
        let mins = self.start.elapsed().as_secs_f64() / 60.0;
        let rate = if mins > 0.0 {
            self.done as f64 / mins
        } else {
            0.0
        };
        let left = if self.done == self.total {
            format!("finished in {mins:.1} min")
        } else if rate > 0.0 {
            format!(
                "about {:.0} min left",
                (self.total - self.done) as f64 / rate
            )
        } else {
            "time left unknown".into()
        };
        format!(
            "{}: {}/{} done, {rate:.1} per minute, {left}",
            self.what, self.done, self.total
        )
    }
}
