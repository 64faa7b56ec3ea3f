//! `project.toml`: which columns mean what, which indicators to use, and who is eligible.

use std::collections::BTreeMap;

use serde::{Deserialize, Serialize};

use super::problem::Problem;

/// The manifest's file name inside a project folder.
pub const MANIFEST_FILE: &str = "project.toml";

/// A project's manifest. See the README's "Project folder" section for every field.
#[derive(Debug, Clone, Deserialize, Serialize)]
#[serde(deny_unknown_fields)]
pub struct Manifest {
    pub title: String,
    #[serde(default)]
    pub description: Option<String>,
    pub columns: ColumnRoles,
    #[serde(default)]
    pub indicators: Indicators,
    #[serde(default)]
    pub eligibility: Vec<EligibilityRule>,
    #[serde(default)]
    pub recruitment: Recruitment,
    #[serde(default)]
    pub microdata: Option<MicrodataRoles>,
    /// The frame column with each country's population, for counting countries by people.
    #[serde(default)]
    pub population: Option<Population>,
}

/// Where a country's population is, and on what scale the column holds it.
#[derive(Debug, Clone, Deserialize, Serialize)]
#[serde(deny_unknown_fields)]
pub struct Population {
    /// A numeric frame column (it may also be an indicator).
    pub column: String,
    /// `count` (people, the default), `log` (natural log of people) or `log10`.
    #[serde(default)]
    pub scale: PopulationScale,
}

#[derive(Debug, Clone, Copy, Default, PartialEq, Eq, Deserialize, Serialize)]
#[serde(rename_all = "kebab-case")]
pub enum PopulationScale {
    #[default]
    Count,
    Log,
    Log10,
}

impl PopulationScale {
    /// The number of people from a value of the column.
    pub fn people(self, value: f64) -> f64 {
        match self {
            PopulationScale::Count => value,
            PopulationScale::Log => value.exp(),
            PopulationScale::Log10 => 10f64.powf(value),
        }
    }
}

/// Which frame columns carry the country code, name, wave and participation flag.
#[derive(Debug, Clone, Deserialize, Serialize)]
#[serde(deny_unknown_fields)]
pub struct ColumnRoles {
    pub code: String,
    #[serde(default)]
    pub name: Option<String>,
    pub wave: String,
    pub participation: String,
    /// The categorical indicator used to break coverage down (usually a region);
    /// defaults to the first categorical indicator.
    #[serde(default)]
    pub group: Option<String>,
}

/// The country indicators: numeric ones and categories.
#[derive(Debug, Clone, Default, Deserialize, Serialize)]
#[serde(deny_unknown_fields)]
pub struct Indicators {
    #[serde(default)]
    pub numeric: Vec<String>,
    #[serde(default)]
    pub categorical: Vec<String>,
    /// Reference level per categorical indicator (the level left out of the dummies);
    /// defaults to the first level in sorted order.
    #[serde(default)]
    pub reference: BTreeMap<String, String>,
    /// Readable labels, with units, used on pages and charts.
    #[serde(default)]
    pub labels: BTreeMap<String, String>,
}

/// A rule that every eligible country must meet in the waves it applies to.
#[derive(Debug, Clone, Deserialize, Serialize)]
#[serde(deny_unknown_fields)]
pub struct EligibilityRule {
    pub indicator: String,
    #[serde(default)]
    pub at_least: Option<Threshold>,
    #[serde(default)]
    pub at_most: Option<Threshold>,
    /// The waves the rule applies to; all waves when absent.
    #[serde(default)]
    pub waves: Option<Vec<i64>>,
}

/// A cut-off: a fixed number, or one taken from the wave's participants.
#[derive(Debug, Clone, PartialEq, Deserialize, Serialize)]
#[serde(untagged)]
pub enum Threshold {
    Value(f64),
    /// `"lowest-participant"` or `"highest-participant"`: the lowest (highest) value of
    /// the indicator among the wave's participants.
    FromParticipants(ParticipantCut),
}

#[derive(Debug, Clone, Copy, PartialEq, Eq, Deserialize, Serialize)]
#[serde(rename_all = "kebab-case")]
pub enum ParticipantCut {
    LowestParticipant,
    HighestParticipant,
}

/// Optional frame columns used when planning recruitment.
#[derive(Debug, Clone, Default, Deserialize, Serialize)]
#[serde(deny_unknown_fields)]
pub struct Recruitment {
    /// Cost of recruiting a country, in any unit (larger is costlier).
    #[serde(default)]
    pub cost: Option<String>,
    /// A probability or 0/1 judgement that the country could take part.
    #[serde(default)]
    pub feasibility: Option<String>,
    /// What it costs to support a country's team or fieldwork (on top of `cost`).
    #[serde(default)]
    pub support_cost: Option<String>,
    /// The country's chance of joining when supported (a probability).
    #[serde(default)]
    pub support_chance: Option<String>,
}

