//! `gapwise weights`: every wave's country weights (or every respondent's) as CSV, with a
//! sidecar JSON file that says how they were made.

use std::path::{Path, PathBuf};

use serde::Serialize;

use super::atomic_file::write_atomically;
use super::universe::load_project;
use crate::analysis::exports::{
    country_weights, respondent_weights, CountryWeight, CountryWeights, WaveWeights,
};
use crate::analysis::Settings;
use crate::csv_out::{cell, csv_text};
use crate::project::{LoadedFile, Project};

/// The sidecar `FILE.json` written beside an export `FILE`: what the rows are, how the
/// weights were made, from which files, and what each column means.
#[derive(Debug, Serialize)]
struct WeightsSidecar<'a> {
    /// The tool and its version (`gapwise 0.x.y`).
    tool: String,
    /// What one row stands for.
    rows: &'static str,
    /// The weighting method's name.
    method: &'static str,
    /// The participation model's name.
    model: &'static str,
    settings: &'a Settings,
    /// Each wave's weighting: counts, effective number, countries left out, warnings.
    waves: &'a [WaveWeights],
    /// The files the project was loaded from, with their checksums.
    inputs: &'a [LoadedFile],
    /// Each CSV column's meaning, by column name, in the file's order.
    #[serde(serialize_with = "columns_as_map")]
    columns: Vec<Column>,
}

/// One CSV column: its header and what it holds.
#[derive(Debug)]
struct Column {
    name: String,
    meaning: String,
}

fn column(name: impl Into<String>, meaning: impl Into<String>) -> Column {
    Column {
        name: name.into(),
        meaning: meaning.into(),
    }
}

/// The columns as one JSON object (`{"wave": "wave", ...}`), in the file's order.
fn columns_as_map<S: serde::Serializer>(columns: &[Column], s: S) -> Result<S::Ok, S::Error> {
    use serde::ser::SerializeMap as _;
    let mut map = s.serialize_map(Some(columns.len()))?;
    for c in columns {
        map.serialize_entry(&c.name, &c.meaning)?;
    }
    map.end()
}

/// An export's text and the meaning of its columns.
struct Table {
    csv: String,
    columns: Vec<Column>,
}

/// `gapwise weights`: every wave's country weights in one CSV, one row per eligible
/// country of every wave (columns `wave, code, name, took_part, propensity, weight,
/// reason`: countries left out of the analysis keep their row with empty propensity and
/// weight and the reason), or with `respondents` one row per respondent (`country, wave,
/// respondent, design_weight, country_weight, combined_weight, reason`); and a sidecar
/// JSON with the method, the settings, the tool version and the input checksums. Both
/// written atomically.
pub fn export_weights(dir: &Path, settings: &Settings, out: &Path, respondents: bool) -> i32 {
    let project = match load_project(dir) {
        Ok(p) => p,
        Err(message) => {
            eprintln!("{message}");
            return 1;
        }
    };
    let countries = country_weights(&project, settings);
    let table = if respondents {
        match respondent_table(&project, &countries) {
            Ok(t) => t,
            Err(message) => {
                eprintln!("{message}");
                return 1;
            }
        }
    } else if crate::analysis::imputed::wanted(settings) {
        imputed_country_table(&countries, settings)
    } else {
        country_table(&countries)
    };
    let sidecar = WeightsSidecar {
        tool: format!("gapwise {}", crate::VERSION),
        rows: if respondents {
            "one per respondent"
        } else {
            "one per eligible country and wave"
        },
        method: settings.weighting.as_str(),
        model: settings.model.as_str(),
        settings,
        waves: &countries.waves,
        inputs: &project.inputs,
        columns: table.columns,
    };
    let sidecar_path = PathBuf::from(format!("{}.json", out.display()));
    let written = write_atomically(out, table.csv.as_bytes()).and_then(|()| {
        write_atomically(
            &sidecar_path,
            serde_json::to_string_pretty(&sidecar)
                .unwrap_or_default()
                .as_bytes(),
        )
    });
    match written {
        Ok(()) => {
            println!("wrote {} and {}", out.display(), sidecar_path.display());
            0
        }
        Err(e) => {
            eprintln!("cannot write {}: {e}", out.display());
            1
        }
    }
}

