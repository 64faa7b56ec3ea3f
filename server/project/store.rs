//! A projects folder: one sub-folder per project. New or changed projects are assembled in
//! a staging folder and moved into place by renames, keeping the previous version, so that
//! an interrupted save never leaves a half-written project.

use std::path::{Path, PathBuf};

use super::{Problem, Project, MANIFEST_FILE};

/// Sub-folders whose names start with this are staging areas, not projects.
pub const STAGING_PREFIX: &str = ".staging-";
/// Previous versions are kept as `NAME.previous-SECONDS`.
pub const PREVIOUS_MARKER: &str = ".previous-";

/// A project name must be a plain folder name: letters, digits, `-` and `_`, up to 64.
pub fn valid_name(name: &str) -> Result<(), String> {
    let ok = !name.is_empty()
        && name.len() <= 64
        && name
            .chars()
            .all(|c| c.is_ascii_alphanumeric() || c == '-' || c == '_');
    if ok {
        Ok(())
    } else {
        Err(format!("'{name}' cannot be a project name; use letters, digits, '-' and '_' (up to 64 characters)"))
    }
}

/// The projects in a folder: names of sub-folders with a manifest, sorted.
pub fn list(projects: &Path) -> Vec<String> {
    let mut names: Vec<String> = std::fs::read_dir(projects)
        .map(|entries| {
            entries
                .filter_map(Result::ok)
                .filter(|e| e.path().join(MANIFEST_FILE).is_file())
                .map(|e| e.file_name().to_string_lossy().to_string())
                .filter(|n| !n.starts_with(STAGING_PREFIX) && !n.contains(PREVIOUS_MARKER))
                .collect()
        })
        .unwrap_or_default();
    names.sort();
    names
}

/// The staging folder of a project name (created empty when `fresh`).
pub fn staging(projects: &Path, name: &str, fresh: bool) -> std::io::Result<PathBuf> {
    let dir = projects.join(format!("{STAGING_PREFIX}{name}"));
    if fresh {
        if dir.exists() {
            std::fs::remove_dir_all(&dir)?;
        }
        std::fs::create_dir_all(&dir)?;
    }
    Ok(dir)
}

/// Validates the staged project and, if it loads, moves it into place: the current
/// version (if any) is renamed to `NAME.previous-SECONDS`, then the staging folder to
/// `NAME`. Both are renames within one folder, so each step is atomic; if the second
/// fails, the previous version is renamed back. On problems nothing outside the staging
/// folder changes.
pub fn save(projects: &Path, name: &str) -> Result<Project, Vec<Problem>> {
    valid_name(name).map_err(|m| vec![Problem::file("project", m)])?;
    let staged = staging(projects, name, false)
        .map_err(|e| vec![Problem::file("project", e.to_string())])?;
    Project::load(&staged)?;
    let target = projects.join(name);
    let stamp = std::time::SystemTime::now()
        .duration_since(std::time::UNIX_EPOCH)
        .map_or(0, |d| d.as_secs());
    let previous = projects.join(format!("{name}{PREVIOUS_MARKER}{stamp}"));
    let io = |e: std::io::Error| {
        vec![Problem::file(
            "project",
            format!("cannot save the project: {e}; the previous version is unchanged"),
        )]
    };
    let had_previous = target.exists();
    if had_previous {
        std::fs::rename(&target, &previous).map_err(io)?;
    }
    if let Err(e) = std::fs::rename(&staged, &target) {
        if had_previous {
            let _ = std::fs::rename(&previous, &target);
        }
        return Err(io(e));
    }
    Project::load(&target)
}
