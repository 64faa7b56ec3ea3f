//! A projects folder: one sub-folder per project, saved so that a crash at any moment
//! leaves either the previous or the new version, never neither and never a mix.
//!
//! ```text
//! PROJECTS/
//!   .staging-NAME-UPLOAD/      one per upload (UPLOAD: 64 random bits), until saved
//!   NAME/
//!     versions/VERSION/        complete, validated, never changed once in place
//!     current                  the name of the current version (one line)
//! ```
//!
//! A save validates the staged upload, writes and fsyncs its files and folder, renames it
//! to `NAME/versions/VERSION` (one atomic rename), writes `current.tmp-VERSION`, fsyncs
//! it, renames it over `current` (the atomic switch) and fsyncs the folder. Only then
//! are old versions beyond the number kept deleted. Version names (milliseconds since
//! 1970 and 32 random bits) sort by time and cannot collide; one lock per project
//! serialises saves within the server. [`recover`] (run at start-up) removes staging
//! folders and uncommitted versions and repairs the pointer from any leftover state.
//!
//! Folders written by earlier releases (the files directly in `NAME/`, previous versions
//! as `NAME.previous-SECONDS`) still load; a `NAME` lost between their two renames is
//! restored from its newest previous version by [`recover`].

use std::collections::HashMap;
use std::path::{Path, PathBuf};
use std::sync::{Arc, Mutex};

use super::{Problem, Project, MANIFEST_FILE};

/// Sub-folders whose names start with this are staging areas, not projects.
pub const STAGING_PREFIX: &str = ".staging-";
/// Previous versions of earlier releases were kept as `NAME.previous-SECONDS`.
pub const PREVIOUS_MARKER: &str = ".previous-";
/// The folder of a project's versions.
pub const VERSIONS_DIR: &str = "versions";
/// The pointer file naming the current version.
pub const CURRENT_FILE: &str = "current";
/// Versions kept per project unless configured otherwise (the current one included).
pub const DEFAULT_KEEP: usize = 5;

/// Names Windows reserves for devices, in any case and with any extension.
const RESERVED: [&str; 22] = [
    "con", "prn", "aux", "nul", "com1", "com2", "com3", "com4", "com5", "com6", "com7", "com8",
    "com9", "lpt1", "lpt2", "lpt3", "lpt4", "lpt5", "lpt6", "lpt7", "lpt8", "lpt9",
];

/// A project name must be a plain folder name: letters, digits, `-` and `_`, up to 64,
/// and not a name Windows reserves for a device (`CON`, `nul`, `COM1`...).
pub fn valid_name(name: &str) -> Result<(), String> {
    let ok = !name.is_empty()
        && name.len() <= 64
        && name
            .chars()
            .all(|c| c.is_ascii_alphanumeric() || c == '-' || c == '_');
    if !ok {
        let shown: String = name.chars().take(64).collect();
        return Err(format!("'{shown}' cannot be a project name; use letters, digits, '-' and '_' (up to 64 characters)"));
    }
    if RESERVED.contains(&name.to_ascii_lowercase().as_str()) {
        return Err(format!(
            "'{name}' cannot be a project name: Windows reserves it for a device; choose another"
        ));
    }
    Ok(())
}

fn is_symlink(path: &Path) -> bool {
    std::fs::symlink_metadata(path).is_ok_and(|m| m.file_type().is_symlink())
}

/// The folder that holds a project's files: its current version when it has one, the
/// folder itself otherwise (projects written by hand or by earlier releases).
pub fn resolve(dir: &Path) -> PathBuf {
    let version = current_version(dir).filter(|v| dir.join(VERSIONS_DIR).join(v).is_dir());
    match version {
        Some(version) => dir.join(VERSIONS_DIR).join(version),
        None => dir.to_path_buf(),
    }
}

/// The current version named by the pointer, if the pointer is there and well-formed.
fn current_version(dir: &Path) -> Option<String> {
    let text = std::fs::read_to_string(dir.join(CURRENT_FILE)).ok()?;
    let version = text.trim().to_string();
    valid_version(&version).then_some(version)
}

fn valid_version(v: &str) -> bool {
    !v.is_empty() && v.len() <= 40 && v.chars().all(|c| c.is_ascii_hexdigit() || c == '-')
}

