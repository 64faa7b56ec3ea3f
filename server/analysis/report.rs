//! The meeting report: every analysis of one wave in one result, plus what is needed to
//! reproduce it (tool version, input checksums, settings, seed).

use serde::Serialize;
use sha2::{Digest, Sha256};

use super::balance::{compare, BalanceComparison};
use super::coverage::{coverage, CoverageReport};
use super::impact::{impact, ImpactReport, ImpactSettings, Shares};
use super::overview::{overview, Overview};
use super::participation::{fit, FitReport};
use super::planner::{plan, Plan, PlanSettings};
use super::settings::Settings;
use crate::project::Project;
use crate::stats::regression::Kind;

#[derive(Debug, Clone, Serialize)]
pub struct InputFile {
    pub name: String,
    pub bytes: u64,
    pub sha256: String,
}

#[derive(Debug, Clone, Serialize)]
pub struct Report {
    pub version: &'static str,
    pub wave: i64,
    pub settings: Settings,
    pub overview: Overview,
    pub fit: Result<FitReport, String>,
    pub balance: Result<BalanceComparison, String>,
    pub coverage: CoverageReport,
    pub plan: Result<Plan, String>,
    pub impact: Option<Result<ImpactReport, String>>,
    pub inputs: Vec<InputFile>,
}

/// SHA-256 of every file the project read (FIPS 180-4).
pub fn input_checksums(project: &Project) -> Vec<InputFile> {
    let mut names = vec![
        crate::project::MANIFEST_FILE.to_string(),
        project.frame.file.clone(),
    ];
    if let Some(m) = &project.microdata {
        names.push(m.file.clone());
    }
    names
        .into_iter()
        .filter_map(|name| {
            let bytes = std::fs::read(project.dir.join(&name)).ok()?;
            let digest = Sha256::digest(&bytes);
            Some(InputFile {
                sha256: digest.iter().map(|b| format!("{b:02x}")).collect(),
                bytes: bytes.len() as u64,
                name,
            })
        })
        .collect()
}

/// Builds the report for one wave (the latest when the settings name none).
pub fn report(project: &Project, settings: &Settings) -> Result<Report, String> {
    let wave = settings
        .wave
        .or_else(|| project.waves.last().copied())
        .ok_or("the project has no waves")?;
    let settings = Settings {
        wave: Some(wave),
        ..settings.clone()
    };
    let view = project
        .wave(wave)
        .ok_or_else(|| format!("the project has no wave {wave}"))?;
    let impact = project
        .manifest
        .microdata
        .as_ref()
        .filter(|_| project.microdata.is_some())
        .map(|roles| {
            let outcome = roles
                .variables
                .iter()
                .find(|v| v.contains("trust"))
                .or(roles.variables.first())
                .cloned()
                .unwrap_or_default();
            let predictors = roles
                .variables
                .iter()
                .filter(|v| **v != outcome)
                .take(3)
                .cloned()
                .collect();
            let imp = ImpactSettings {
                outcome,
                predictors,
                kind: Kind::Linear,
                country_indicators: Vec::new(),
                shares: Shares::Equal,
                replicates: 399,
            };
            impact(project, &view, &settings, &imp).map_err(|e| e.to_string())
        });
    Ok(Report {
        version: crate::VERSION,
        wave,
        overview: overview(project),
        fit: fit(&view, &settings).map_err(|e| e.to_string()),
        balance: compare(&view, &settings).map_err(|e| e.to_string()),
        coverage: coverage(&view),
        plan: plan(
            &view,
            &settings,
            &PlanSettings {
                replicates: 100,
                ..PlanSettings::default()
            },
        )
        .map_err(|e| e.to_string()),
        impact,
        inputs: input_checksums(project),
        settings,
    })
}
