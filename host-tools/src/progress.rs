//! Progress bars on standard error, shown only on a terminal and never with
//! `--quiet`. Library code takes a [`Progress`] and never prints by itself.

use indicatif::{ProgressBar, ProgressDrawTarget, ProgressStyle};
use std::io::IsTerminal;
use std::time::Duration;

/// Makes one bar per stage, or none.
#[derive(Debug, Clone, Copy)]
pub struct Progress {
    enabled: bool,
}

impl Progress {
    /// Bars on standard error if it is a terminal and `quiet` is off.
    pub fn stderr(quiet: bool) -> Self {
        Progress {
            enabled: !quiet && std::io::stderr().is_terminal(),
        }
    }

    /// No bars (tests, library use).
    pub fn hidden() -> Self {
        Progress { enabled: false }
    }

    /// A bar over `total` units; `bytes` shows them as sizes.
    pub fn stage(&self, label: &str, total: u64, bytes: bool) -> Stage {
        if !self.enabled {
            return Stage { bar: None };
        }
        let bar = ProgressBar::with_draw_target(Some(total), ProgressDrawTarget::stderr());
        let template = if bytes {
            "{prefix:>12} [{bar:32}] {bytes}/{total_bytes} {bytes_per_sec} eta {eta}"
        } else {
            "{prefix:>12} [{bar:32}] {pos}/{len} {msg} eta {eta}"
        };
        if let Ok(style) = ProgressStyle::with_template(template) {
            bar.set_style(style.progress_chars("=> "));
        }
        bar.set_prefix(label.to_string());
        bar.enable_steady_tick(Duration::from_millis(200));
        Stage { bar: Some(bar) }
    }
}

/// One stage's bar; finishes and clears itself when dropped.
#[derive(Debug)]
pub struct Stage {
    bar: Option<ProgressBar>,
}

impl Stage {
    /// A stage that shows nothing.
    pub fn hidden() -> Self {
        Stage { bar: None }
    }

    /// Moves the bar forward.
    pub fn advance(&self, n: u64) {
        if let Some(b) = &self.bar {
            b.inc(n);
        }
    }

    /// Sets a short message beside the bar.
    pub fn message(&self, msg: String) {
        if let Some(b) = &self.bar {
            b.set_message(msg);
        }
    }
}

impl Drop for Stage {
    fn drop(&mut self) {
        if let Some(b) = &self.bar {
            b.finish_and_clear();
        }
    }
}