/// The projects in a folder: plain (not symlinked) sub-folders whose current version has
/// a manifest, sorted.
pub fn list(projects: &Path) -> Vec<String> {
    let mut names: Vec<String> = std::fs::read_dir(projects)
        .map(|entries| {
            entries
                .filter_map(Result::ok)
                .filter(|e| e.file_type().is_ok_and(|t| t.is_dir()))
                .map(|e| e.file_name().to_string_lossy().to_string())
                .filter(|n| valid_name(n).is_ok())
                .filter(|n| {
                    let dir = projects.join(n);
                    let files = resolve(&dir);
                    !is_symlink(&files) && files.join(MANIFEST_FILE).is_file()
                })
                .collect()
        })
        .unwrap_or_default();
    names.sort();
    names
}

/// The folder of an existing project to open: the name must be valid and match exactly
/// a plain folder (no symlink, no other case).
pub fn project_dir(projects: &Path, name: &str) -> Result<PathBuf, String> {
    valid_name(name)?;
    if !list(projects).iter().any(|n| n == name) {
        return Err(format!(
            "there is no project '{name}' in the projects folder (names are matched exactly, and symbolic links are not followed); choose one from /projects"
        ));
    }
    Ok(projects.join(name))
}

/// Refuses a new name that differs only in case from an existing project or a symlink
/// in its place: such names clash on Windows and macOS, and a link could lead anywhere.
fn check_new_name(projects: &Path, name: &str) -> Result<(), String> {
    valid_name(name)?;
    if is_symlink(&projects.join(name)) {
        return Err(format!(
            "'{name}' in the projects folder is a symbolic link; links are refused there, choose another name"
        ));
    }
    let clash = std::fs::read_dir(projects).ok().and_then(|entries| {
        entries
            .filter_map(Result::ok)
            .map(|e| e.file_name().to_string_lossy().to_string())
            .find(|n| n != name && n.eq_ignore_ascii_case(name))
    });
    match clash {
        Some(other) => Err(format!(
            "a project named '{other}' exists; names that differ only in case are refused (they clash on Windows and macOS); choose another name or save as '{other}'"
        )),
        None => Ok(()),
    }
}

fn random_hex(bytes: usize) -> String {
    let mut buf = vec![0u8; bytes];
    if getrandom::fill(&mut buf).is_err() {
        // Uniqueness, not secrecy, is needed here: fall back to the clock's nanoseconds.
        let nanos = std::time::SystemTime::now()
            .duration_since(std::time::UNIX_EPOCH)
            .map_or(0, |d| d.subsec_nanos());
        buf = nanos.to_be_bytes().repeat(bytes.div_ceil(4));
        buf.truncate(bytes);
    }
    buf.iter().map(|b| format!("{b:02x}")).collect()
}

/// Uploads left unsaved longer than this are deleted when the next upload arrives.
pub const STALE_STAGING: std::time::Duration = std::time::Duration::from_secs(24 * 3600);

/// A fresh staging folder for one upload of `name`; returns the upload's id and folder.
/// Staging folders older than [`STALE_STAGING`] are deleted on the way.
pub fn new_staging(projects: &Path, name: &str) -> std::io::Result<(String, PathBuf)> {
    valid_name(name).map_err(std::io::Error::other)?;
    if let Ok(entries) = std::fs::read_dir(projects) {
        for e in entries.filter_map(Result::ok) {
            let stale = e
                .metadata()
                .and_then(|m| m.modified())
                .ok()
                .and_then(|t| t.elapsed().ok())
                .is_some_and(|age| age > STALE_STAGING);
            let is_staging = e.file_name().to_string_lossy().starts_with(STAGING_PREFIX)
                && e.file_type().is_ok_and(|t| t.is_dir());
            if stale && is_staging {
                let _ = std::fs::remove_dir_all(e.path());
            }
        }
    }
    let id = random_hex(8);
    let dir = projects.join(format!("{STAGING_PREFIX}{name}-{id}"));
    std::fs::create_dir_all(projects)?;
    std::fs::create_dir(&dir)?;
    Ok((id, dir))
}

/// The staging folder of an upload (it may no longer exist).
pub fn staging(projects: &Path, name: &str, upload: &str) -> Result<PathBuf, String> {
    valid_name(name)?;
    if upload.len() != 16 || !upload.chars().all(|c| c.is_ascii_hexdigit()) {
        return Err("this upload is unknown; start again from /projects".to_string());
    }
    Ok(projects.join(format!("{STAGING_PREFIX}{name}-{upload}")))
}

