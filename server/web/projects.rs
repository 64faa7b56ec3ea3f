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
    /// Each project with its saved versions, newest first.
    projects: Vec<(String, Vec<store::VersionInfo>)>,
    folder: Option<String>,
    message: Option<String>,
    cautions: &'a [Caution],
}

/// What the mapping form knows of a frame column: its name, what its values look like,
/// and a few of them.
#[derive(Debug, Clone)]
pub struct ColumnInfo {
    pub name: String,
    pub kind: ColumnGuess,
    /// Up to three distinct values, for the form's hints.
    pub examples: String,
    /// Distinct non-missing values (up to 50 are kept; categorical levels for references).
    pub levels: Vec<String>,
}

/// What a column's values look like (a guess from the file, never binding).
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum ColumnGuess {
    /// Only 0 and 1.
    Flag,
    /// Whole numbers (waves and years look like this).
    Whole,
    /// Numbers.
    Number,
    /// Short upper-case codes (ISO 3166 and the like).
    Code,
    /// Text with few distinct values.
    Category,
    /// Other text (names).
    Text,
    /// Not read (an unreadable file, or an empty column).
    Unknown,
}

impl ColumnGuess {
    pub fn as_str(self) -> &'static str {
        match self {
            ColumnGuess::Flag => "0/1 flag",
            ColumnGuess::Whole => "whole numbers",
            ColumnGuess::Number => "numbers",
            ColumnGuess::Code => "codes",
            ColumnGuess::Category => "categories",
            ColumnGuess::Text => "text",
            ColumnGuess::Unknown => "not read",
        }
    }
    fn numeric(self) -> bool {
        matches!(
            self,
            ColumnGuess::Flag | ColumnGuess::Whole | ColumnGuess::Number | ColumnGuess::Unknown
        )
    }
    fn textual(self) -> bool {
        matches!(
            self,
            ColumnGuess::Code | ColumnGuess::Category | ColumnGuess::Text | ColumnGuess::Unknown
        )
    }
}

/// One eligibility rule row of the form, as entered.
#[derive(Debug, Clone, Default)]
pub struct RuleEntry {
    pub indicator: String,
    pub direction: String,
    pub cut: String,
    pub waves: String,
}

/// Rule rows the form offers.
const RULE_ROWS: usize = 4;

#[derive(Template)]
#[template(path = "project_map.html")]
struct MapPage<'a> {
    page: &'static str,
    nav_query: String,
    name: String,
    /// The upload's id: its staging folder, carried by the form.
    upload: String,
    columns: Vec<ColumnInfo>,
    micro_columns: Vec<String>,
    /// The form's entries: as typed after an error, else the previous version's mapping,
    /// else guesses from the columns.
    entries: Vec<(String, String)>,
    rules: Vec<RuleEntry>,
    /// Hints about the files (separators, decimal commas, codes differing in case).
    hints: Vec<String>,
    /// The microdata kept from the current version, when no new one was uploaded.
    kept_microdata: Option<String>,
    /// Whether the mapping was filled from the previous version.
    from_previous: bool,
    problems: Vec<String>,
    cautions: &'a [Caution],
}

