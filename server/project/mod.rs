//! A project folder: its manifest, its frame of countries and waves, and optional
//! microdata, loaded with polars and validated. Every problem is reported as
//! `file:row:column: message`; nothing here panics on bad input.

pub mod composition;
pub mod eligibility;
pub mod manifest;
pub mod problem;
pub mod store;
pub mod table;
pub mod wave;

use std::collections::{BTreeMap, HashMap};
use std::path::{Path, PathBuf};

pub use eligibility::{Eligibility, RowStatus};
pub use manifest::{Manifest, MANIFEST_FILE};
pub use problem::{Problem, ProblemList};
pub use table::{ColumnKind, ColumnSpec, Table};
pub use wave::WaveView;

/// The frame's file name stem (`frame.csv` or `frame.parquet`).
pub const FRAME_STEM: &str = "frame";
/// The microdata's file name stem (`microdata.csv` or `microdata.parquet`).
pub const MICRODATA_STEM: &str = "microdata";

/// A loaded, validated project. Immutable: reloading builds a new one.
#[derive(Debug)]
pub struct Project {
    pub dir: PathBuf,
    pub manifest: Manifest,
    /// One row per country and wave, typed columns (see [`table::load_table`]).
    pub frame: Table,
    pub microdata: Option<Table>,
    /// The respondent composition of countries (`[projection] composition`), if declared.
    pub composition: Option<composition::Composition>,
    /// Distinct waves, ascending.
    pub waves: Vec<i64>,
    pub eligibility: Eligibility,
    /// Things worth knowing that do not stop the analysis (participants failing a rule...).
    pub warnings: Vec<Problem>,
    /// The files read, in order (manifest, frame, microdata), with rows and checksums.
    pub inputs: Vec<LoadedFile>,
    /// What changed since the project was last loaded (empty on the first load); set by
    /// [`Project::compare_with`] when the server reloads.
    pub changes: Vec<String>,
    /// A number no other load in this process has: cached results are keyed by it, so a
    /// reload can never be answered from results of the files before it.
    pub revision: u64,
}

/// The next project revision (see [`Project::revision`]).
fn next_revision() -> u64 {
    static NEXT: std::sync::atomic::AtomicU64 = std::sync::atomic::AtomicU64::new(1);
    NEXT.fetch_add(1, std::sync::atomic::Ordering::Relaxed)
}

/// One file as it was loaded: name, size, data rows (not for the manifest) and SHA-256
/// (FIPS 180-4) of exactly the bytes that were validated.
#[derive(Debug, Clone, PartialEq, Eq, serde::Serialize)]
pub struct LoadedFile {
    pub name: String,
    pub bytes: u64,
    pub rows: Option<usize>,
    pub sha256: String,
}

impl LoadedFile {
    fn new(name: &str, bytes: &[u8], rows: Option<usize>) -> Self {
        use sha2::{Digest, Sha256};
        LoadedFile {
            name: name.to_string(),
            bytes: bytes.len() as u64,
            rows,
            sha256: Sha256::digest(bytes)
                .iter()
                .map(|b| format!("{b:02x}"))
                .collect(),
        }
    }
}

/// Data lost by a reload: files gone, fewer rows, waves gone. Empty when nothing is lost.
pub fn losses(old: &Project, new: &Project) -> Vec<String> {
    let mut lost = Vec::new();
    for before in &old.inputs {
        let Some(rows_before) = before.rows else {
            continue;
        };
        match new.inputs.iter().find(|f| f.name == before.name) {
            None => lost.push(format!(
                "{} ({rows_before} rows) is no longer there",
                before.name
            )),
            Some(after) => {
                let rows_after = after.rows.unwrap_or(0);
                if rows_after < rows_before {
                    lost.push(format!(
                        "{} now has {rows_after} rows instead of {rows_before} ({} fewer)",
                        before.name,
                        rows_before - rows_after
                    ));
                }
            }
        }
    }
    let gone: Vec<String> = old
        .waves
        .iter()
        .filter(|w| !new.waves.contains(w))
        .map(i64::to_string)
        .collect();
    if !gone.is_empty() {
        lost.push(format!(
            "wave{} {} no longer in the frame",
            if gone.len() == 1 { "" } else { "s" },
            gone.join(", ")
        ));
    }
    lost
}

