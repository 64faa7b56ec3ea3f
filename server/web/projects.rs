//! Projects from the browser: list and open the projects of the projects folder, create one
//! by uploading its files and mapping their columns. Validation gives the same messages as
//! `gapwise check`; every upload has its own staging folder, and saving switches versions
//! atomically (project::store), so nothing is lost, mixed or half-written.

use std::collections::BTreeMap;
use std::sync::Arc;

use askama::Template;
use axum::extract::{Multipart, Query, State};
use axum::http::StatusCode;
use axum::response::{Html, IntoResponse, Redirect, Response};
use axum::Form;

use super::error::{AppError, AppResult};
use super::state::AppState;
use crate::analysis::cautions::{Caution, STANDING};
use crate::project::manifest::{
    ColumnRoles, EligibilityRule, Indicators, Manifest, MicrodataRoles, ParticipantCut, Population,
    PopulationScale, Recruitment, Threshold,
};
use crate::project::{store, Problem, MANIFEST_FILE};

/// Largest frame accepted from the browser: rows and columns.
pub const MAX_FRAME_ROWS: usize = 100_000;
pub const MAX_COLUMNS: usize = 1_000;
/// Largest microdata accepted from the browser (rows).
pub const MAX_MICRODATA_ROWS: usize = 5_000_000;

#[derive(Template)]
#[template(path = "projects.html")]
struct ProjectsPage<'a> {
    page: &'static str,
    nav_query: String,
    current: String,
    projects: Vec<String>,
    folder: Option<String>,
    message: Option<String>,
    cautions: &'a [Caution],
}

#[derive(Template)]
#[template(path = "project_map.html")]
struct MapPage<'a> {
    page: &'static str,
    nav_query: String,
    name: String,
    /// The upload's id: its staging folder, carried by the form.
    upload: String,
    title: String,
    frame_columns: Vec<String>,
    micro_columns: Vec<String>,
    /// Best guesses for each role, preselected in the form.
    guess: Guesses,
    problems: Vec<String>,
    cautions: &'a [Caution],
}

fn folder(state: &AppState) -> AppResult<std::path::PathBuf> {
    state.projects.clone().ok_or_else(|| AppError::NotFound("projects can be created and opened from the browser when the server is started with --projects DIR".to_string()))
}

pub async fn list(State(state): State<Arc<AppState>>) -> AppResult<Html<String>> {
    render_list(&state, None)
}

fn render_list(state: &AppState, message: Option<String>) -> AppResult<Html<String>> {
    let project = state.project();
    let html = ProjectsPage {
        page: "projects",
        nav_query: String::new(),
        current: project.manifest.title.clone(),
        projects: state
            .projects
            .as_deref()
            .map(store::list)
            .unwrap_or_default(),
        folder: state.projects.as_ref().map(|p| p.display().to_string()),
        message,
        cautions: &STANDING,
    }
    .render()?;
    Ok(Html(html))
}

#[derive(serde::Deserialize)]
pub struct OpenForm {
    name: String,
}

pub async fn open(
    State(state): State<Arc<AppState>>,
    Form(form): Form<OpenForm>,
) -> AppResult<Response> {
    let dir = folder(&state)?;
    let target = store::project_dir(&dir, &form.name).map_err(AppError::BadRequest)?;
    let state2 = Arc::clone(&state);
    tokio::task::spawn_blocking(move || state2.open(target))
        .await
        .map_err(|e| AppError::Internal(e.to_string()))?
        .map_err(AppError::InvalidProject)?;
    Ok(Redirect::to("/").into_response())
}

/// Rows and columns of an uploaded file, without decoding its data: lines and header
/// fields of a CSV, the metadata of a Parquet file.
fn shape(bytes: &[u8], parquet: bool, file_name: &str) -> AppResult<(usize, usize)> {
    if parquet {
        crate::project::table::parquet_shape(bytes).map_err(|e| {
            AppError::BadRequest(format!(
                "{file_name}: cannot read it as Parquet ({e}); export it again or save it as CSV"
            ))
        })
    } else {
        Ok(csv_shape(bytes))
    }
}