/// Which microdata columns carry the country code, wave and design weight.
#[derive(Debug, Clone, Deserialize, Serialize)]
#[serde(deny_unknown_fields)]
pub struct MicrodataRoles {
    pub country: String,
    pub wave: String,
    pub design_weight: String,
    /// Numeric survey variables to load; every other column when empty.
    #[serde(default)]
    pub variables: Vec<String>,
    /// The outcome shown first on the impact page and in the report (default: the first
    /// of `variables`).
    #[serde(default)]
    pub outcome: Option<String>,
    /// A column identifying each respondent, carried into respondent-level exports
    /// (`gapwise weights --respondents`) so they can be merged back.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub respondent: Option<String>,
}

/// The `[projection]` section: files used by the multilevel projection (kept apart from
/// [`Manifest`] so that manifests built in code need not name it).
#[derive(Debug, Clone, Default, Deserialize, Serialize, PartialEq, Eq)]
#[serde(deny_unknown_fields)]
pub struct ProjectionFiles {
    /// A CSV of respondent composition cells per country and wave (see the README).
    #[serde(default)]
    pub composition: Option<String>,
}

/// The manifest as written, with the sections [`Manifest`] does not hold.
#[derive(Deserialize)]
#[serde(deny_unknown_fields)]
struct Written {
    title: String,
    #[serde(default)]
    description: Option<String>,
    columns: ColumnRoles,
    #[serde(default)]
    indicators: Indicators,
    #[serde(default)]
    eligibility: Vec<EligibilityRule>,
    #[serde(default)]
    recruitment: Recruitment,
    #[serde(default)]
    microdata: Option<MicrodataRoles>,
    #[serde(default)]
    population: Option<Population>,
    #[serde(default)]
    projection: ProjectionFiles,
}

impl Manifest {
    /// Parses manifest text; syntax and type errors name the line and column.
    pub fn parse(text: &str) -> Result<Manifest, Vec<Problem>> {
        Self::parse_with_projection(text).map(|(m, _)| m)
    }

    /// Parses manifest text with its `[projection]` section.
    pub fn parse_with_projection(text: &str) -> Result<(Manifest, ProjectionFiles), Vec<Problem>> {
        let written: Written = toml::from_str(text).map_err(|e| {
            let (row, column) = e
                .span()
                .map(|span| line_and_column(text, span.start))
                .map_or((None, None), |(l, c)| (Some(l), Some(c)));
            let message = e.message().trim().to_string();
            vec![Problem::at(
                MANIFEST_FILE,
                row,
                column.map(|c| format!("char {c}")).as_deref(),
                format!("{message}; see the README's table of project.toml fields"),
            )]
        })?;
        let projection = written.projection;
        let manifest = Manifest {
            title: written.title,
            description: written.description,
            columns: written.columns,
            indicators: written.indicators,
            eligibility: written.eligibility,
            recruitment: written.recruitment,
            microdata: written.microdata,
            population: written.population,
        };
        let problems = manifest.check_consistency();
        if problems.is_empty() {
            Ok((manifest, projection))
        } else {
            Err(problems)
        }
    }

    /// Checks that do not need the data: every rule has a cut-off, no column plays two roles.
    fn check_consistency(&self) -> Vec<Problem> {
        let mut problems = Vec::new();
        for (i, rule) in self.eligibility.iter().enumerate() {
            if rule.at_least.is_none() && rule.at_most.is_none() {
                problems.push(Problem::at(
                    MANIFEST_FILE,
                    None,
                    Some(&format!("eligibility[{}]", i + 1)),
                    format!(
                        "the rule on '{}' has neither at_least nor at_most; give one of them a number or \"lowest-participant\"/\"highest-participant\"",
                        rule.indicator
                    ),
                ));
            }
        }
        let mut seen: BTreeMap<&str, &str> = BTreeMap::new();
        let name = self
            .columns
            .name
            .iter()
            .filter(|n| **n != self.columns.code)
            .map(|n| (n.as_str(), "columns.name"));
        let roles = [
            (self.columns.code.as_str(), "columns.code"),
            (self.columns.wave.as_str(), "columns.wave"),
            (self.columns.participation.as_str(), "columns.participation"),
        ];
        let indicators = self
            .indicators
            .numeric
            .iter()
            .map(|c| (c.as_str(), "indicators.numeric"))
            .chain(
                self.indicators
                    .categorical
                    .iter()
                    .map(|c| (c.as_str(), "indicators.categorical")),
            );
        for (column, role) in roles.into_iter().chain(name).chain(indicators) {
            if let Some(previous) = seen.insert(column, role) {
                problems.push(Problem::at(
                    MANIFEST_FILE,
                    None,
                    Some(role),
                    format!("column '{column}' is listed both in {previous} and in {role}; list it once"),
                ));
            }
        }
        if let Some(m) = &self.microdata {
            if let Some(o) = &m.outcome {
                if !m.variables.is_empty() && !m.variables.contains(o) {
                    problems.push(Problem::at(
                        MANIFEST_FILE,
                        None,
                        Some("microdata.outcome"),
                        format!("the outcome '{o}' must also be listed in microdata.variables"),
                    ));
                }
            }
        }
        if let Some(group) = &self.columns.group {
            if !self.indicators.categorical.contains(group) {
                problems.push(Problem::at(
                    MANIFEST_FILE,
                    None,
                    Some("columns.group"),
                    format!("'{group}' must also be listed in indicators.categorical"),
                ));
            }
        }
        problems
    }

