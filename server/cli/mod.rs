//! The command line's work: each command returns its exit code and prints its result.
//! Argument parsing lives in `main.rs`.
//!
//! One module per command group: its runner (load, run the analysis, choose text or
//! JSON) and, beside it, the readable text of its result. What several commands share:
//! where a universe comes from ([`universe`]), how results reach standard output (here),
//! how their tables are laid out ([`text_table`]) and how files are written
//! ([`atomic_file`]).

pub mod atomic_file;
mod check;
mod fit;
mod impact;
mod multilevel;
mod plan;
mod report;
mod respondents;
mod serve;
mod text_table;
pub mod universe;
mod weights;

pub use atomic_file::write_atomically;
pub use check::{check, summary_text};
pub use fit::{fit, fit_text};
pub use impact::impact;
pub use multilevel::{multilevel, MultilevelArgs};
pub use plan::{plan, plan_text};
pub use report::report;
pub use respondents::{pooled, two_step};
pub use serve::{make_demo, serve};
pub use universe::{load_universe, UniverseSource};
pub use weights::export_weights;

/// Writes to standard output, ignoring a closed pipe (`gapwise fit ... | head`).
fn emit(text: &str) {
    use std::io::Write as _;
    let _ = std::io::stdout().lock().write_all(text.as_bytes());
}

/// One JSON value, pretty-printed, on standard output.
fn emit_json<T: serde::Serialize>(value: &T) {
    emit(&(serde_json::to_string_pretty(value).unwrap_or_default() + "\n"));
}

/// The end of most commands: the result as JSON or as its readable text, exit 0; or the
/// error on standard error, exit 1.
fn finish<T: serde::Serialize, E: std::fmt::Display>(
    result: Result<T, E>,
    json: bool,
    text: impl FnOnce(&T) -> String,
) -> i32 {
    match result {
        Ok(value) => {
            if json {
                emit_json(&value);
            } else {
                emit(&text(&value));
            }
            0
        }
        Err(e) => {
            eprintln!("{e}");
            1
        }
    }
}

/// A number with `decimals` places, `-` when there is none.
fn opt(x: Option<f64>, decimals: usize) -> String {
    x.map_or_else(|| "-".to_string(), |v| format!("{v:.decimals$}"))
}