/// Counts lines and header fields of a CSV without parsing it (limits before validation).
fn csv_shape(bytes: &[u8]) -> (usize, usize) {
    let header_end = bytes
        .iter()
        .position(|&b| b == b'\n')
        .unwrap_or(bytes.len());
    let columns = bytes[..header_end].iter().filter(|&&b| b == b',').count() + 1;
    // Lines, counting a last line without a newline; the header is not a row.
    let newlines = bytes.iter().filter(|&&b| b == b'\n').count();
    let unterminated = usize::from(bytes.last().is_some_and(|&b| b != b'\n'));
    ((newlines + unterminated).saturating_sub(1), columns)
}

pub async fn upload(
    State(state): State<Arc<AppState>>,
    mut multipart: Multipart,
) -> AppResult<Response> {
    let dir = folder(&state)?;
    let mut fields: BTreeMap<String, String> = BTreeMap::new();
    let mut files: Vec<(String, String, Vec<u8>)> = Vec::new();
    while let Some(field) = multipart.next_field().await.map_err(|e| {
        AppError::BadRequest(format!(
            "the upload could not be read ({e}); try again, files up to {} MB",
            super::MAX_BODY_BYTES / 1024 / 1024
        ))
    })? {
        let name = field.name().unwrap_or_default().to_string();
        match field.file_name().map(str::to_string) {
            Some(file_name) => {
                let bytes = field.bytes().await.map_err(|e| {
                    AppError::BadRequest(format!(
                        "the file {file_name} could not be read ({e}); an upload may be at most {} MB in all",
                        super::MAX_BODY_BYTES / 1024 / 1024
                    ))
                })?;
                if !bytes.is_empty() {
                    files.push((name, file_name, bytes.to_vec()));
                }
            }
            None => {
                fields.insert(name, field.text().await.unwrap_or_default());
            }
        }
    }
    let name = fields.get("name").cloned().unwrap_or_default();
    store::valid_name(&name).map_err(AppError::BadRequest)?;
    let title = fields
        .get("title")
        .cloned()
        .filter(|t| !t.trim().is_empty())
        .unwrap_or_else(|| name.clone());
    if !files.iter().any(|f| f.0 == "frame") {
        return Err(AppError::BadRequest(
            "choose a frame file (CSV or Parquet, one row per country and wave)".to_string(),
        ));
    }
    // Limits first, on every file, before anything is written.
    let mut accepted = Vec::new();
    for (role, file_name, bytes) in &files {
        let stem = match role.as_str() {
            "frame" => "frame",
            "microdata" => "microdata",
            _ => continue,
        };
        let lower = file_name.to_ascii_lowercase();
        let ext = if lower.ends_with(".csv") {
            "csv"
        } else if lower.ends_with(".parquet") {
            "parquet"
        } else {
            return Err(AppError::BadRequest(format!(
                "{file_name}: upload a .csv or .parquet file"
            )));
        };
        let (rows, columns) = shape(bytes, ext == "parquet", file_name)?;
        let max_rows = if stem == "frame" {
            MAX_FRAME_ROWS
        } else {
            MAX_MICRODATA_ROWS
        };
        if rows > max_rows || columns > MAX_COLUMNS {
            return Err(AppError::BadRequest(format!("{file_name} has {rows} rows and {columns} columns; the limits are {max_rows} rows and {MAX_COLUMNS} columns")));
        }
        accepted.push((format!("{stem}.{ext}"), bytes));
    }
    let (upload, staging) =
        store::new_staging(&dir, &name).map_err(|e| AppError::Internal(e.to_string()))?;
    for (file, bytes) in accepted {
        std::fs::write(staging.join(file), bytes).map_err(|e| AppError::Internal(e.to_string()))?;
    }
    std::fs::write(staging.join("title.txt"), title)
        .map_err(|e| AppError::Internal(e.to_string()))?;
    Ok(Redirect::to(&format!("/projects/map?name={name}&upload={upload}")).into_response())
}

