//! What a run shows while it works: a live status line on a terminal (indicatif), plain
//! timestamped log lines otherwise (for batch logs and pipes), or nothing.

use std::io::IsTerminal;
use std::time::Duration;

use indicatif::{ProgressBar, ProgressStyle};

/// Progress output of one command.
pub struct Progress {
    bar: Option<ProgressBar>,
    lines: bool,
    last_status: String,
}

impl Progress {
    /// A live line on a terminal, plain lines otherwise; `quiet` shows nothing but errors.
    pub fn for_stderr(quiet: bool) -> Progress {
        if quiet {
            return Progress {
                bar: None,
                lines: false,
                last_status: String::new(),
            };
        }
        if std::io::stderr().is_terminal() {
            let bar = ProgressBar::new_spinner();
            bar.set_style(
                ProgressStyle::with_template("{spinner} [{elapsed_precise}] {wide_msg}")
                    .unwrap_or_else(|_| ProgressStyle::default_spinner()),
            );
            bar.enable_steady_tick(Duration::from_millis(200));
            Progress {
                bar: Some(bar),
                lines: true,
                last_status: String::new(),
            }
        } else {
            Progress {
                bar: None,
                lines: true,
                last_status: String::new(),
            }
        }
    }

    /// Whether a live status line is shown (a terminal, not quiet).
    pub fn live(&self) -> bool {
        self.bar.is_some()
    }

    /// The current summary (shown live on a terminal; not printed as lines).
    pub fn status(&mut self, msg: String) {
        if msg == self.last_status {
            return;
        }
        if let Some(bar) = &self.bar {
            bar.set_message(msg.clone());
        }
        self.last_status = msg;
    }

    /// An event worth a line of its own.
    pub fn line(&self, msg: String) {
        if !self.lines {
            return;
        }
        let stamp = chrono::Utc::now().format("%Y-%m-%dT%H:%M:%SZ");
        match &self.bar {
            Some(bar) => bar.println(format!("{stamp} {msg}")),
            None => eprintln!("{stamp} {msg}"),
        }
    }

    /// Clear the live line.
    pub fn finish(&self) {
        if let Some(bar) = &self.bar {
            bar.finish_and_clear();
        }
    }
}

/// A byte-count bar for long operations (hashing big files), shown only on a terminal and
/// only once the operation is big enough to be worth it.
pub struct Bytes {
    bar: Option<ProgressBar>,
    what: &'static str,
}

impl Bytes {
    /// A bar labelled `what` (not shown until [`Bytes::set`] sees more than 64 MiB).
    pub fn new(what: &'static str) -> Bytes {
        Bytes { bar: None, what }
    }

    /// Progress: `done` of `total` bytes.
    pub fn set(&mut self, done: u64, total: u64) {
        if self.bar.is_none() && total > 64 << 20 && std::io::stderr().is_terminal() {
            let bar = ProgressBar::new(total);
            bar.set_style(
                ProgressStyle::with_template("{msg} {bar:40} {bytes}/{total_bytes} ({eta})")
                    .unwrap_or_else(|_| ProgressStyle::default_bar()),
            );
            bar.set_message(self.what);
            self.bar = Some(bar);
        }
        if let Some(bar) = &self.bar {
            bar.set_position(done);
        }
    }

    /// Clear the bar.
    pub fn finish(&self) {
        if let Some(bar) = &self.bar {
            bar.finish_and_clear();
        }
    }
}