    /// The outcome the impact page and the report start from: the declared one, else the
    /// first survey variable.
    pub fn default_outcome(&self) -> Option<&str> {
        let m = self.microdata.as_ref()?;
        m.outcome
            .as_deref()
            .or(m.variables.first().map(String::as_str))
    }

    /// The scale of a column used as population: the declared scale for the declared
    /// column; any other column is taken as a count of people.
    pub fn population_scale(&self, column: &str) -> PopulationScale {
        self.population
            .as_ref()
            .filter(|p| p.column == column)
            .map_or(PopulationScale::Count, |p| p.scale)
    }

    /// The categorical indicator that coverage is broken down by, if any.
    pub fn group_column(&self) -> Option<&str> {
        self.columns
            .group
            .as_deref()
            .or(self.indicators.categorical.first().map(String::as_str))
    }

    /// The readable label of a column: the manifest's `[indicators.labels]` entry, else one
    /// derived from the column name by [`readable_label`], so that a raw column name never
    /// reaches a page.
    pub fn label<'a>(&'a self, column: &'a str) -> std::borrow::Cow<'a, str> {
        match self.indicators.labels.get(column) {
            Some(l) if !l.trim().is_empty() => std::borrow::Cow::Borrowed(l.as_str()),
            _ => std::borrow::Cow::Owned(readable_label(column)),
        }
    }
}

/// Abbreviations written in capitals when a label is derived from a column name.
const ACRONYMS: [&str; 14] = [
    "gdp", "gni", "hdi", "ppp", "usd", "eu", "un", "oecd", "co2", "ict", "id", "iso", "ses",
    "isced",
];

/// A readable label derived from a column name, for columns the manifest gives no label:
/// underscores, hyphens and dots become spaces; a leading `log`, `ln` or `log10` word
/// becomes a suffix " (log)" / " (log10)"; common abbreviations (GDP, GNI, HDI, PPP, ...)
/// are written in capitals; the first letter is capitalised; everything else is kept as
/// written. `log_gdp_pc` → "GDP pc (log)", `years_since_transition` → "Years since
/// transition", `female` → "Female". A name that is only separators stays as it is.
pub fn readable_label(column: &str) -> String {
    let mut words: Vec<&str> = column
        .split(['_', '-', '.', ' '])
        .filter(|w| !w.is_empty())
        .collect();
    if words.is_empty() {
        return column.to_string();
    }
    let mut suffix = "";
    if words.len() > 1 {
        match words[0].to_ascii_lowercase().as_str() {
            "log" | "ln" => suffix = " (log)",
            "log10" => suffix = " (log10)",
            _ => {}
        }
        if !suffix.is_empty() {
            words.remove(0);
        }
    }
    let words: Vec<String> = words
        .iter()
        .map(|w| {
            if ACRONYMS.contains(&w.to_ascii_lowercase().as_str()) {
                w.to_ascii_uppercase()
            } else {
                (*w).to_string()
            }
        })
        .collect();
    let mut text = words.join(" ");
    if let Some(first) = text.chars().next() {
        if first.is_lowercase() {
            text = first.to_uppercase().chain(text.chars().skip(1)).collect();
        }
    }
    text + suffix
}

impl EligibilityRule {
    pub fn applies_to(&self, wave: i64) -> bool {
        self.waves.as_ref().is_none_or(|w| w.contains(&wave))
    }
}