impl MapPage<'_> {
    /// The entry of a single-valued field ("" when absent).
    fn one(&self, key: &str) -> &str {
        self.entries
            .iter()
            .find(|(k, _)| k == key)
            .map_or("", |(_, v)| v.as_str())
    }
    /// Whether `value` is among a repeated field's entries (ticked checkboxes).
    fn has(&self, key: &str, value: &str) -> bool {
        self.entries.iter().any(|(k, v)| k == key && v == value)
    }
    /// Whether `column` is chosen for `role` (a select).
    fn picked(&self, role: &str, column: &str) -> bool {
        self.one(role) == column
    }
    fn label_entry(&self, column: &str) -> &str {
        self.one(&format!("label.{column}"))
    }
    fn reference_entry(&self, column: &str) -> &str {
        self.one(&format!("reference.{column}"))
    }
    /// The label a column gets when its label field is left empty.
    fn derived_label(&self, column: &str) -> String {
        crate::project::manifest::readable_label(column)
    }
    /// Columns the form offers as numeric indicators: numeric-looking columns that are
    /// not the code, wave or participation flag chosen above.
    fn numeric_choices(&self) -> Vec<&ColumnInfo> {
        let taken = [
            self.one("code"),
            self.one("wave"),
            self.one("participation"),
        ];
        self.columns
            .iter()
            .filter(|c| c.kind.numeric() && !taken.contains(&c.name.as_str()))
            .collect()
    }
    /// Columns offered as categorical indicators: text-looking columns other than the
    /// code and name.
    fn categorical_choices(&self) -> Vec<&ColumnInfo> {
        let taken = [self.one("code"), self.one("country_name")];
        self.columns
            .iter()
            .filter(|c| c.kind.textual() && !taken.contains(&c.name.as_str()))
            .collect()
    }
}

fn folder(state: &AppState) -> AppResult<std::path::PathBuf> {
    state.projects.clone().ok_or_else(|| AppError::NotFound("projects can be created and opened from the browser when the server is started with --projects DIR".to_string()))
}

pub async fn list(State(state): State<Arc<AppState>>) -> AppResult<Html<String>> {
    render_list(&state, None)
}

fn render_list(state: &AppState, message: Option<String>) -> AppResult<Html<String>> {
    let project = state.project();
    let projects = state
        .projects
        .as_deref()
        .map(|dir| {
            store::list(dir)
                .into_iter()
                .map(|n| {
                    let versions = store::versions(dir, &n);
                    (n, versions)
                })
                .collect()
        })
        .unwrap_or_default();
    let html = ProjectsPage {
        page: "projects",
        nav_query: String::new(),
        current: project.manifest.title.clone(),
        projects,
        folder: state.projects.as_ref().map(|p| p.display().to_string()),
        message,
        cautions: &STANDING,
    }
    .render()?;
    Ok(Html(html))
}

#[derive(serde::Deserialize)]
pub struct RestoreForm {
    name: String,
    version: String,
}

/// Makes an earlier version current again (saved as the newest version, so nothing is
/// lost) and opens it.
pub async fn restore(
    State(state): State<Arc<AppState>>,
    Form(form): Form<RestoreForm>,
) -> AppResult<Response> {
    let dir = folder(&state)?;
    let (dir2, keep) = (dir.clone(), state.keep_versions);
    let name = form.name.clone();
    let restored =
        tokio::task::spawn_blocking(move || store::restore(&dir2, &form.name, &form.version, keep))
            .await
            .map_err(|e| AppError::Internal(e.to_string()))?;
    match restored {
        Ok(project) => {
            state.install(dir.join(&name), Arc::new(project));
            Ok(Redirect::to("/").into_response())
        }
        Err(problems) => Err(AppError::BadRequest(
            problems
                .iter()
                .map(Problem::to_string)
                .collect::<Vec<_>>()
                .join("\n"),
        )),
    }
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
    let new_microdata = accepted.iter().any(|(f, _)| f.starts_with("microdata."));
    // A new version without microdata keeps the current version's, unless asked not to.
    let remove = fields
        .get("remove_microdata")
        .is_some_and(|v| !v.is_empty());
    let accepted: Vec<(String, Vec<u8>)> =
        accepted.into_iter().map(|(f, b)| (f, b.to_vec())).collect();
    // Writing up to the body limit (and copying the old microdata) is blocking file work:
    // it runs on the blocking pool, not on the server's async threads.
    let (dir2, name2) = (dir.clone(), name.clone());
    let (upload, kept) = tokio::task::spawn_blocking(move || -> std::io::Result<(String, bool)> {
        let (upload, staging) = store::new_staging(&dir2, &name2)?;
        for (file, bytes) in accepted {
            std::fs::write(staging.join(file), bytes)?;
        }
        let mut kept = false;
        if !new_microdata && !remove {
            if let Some(old) = store::current_microdata(&dir2, &name2) {
                if let Some(file) = old.file_name() {
                    std::fs::copy(&old, staging.join(file))?;
                    kept = true;
                }
            }
        }
        Ok((upload, kept))
    })
    .await
    .map_err(|e| AppError::Internal(e.to_string()))?
    .map_err(|e| AppError::Internal(e.to_string()))?;
    // The title travels in the address, not in a file: a saved project holds only its
    // manifest and data.
    let mut target = form_urlencoded::Serializer::new(String::from("/projects/map?"));
    target
        .append_pair("name", &name)
        .append_pair("upload", &upload);
    if fields.get("title").is_some_and(|t| !t.trim().is_empty()) {
        target.append_pair("title", &title);
    }
    if kept {
        target.append_pair("kept", "1");
    }
    Ok(Redirect::to(&target.finish()).into_response())
}

