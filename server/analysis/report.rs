//! The meeting report: every analysis of one wave in one result, plus what is needed to
//! reproduce it (tool version, input checksums, settings, seed).

use serde::Serialize;

use super::balance::{compare, BalanceComparison};
use super::coverage::{coverage, CoverageReport};
use super::impact::{impact, ImpactReport, ImpactSettings, Shares};
use super::overview::{overview, Overview};
use super::participation::{fit, FitReport};
use super::planner::{plan, Plan, PlanSettings};
use super::settings::Settings;
use crate::project::{LoadedFile, Project};
use crate::stats::regression::Kind;

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
    pub inputs: Vec<LoadedFile>,
}

/// Builds the report for one wave (the latest when the settings name none).
pub fn report(project: &Project, settings: &Settings) -> Result<Report, String> {
    let (wave, view) = project.resolve_wave(settings.wave)?;
    let settings = Settings {
        wave: Some(wave),
        ..settings.clone()
    };
    let impact = project
        .manifest
        .microdata
        .as_ref()
        .filter(|_| project.microdata.is_some())
        .map(|roles| {
            let outcome = project
                .manifest
                .default_outcome()
                .unwrap_or_default()
                .to_string();
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
        // Checksums of exactly the bytes validated at load (FIPS 180-4 SHA-256).
        inputs: project.inputs.clone(),
        settings,
    })
}
