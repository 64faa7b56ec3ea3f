//! The application state shared by every handler: the loaded project behind an `Arc`,
//! swapped whole on reload or when another project is opened, so that a request never
//! sees half a project.

use std::path::PathBuf;
use std::sync::{Arc, RwLock};

use super::work::WorkPool;
use crate::analysis::cache::ResultCache;
use crate::project::{Problem, Project};

pub struct AppState {
    /// The open project and the folder it came from, swapped together.
    current: RwLock<(PathBuf, Arc<Project>)>,
    /// The folder of projects that can be opened and created from the browser, if any.
    pub projects: Option<PathBuf>,
    /// Results computed so far, keyed by the project's revision and the settings.
    pub cache: Arc<ResultCache>,
    /// Where computations run (light on tokio's blocking pool, heavy on a bounded pool).
    pub work: WorkPool,
    /// Versions kept per project of that folder (see `project::store`).
    pub keep_versions: usize,
}

/// Why a reload did not swap in the files on disk.
#[derive(Debug)]
pub enum ReloadRefused {
    /// The files have problems; the old project stays.
    Problems(Vec<Problem>),
    /// The files load but hold less than before (rows, files or waves lost): kept until
    /// the reload is confirmed.
    Loses(Vec<String>),
}

fn read<T>(lock: &RwLock<T>) -> std::sync::RwLockReadGuard<'_, T> {
    // A panic while holding the lock cannot leave a half-written value behind: every
    // write is a single assignment.
    lock.read()
        .unwrap_or_else(std::sync::PoisonError::into_inner)
}

impl AppState {
    pub fn new(project: Project) -> Self {
        Self::with_projects(project, None)
    }

    pub fn with_projects(project: Project, projects: Option<PathBuf>) -> Self {
        AppState {
            current: RwLock::new((project.dir.clone(), Arc::new(project))),
            projects,
            cache: Arc::new(ResultCache::default()),
            work: WorkPool::new(),
            keep_versions: crate::project::store::DEFAULT_KEEP,
        }
    }

    /// The same, keeping `keep` versions per project of the projects folder.
    pub fn keeping(mut self, keep: usize) -> Self {
        self.keep_versions = keep.max(1);
        self
    }

    /// The current project; cheap (clones an `Arc`).
    pub fn project(&self) -> Arc<Project> {
        Arc::clone(&read(&self.current).1)
    }

    /// Loads the project folder again; on success swaps it in, on failure keeps the old one.
    /// A reload that would lose data (fewer rows, a file or a wave gone: a file cut short
    /// while being rewritten, say) keeps the old project unless `confirmed`. The new
    /// project records what changed since the old one.
    pub fn reload(&self, confirmed: bool) -> Result<Arc<Project>, ReloadRefused> {
        let (dir, old) = {
            let current = read(&self.current);
            (current.0.clone(), Arc::clone(&current.1))
        };
        let mut fresh = Project::load(&dir).map_err(ReloadRefused::Problems)?;
        let lost = crate::project::losses(&old, &fresh);
        if !lost.is_empty() && !confirmed {
            return Err(ReloadRefused::Loses(lost));
        }
        fresh.compare_with(&old);
        let fresh = Arc::new(fresh);
        self.install(dir, Arc::clone(&fresh));
        Ok(fresh)
    }

    /// Opens another project folder; the current one stays if the new one has problems.
    pub fn open(&self, dir: PathBuf) -> Result<Arc<Project>, Vec<Problem>> {
        let fresh = Arc::new(Project::load(&dir)?);
        self.install(dir, Arc::clone(&fresh));
        Ok(fresh)
    }

    /// Swaps in an already loaded project.
    pub fn install(&self, dir: PathBuf, project: Arc<Project>) {
        let mut guard = self
            .current
            .write()
            .unwrap_or_else(std::sync::PoisonError::into_inner);
        let revision = project.revision;
        *guard = (dir, project);
        drop(guard);
        // Results of the files before this load can never be asked for again.
        self.cache.retain_revision(revision);
    }
}