impl Project {
    /// Loads and validates the project in `dir`; returns every problem found. A project
    /// saved from the browser (a folder of versions, see [`store`]) loads its current
    /// version. Every file is read whole while unchanged ([`table::read_stable`]).
    pub fn load(dir: &Path) -> Result<Project, Vec<Problem>> {
        let dir = &store::resolve(dir);
        let manifest_path = dir.join(MANIFEST_FILE);
        if !manifest_path.exists() {
            return Err(vec![Problem::file(
                MANIFEST_FILE,
                format!(
                    "cannot read {} (there is no such file); a project folder needs a project.toml (see the README)",
                    manifest_path.display()
                ),
            )]);
        }
        let manifest_bytes =
            table::read_stable(&manifest_path, MANIFEST_FILE).map_err(|p| vec![p])?;
        let mut inputs = vec![LoadedFile::new(MANIFEST_FILE, &manifest_bytes, None)];
        let text = String::from_utf8(manifest_bytes).map_err(|_| {
            vec![Problem::file(
                MANIFEST_FILE,
                "the manifest is not UTF-8 text; save it as UTF-8",
            )]
        })?;
        let (manifest, projection_files) = Manifest::parse_with_projection(&text)?;
        let mut conflicts = conflicting_roles(MANIFEST_FILE, &frame_specs(&manifest));
        if let Some(roles) = &manifest.microdata {
            conflicts.extend(conflicting_roles(MANIFEST_FILE, &microdata_specs(roles)));
        }
        if !conflicts.is_empty() {
            return Err(conflicts);
        }

        let frame_path = match table::find_data_file(dir, FRAME_STEM) {
            Ok(Some(p)) => p,
            Ok(None) => {
                return Err(vec![Problem::file(
                    "frame.csv",
                    format!("no frame.csv or frame.parquet in {}; the frame (one row per country and wave) is required", dir.display()),
                )])
            }
            Err(p) => return Err(vec![p]),
        };
        let frame_label = file_label(&frame_path);
        let frame_bytes = table::read_stable(&frame_path, &frame_label).map_err(|p| vec![p])?;
        let frame_file = LoadedFile::new(&frame_label, &frame_bytes, None);
        let frame = table::load_table_bytes(
            &frame_path,
            frame_bytes,
            &frame_label,
            &frame_specs(&manifest),
        )?;
        inputs.push(LoadedFile {
            rows: Some(frame.height()),
            ..frame_file
        });

        let mut problems = ProblemList::new();
        let codes = frame.texts(&manifest.columns.code);
        let waves_col = frame.integers(&manifest.columns.wave);
        let flags = frame.integers(&manifest.columns.participation);
        let keys: Vec<(String, i64)> = codes
            .iter()
            .zip(&waves_col)
            .map(|(c, w)| (c.clone().unwrap_or_default(), w.unwrap_or_default()))
            .collect();
        let participated: Vec<bool> = flags.iter().map(|f| *f == Some(1)).collect();
        check_duplicates(&frame, &manifest, &keys, &mut problems);
        check_reference_levels(&frame, &manifest, &mut problems);

        let rule_values: Vec<Vec<Option<f64>>> = manifest
            .eligibility
            .iter()
            .map(|r| frame.numbers(&r.indicator))
            .collect();
        let rules: Vec<eligibility::RuleValues<'_>> = manifest
            .eligibility
            .iter()
            .zip(&rule_values)
            .map(|(rule, values)| eligibility::RuleValues { rule, values })
            .collect();
        let wave_of_row: Vec<i64> = keys.iter().map(|k| k.1).collect();
        let eligibility = eligibility::evaluate(&wave_of_row, &participated, &rules);

        let mut warnings = eligibility_warnings(&frame, &keys, &participated, &eligibility);

        let microdata = match table::find_data_file(dir, MICRODATA_STEM) {
            Err(p) => {
                problems.push(p);
                None
            }
            Ok(None) => {
                if manifest.microdata.is_some() {
                    warnings.push(Problem::file(
                        "microdata.csv",
                        "project.toml has a [microdata] section but there is no microdata.csv or microdata.parquet; the microdata pages stay empty",
                    ));
                }
                None
            }
            Ok(Some(path)) => match &manifest.microdata {
                None => {
                    problems.push(Problem::file(
                        &file_label(&path),
                        "the project has microdata but project.toml has no [microdata] section naming its country, wave and design-weight columns; add one (see the README)",
                    ));
                    None
                }
                Some(roles) => {
                    let label = file_label(&path);
                    let loaded = table::read_stable(&path, &label)
                        .map_err(|p| vec![p])
                        .and_then(|bytes| {
                            let file = LoadedFile::new(&label, &bytes, None);
                            let table = table::load_table_bytes(
                                &path,
                                bytes,
                                &label,
                                &microdata_specs(roles),
                            )?;
                            Ok((file, table))
                        });
                    match loaded {
                        Err(p) => {
                            problems.extend(p);
                            None
                        }
                        Ok((file, micro)) => {
                            inputs.push(LoadedFile {
                                rows: Some(micro.height()),
                                ..file
                            });
                            check_microdata(
                                &micro,
                                roles,
                                &frame,
                                &keys,
                                &participated,
                                &mut problems,
                                &mut warnings,
                            );
                            Some(micro)
                        }
                    }
                }
            },
        };

        let composition = match &projection_files.composition {
            None => None,
            Some(name) => {
                let known: std::collections::HashSet<String> =
                    keys.iter().map(|k| k.0.clone()).collect();
                match composition::load(dir, name, manifest.microdata.as_ref(), &known) {
                    Ok((c, bytes)) => {
                        inputs.push(LoadedFile::new(name, &bytes, Some(c.cells.len())));
                        Some(c)
                    }
                    Err(p) => {
                        problems.extend(p);
                        None
                    }
                }
            }
        };
        if !problems.is_empty() {
            return Err(problems.into_vec());
        }
        let mut waves = wave_of_row;
        waves.sort_unstable();
        waves.dedup();
        Ok(Project {
            dir: dir.to_path_buf(),
            manifest,
            frame,
            microdata,
            composition,
            waves,
            eligibility,
            warnings,
            revision: next_revision(),
            inputs,
            changes: Vec::new(),
        })
    }

