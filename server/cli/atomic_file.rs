//! Files the command line writes (reports, weight exports and their sidecars) are
//! written whole or not at all.
//!
//! The projects folder has its own, stricter scheme (synced files, a switched pointer;
//! `project::store`); a command's output needs only that no reader ever sees half a file.

use std::path::Path;

/// Writes to a temporary file beside `path`, then renames it into place, so that an
/// interrupted write never leaves a half-written file.
pub fn write_atomically(path: &Path, bytes: &[u8]) -> std::io::Result<()> {
    let dir = path
        .parent()
        .filter(|p| !p.as_os_str().is_empty())
        .unwrap_or(Path::new("."));
    let name = path
        .file_name()
        .map_or_else(|| "output".into(), |n| n.to_string_lossy().to_string());
    let temp = dir.join(format!(".{name}.{}.partial", std::process::id()));
    let result = std::fs::write(&temp, bytes).and_then(|()| std::fs::rename(&temp, path));
    if result.is_err() {
        let _ = std::fs::remove_file(&temp);
    }
    result
}