/// The steps of a save, in order; a crash after any of them leaves a state that
/// [`recover`] turns into the previous or the new version.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Step {
    /// The staged files and their folder are on disk.
    FilesSynced,
    /// The staged folder is renamed into `versions/`.
    VersionPlaced,
    /// `versions/` is on disk.
    VersionsSynced,
    /// `current.tmp-VERSION` is written and on disk.
    PointerWritten,
    /// `current` now names the new version.
    PointerSwitched,
    /// The project folder (the switch) is on disk.
    FolderSynced,
    /// Old versions beyond the number kept are gone.
    Pruned,
}

/// Every step, in order (for tests that crash at each).
pub const STEPS: [Step; 7] = [
    Step::FilesSynced,
    Step::VersionPlaced,
    Step::VersionsSynced,
    Step::PointerWritten,
    Step::PointerSwitched,
    Step::FolderSynced,
    Step::Pruned,
];

fn sync_file(path: &Path) -> std::io::Result<()> {
    std::fs::File::open(path)?.sync_all()
}

/// Flushes a folder's entries (renames, new files) to disk. Windows cannot open folders
/// this way; there the renames are durable when they return.
fn sync_dir(path: &Path) -> std::io::Result<()> {
    #[cfg(unix)]
    {
        std::fs::File::open(path)?.sync_all()
    }
    #[cfg(not(unix))]
    {
        let _ = path;
        Ok(())
    }
}

/// One lock per project (by lower-case name, since such names clash on some systems).
fn project_lock(projects: &Path, name: &str) -> Arc<Mutex<()>> {
    static LOCKS: Mutex<Option<HashMap<PathBuf, Arc<Mutex<()>>>>> = Mutex::new(None);
    let mut locks = LOCKS
        .lock()
        .unwrap_or_else(std::sync::PoisonError::into_inner);
    let key = projects.join(name.to_ascii_lowercase());
    Arc::clone(
        locks
            .get_or_insert_with(HashMap::new)
            .entry(key)
            .or_default(),
    )
}

/// Validates the staged upload and makes it the current version of `name`, keeping at
/// most `keep` versions (at least one). On problems nothing outside the staging folder
/// changes.
pub fn save(
    projects: &Path,
    name: &str,
    upload: &str,
    keep: usize,
) -> Result<Project, Vec<Problem>> {
    save_with_crash(projects, name, upload, keep, None)
}

/// The save, stopped right after `crash` as if the process had been killed there (no
/// clean-up, an error returned): the hook by which tests inject a crash at every step.
#[doc(hidden)]
pub fn save_with_crash(
    projects: &Path,
    name: &str,
    upload: &str,
    keep: usize,
    crash: Option<Step>,
) -> Result<Project, Vec<Problem>> {
    let fail = |m: String| vec![Problem::file("project", m)];
    check_new_name(projects, name).map_err(fail)?;
    let staged = staging(projects, name, upload).map_err(fail)?;
    if !staged.is_dir() {
        return Err(fail(format!(
            "no upload for '{name}' (it was saved already, or the server restarted); start again from /projects"
        )));
    }
    let lock = project_lock(projects, name);
    let _held = lock
        .lock()
        .unwrap_or_else(std::sync::PoisonError::into_inner);
    Project::load(&staged)?;
    let io = |e: std::io::Error| {
        fail(format!(
            "cannot save the project: {e}; the previous version is unchanged"
        ))
    };
    let crashed = |step: Step| -> Result<(), Vec<Problem>> {
        if crash == Some(step) {
            Err(fail(format!("simulated crash after {step:?}")))
        } else {
            Ok(())
        }
    };
    for entry in std::fs::read_dir(&staged).map_err(io)? {
        let path = entry.map_err(io)?.path();
        if is_symlink(&path) {
            return Err(fail(format!(
                "{} is a symbolic link; links are refused in the projects folder",
                path.display()
            )));
        }
        sync_file(&path).map_err(io)?;
    }
    sync_dir(&staged).map_err(io)?;
    crashed(Step::FilesSynced)?;

    let dir = projects.join(name);
    let versions = dir.join(VERSIONS_DIR);
    std::fs::create_dir_all(&versions).map_err(io)?;
    sync_dir(&dir).map_err(io)?;
    sync_dir(projects).map_err(io)?;
    let millis = std::time::SystemTime::now()
        .duration_since(std::time::UNIX_EPOCH)
        .map_or(0, |d| d.as_millis());
    let version = format!("{millis:013}-{}", random_hex(4));
    std::fs::rename(&staged, versions.join(&version)).map_err(io)?;
    crashed(Step::VersionPlaced)?;
    sync_dir(&versions).map_err(io)?;
    sync_dir(projects).map_err(io)?;
    crashed(Step::VersionsSynced)?;

    let pointer = dir.join(format!("{CURRENT_FILE}.tmp-{version}"));
    std::fs::write(&pointer, format!("{version}\n")).map_err(io)?;
    sync_file(&pointer).map_err(io)?;
    crashed(Step::PointerWritten)?;
    std::fs::rename(&pointer, dir.join(CURRENT_FILE)).map_err(io)?;
    crashed(Step::PointerSwitched)?;
    sync_dir(&dir).map_err(io)?;
    crashed(Step::FolderSynced)?;

    prune(&dir, &version, keep);
    crashed(Step::Pruned)?;
    Project::load(&dir)
}