    /// Records in `changes` what differs from the project loaded before (files added,
    /// removed or changed, with their rows), for the overview.
    pub fn compare_with(&mut self, before: &Project) {
        let mut changes = Vec::new();
        for after in &self.inputs {
            match before.inputs.iter().find(|f| f.name == after.name) {
                None => changes.push(format!("{}: new", after.name)),
                Some(b) if b.sha256 == after.sha256 => {}
                Some(b) => changes.push(match (b.rows, after.rows) {
                    (Some(r0), Some(r1)) => {
                        format!("{}: changed, {r0} rows before, {r1} now", after.name)
                    }
                    _ => format!("{}: changed", after.name),
                }),
            }
        }
        for b in &before.inputs {
            if !self.inputs.iter().any(|f| f.name == b.name) {
                changes.push(format!("{}: no longer there", b.name));
            }
        }
        if changes.is_empty() {
            changes.push("no file changed since the last load".to_string());
        }
        self.changes = changes;
    }

    /// Country codes of the frame's rows.
    pub fn codes(&self) -> Vec<String> {
        self.frame
            .texts(&self.manifest.columns.code)
            .into_iter()
            .map(Option::unwrap_or_default)
            .collect()
    }

    /// Country names of the frame's rows (the code where there is no name column).
    pub fn names(&self) -> Vec<String> {
        let column = self
            .manifest
            .columns
            .name
            .as_deref()
            .unwrap_or(&self.manifest.columns.code);
        let names = self.frame.texts(column);
        self.codes()
            .into_iter()
            .enumerate()
            .map(|(i, c)| names.get(i).cloned().flatten().unwrap_or(c))
            .collect()
    }

