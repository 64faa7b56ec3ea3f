//! `composition.csv` (optional, declared as `[projection] composition = "..."`): the
//! respondent composition of countries, for projecting those without respondents. One row
//! per cell: the country code and wave (the microdata's column names), the cell's values
//! of respondent-level survey variables (e.g. age group x sex x education, coded as the
//! microdata code them), and `share`, the cell's share of the country's population (shares
//! of a country-wave need not sum to 1; they are normalised).

use std::collections::HashSet;
use std::path::Path;

use super::manifest::MicrodataRoles;
use super::problem::{Problem, ProblemList};

/// The share column's name.
pub const SHARE_COLUMN: &str = "share";

/// One cell of a country-wave's composition.
#[derive(Debug, Clone, PartialEq)]
pub struct CompositionCell {
    pub code: String,
    pub wave: i64,
    /// Values of [`Composition::variables`], in order.
    pub values: Vec<f64>,
    pub share: f64,
}

/// A loaded, checked composition file.
#[derive(Debug, Clone, PartialEq)]
pub struct Composition {
    /// The file's name (as given in project.toml).
    pub file: String,
    /// Survey variables the cells give values of.
    pub variables: Vec<String>,
    pub cells: Vec<CompositionCell>,
}

impl Composition {
    /// The cells of one country and wave (empty when the file has none).
    pub fn of<'a>(&'a self, code: &'a str, wave: i64) -> impl Iterator<Item = &'a CompositionCell> {
        self.cells
            .iter()
            .filter(move |c| c.wave == wave && c.code == code)
    }
}

/// Reads and checks the composition file `name` in `dir`. `codes` are the frame's country
/// codes. Every problem has the file, line and column.
pub fn load(
    dir: &Path,
    name: &str,
    roles: Option<&MicrodataRoles>,
    codes: &HashSet<String>,
) -> Result<(Composition, Vec<u8>), Vec<Problem>> {
    let Some(roles) = roles else {
        return Err(vec![Problem::at(
            super::MANIFEST_FILE,
            None,
            Some("projection.composition"),
            "a composition file needs a [microdata] section (its cells are values of survey variables); add one or remove the composition",
        )]);
    };
    let path = dir.join(name);
    if !path.exists() {
        return Err(vec![Problem::file(
            name,
            format!("project.toml names the composition file '{name}' but there is no such file in the project folder; add it or remove [projection] composition"),
        )]);
    }
    let bytes = super::table::read_stable(&path, name).map_err(|p| vec![p])?;
    let composition = parse(name, &bytes, roles, codes)?;
    Ok((composition, bytes))
}