#[derive(serde::Deserialize)]
pub struct MapQuery {
    name: String,
    #[serde(default)]
    upload: String,
    #[serde(default)]
    title: Option<String>,
    #[serde(default)]
    kept: Option<String>,
}

/// Column names of a staged data file (CSV header, or the Parquet schema).
fn columns_of(dir: &std::path::Path, stem: &str) -> Vec<String> {
    let Ok(Some(path)) = crate::project::table::find_data_file(dir, stem) else {
        return Vec::new();
    };
    let names = crate::project::table::column_names(&path);
    names.unwrap_or_default()
}

/// Rows read to guess column types (enough for any frame's flags and codes).
const PROFILE_ROWS: usize = 20_000;

/// What each column of a staged CSV or Parquet file looks like, from its first rows
/// (a Parquet file's values as text, so that both get the same guesses).
pub fn profile_columns(path: &std::path::Path) -> Vec<ColumnInfo> {
    let is_parquet = path
        .extension()
        .is_some_and(|e| e.eq_ignore_ascii_case("parquet"));
    if is_parquet {
        if let Some(columns) = crate::project::table::parquet_sample(path, PROFILE_ROWS) {
            return columns
                .into_iter()
                .map(|(name, cells)| column_info(name, cells))
                .collect();
        }
    }
    let names = crate::project::table::column_names(path).unwrap_or_default();
    let unread = |names: Vec<String>| {
        names
            .into_iter()
            .map(|name| ColumnInfo {
                name,
                kind: ColumnGuess::Unknown,
                examples: String::new(),
                levels: Vec::new(),
            })
            .collect::<Vec<_>>()
    };
    let is_csv = path
        .extension()
        .is_some_and(|e| e.eq_ignore_ascii_case("csv"));
    let Ok(mut reader) = csv::ReaderBuilder::new()
        .has_headers(true)
        .flexible(true)
        .from_path(path)
    else {
        return unread(names);
    };
    if !is_csv {
        return unread(names);
    }
    let mut values: Vec<Vec<String>> = vec![Vec::new(); names.len()];
    for record in reader.records().take(PROFILE_ROWS).filter_map(Result::ok) {
        for (j, cell) in record.iter().enumerate().take(names.len()) {
            let cell = cell.trim();
            if !cell.is_empty() && !crate::project::table::MISSING_TOKENS.contains(&cell) {
                values[j].push(cell.to_string());
            }
        }
    }
    names
        .into_iter()
        .zip(values)
        .map(|(name, cells)| column_info(name, cells))
        .collect()
}

/// A column's guess, examples and levels from its non-missing cells.
fn column_info(name: String, cells: Vec<String>) -> ColumnInfo {
    let mut levels: Vec<String> = cells.clone();
    levels.sort();
    levels.dedup();
    let kind = guess_kind(&cells, levels.len());
    let examples = levels
        .iter()
        .take(3)
        .cloned()
        .collect::<Vec<_>>()
        .join(", ");
    levels.truncate(50);
    ColumnInfo {
        name,
        kind,
        examples,
        levels,
    }
}