    /// The wave of each frame row.
    pub fn row_waves(&self) -> Vec<i64> {
        self.frame
            .integers(&self.manifest.columns.wave)
            .into_iter()
            .map(Option::unwrap_or_default)
            .collect()
    }

    /// Whether each frame row took part.
    pub fn participated(&self) -> Vec<bool> {
        self.frame
            .integers(&self.manifest.columns.participation)
            .into_iter()
            .map(|f| f == Some(1))
            .collect()
    }

    /// One wave's eligible universe, ready for analysis.
    pub fn wave(&self, wave: i64) -> Option<WaveView> {
        WaveView::new(self, wave)
    }

    /// The wave asked for, or the latest when none is, with its view; a wave the project
    /// does not have gets a message that lists the waves it has. The one place where a
    /// missing wave setting is resolved (pages, command line and report alike).
    pub fn resolve_wave(&self, wave: Option<i64>) -> Result<(i64, WaveView), UnknownWave> {
        let wave = match wave {
            Some(w) => w,
            None => *self
                .waves
                .last()
                .ok_or_else(|| UnknownWave("the project has no waves".to_string()))?,
        };
        let view = self.wave(wave).ok_or_else(|| {
            UnknownWave(format!(
                "there is no wave {wave}; the project's waves are {}",
                self.waves
                    .iter()
                    .map(i64::to_string)
                    .collect::<Vec<_>>()
                    .join(", ")
            ))
        })?;
        Ok((wave, view))
    }
}

/// A wave the project does not have (the message lists the waves it has).
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
#[error("{0}")]
pub struct UnknownWave(pub String);

impl From<UnknownWave> for String {
    fn from(e: UnknownWave) -> String {
        e.0
    }
}

/// The name shown in messages: the file name within the project folder.
fn file_label(path: &Path) -> String {
    path.file_name().map_or_else(
        || path.display().to_string(),
        |n| n.to_string_lossy().to_string(),
    )
}

fn frame_specs(m: &Manifest) -> Vec<ColumnSpec> {
    let mut specs = vec![
        ColumnSpec::new(
            &m.columns.code,
            ColumnKind::RequiredText,
            "columns.code (the country code)",
        ),
        ColumnSpec::new(&m.columns.wave, ColumnKind::Integer, "columns.wave"),
        ColumnSpec::new(
            &m.columns.participation,
            ColumnKind::Flag,
            "columns.participation (the participation flag)",
        ),
    ];
    if let Some(name) = &m.columns.name {
        specs.push(ColumnSpec::new(name, ColumnKind::Text, "columns.name"));
    }
    for c in &m.indicators.numeric {
        specs.push(ColumnSpec::new(c, ColumnKind::Number, "indicators.numeric"));
    }
    for c in &m.indicators.categorical {
        specs.push(ColumnSpec::new(
            c,
            ColumnKind::Text,
            "indicators.categorical",
        ));
    }
    for (i, r) in m.eligibility.iter().enumerate() {
        specs.push(ColumnSpec::new(
            &r.indicator,
            ColumnKind::Number,
            &format!("eligibility rule {}", i + 1),
        ));
    }
    if let Some(c) = &m.recruitment.cost {
        specs.push(ColumnSpec::new(c, ColumnKind::Number, "recruitment.cost"));
    }
    if let Some(c) = &m.recruitment.feasibility {
        specs.push(ColumnSpec::new(
            c,
            ColumnKind::Number,
            "recruitment.feasibility",
        ));
    }
    if let Some(c) = &m.recruitment.support_cost {
        specs.push(ColumnSpec::new(
            c,
            ColumnKind::Number,
            "recruitment.support_cost",
        ));
    }
    if let Some(c) = &m.recruitment.support_chance {
        specs.push(ColumnSpec::new(
            c,
            ColumnKind::Number,
            "recruitment.support_chance",
        ));
    }
    if let Some(p) = &m.population {
        specs.push(ColumnSpec::new(
            &p.column,
            ColumnKind::Number,
            "population.column",
        ));
    }
    specs
}

