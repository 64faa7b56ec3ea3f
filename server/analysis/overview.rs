//! The overview: per wave, who is eligible and who took part; coverage by group.

use serde::Serialize;

use super::cautions::{Caution, STANDING};
use crate::project::{Problem, Project};

#[derive(Debug, Clone, Serialize)]
pub struct Overview {
    pub title: String,
    pub description: Option<String>,
    pub n_countries: usize,
    pub waves: Vec<WaveCounts>,
    /// The label of the grouping indicator (e.g. "Region"), if any.
    pub group_label: Option<String>,
    pub coverage: Vec<GroupCoverage>,
    pub countries: Vec<CountryWaves>,
    pub missing: Vec<MissingValues>,
    pub cuts: Vec<String>,
    pub microdata: Option<MicrodataCounts>,
    /// Imbalance and effective number per wave, and who joined or left.
    pub trends: Vec<WaveTrend>,
    pub warnings: Vec<String>,
    pub cautions: Vec<Caution>,
    /// The files loaded: name, size, data rows, SHA-256 of the bytes validated.
    pub loaded: Vec<crate::project::LoadedFile>,
    /// What changed since the previous load (empty when the project was loaded once).
    pub changes: Vec<String>,
}

#[derive(Debug, Clone, Serialize)]
pub struct WaveCounts {
    pub wave: i64,
    pub rows: usize,
    pub eligible: usize,
    pub participating: usize,
    /// Participants that fail an eligibility rule (kept in the universe).
    pub participating_failing_rules: usize,
    /// participating / eligible.
    pub coverage: f64,
}

#[derive(Debug, Clone, Serialize)]
pub struct GroupCoverage {
    pub group: String,
    /// Aligned with `Overview::waves`.
    pub eligible: Vec<usize>,
    pub participating: Vec<usize>,
    /// `None` where the group has no eligible country that wave.
    pub coverage: Vec<Option<f64>>,
}

/// A country's status in one wave.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize)]
#[serde(rename_all = "kebab-case")]
pub enum WaveStatus {
    TookPart,
    EligibleAbsent,
    NotEligible,
    NotInFrame,
}

#[derive(Debug, Clone, Serialize)]
pub struct CountryWaves {
    pub code: String,
    pub name: String,
    pub group: Option<String>,
    /// Aligned with `Overview::waves`.
    pub status: Vec<WaveStatus>,
    pub waves_taken_part: usize,
}

#[derive(Debug, Clone, Serialize)]
pub struct MissingValues {
    pub indicator: String,
    pub label: String,
    /// Missing among eligible countries, aligned with `Overview::waves`.
    pub eligible_missing: Vec<usize>,
    /// Missing among all frame rows.
    pub total_missing: usize,
}

#[derive(Debug, Clone, Serialize)]
pub struct WaveTrend {
    pub wave: i64,
    /// Largest |SMD| of participants before weighting, over every indicator.
    pub max_abs_smd: Option<f64>,
    /// Effective number of countries after entropy balancing to the wave's universe.
    pub effective_n: Option<f64>,
    /// Why a figure is missing (e.g. balance not reachable).
    pub note: Option<String>,
    /// Took part this wave but not the previous one.
    pub joined: Vec<String>,
    /// Took part the previous wave but not this one.
    pub left: Vec<String>,
    /// Set when leaving out incomplete countries (default settings) dropped participants
    /// or non-participants of the wave.
    pub incomplete: Option<super::participation::IncompleteCountries>,
}

#[derive(Debug, Clone, Serialize)]
pub struct MicrodataCounts {
    pub respondents: usize,
    pub variables: Vec<String>,
}