/// The guess for one column from its non-missing cells and number of distinct values.
fn guess_kind(cells: &[String], distinct: usize) -> ColumnGuess {
    if cells.is_empty() {
        return ColumnGuess::Unknown;
    }
    let numbers: Vec<f64> = cells
        .iter()
        .filter_map(|c| c.parse::<f64>().ok().filter(|v| v.is_finite()))
        .collect();
    if numbers.len() == cells.len() {
        if numbers.iter().all(|&v| v == 0.0 || v == 1.0) {
            return ColumnGuess::Flag;
        }
        if numbers.iter().all(|v| v.fract() == 0.0) {
            return ColumnGuess::Whole;
        }
        return ColumnGuess::Number;
    }
    let code_like = cells.iter().all(|c| {
        (2..=3).contains(&c.chars().count()) && c.chars().all(|ch| ch.is_ascii_alphabetic())
    });
    if code_like {
        return ColumnGuess::Code;
    }
    if distinct <= 12.max(cells.len() / 10) {
        return ColumnGuess::Category;
    }
    ColumnGuess::Text
}

/// The first column whose lower-case name contains one of the hints and whose values
/// fit `fits`; else the first column that fits.
fn guess(columns: &[ColumnInfo], hints: &[&str], fits: impl Fn(ColumnGuess) -> bool) -> String {
    hints
        .iter()
        .find_map(|h| {
            columns
                .iter()
                .find(|c| c.name.to_lowercase().contains(h) && fits(c.kind))
        })
        .or_else(|| columns.iter().find(|c| fits(c.kind)))
        .map(|c| c.name.clone())
        .unwrap_or_default()
}

fn guess_micro(columns: &[String], hints: &[&str]) -> String {
    hints
        .iter()
        .find_map(|h| columns.iter().find(|c| c.to_lowercase().contains(h)))
        .cloned()
        .unwrap_or_default()
}

/// The form's first entries from the columns alone.
fn guessed_entries(columns: &[ColumnInfo], micro: &[String], title: &str) -> Vec<(String, String)> {
    let pairs = [
        ("title", title.to_string()),
        (
            "code",
            guess(columns, &["iso", "code"], |k| {
                matches!(k, ColumnGuess::Code | ColumnGuess::Unknown)
            }),
        ),
        (
            "country_name",
            guess(columns, &["country", "name"], |k| {
                matches!(k, ColumnGuess::Text | ColumnGuess::Unknown)
            }),
        ),
        (
            "wave",
            guess(columns, &["wave", "round", "year"], |k| {
                matches!(k, ColumnGuess::Whole | ColumnGuess::Unknown)
            }),
        ),
        (
            "participation",
            guess(columns, &["took_part", "particip", "flag", "member"], |k| {
                matches!(k, ColumnGuess::Flag | ColumnGuess::Unknown)
            }),
        ),
        (
            "micro_country",
            guess_micro(micro, &["iso", "code", "country"]),
        ),
        ("micro_wave", guess_micro(micro, &["wave", "round", "year"])),
        (
            "micro_weight",
            guess_micro(micro, &["weight", "dweight", "wt"]),
        ),
    ];
    pairs.into_iter().map(|(k, v)| (k.to_string(), v)).collect()
}

