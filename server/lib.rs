//! gapwise: country-selection diagnostics and corrections for cross-national survey
//! programmes.
//!
//! Data flow in one direction: `project` (files, validation) -> `project::WaveView` (one
//! wave's eligible universe) -> `analysis` (one serialisable result per question) ->
//! `charts` and `web` (presentation). `stats` holds the numerical code, with no I/O.

pub mod analysis;
pub mod charts;
pub mod cli;
pub mod csv_out;
pub mod demo;
pub mod project;
pub mod stats;
pub mod web;

/// The tool's version, shown in outputs for reproducibility.
pub const VERSION: &str = env!("CARGO_PKG_VERSION");

/// The folder of the bundled demo project (used when no project is named).
pub fn demo_dir() -> std::path::PathBuf {
    let local = std::path::PathBuf::from("demo-data");
    if local.join(project::MANIFEST_FILE).is_file() {
        local
    } else {
        std::path::Path::new(env!("CARGO_MANIFEST_DIR")).join("demo-data")
    }
}
