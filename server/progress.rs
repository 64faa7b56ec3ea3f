//! Progress on standard error for command-line work that can take more than a second.
//!
//! Shown only when standard error is a terminal and the output is not `--json`, so that
//! piped and scripted runs stay quiet: a spinner with the stage and the elapsed time
//! (indicatif), cleared when the work ends.

use std::io::IsTerminal;
use std::time::Duration;

use indicatif::{ProgressBar, ProgressStyle};

/// Runs `work`, with a spinner saying `stage` while it runs (when shown at all).
pub fn during<T>(stage: &str, json: bool, work: impl FnOnce() -> T) -> T {
    if json || !std::io::stderr().is_terminal() {
        return work();
    }
    let spinner = ProgressBar::new_spinner();
    if let Ok(style) = ProgressStyle::with_template("{spinner} {msg} ({elapsed})") {
        spinner.set_style(style);
    }
    spinner.set_message(stage.to_string());
    spinner.enable_steady_tick(Duration::from_millis(120));
    let out = work();
    spinner.finish_and_clear();
    out
}