/// 1-based line and character of a byte offset.
pub(crate) fn line_and_column(text: &str, offset: usize) -> (usize, usize) {
    let before = &text.as_bytes()[..offset.min(text.len())];
    let line = before.iter().filter(|&&b| b == b'\n').count() + 1;
    let line_start = before
        .iter()
        .rposition(|&b| b == b'\n')
        .map_or(0, |p| p + 1);
    let column = String::from_utf8_lossy(&before[line_start..])
        .chars()
        .count()
        + 1;
    (line, column)
}

#[cfg(test)]
mod tests {
    use super::*;

    const MINIMAL: &str = r#"
title = "t"
[columns]
code = "iso"
wave = "wave"
participation = "took_part"
[indicators]
numeric = ["gdp"]
categorical = ["region"]
[[eligibility]]
indicator = "gdp"
at_least = "lowest-participant"
[[eligibility]]
indicator = "gdp"
at_most = 12.5
waves = [2]
"#;

    /// Declared conventions replace guesses from column names (common practice).
    #[test]
    fn population_and_outcome_are_declared_not_guessed() {
        let m = Manifest::parse(MINIMAL).expect("valid manifest");
        assert_eq!(m.default_outcome(), None);
        assert_eq!(m.population_scale("log_pop"), PopulationScale::Count);
        let text = format!(
            "{MINIMAL}[microdata]\ncountry = \"c\"\nwave = \"w\"\ndesign_weight = \"dw\"\nvariables = [\"a\", \"b\"]\n[population]\ncolumn = \"gdp\"\nscale = \"log10\"\n"
        );
        let m = Manifest::parse(&text).expect("valid manifest");
        assert_eq!(m.default_outcome(), Some("a"));
        assert_eq!(m.population_scale("gdp"), PopulationScale::Log10);
        assert!((m.population_scale("gdp").people(3.0) - 1000.0).abs() < 1e-9);
        assert_eq!(m.population_scale("other"), PopulationScale::Count);
        let wrong = text.replace(
            "variables = [\"a\", \"b\"]",
            "variables = [\"a\"]\noutcome = \"z\"",
        );
        assert!(Manifest::parse(&wrong).is_err());
    }

    #[test]
    fn parses_both_kinds_of_threshold() {
        let m = Manifest::parse(MINIMAL).expect("valid manifest");
        assert_eq!(
            m.eligibility[0].at_least,
            Some(Threshold::FromParticipants(
                ParticipantCut::LowestParticipant
            ))
        );
        assert_eq!(m.eligibility[1].at_most, Some(Threshold::Value(12.5)));
        assert!(!m.eligibility[1].applies_to(1));
        assert_eq!(m.group_column(), Some("region"));
    }

    #[test]
    fn unknown_field_names_line() {
        let text = MINIMAL.replace("participation =", "participate =");
        let problems = Manifest::parse(&text).unwrap_err();
        assert_eq!(problems[0].row, Some(6));
        assert!(problems[0].to_string().starts_with("project.toml:6:"));
    }

    /// Labels derived from column names (our own rule, documented on `readable_label`).
    #[test]
    fn labels_are_derived_when_none_is_given() {
        assert_eq!(readable_label("log_gdp_pc"), "GDP pc (log)");
        assert_eq!(
            readable_label("years_since_transition"),
            "Years since transition"
        );
        assert_eq!(readable_label("log_population"), "Population (log)");
        assert_eq!(readable_label("log10_pop"), "Pop (log10)");
        assert_eq!(readable_label("female"), "Female");
        assert_eq!(readable_label("log"), "Log");
        assert_eq!(readable_label("___"), "___");
        assert_eq!(readable_label("élite_share"), "Élite share");
        let mut m = Manifest::parse(MINIMAL).expect("valid manifest");
        assert_eq!(m.label("gdp"), "GDP");
        m.indicators
            .labels
            .insert("gdp".into(), "GDP per head (USD)".into());
        assert_eq!(m.label("gdp"), "GDP per head (USD)");
        m.indicators.labels.insert("gdp".into(), " ".into());
        assert_eq!(m.label("gdp"), "GDP");
    }

    #[test]
    fn name_column_listed_as_an_indicator_is_reported() {
        let text = MINIMAL.replace(
            "participation = \"took_part\"",
            "participation = \"took_part\"\nname = \"gdp\"",
        );
        let problems = Manifest::parse(&text).unwrap_err();
        assert!(
            problems[0]
                .message
                .contains("'gdp' is listed both in columns.name"),
            "{problems:?}"
        );
    }

    #[test]
    fn column_in_two_roles_is_reported() {
        let text = MINIMAL.replace("numeric = [\"gdp\"]", "numeric = [\"gdp\", \"wave\"]");
        let problems = Manifest::parse(&text).unwrap_err();
        assert!(
            problems[0].message.contains("'wave' is listed both"),
            "{problems:?}"
        );
    }
}