/// The form's entries that reproduce a manifest (the inverse of [`manifest_from_form`]):
/// a re-upload starts from the previous version's mapping.
pub fn manifest_to_form(m: &Manifest) -> Vec<(String, String)> {
    let mut f: Vec<(String, String)> = Vec::new();
    let mut put = |k: &str, v: &str| f.push((k.to_string(), v.to_string()));
    put("title", &m.title);
    if let Some(d) = &m.description {
        put("description", d);
    }
    put("code", &m.columns.code);
    put("country_name", m.columns.name.as_deref().unwrap_or(""));
    put("wave", &m.columns.wave);
    put("participation", &m.columns.participation);
    put("group", m.columns.group.as_deref().unwrap_or(""));
    for c in &m.indicators.numeric {
        put("numeric", c);
    }
    for c in &m.indicators.categorical {
        put("categorical", c);
    }
    for (c, l) in &m.indicators.labels {
        put(&format!("label.{c}"), l);
    }
    for (c, r) in &m.indicators.reference {
        put(&format!("reference.{c}"), r);
    }
    let cut = |t: &Threshold| match t {
        Threshold::Value(v) => v.to_string(),
        Threshold::FromParticipants(ParticipantCut::LowestParticipant) => {
            "lowest-participant".to_string()
        }
        Threshold::FromParticipants(ParticipantCut::HighestParticipant) => {
            "highest-participant".to_string()
        }
    };
    for r in &m.eligibility {
        let waves = r.waves.as_ref().map_or(String::new(), |w| {
            w.iter().map(i64::to_string).collect::<Vec<_>>().join(", ")
        });
        for (direction, threshold) in [("at_least", &r.at_least), ("at_most", &r.at_most)] {
            if let Some(t) = threshold {
                put("rule_indicator", &r.indicator);
                put("rule_direction", direction);
                put("rule_cut", &cut(t));
                put("rule_waves", &waves);
            }
        }
    }
    put("cost", m.recruitment.cost.as_deref().unwrap_or(""));
    put(
        "feasibility",
        m.recruitment.feasibility.as_deref().unwrap_or(""),
    );
    if let Some(p) = &m.population {
        put("population", &p.column);
        put(
            "population_scale",
            match p.scale {
                PopulationScale::Count => "count",
                PopulationScale::Log => "log",
                PopulationScale::Log10 => "log10",
            },
        );
    }
    if let Some(md) = &m.microdata {
        put("micro_country", &md.country);
        put("micro_wave", &md.wave);
        put("micro_weight", &md.design_weight);
        for v in &md.variables {
            put("micro_variable", v);
        }
        put("micro_outcome", md.outcome.as_deref().unwrap_or(""));
    }
    f
}

/// The rule rows of the form from its entries, padded to [`RULE_ROWS`] (at least one
/// empty row to add a rule).
fn rule_rows(entries: &[(String, String)]) -> Vec<RuleEntry> {
    let many = |key: &str| {
        entries
            .iter()
            .filter(|(k, _)| k == key)
            .map(|(_, v)| v.clone())
            .collect::<Vec<_>>()
    };
    let (ind, dir, cut, waves) = (
        many("rule_indicator"),
        many("rule_direction"),
        many("rule_cut"),
        many("rule_waves"),
    );
    let legacy = many("rule_at_least");
    let mut rows: Vec<RuleEntry> = ind
        .iter()
        .enumerate()
        .map(|(i, indicator)| RuleEntry {
            indicator: indicator.clone(),
            direction: dir.get(i).cloned().unwrap_or_else(|| "at_least".into()),
            cut: cut.get(i).or(legacy.get(i)).cloned().unwrap_or_default(),
            waves: waves.get(i).cloned().unwrap_or_default(),
        })
        .filter(|r| !(r.indicator.is_empty() && r.cut.trim().is_empty()))
        .collect();
    while rows.len() < RULE_ROWS || rows.last().is_some_and(|r| !r.indicator.is_empty()) {
        rows.push(RuleEntry {
            direction: "at_least".into(),
            ..RuleEntry::default()
        });
    }
    rows
}

