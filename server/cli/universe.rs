//! Where a command's eligible universe comes from: a project folder (its manifest's
//! columns, one wave) or a bare frame file whose rows are all eligible.

use std::path::{Path, PathBuf};

use crate::analysis::Settings;
use crate::project::{Problem, Project, WaveView};

/// Where `gapwise fit` and `gapwise plan` take their universe from.
pub struct UniverseSource {
    pub path: PathBuf,
    pub wave: Option<i64>,
    pub id: Option<String>,
    pub flag: Option<String>,
    /// Cost and feasibility columns to read from a bare frame file.
    pub extra: crate::project::wave::ExtraColumns,
}

impl UniverseSource {
    /// A project folder and one of its waves (the latest when `wave` is `None`).
    pub fn project(dir: &Path, wave: Option<i64>) -> Self {
        UniverseSource {
            path: dir.to_path_buf(),
            wave,
            id: None,
            flag: None,
            extra: Default::default(),
        }
    }

    /// Whether the source is a project folder (not a bare frame file).
    pub fn is_project(&self) -> bool {
        self.path.is_dir()
    }

    /// The project, when the source is a project folder that loads.
    pub fn project_if_any(&self) -> Option<Project> {
        if self.is_project() {
            Project::load(&self.path).ok()
        } else {
            None
        }
    }
}

/// Loads the wave view named by the source: a project folder (manifest columns, one wave)
/// or a bare frame file whose rows are all eligible. Returns the view and the settings
/// completed with the defaults that apply.
pub fn load_universe(source: &UniverseSource, settings: &mut Settings) -> Result<WaveView, String> {
    if source.is_project() {
        load_project_wave(source, settings).map(|(_, view)| view)
    } else {
        let id = source
            .id
            .as_deref()
            .ok_or("a frame file needs --id COLUMN (the unit identifier)")?;
        let flag = source
            .flag
            .as_deref()
            .ok_or("a frame file needs --flag COLUMN (1 took part, 0 did not)")?;
        let covariates = settings.covariates.clone().unwrap_or_default();
        let factors = settings.factors.clone().unwrap_or_default();
        if covariates.is_empty() && factors.is_empty() {
            return Err(
                "a frame file needs --covariates a,b,c (and optionally --categorical f,g)"
                    .to_string(),
            );
        }
        WaveView::from_file(&source.path, id, flag, &covariates, &factors, &source.extra)
            .map_err(|p| problems_text(&p, &source.path))
    }
}

/// A project folder and its wave (the settings' wave set to it).
pub(super) fn load_project_wave(
    source: &UniverseSource,
    settings: &mut Settings,
) -> Result<(Project, WaveView), String> {
    let project = load_project(&source.path)?;
    let (wave, view) = project.resolve_wave(source.wave)?;
    settings.wave = Some(wave);
    Ok((project, view))
}

/// A project folder, or its problems as one message.
pub(super) fn load_project(dir: &Path) -> Result<Project, String> {
    Project::load(dir).map_err(|p| problems_text(&p, dir))
}

/// One line per problem, then how many there were and where.
fn problems_text(problems: &[Problem], path: &Path) -> String {
    let mut out: Vec<String> = problems.iter().map(ToString::to_string).collect();
    out.push(format!(
        "{} problem{} in {}",
        problems.len(),
        if problems.len() == 1 { "" } else { "s" },
        path.display()
    ));
    out.join("\n")
}