/// The version folders of a project, oldest first (names sort by time).
fn versions_of(dir: &Path) -> Vec<String> {
    let mut names: Vec<String> = std::fs::read_dir(dir.join(VERSIONS_DIR))
        .map(|entries| {
            entries
                .filter_map(Result::ok)
                .map(|e| e.file_name().to_string_lossy().to_string())
                .filter(|n| valid_version(n))
                .collect()
        })
        .unwrap_or_default();
    names.sort();
    names
}

/// One saved version of a project, for the list of versions on the projects page.
#[derive(Debug, Clone, PartialEq, Eq, serde::Serialize)]
pub struct VersionInfo {
    /// The version's folder name (its id).
    pub id: String,
    /// When it was saved, as "YYYY-MM-DD HH:MM UTC" (from the id).
    pub saved: String,
    /// The manifest's title, if it reads.
    pub title: Option<String>,
    /// The data files it holds.
    pub files: Vec<String>,
    pub current: bool,
}

/// A version's save time from its id (milliseconds since 1970, UTC).
fn saved_at(id: &str) -> String {
    let Some(millis) = id.split('-').next().and_then(|m| m.parse::<i64>().ok()) else {
        return "unknown time".to_string();
    };
    let t = crate::civil_time::UtcTime::from_unix_seconds(millis.div_euclid(1000));
    format!(
        "{:04}-{:02}-{:02} {:02}:{:02} UTC",
        t.year, t.month, t.day, t.hour, t.minute
    )
}

/// The saved versions of project `name`, newest first.
pub fn versions(projects: &Path, name: &str) -> Vec<VersionInfo> {
    if valid_name(name).is_err() {
        return Vec::new();
    }
    let dir = projects.join(name);
    if is_symlink(&dir) {
        return Vec::new();
    }
    let current = current_version(&dir);
    let mut out: Vec<VersionInfo> = versions_of(&dir)
        .into_iter()
        .map(|id| {
            let folder = dir.join(VERSIONS_DIR).join(&id);
            let title = std::fs::read_to_string(folder.join(MANIFEST_FILE))
                .ok()
                .and_then(|t| toml::from_str::<toml::Table>(&t).ok())
                .and_then(|t| t.get("title").and_then(|v| v.as_str()).map(str::to_string));
            let mut files: Vec<String> = std::fs::read_dir(&folder)
                .map(|e| {
                    e.filter_map(Result::ok)
                        .map(|e| e.file_name().to_string_lossy().to_string())
                        .filter(|n| n != MANIFEST_FILE)
                        .collect()
                })
                .unwrap_or_default();
            files.sort();
            VersionInfo {
                saved: saved_at(&id),
                current: current.as_deref() == Some(id.as_str()),
                id,
                title,
                files,
            }
        })
        .collect();
    out.reverse();
    out
}