/// The separator a CSV's header seems to use when it is not a comma, and whether its
/// cells write decimals with a comma; `None` for a comma-separated file.
fn separator_hint(path: &std::path::Path, file: &str) -> Option<String> {
    if !path
        .extension()
        .is_some_and(|e| e.eq_ignore_ascii_case("csv"))
    {
        return None;
    }
    let bytes = std::fs::read(path).ok()?;
    let text = String::from_utf8_lossy(&bytes[..bytes.len().min(1 << 16)]).to_string();
    let mut lines = text.lines();
    let header = lines.next()?;
    if header.contains(',') {
        return None;
    }
    let (sep, shown) = [(';', "';'"), ('\t', "a tab"), ('|', "'|'")]
        .into_iter()
        .find(|(c, _)| header.contains(*c))?;
    let decimal_commas = lines.take(200).any(|l| {
        l.split(sep).any(|cell| {
            let cell = cell.trim().trim_matches('"');
            cell.split_once(',').is_some_and(|(a, b)| {
                !a.is_empty()
                    && !b.is_empty()
                    && a.trim_start_matches('-')
                        .chars()
                        .all(|c| c.is_ascii_digit())
                    && b.chars().all(|c| c.is_ascii_digit())
            })
        })
    });
    Some(format!(
        "{file}: this file seems to use {shown} between fields (its header has no comma){}; save it as comma-separated CSV (UTF-8){}, then upload it again",
        if decimal_commas { " and a decimal comma (1,5)" } else { "" },
        if decimal_commas { " with '.' as the decimal point" } else { "" }
    ))
}

/// Codes in the microdata that match a frame code only when case is ignored: a hint
/// that names a few, since codes must match exactly.
fn code_case_hint(staging: &std::path::Path, entries: &[(String, String)]) -> Option<String> {
    let one = |key: &str| {
        entries
            .iter()
            .find(|(k, _)| k == key)
            .map(|(_, v)| v.clone())
            .filter(|v| !v.is_empty())
    };
    let (code, micro_code) = (one("code")?, one("micro_country")?);
    let read = |stem: &str, column: &str| -> Option<std::collections::BTreeSet<String>> {
        let path = crate::project::table::find_data_file(staging, stem).ok()??;
        let mut reader = csv::ReaderBuilder::new()
            .flexible(true)
            .from_path(&path)
            .ok()?;
        let j = reader.headers().ok()?.iter().position(|h| h == column)?;
        Some(
            reader
                .records()
                .filter_map(Result::ok)
                .filter_map(|r| r.get(j).map(|c| c.trim().to_string()))
                .filter(|c| !c.is_empty())
                .collect(),
        )
    };
    let frame = read("frame", &code)?;
    let micro = read("microdata", &micro_code)?;
    let folded: std::collections::HashMap<String, &String> =
        frame.iter().map(|c| (c.to_lowercase(), c)).collect();
    let pairs: Vec<String> = micro
        .iter()
        .filter(|c| !frame.contains(*c))
        .filter_map(|c| {
            folded
                .get(&c.to_lowercase())
                .map(|f| format!("'{c}' / '{f}'"))
        })
        .collect();
    if pairs.is_empty() {
        return None;
    }
    Some(format!(
        "{} microdata code{} match{} a frame code only when case is ignored ({}{}); codes must match exactly: write them in the same case in both files",
        pairs.len(),
        if pairs.len() == 1 { "" } else { "s" },
        if pairs.len() == 1 { "es" } else { "" },
        pairs.iter().take(5).cloned().collect::<Vec<_>>().join(", "),
        if pairs.len() > 5 { ", ..." } else { "" }
    ))
}

pub async fn map_form(
    State(state): State<Arc<AppState>>,
    Query(q): Query<MapQuery>,
) -> AppResult<Html<String>> {
    let dir = folder(&state)?;
    // Profiling the uploaded files reads them: blocking work, on the blocking pool.
    tokio::task::spawn_blocking(move || map_form_page(&dir, &q))
        .await
        .map_err(|e| AppError::Internal(e.to_string()))?
        .map(Html)
}