#[derive(serde::Deserialize)]
pub struct MapQuery {
    name: String,
    #[serde(default)]
    upload: String,
}

/// Column names of a staged data file (CSV header, or the Parquet schema).
fn columns_of(dir: &std::path::Path, stem: &str) -> Vec<String> {
    let Ok(Some(path)) = crate::project::table::find_data_file(dir, stem) else {
        return Vec::new();
    };
    let names = crate::project::table::column_names(&path);
    names.unwrap_or_default()
}

pub async fn map_form(
    State(state): State<Arc<AppState>>,
    Query(q): Query<MapQuery>,
) -> AppResult<Html<String>> {
    let dir = folder(&state)?;
    let staging = store::staging(&dir, &q.name, &q.upload).map_err(AppError::BadRequest)?;
    if !staging.is_dir() {
        return Err(AppError::NotFound(format!(
            "no upload for '{}'; start from /projects",
            q.name
        )));
    }
    render_map(&q.name, &q.upload, &staging, Vec::new()).map(Html)
}

/// Preselected columns: the first whose lower-case name contains one of the hints.
#[derive(Default)]
struct Guesses {
    code: String,
    name: String,
    wave: String,
    participation: String,
    micro_country: String,
    micro_wave: String,
    micro_weight: String,
}

fn guess(columns: &[String], hints: &[&str]) -> String {
    hints
        .iter()
        .find_map(|h| columns.iter().find(|c| c.to_lowercase().contains(h)))
        .cloned()
        .unwrap_or_default()
}

fn render_map(
    name: &str,
    upload: &str,
    staging: &std::path::Path,
    problems: Vec<String>,
) -> AppResult<String> {
    let frame_columns = columns_of(staging, "frame");
    let micro_columns = columns_of(staging, "microdata");
    let guesses = Guesses {
        code: guess(&frame_columns, &["iso", "code"]),
        name: guess(&frame_columns, &["country", "name"]),
        wave: guess(&frame_columns, &["wave", "round", "year"]),
        participation: guess(&frame_columns, &["took_part", "particip", "flag", "member"]),
        micro_country: guess(&micro_columns, &["iso", "code", "country"]),
        micro_wave: guess(&micro_columns, &["wave", "round", "year"]),
        micro_weight: guess(&micro_columns, &["weight", "dweight", "wt"]),
    };
    Ok(MapPage {
        guess: guesses,
        page: "projects",
        nav_query: String::new(),
        name: name.to_string(),
        upload: upload.to_string(),
        title: std::fs::read_to_string(staging.join("title.txt"))
            .unwrap_or_else(|_| name.to_string()),
        frame_columns,
        micro_columns,
        problems,
        cautions: &STANDING,
    }
    .render()?)
}