/// What a column is read as: text, whole numbers (waves, flags) or numbers.
fn storage(kind: ColumnKind) -> &'static str {
    match kind {
        ColumnKind::Text | ColumnKind::RequiredText => "text",
        ColumnKind::Integer | ColumnKind::Flag => "a whole number",
        ColumnKind::Number | ColumnKind::RequiredNumber => "a number",
    }
}

/// A column that two roles need read differently (the country name also listed as a
/// numeric indicator, a rule on a categorical indicator, the wave as a cost): one column
/// is stored one way, so the other role would find nothing. Refused before any data is
/// read, naming both roles; the same check runs for `gapwise check` and for a save from
/// the browser, because both load through [`Project::load`].
fn conflicting_roles(file: &str, specs: &[ColumnSpec]) -> Vec<Problem> {
    let mut problems = Vec::new();
    let mut first: HashMap<&str, &ColumnSpec> = HashMap::new();
    let mut reported: std::collections::HashSet<&str> = std::collections::HashSet::new();
    for spec in specs {
        match first.get(spec.name.as_str()) {
            None => {
                first.insert(&spec.name, spec);
            }
            Some(earlier) => {
                if storage(earlier.kind) != storage(spec.kind) && reported.insert(&spec.name) {
                    problems.push(Problem::at(
                        file,
                        None,
                        Some(spec.role.as_str()),
                        format!(
                            "column '{}' is used as {} (read as {}) and as {} (read as {}); one column cannot be both: choose another column for one of them",
                            spec.name,
                            earlier.role,
                            storage(earlier.kind),
                            spec.role,
                            storage(spec.kind)
                        ),
                    ));
                }
            }
        }
    }
    problems
}

fn microdata_specs(roles: &manifest::MicrodataRoles) -> Vec<ColumnSpec> {
    let mut specs = vec![
        ColumnSpec::new(
            &roles.country,
            ColumnKind::RequiredText,
            "microdata.country (the country code)",
        ),
        ColumnSpec::new(&roles.wave, ColumnKind::Integer, "microdata.wave"),
        ColumnSpec::new(
            &roles.design_weight,
            ColumnKind::Number,
            "microdata.design_weight",
        ),
    ];
    for v in &roles.variables {
        specs.push(ColumnSpec::new(
            v,
            ColumnKind::Number,
            "microdata.variables",
        ));
    }
    if let Some(r) = &roles.respondent {
        specs.push(ColumnSpec::new(r, ColumnKind::Text, "microdata.respondent"));
    }
    specs
}

fn check_duplicates(
    frame: &Table,
    m: &Manifest,
    keys: &[(String, i64)],
    problems: &mut ProblemList,
) {
    let mut first: HashMap<&(String, i64), usize> = HashMap::new();
    for (i, key) in keys.iter().enumerate() {
        if let Some(&j) = first.get(key) {
            problems.push_kind(
                "duplicate country-wave",
                Problem::at(
                    &frame.file,
                    Some(frame.row_number(i)),
                    Some(&m.columns.code),
                    format!(
                        "{} appears twice in wave {} (also on row {}); keep one row per country and wave",
                        key.0,
                        key.1,
                        frame.row_number(j)
                    ),
                ),
            );
        } else {
            first.insert(key, i);
        }
    }
}

fn check_reference_levels(frame: &Table, m: &Manifest, problems: &mut ProblemList) {
    for (column, level) in &m.indicators.reference {
        if !m.indicators.categorical.contains(column) {
            problems.push(Problem::at(
                MANIFEST_FILE,
                None,
                Some("indicators.reference"),
                format!(
                    "'{column}' has a reference level but is not listed in indicators.categorical"
                ),
            ));
            continue;
        }
        let values = frame.texts(column);
        if !values.iter().flatten().any(|v| v == level) {
            problems.push(Problem::at(
                MANIFEST_FILE,
                None,
                Some("indicators.reference"),
                format!("the reference level '{level}' of '{column}' does not occur in {}; use one of its levels", frame.file),
            ));
        }
    }
}