/// Builds the overview of a loaded project.
pub fn overview(project: &Project) -> Overview {
    let m = &project.manifest;
    let codes = project.codes();
    let names = project.names();
    let row_waves = project.row_waves();
    let participated = project.participated();
    let eligible = &project.eligibility.eligible;
    let group_values = m.group_column().map(|g| project.frame.texts(g));
    let group_levels = group_values
        .as_ref()
        .map(|v| {
            crate::project::wave::levels(
                v,
                m.group_column()
                    .and_then(|g| m.indicators.reference.get(g))
                    .map(String::as_str),
            )
        })
        .unwrap_or_default();
    let wave_index = |w: i64| project.waves.iter().position(|&x| x == w).unwrap_or(0);
    let n_waves = project.waves.len();

    let mut waves: Vec<WaveCounts> = project
        .waves
        .iter()
        .map(|&wave| WaveCounts {
            wave,
            rows: 0,
            eligible: 0,
            participating: 0,
            participating_failing_rules: 0,
            coverage: 0.0,
        })
        .collect();
    let mut coverage: Vec<GroupCoverage> = group_levels
        .iter()
        .map(|g| GroupCoverage {
            group: g.clone(),
            eligible: vec![0; n_waves],
            participating: vec![0; n_waves],
            coverage: vec![None; n_waves],
        })
        .collect();
    let mut by_country: std::collections::BTreeMap<String, CountryWaves> = Default::default();
    for i in 0..codes.len() {
        let w = wave_index(row_waves[i]);
        let counts = &mut waves[w];
        counts.rows += 1;
        let group = group_values.as_ref().and_then(|v| v[i].clone());
        if eligible[i] {
            counts.eligible += 1;
            if let Some(g) = group
                .as_ref()
                .and_then(|g| group_levels.iter().position(|l| l == g))
            {
                coverage[g].eligible[w] += 1;
                coverage[g].participating[w] += usize::from(participated[i]);
            }
        }
        if participated[i] {
            counts.participating += 1;
            if project.eligibility.status[i] != crate::project::RowStatus::Eligible {
                counts.participating_failing_rules += 1;
            }
        }
        let entry = by_country
            .entry(codes[i].clone())
            .or_insert_with(|| CountryWaves {
                code: codes[i].clone(),
                name: names[i].clone(),
                group: group.clone(),
                status: vec![WaveStatus::NotInFrame; n_waves],
                waves_taken_part: 0,
            });
        entry.status[w] = match (participated[i], eligible[i]) {
            (true, _) => WaveStatus::TookPart,
            (false, true) => WaveStatus::EligibleAbsent,
            (false, false) => WaveStatus::NotEligible,
        };
        entry.waves_taken_part += usize::from(participated[i]);
    }
    for counts in &mut waves {
        counts.coverage = ratio(counts.participating, counts.eligible).unwrap_or(0.0);
    }
    for g in &mut coverage {
        g.coverage = g
            .eligible
            .iter()
            .zip(&g.participating)
            .map(|(&e, &p)| ratio(p, e))
            .collect();
    }
    let n_countries = by_country.len();
    let countries: Vec<CountryWaves> = by_country
        .into_values()
        .filter(|c| {
            c.status
                .iter()
                .any(|s| matches!(s, WaveStatus::TookPart | WaveStatus::EligibleAbsent))
        })
        .collect();

    let missing = m
        .indicators
        .numeric
        .iter()
        .map(|c| {
            (
                c,
                project
                    .frame
                    .numbers(c)
                    .iter()
                    .map(Option::is_none)
                    .collect::<Vec<_>>(),
            )
        })
        .chain(m.indicators.categorical.iter().map(|c| {
            (
                c,
                project.frame.texts(c).iter().map(Option::is_none).collect(),
            )
        }))
        .map(|(c, is_missing)| {
            let mut eligible_missing = vec![0; n_waves];
            for (i, &miss) in is_missing.iter().enumerate() {
                if miss && eligible[i] {
                    eligible_missing[wave_index(row_waves[i])] += 1;
                }
            }
            MissingValues {
                indicator: c.clone(),
                label: m.label(c).to_string(),
                eligible_missing,
                total_missing: is_missing.iter().filter(|&&x| x).count(),
            }
        })
        .collect();

    let cuts = project
        .eligibility
        .cuts
        .iter()
        .map(|c| {
            let value = c.value.map_or_else(
                || "undefined (no participant has a value)".to_string(),
                |v| format!("{v}"),
            );
            let source = if c.from_participants {
                " (the lowest or highest participant's value)"
            } else {
                ""
            };
            format!(
                "Wave {}: {} {} {value}{source}",
                c.wave,
                m.label(&c.indicator),
                c.direction
            )
        })
        .collect();

    let trends = trends(project, &countries);
    Overview {
        trends,
        title: m.title.clone(),
        description: m.description.clone(),
        n_countries,
        waves,
        group_label: m.group_column().map(|g| m.label(g).to_string()),
        coverage,
        countries,
        missing,
        cuts,
        microdata: project.microdata.as_ref().map(|t| MicrodataCounts {
            respondents: t.height(),
            variables: m
                .microdata
                .as_ref()
                .map(|r| r.variables.clone())
                .unwrap_or_default(),
        }),
        warnings: project.warnings.iter().map(Problem::to_string).collect(),
        cautions: STANDING.to_vec(),
        loaded: project.inputs.clone(),
        changes: project.changes.clone(),
    }
}

fn ratio(numerator: usize, denominator: usize) -> Option<f64> {
    (denominator > 0).then(|| numerator as f64 / denominator as f64)
}

/// Per wave: imbalance before weighting and the effective number after entropy balancing
/// (default settings: every indicator), and the countries that joined or left.
fn trends(project: &Project, countries: &[CountryWaves]) -> Vec<WaveTrend> {
    use super::settings::{Settings, WeightingKind};
    project
        .waves
        .iter()
        .enumerate()
        .map(|(w, &wave)| {
            let settings = Settings {
                wave: Some(wave),
                weighting: WeightingKind::Entropy,
                ..Settings::default()
            };
            let (mut max_abs_smd, mut effective_n, mut note) = (None, None, None);
            let mut incomplete = None;
            if let Some(view) = project.wave(wave) {
                match super::design::build(&view, &settings) {
                    Ok(design) => {
                        incomplete = super::participation::incomplete_countries(&design);
                        let unweighted: Vec<f64> = design
                            .participated
                            .iter()
                            .map(|&t| f64::from(u8::from(t)))
                            .collect();
                        let rows = super::participation::balance_table(&design, &unweighted);
                        max_abs_smd = rows
                            .iter()
                            .filter_map(|r| r.smd_before)
                            .map(f64::abs)
                            .reduce(f64::max);
                        match super::participation::fit_model(&design, settings.model, false)
                            .and_then(|m| super::participation::weigh(&design, &settings, &m))
                        {
                            Ok(weighted) => effective_n = Some(weighted.report.effective_n),
                            Err(e) => note = Some(e.to_string()),
                        }
                    }
                    Err(e) => note = Some(e.to_string()),
                }
            }
            let (joined, left) = if w == 0 {
                (Vec::new(), Vec::new())
            } else {
                let took = |c: &CountryWaves, i: usize| c.status[i] == WaveStatus::TookPart;
                (
                    countries
                        .iter()
                        .filter(|c| took(c, w) && !took(c, w - 1))
                        .map(|c| c.code.clone())
                        .collect(),
                    countries
                        .iter()
                        .filter(|c| !took(c, w) && took(c, w - 1))
                        .map(|c| c.code.clone())
                        .collect(),
                )
            };
            WaveTrend {
                wave,
                max_abs_smd,
                effective_n,
                note,
                joined,
                left,
                incomplete,
            }
        })
        .collect()
}
