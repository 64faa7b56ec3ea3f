//! gapwise: country-selection diagnostics and corrections for cross-national survey
//! programmes.
//!
//! Data flow in one direction: `project` (files, validation) -> `project::WaveView` (one
//! wave's eligible universe) -> `analysis` (one serialisable result per question) ->
//! `charts` and `web` (presentation). `stats` holds the numerical code, with no I/O.

pub mod analysis;
pub mod charts;
pub mod civil_time;
pub mod cli;
pub mod csv_out;
pub mod demo;
pub mod progress;
pub mod project;
pub mod stats;
pub mod web;

/// The tool's version, shown in outputs for reproducibility.
pub const VERSION: &str = env!("CARGO_PKG_VERSION");

/// The folder of the bundled demo project (used when no project is named): `demo-data`
/// in the working folder or in the checkout the binary was built from; when neither
/// exists (an installed binary whose checkout is gone), the demo generator writes it once
/// into the user's cache folder (`$XDG_CACHE_HOME/gapwise/demo-VERSION`, else
/// `~/.cache/...`, else the temporary folder). The generator is deterministic, so this is
/// the same project, byte for byte.
pub fn demo_dir() -> std::path::PathBuf {
    let has_manifest = |d: &std::path::Path| d.join(project::MANIFEST_FILE).is_file();
    let local = std::path::PathBuf::from("demo-data");
    if has_manifest(&local) {
        return local;
    }
    let checkout = std::path::Path::new(env!("CARGO_MANIFEST_DIR")).join("demo-data");
    if has_manifest(&checkout) {
        return checkout;
    }
    let cache = std::env::var_os("XDG_CACHE_HOME")
        .map(std::path::PathBuf::from)
        .or_else(|| std::env::var_os("HOME").map(|h| std::path::PathBuf::from(h).join(".cache")))
        .unwrap_or_else(std::env::temp_dir)
        .join("gapwise")
        .join(format!("demo-{VERSION}"));
    if !has_manifest(&cache) {
        // Written beside and renamed into place, so that a half-written demo is never used.
        let staging = cache.with_extension(format!("staging-{}", std::process::id()));
        if demo::write(&staging, demo::SEED).is_ok() {
            let _ = std::fs::rename(&staging, &cache);
        }
        let _ = std::fs::remove_dir_all(&staging);
    }
    cache
}