fn eligibility_warnings(
    frame: &Table,
    keys: &[(String, i64)],
    participated: &[bool],
    e: &Eligibility,
) -> Vec<Problem> {
    let mut warnings = Vec::new();
    for (i, status) in e.status.iter().enumerate() {
        let (code, wave) = &keys[i];
        let row = Some(frame.row_number(i));
        match (status, participated[i]) {
            (RowStatus::Fails { indicator, value, cut }, true) => warnings.push(Problem::at(
                &frame.file,
                row,
                Some(indicator),
                format!("{code} took part in wave {wave} although its {indicator} ({value}) fails the rule '{cut}'; it is kept in the universe"),
            )),
            (RowStatus::Unknown { indicator }, true) => warnings.push(Problem::at(
                &frame.file,
                row,
                Some(indicator),
                format!("{code} took part in wave {wave} but has no {indicator}, so the eligibility rule cannot be checked; it is kept in the universe"),
            )),
            (RowStatus::Unknown { indicator }, false) => warnings.push(Problem::at(
                &frame.file,
                row,
                Some(indicator),
                format!("{code} has no {indicator} in wave {wave}, so its eligibility cannot be judged and it is left out of the universe; fill the value to include it"),
            )),
            _ => {}
        }
    }
    warnings
}

fn check_microdata(
    micro: &Table,
    roles: &manifest::MicrodataRoles,
    frame: &Table,
    frame_keys: &[(String, i64)],
    participated: &[bool],
    problems: &mut ProblemList,
    warnings: &mut Vec<Problem>,
) {
    let frame_rows: HashMap<(&str, i64), usize> = frame_keys
        .iter()
        .enumerate()
        .map(|(i, (c, w))| ((c.as_str(), *w), i))
        .collect();
    let countries = micro.texts(&roles.country);
    let waves = micro.integers(&roles.wave);
    let weights = micro.numbers(&roles.design_weight);
    // First row and respondent count of each country-wave in the microdata.
    let mut groups: BTreeMap<(&str, i64), (usize, usize)> = BTreeMap::new();
    for (i, (c, w)) in countries.iter().zip(&waves).enumerate() {
        if let (Some(c), Some(w)) = (c, w) {
            groups.entry((c.as_str(), *w)).or_insert((i, 0)).1 += 1;
        }
    }
    for (&(code, wave), &(first, count)) in &groups {
        let row = Some(micro.row_number(first));
        match frame_rows.get(&(code, wave)) {
            None => problems.push(Problem::at(
                &micro.file,
                row,
                Some(&roles.country),
                format!("{count} respondents of {code} in wave {wave}, but the frame has no row for {code} in wave {wave}; add the country-wave to {} or correct the code", frame.file),
            )),
            Some(&j) if !participated[j] => problems.push(Problem::at(
                &micro.file,
                row,
                Some(&roles.country),
                format!(
                    "{count} respondents of {code} in wave {wave}, but {} row {} says {code} did not take part in wave {wave}; set its flag to 1 or remove these respondents",
                    frame.file,
                    frame.row_number(j)
                ),
            )),
            Some(_) => {}
        }
    }
    for (i, key) in frame_keys.iter().enumerate() {
        if participated[i] && !groups.contains_key(&(key.0.as_str(), key.1)) {
            warnings.push(Problem::at(
                &frame.file,
                Some(frame.row_number(i)),
                None,
                format!(
                    "{} took part in wave {} but has no respondents in {}",
                    key.0, key.1, micro.file
                ),
            ));
        }
    }
    for (i, w) in weights.iter().enumerate() {
        let row = Some(micro.row_number(i));
        let column = Some(roles.design_weight.as_str());
        match w {
            None => problems.push_kind("missing design weight", Problem::at(&micro.file, row, column, "the design weight is missing; every respondent needs a positive weight (use 1 when the sample is self-weighting)")),
            Some(x) if *x <= 0.0 => problems.push_kind("non-positive design weight", Problem::at(&micro.file, row, column, format!("the design weight is {x}; design weights must be positive (drop the respondent instead of giving weight 0)"))),
            Some(_) => {}
        }
    }
}