/// One row per respondent: the design weight, the country's weight and their product
/// scaled within the country.
fn respondent_table(project: &Project, countries: &CountryWeights) -> Result<Table, String> {
    let rows = respondent_weights(project, countries).map_err(|e| e.to_string())?;
    let csv = csv_text(
        &[
            "country",
            "wave",
            "respondent",
            "design_weight",
            "country_weight",
            "combined_weight",
            "reason",
        ],
        rows.into_iter().map(|r| {
            vec![
                r.country.unwrap_or_default(),
                r.wave.map(|w| w.to_string()).unwrap_or_default(),
                r.respondent.unwrap_or_default(),
                cell(r.design_weight),
                cell(r.country_weight),
                cell(r.combined_weight),
                r.reason.unwrap_or_default(),
            ]
        }),
    );
    let respondent = project
        .manifest
        .microdata
        .as_ref()
        .and_then(|m| m.respondent.clone())
        .map_or(
            "empty: project.toml names no [microdata] respondent column".to_string(),
            |c| format!("the microdata's column {c}"),
        );
    let columns = vec![
        column("country", "country code (the microdata's country column)"),
        column("wave", "wave"),
        column("respondent", respondent),
        column("design_weight", "the microdata's design weight"),
        column("country_weight", "the country's weight in its wave (participants' weights sum to the wave's number of countries analysed); empty when the country has none"),
        column("combined_weight", "country_weight x design_weight / the sum of the design weights of the country's respondents in the wave, so each country's respondents sum to its country weight; empty when either is missing"),
        column("reason", "why a weight is empty; empty when there are weights"),
    ];
    Ok(Table { csv, columns })
}

/// The first columns of every per-country export.
const COUNTRY_COLUMNS: [&str; 6] = ["wave", "code", "name", "took_part", "propensity", "weight"];

/// What the columns naming a country and whether it took part hold.
fn identity_columns() -> Vec<Column> {
    vec![
        column("wave", "wave"),
        column("code", "country code"),
        column("name", "country name"),
        column("took_part", "1 took part, 0 did not"),
    ]
}

/// A country's cells under [`COUNTRY_COLUMNS`].
fn country_cells(r: &CountryWeight) -> Vec<String> {
    vec![
        r.wave.to_string(),
        r.code.clone(),
        r.name.clone(),
        u8::from(r.took_part).to_string(),
        cell(r.propensity),
        cell(r.weight),
    ]
}

/// One row per eligible country and wave under multiple imputation: the mean weight, its
/// range and the weight in each completed frame.
fn imputed_country_table(countries: &CountryWeights, settings: &Settings) -> Table {
    let m = settings.imputations;
    let mut header: Vec<String> = COUNTRY_COLUMNS
        .iter()
        .chain(&["weight_min", "weight_max"])
        .map(|s| s.to_string())
        .collect();
    header.extend((1..=m).map(|k| format!("weight_{k}")));
    header.push("reason".to_string());
    let refs: Vec<&str> = header.iter().map(String::as_str).collect();
    let csv = csv_text(
        &refs,
        countries.rows.iter().map(|r| {
            let by = r.weights_by_imputation.as_deref().unwrap_or(&[]);
            let spread = crate::stats::combine::spread(by);
            let mut row = country_cells(r);
            row.extend([cell(spread.map(|s| s.min)), cell(spread.map(|s| s.max))]);
            row.extend((0..m).map(|k| cell(by.get(k).copied())));
            row.push(r.reason.clone().unwrap_or_default());
            row
        }),
    );
    let mut columns = identity_columns();
    columns.extend([
        column("propensity", "estimated probability of taking part, mean over the imputations"),
        column("weight", "mean over the imputations of the country's weight (in each, participants' weights sum to the wave's number of countries); 0 for non-participants"),
        column("weight_min", "smallest weight over the imputations"),
        column("weight_max", "largest weight over the imputations"),
        column("weight_1..", format!("the weight in each of the {m} completed frames (seed {})", settings.seed)),
        column("reason", "why propensity and weight are empty; empty when they are not"),
    ]);
    Table { csv, columns }
}

/// One row per eligible country and wave.
fn country_table(countries: &CountryWeights) -> Table {
    let header: Vec<&str> = COUNTRY_COLUMNS.iter().chain(&["reason"]).copied().collect();
    let csv = csv_text(
        &header,
        countries.rows.iter().map(|r| {
            let mut row = country_cells(r);
            row.push(r.reason.clone().unwrap_or_default());
            row
        }),
    );
    let mut columns = identity_columns();
    columns.extend([
        column("propensity", "estimated probability of taking part; empty when left out"),
        column("weight", "participants' weights sum to the wave's number of countries analysed; 0 for non-participants; empty when left out"),
        column("reason", "why propensity and weight are empty (e.g. a missing indicator value); empty when they are not"),
    ]);
    Table { csv, columns }
}