/// Makes an earlier version current again by saving a copy of it as the newest version
/// (through [`save`], so the switch is as atomic and as checked as any save, and no
/// version is lost: the one current before stays in the list).
pub fn restore(
    projects: &Path,
    name: &str,
    version: &str,
    keep: usize,
) -> Result<Project, Vec<Problem>> {
    let fail = |m: String| vec![Problem::file("project", m)];
    valid_name(name).map_err(fail)?;
    if !valid_version(version)
        || !versions_of(&projects.join(name))
            .iter()
            .any(|v| v == version)
    {
        return Err(fail(format!(
            "'{name}' has no version '{version}'; choose one from the list on /projects"
        )));
    }
    let from = projects.join(name).join(VERSIONS_DIR).join(version);
    let (upload, staging) = new_staging(projects, name)
        .map_err(|e| fail(format!("cannot prepare the restore: {e}")))?;
    copy_files(&from, &staging).map_err(|e| fail(format!("cannot copy version {version}: {e}")))?;
    save(projects, name, &upload, keep)
}

/// Copies the plain files of one folder into another (no sub-folders, no links).
fn copy_files(from: &Path, to: &Path) -> std::io::Result<()> {
    for entry in std::fs::read_dir(from)? {
        let entry = entry?;
        let path = entry.path();
        if entry.file_type()?.is_file() && !is_symlink(&path) {
            std::fs::copy(&path, to.join(entry.file_name()))?;
        }
    }
    Ok(())
}

/// The microdata file of the current version of project `name`, if it has one: a new
/// version uploaded without microdata keeps it unless its removal is asked for.
pub fn current_microdata(projects: &Path, name: &str) -> Option<PathBuf> {
    valid_name(name).ok()?;
    let dir = projects.join(name);
    if is_symlink(&dir) || !dir.is_dir() {
        return None;
    }
    super::table::find_data_file(&resolve(&dir), super::MICRODATA_STEM)
        .ok()
        .flatten()
        .filter(|p| !is_symlink(p))
}

/// The manifest of the current version of project `name`, if it has one and it parses:
/// a re-upload starts from its mapping.
pub fn current_manifest(projects: &Path, name: &str) -> Option<super::Manifest> {
    valid_name(name).ok()?;
    let dir = projects.join(name);
    if is_symlink(&dir) || !dir.is_dir() {
        return None;
    }
    let text = std::fs::read_to_string(resolve(&dir).join(MANIFEST_FILE)).ok()?;
    super::Manifest::parse(&text).ok()
}

/// Deletes the oldest versions beyond `keep` (never the current one).
fn prune(dir: &Path, current: &str, keep: usize) {
    let versions = versions_of(dir);
    let excess = versions.len().saturating_sub(keep.max(1));
    for old in versions.iter().take(excess).filter(|v| *v != current) {
        let _ = std::fs::remove_dir_all(dir.join(VERSIONS_DIR).join(old));
    }
}

/// Brings a projects folder back to a consistent state after a crash; run at start-up,
/// before any upload. Returns one line per repair, for the log.
///
/// - staging folders (uploads never saved) are deleted;
/// - leftover `current.tmp-*` pointers are deleted: the switch did not happen;
/// - versions newer than the current one were never committed and are deleted;
/// - a pointer to a missing version falls back to the newest complete version;
/// - a project folder of an earlier release lost between its two renames is restored
///   from its newest `NAME.previous-*`;
/// - old versions beyond `keep` are deleted.
pub fn recover(projects: &Path, keep: usize) -> Vec<String> {
    let mut done = Vec::new();
    let Ok(entries) = std::fs::read_dir(projects) else {
        return done;
    };
    let names: Vec<String> = entries
        .filter_map(Result::ok)
        .map(|e| e.file_name().to_string_lossy().to_string())
        .collect();
    for n in &names {
        let path = projects.join(n);
        if n.starts_with(STAGING_PREFIX)
            && !is_symlink(&path)
            && path.is_dir()
            && std::fs::remove_dir_all(&path).is_ok()
        {
            done.push(format!("removed the unsaved upload {n}"));
        }
    }
    // Earlier releases: NAME renamed to NAME.previous-SECONDS, then the crash.
    let mut previous: HashMap<&str, &String> = HashMap::new();
    for n in &names {
        if let Some((base, stamp)) = n.split_once(PREVIOUS_MARKER) {
            if valid_name(base).is_ok() && stamp.chars().all(|c| c.is_ascii_digit()) {
                let newest = previous.entry(base).or_insert(n);
                if n.as_str() > newest.as_str() {
                    *newest = n;
                }
            }
        }
    }
    for (base, newest) in previous {
        let target = projects.join(base);
        if !target.exists()
            && projects.join(newest).join(MANIFEST_FILE).is_file()
            && std::fs::rename(projects.join(newest), &target).is_ok()
        {
            done.push(format!(
                "restored {base} from {newest} (a save had stopped midway)"
            ));
        }
    }
    for n in &names {
        let dir = projects.join(n);
        if valid_name(n).is_err() || is_symlink(&dir) || !dir.join(VERSIONS_DIR).is_dir() {
            continue;
        }
        done.extend(recover_project(&dir, n, keep));
    }
    let _ = sync_dir(projects);
    done
}