/// Builds the manifest from the mapping form (repeated keys for the ticked indicators).
fn manifest_from_form(form: &[(String, String)]) -> Result<Manifest, String> {
    let one = |key: &str| {
        form.iter()
            .find(|(k, _)| k == key)
            .map(|(_, v)| v.trim().to_string())
            .filter(|v| !v.is_empty())
    };
    let many = |key: &str| {
        form.iter()
            .filter(|(k, _)| k == key)
            .map(|(_, v)| v.clone())
            .collect::<Vec<_>>()
    };
    let need =
        |key: &str, what: &str| one(key).ok_or_else(|| format!("choose the column with {what}"));
    // Rules come as pairs of fields (indicator, cut-off); an empty indicator means no rule.
    let mut eligibility = Vec::new();
    for (indicator, cut) in many("rule_indicator")
        .into_iter()
        .zip(many("rule_at_least"))
    {
        let (indicator, cut) = (indicator.trim().to_string(), cut.trim().to_string());
        if indicator.is_empty() {
            continue;
        }
        if cut.is_empty() {
            return Err(format!("give the eligibility rule on '{indicator}' a cut-off: a number or lowest-participant"));
        }
        let threshold = if cut == "lowest-participant" {
            Threshold::FromParticipants(ParticipantCut::LowestParticipant)
        } else {
            Threshold::Value(cut.parse().map_err(|_| {
                format!("the cut-off '{cut}' is neither a number nor lowest-participant")
            })?)
        };
        eligibility.push(EligibilityRule {
            indicator,
            at_least: Some(threshold),
            at_most: None,
            waves: None,
        });
    }
    let microdata = match one("micro_country") {
        None => None,
        Some(country) => Some(MicrodataRoles {
            country,
            wave: need("micro_wave", "the respondents' wave")?,
            design_weight: need("micro_weight", "the design weights")?,
            variables: many("micro_variable"),
            outcome: one("micro_outcome"),
            respondent: None,
        }),
    };
    Ok(Manifest {
        title: one("title").unwrap_or_else(|| "Untitled project".to_string()),
        description: None,
        population: one("population").map(|column| Population {
            column,
            scale: match one("population_scale").as_deref() {
                Some("log") => PopulationScale::Log,
                Some("log10") => PopulationScale::Log10,
                _ => PopulationScale::Count,
            },
        }),
        columns: ColumnRoles {
            code: need("code", "the country code")?,
            name: one("country_name"),
            wave: need("wave", "the wave")?,
            participation: need("participation", "the participation flag")?,
            group: one("group"),
        },
        indicators: Indicators {
            numeric: many("numeric"),
            categorical: many("categorical"),
            ..Indicators::default()
        },
        eligibility,
        recruitment: Recruitment {
            cost: one("cost"),
            feasibility: one("feasibility"),
            support_cost: one("support_cost"),
            support_chance: one("support_chance"),
        },
        microdata,
    })
}

pub async fn map_save(
    State(state): State<Arc<AppState>>,
    Form(form): Form<Vec<(String, String)>>,
) -> AppResult<Response> {
    let dir = folder(&state)?;
    let name = form
        .iter()
        .find(|(k, _)| k == "name")
        .map(|(_, v)| v.clone())
        .unwrap_or_default();
    let upload = form
        .iter()
        .find(|(k, _)| k == "upload")
        .map(|(_, v)| v.clone())
        .unwrap_or_default();
    let staging = store::staging(&dir, &name, &upload).map_err(AppError::BadRequest)?;
    if !staging.is_dir() {
        return Err(AppError::NotFound(format!(
            "no upload for '{name}'; start from /projects"
        )));
    }
    let problems: Vec<String> = match manifest_from_form(&form) {
        Err(message) => vec![message],
        Ok(manifest) => {
            let text = toml::to_string(&manifest).map_err(|e| AppError::Internal(e.to_string()))?;
            std::fs::write(staging.join(MANIFEST_FILE), text)
                .map_err(|e| AppError::Internal(e.to_string()))?;
            let dir2 = dir.clone();
            let (name2, upload2, keep) = (name.clone(), upload.clone(), state.keep_versions);
            let saved =
                tokio::task::spawn_blocking(move || store::save(&dir2, &name2, &upload2, keep))
                    .await
                    .map_err(|e| AppError::Internal(e.to_string()))?;
            match saved {
                Ok(project) => {
                    state.install(dir.join(&name), Arc::new(project));
                    return Ok(Redirect::to("/").into_response());
                }
                Err(problems) => problems.iter().map(Problem::to_string).collect(),
            }
        }
    };
    let html = render_map(&name, &upload, &staging, problems)?;
    Ok((StatusCode::UNPROCESSABLE_ENTITY, Html(html)).into_response())
}