/// Parses composition CSV bytes (see [`load`]).
pub fn parse(
    name: &str,
    bytes: &[u8],
    roles: &MicrodataRoles,
    codes: &HashSet<String>,
) -> Result<Composition, Vec<Problem>> {
    let mut problems = ProblemList::new();
    let mut reader = csv::ReaderBuilder::new()
        .has_headers(true)
        .from_reader(bytes);
    let header: Vec<String> = match reader.headers() {
        Ok(h) => h.iter().map(|s| s.trim().to_string()).collect(),
        Err(e) => {
            return Err(vec![Problem::at(
                name,
                Some(1),
                None,
                format!("cannot read the header: {e}; save the file as UTF-8 CSV"),
            )])
        }
    };
    let position = |col: &str| header.iter().position(|h| h == col);
    let mut missing = Vec::new();
    for (col, role) in [
        (roles.country.as_str(), "the country code"),
        (roles.wave.as_str(), "the wave"),
        (SHARE_COLUMN, "the cell's population share"),
    ] {
        if position(col).is_none() {
            missing.push(Problem::at(
                name,
                Some(1),
                Some(col),
                format!(
                    "no column '{col}' ({role}); the header needs {}, {} and {SHARE_COLUMN}",
                    roles.country, roles.wave
                ),
            ));
        }
    }
    if !missing.is_empty() {
        return Err(missing);
    }
    let (code_at, wave_at, share_at) = (
        position(&roles.country).unwrap_or(0),
        position(&roles.wave).unwrap_or(0),
        position(SHARE_COLUMN).unwrap_or(0),
    );
    let mut variables = Vec::new();
    let mut variable_at = Vec::new();
    for (k, h) in header.iter().enumerate() {
        if k == code_at || k == wave_at || k == share_at {
            continue;
        }
        if !roles.variables.is_empty() && !roles.variables.contains(h) {
            problems.push(Problem::at(
                name,
                Some(1),
                Some(h),
                format!(
                    "'{h}' is not a survey variable of [microdata] ({}); rename or remove the column",
                    roles.variables.join(", ")
                ),
            ));
            continue;
        }
        variables.push(h.clone());
        variable_at.push(k);
    }
    let mut cells = Vec::new();
    for (r, record) in reader.records().enumerate() {
        let line = r + 2;
        let record = match record {
            Ok(rec) => rec,
            Err(e) => {
                problems.push_kind("cell", Problem::at(name, Some(line), None, format!("{e}")));
                continue;
            }
        };
        let cell = |k: usize| record.get(k).unwrap_or("").trim();
        let code = cell(code_at).to_string();
        if !codes.contains(&code) {
            problems.push_kind("cell", Problem::at(
                name,
                Some(line),
                Some(&roles.country),
                format!("'{code}' is not a country code of the frame; fix the code or remove the row"),
            ));
        }
        let wave = match cell(wave_at).parse::<i64>() {
            Ok(w) => w,
            Err(_) => {
                problems.push_kind(
                    "cell",
                    Problem::at(
                        name,
                        Some(line),
                        Some(&roles.wave),
                        format!("'{}' is not a whole-number wave", cell(wave_at)),
                    ),
                );
                continue;
            }
        };
        let share = match cell(share_at).parse::<f64>() {
            Ok(s) if s.is_finite() && s >= 0.0 => s,
            _ => {
                problems.push_kind(
                    "cell",
                    Problem::at(
                        name,
                        Some(line),
                        Some(SHARE_COLUMN),
                        format!("'{}' is not a share (a number at least 0)", cell(share_at)),
                    ),
                );
                continue;
            }
        };
        let mut values = Vec::with_capacity(variable_at.len());
        for (&k, v) in variable_at.iter().zip(&variables) {
            match cell(k).parse::<f64>() {
                Ok(x) if x.is_finite() => values.push(x),
                _ => problems.push_kind(
                    "cell",
                    Problem::at(
                        name,
                        Some(line),
                        Some(v),
                        format!(
                            "'{}' is not a number; give the cell's value of {v}",
                            cell(k)
                        ),
                    ),
                ),
            }
        }
        if values.len() == variables.len() {
            cells.push(CompositionCell {
                code,
                wave,
                values,
                share,
            });
        }
    }
    // Every country-wave needs some population.
    let mut seen: Vec<(&str, i64)> = Vec::new();
    for c in &cells {
        if !seen.contains(&(c.code.as_str(), c.wave)) {
            seen.push((c.code.as_str(), c.wave));
        }
    }
    for (code, wave) in seen {
        let total: f64 = cells
            .iter()
            .filter(|c| c.code == code && c.wave == wave)
            .map(|c| c.share)
            .sum();
        if total <= 0.0 {
            problems.push(Problem::at(
                name,
                None,
                Some(SHARE_COLUMN),
                format!("the shares of {code} in wave {wave} are all 0; give its cells their population shares"),
            ));
        }
    }
    if problems.is_empty() {
        Ok(Composition {
            file: name.to_string(),
            variables,
            cells,
        })
    } else {
        Err(problems.into_vec())
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn roles() -> MicrodataRoles {
        MicrodataRoles {
            country: "iso".into(),
            wave: "wave".into(),
            design_weight: "w".into(),
            variables: vec!["age".into(), "female".into(), "y".into()],
            outcome: None,
            respondent: None,
        }
    }

    #[test]
    fn reads_cells_and_names_bad_ones() {
        // Common practice: every bad cell gets its line and column.
        let codes: HashSet<String> = ["XAA", "XAB"].iter().map(|s| s.to_string()).collect();
        let good = "iso,wave,age,female,share\nXAA,1,30,0,0.4\nXAA,1,30,1,0.6\n";
        let c = parse("composition.csv", good.as_bytes(), &roles(), &codes).unwrap();
        assert_eq!(c.variables, vec!["age", "female"]);
        assert_eq!(c.of("XAA", 1).count(), 2);
        assert_eq!(c.of("XAB", 1).count(), 0);
        let bad = "iso,wave,age,colour,share\nXZZ,1,30,0,0.4\nXAA,x,30,1,0.6\nXAB,1,old,1,-1\n";
        let e = parse("composition.csv", bad.as_bytes(), &roles(), &codes).unwrap_err();
        let text: Vec<String> = e.iter().map(|p| p.to_string()).collect();
        assert!(
            text.iter()
                .any(|t| t.starts_with("composition.csv:1:colour")),
            "{text:?}"
        );
        assert!(
            text.iter().any(|t| t.starts_with("composition.csv:2:iso")),
            "{text:?}"
        );
        assert!(
            text.iter().any(|t| t.starts_with("composition.csv:3:wave")),
            "{text:?}"
        );
        assert!(
            text.iter()
                .any(|t| t.starts_with("composition.csv:4:share")),
            "{text:?}"
        );
        let no_share = "iso,wave,age\nXAA,1,30\n";
        let e = parse("composition.csv", no_share.as_bytes(), &roles(), &codes).unwrap_err();
        assert_eq!(e.len(), 1);
        assert!(e[0].to_string().contains("share"));
    }
}
