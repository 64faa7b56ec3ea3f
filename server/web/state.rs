//! The application state shared by every handler: the loaded project behind an `Arc`,
//! swapped whole on reload so that a request never sees half a project.

use std::path::PathBuf;
use std::sync::{Arc, RwLock};

use crate::project::{Problem, Project};

pub struct AppState {
    dir: PathBuf,
    project: RwLock<Arc<Project>>,
}

impl AppState {
    pub fn new(project: Project) -> Self {
        AppState {
            dir: project.dir.clone(),
            project: RwLock::new(Arc::new(project)),
        }
    }

    /// The current project; cheap (clones an `Arc`).
    pub fn project(&self) -> Arc<Project> {
        match self.project.read() {
            Ok(guard) => Arc::clone(&guard),
            // A panic while holding the lock cannot leave a half-written Arc behind.
            Err(poisoned) => Arc::clone(&poisoned.into_inner()),
        }
    }

    /// Loads the project folder again; on success swaps it in, on failure keeps the old one.
    pub fn reload(&self) -> Result<Arc<Project>, Vec<Problem>> {
        let fresh = Arc::new(Project::load(&self.dir)?);
        let mut guard = match self.project.write() {
            Ok(g) => g,
            Err(poisoned) => poisoned.into_inner(),
        };
        *guard = Arc::clone(&fresh);
        Ok(fresh)
    }
}