fn recover_project(dir: &Path, name: &str, keep: usize) -> Vec<String> {
    let mut done = Vec::new();
    if let Ok(entries) = std::fs::read_dir(dir) {
        for e in entries.filter_map(Result::ok) {
            let n = e.file_name().to_string_lossy().to_string();
            if n.starts_with(&format!("{CURRENT_FILE}.tmp-"))
                && std::fs::remove_file(e.path()).is_ok()
            {
                done.push(format!(
                    "{name}: removed an unfinished version switch ({n})"
                ));
            }
        }
    }
    let versions = versions_of(dir);
    let complete =
        |v: &str| -> bool { dir.join(VERSIONS_DIR).join(v).join(MANIFEST_FILE).is_file() };
    let current = current_version(dir).filter(|v| versions.contains(v) && complete(v));
    let current = match current {
        Some(c) => c,
        None => {
            if current_version(dir).is_none() && dir.join(MANIFEST_FILE).is_file() {
                // An earlier release's folder with a save that never switched: the files
                // in the folder itself stay the project.
                String::new()
            } else if let Some(newest) = versions.iter().rev().find(|v| complete(v)) {
                if current_version(dir).is_some() {
                    // The pointer names a version that is gone: use the newest complete one.
                    let pointer = dir.join(format!("{CURRENT_FILE}.tmp-{newest}"));
                    let switched = std::fs::write(&pointer, format!("{newest}\n"))
                        .and_then(|()| sync_file(&pointer))
                        .and_then(|()| std::fs::rename(&pointer, dir.join(CURRENT_FILE)))
                        .and_then(|()| sync_dir(dir));
                    if switched.is_ok() {
                        done.push(format!(
                            "{name}: the current version was missing; now {newest}"
                        ));
                    }
                    newest.clone()
                } else {
                    // No pointer at all: the first save never switched; nothing was
                    // committed.
                    String::new()
                }
            } else {
                String::new()
            }
        }
    };
    for v in &versions {
        let uncommitted = current.is_empty() || v.as_str() > current.as_str();
        if uncommitted && std::fs::remove_dir_all(dir.join(VERSIONS_DIR).join(v)).is_ok() {
            done.push(format!("{name}: removed the uncommitted version {v}"));
        }
    }
    if current.is_empty() {
        let _ = std::fs::remove_dir(dir.join(VERSIONS_DIR));
        let _ = std::fs::remove_dir(dir);
    } else {
        prune(dir, &current, keep);
    }
    done
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn reserved_and_odd_names_are_refused() {
        for bad in [
            "CON",
            "nul",
            "Com1",
            "lpt9",
            "",
            "a/b",
            "..",
            "a b",
            &"x".repeat(65),
        ] {
            assert!(valid_name(bad).is_err(), "{bad:?}");
        }
        for good in ["p1", "survey_2024", "con-1", "null"] {
            assert!(valid_name(good).is_ok(), "{good:?}");
        }
    }

    /// Dates checked against `date -u -d @SECONDS` (GNU coreutils).
    #[test]
    fn version_times_read_as_utc_dates() {
        assert_eq!(saved_at("0000000000000-abcd"), "1970-01-01 00:00 UTC");
        // date -u -d @1764633600 -> Tue Dec  2 00:00:00 UTC 2025
        assert_eq!(saved_at("1764633600000-0a1b2c3d"), "2025-12-02 00:00 UTC");
        // date -u -d @951826200 -> Tue Feb 29 12:10:00 UTC 2000
        assert_eq!(saved_at("0951826200000-00000000"), "2000-02-29 12:10 UTC");
        assert_eq!(saved_at("x"), "unknown time");
    }
}