fn map_form_page(dir: &std::path::Path, q: &MapQuery) -> AppResult<String> {
    let staging = store::staging(dir, &q.name, &q.upload).map_err(AppError::BadRequest)?;
    if !staging.is_dir() {
        return Err(AppError::NotFound(format!(
            "no upload for '{}'; start from /projects",
            q.name
        )));
    }
    // A new version of an existing project starts from its current mapping.
    let previous = store::current_manifest(dir, &q.name);
    let (entries, from_previous) = match &previous {
        Some(m) => {
            let mut e = manifest_to_form(m);
            if let Some(t) = q.title.as_ref().filter(|t| !t.trim().is_empty()) {
                e.retain(|(k, _)| k != "title");
                e.insert(0, ("title".to_string(), t.clone()));
            }
            (e, true)
        }
        None => {
            let columns = frame_columns(&staging);
            let micro = columns_of(&staging, "microdata");
            let title = q.title.clone().unwrap_or_else(|| q.name.clone());
            (guessed_entries(&columns, &micro, &title), false)
        }
    };
    let kept = q.kept.is_some();
    render_map(
        &q.name,
        &q.upload,
        &staging,
        entries,
        from_previous,
        kept,
        Vec::new(),
    )
}

fn frame_columns(staging: &std::path::Path) -> Vec<ColumnInfo> {
    match crate::project::table::find_data_file(staging, "frame") {
        Ok(Some(path)) => profile_columns(&path),
        _ => Vec::new(),
    }
}

fn render_map(
    name: &str,
    upload: &str,
    staging: &std::path::Path,
    entries: Vec<(String, String)>,
    from_previous: bool,
    kept: bool,
    problems: Vec<String>,
) -> AppResult<String> {
    let columns = frame_columns(staging);
    let micro_columns = columns_of(staging, "microdata");
    let mut hints = Vec::new();
    for stem in ["frame", "microdata"] {
        if let Ok(Some(path)) = crate::project::table::find_data_file(staging, stem) {
            let label = path
                .file_name()
                .map_or_else(String::new, |n| n.to_string_lossy().to_string());
            hints.extend(separator_hint(&path, &label));
        }
    }
    hints.extend(code_case_hint(staging, &entries));
    let kept_microdata = if kept {
        crate::project::table::find_data_file(staging, "microdata")
            .ok()
            .flatten()
            .and_then(|p| p.file_name().map(|n| n.to_string_lossy().to_string()))
    } else {
        None
    };
    Ok(MapPage {
        page: "projects",
        nav_query: String::new(),
        name: name.to_string(),
        upload: upload.to_string(),
        rules: rule_rows(&entries),
        columns,
        micro_columns,
        entries,
        hints,
        kept_microdata,
        from_previous,
        problems,
        cautions: &STANDING,
    }
    .render()?)
}

/// Builds the manifest from the mapping form (repeated keys for the ticked indicators,
/// `label.COLUMN` and `reference.COLUMN` fields, rule rows as parallel lists). Every
/// manifest it returns is then checked exactly as `gapwise check` checks a folder.
pub fn manifest_from_form(form: &[(String, String)]) -> Result<Manifest, String> {
    let one = |key: &str| {
        form.iter()
            .find(|(k, _)| k == key)
            .map(|(_, v)| v.trim().to_string())
            .filter(|v| !v.is_empty())
    };
    let many = |key: &str| {
        let mut seen = Vec::new();
        for (k, v) in form {
            let v = v.trim().to_string();
            if k == key && !v.is_empty() && !seen.contains(&v) {
                seen.push(v);
            }
        }
        seen
    };
    let need =
        |key: &str, what: &str| one(key).ok_or_else(|| format!("choose the column with {what}"));
    // Rules come as rows of fields (indicator, direction, cut-off, waves); a row without
    // an indicator is no rule.
    let mut eligibility: Vec<EligibilityRule> = Vec::new();
    for row in rule_rows(form) {
        let indicator = row.indicator.trim().to_string();
        let cut = row.cut.trim().to_string();
        if indicator.is_empty() {
            if !cut.is_empty() {
                return Err(format!(
                    "the eligibility rule with cut-off '{cut}' has no indicator; choose one or clear the cut-off"
                ));
            }
            continue;
        }
        if cut.is_empty() {
            return Err(format!("give the eligibility rule on '{indicator}' a cut-off: a number, lowest-participant or highest-participant"));
        }
        let threshold = match cut.as_str() {
            "lowest-participant" => Threshold::FromParticipants(ParticipantCut::LowestParticipant),
            "highest-participant" => {
                Threshold::FromParticipants(ParticipantCut::HighestParticipant)
            }
            _ => Threshold::Value(
                cut.parse::<f64>()
                    .ok()
                    .filter(|v| v.is_finite())
                    .ok_or_else(|| {
                        format!("the cut-off '{cut}' of the rule on '{indicator}' is neither a number (with '.' as decimal point) nor lowest-participant / highest-participant")
                    })?,
            ),
        };
        let waves = if row.waves.trim().is_empty() {
            None
        } else {
            let mut list = Vec::new();
            for w in row.waves.split([',', ' ', ';']).filter(|w| !w.is_empty()) {
                list.push(w.parse::<i64>().map_err(|_| {
                    format!("the waves of the rule on '{indicator}' must be whole numbers separated by commas, not '{w}'")
                })?);
            }
            Some(list)
        };
        let (at_least, at_most) = if row.direction == "at_most" {
            (None, Some(threshold))
        } else {
            (Some(threshold), None)
        };
        eligibility.push(EligibilityRule {
            indicator,
            at_least,
            at_most,
            waves,
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
    let numeric = many("numeric");
    let categorical = many("categorical");
    let mut labels = BTreeMap::new();
    let mut reference = BTreeMap::new();
    let variables = microdata
        .as_ref()
        .map(|m| m.variables.clone())
        .unwrap_or_default();
    for (k, v) in form {
        let v = v.trim();
        if v.is_empty() {
            continue;
        }
        if let Some(c) = k.strip_prefix("label.") {
            if numeric
                .iter()
                .chain(&categorical)
                .chain(&variables)
                .any(|x| x == c)
            {
                labels.insert(c.to_string(), v.to_string());
            }
        } else if let Some(c) = k.strip_prefix("reference.") {
            if categorical.iter().any(|x| x == c) {
                reference.insert(c.to_string(), v.to_string());
            }
        }
    }
    Ok(Manifest {
        title: one("title").unwrap_or_else(|| "Untitled project".to_string()),
        description: one("description"),
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
            numeric,
            categorical,
            reference,
            labels,
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
    let kept = form.iter().any(|(k, v)| k == "kept" && !v.is_empty());
    let problems: Vec<String> = match manifest_from_form(&form) {
        Err(message) => vec![message],
        Ok(manifest) => {
            let text = toml::to_string(&manifest).map_err(|e| AppError::Internal(e.to_string()))?;
            let dir2 = dir.clone();
            let (name2, upload2, keep) = (name.clone(), upload.clone(), state.keep_versions);
            let manifest_path = staging.join(MANIFEST_FILE);
            // File work on the blocking pool: the manifest, then the save's fsyncs and renames.
            let saved = tokio::task::spawn_blocking(move || {
                std::fs::write(manifest_path, text)
                    .map(|()| store::save(&dir2, &name2, &upload2, keep))
            })
            .await
            .map_err(|e| AppError::Internal(e.to_string()))?
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
    // Everything stays as typed; the form's own fields are not mapping entries.
    let entries: Vec<(String, String)> = form
        .into_iter()
        .filter(|(k, _)| !matches!(k.as_str(), "name" | "upload" | "kept"))
        .collect();
    // Re-profiling the files reads them: blocking work, on the blocking pool.
    let html = tokio::task::spawn_blocking(move || {
        render_map(&name, &upload, &staging, entries, false, kept, problems)
    })
    .await
    .map_err(|e| AppError::Internal(e.to_string()))??;
    Ok((StatusCode::UNPROCESSABLE_ENTITY, Html(html)).into_response())
}
