//! The meeting report: every analysis of one or several waves in one result, with the
//! settings of the page (or command line) it was asked from, and what is needed to
//! reproduce it (tool version, input checksums, every setting, seed, the time it was made).

use serde::Serialize;

use super::balance::{compare, BalanceComparison};
use super::coverage::{coverage, CoverageReport};
use super::impact::{impact, ImpactReport, ImpactSettings};
use super::overview::{overview, Overview};
use super::participation::{fit, FitReport};
use super::planner::{plan_for, Plan, PlanSettings};
use super::projection::{projection, ProjectionReport, ProjectionSettings};
use super::settings::Settings;
use crate::project::{LoadedFile, Project, WaveView};

/// Which waves the report covers.
#[derive(Debug, Clone, PartialEq, Eq, Serialize)]
#[serde(rename_all = "kebab-case")]
pub enum Waves {
    /// The settings' wave (the latest when they name none).
    One,
    /// Every wave of the project.
    All,
    /// These waves, in this order.
    These(Vec<i64>),
}

impl Waves {
    /// `all`, or a comma-separated list of whole numbers (`3,4`); empty means [`Waves::One`].
    pub fn parse(value: &str) -> Result<Waves, String> {
        let value = value.trim();
        if value.is_empty() {
            return Ok(Waves::One);
        }
        if value == "all" {
            return Ok(Waves::All);
        }
        value
            .split(',')
            .map(str::trim)
            .filter(|s| !s.is_empty())
            .map(|s| {
                s.parse::<i64>().map_err(|_| {
                    format!(
                        "waves must be 'all' or whole numbers separated by commas (3,4), not '{s}'"
                    )
                })
            })
            .collect::<Result<Vec<_>, _>>()
            .map(Waves::These)
    }

    /// The inverse of [`Waves::parse`] (`None` for [`Waves::One`]).
    pub fn as_query_value(&self) -> Option<String> {
        match self {
            Waves::One => None,
            Waves::All => Some("all".to_string()),
            Waves::These(w) => Some(w.iter().map(i64::to_string).collect::<Vec<_>>().join(",")),
        }
    }
}

/// Every setting the report uses, parsed once (from a page's query string or from the
/// command line's options, which use the same names).
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct ReportSettings {
    /// The analysis settings (model, weighting, indicators, trimming, missing values,
    /// seed; `wave` is the wave when `waves` is [`Waves::One`]).
    pub settings: Settings,
    pub waves: Waves,
    /// The recruitment planner's settings (budget, chance of joining, objective,
    /// what-if joiners).
    pub plan: PlanSettings,
    /// The impact view's settings (outcome, predictors, model, shares, replicates);
    /// `None` for a project without microdata.
    pub impact: Option<ImpactSettings>,
}

impl ReportSettings {
    /// The projection's request: the impact view's outcome, with those of its
    /// predictors that are survey variables (the projection takes no country
    /// indicators among them; it uses every numeric indicator at the country level).
    pub fn projection(&self, project: &Project) -> Option<ProjectionSettings> {
        let imp = self.impact.as_ref()?;
        let variables = &project.manifest.microdata.as_ref()?.variables;
        Some(ProjectionSettings::for_impact(imp, variables))
    }
}

/// One wave's part of the report.
#[derive(Debug, Clone, Serialize)]
pub struct WaveReport {
    pub wave: i64,
    /// The analysis settings with this wave filled in.
    pub settings: Settings,
    pub fit: Result<FitReport, String>,
    pub balance: Result<BalanceComparison, String>,
    /// Under multiple imputation the first completed frame's coverage (as on the
    /// coverage page), else the observed frame's.
    pub coverage: CoverageReport,
    /// Under multiple imputation: the countries with filled values (crossed on the map).
    pub coverage_filled: Vec<String>,
    pub plan: Result<Plan, String>,
    pub impact: Option<Result<ImpactReport, String>>,
    pub projection: Option<Result<ProjectionReport, String>>,
}

#[derive(Debug, Clone, Serialize)]
pub struct Report {
    pub version: &'static str,
    /// When the report was made: UTC, ISO 8601 (`2026-12-02T07:15:00Z`).
    pub made_at: String,
    /// The waves covered, in order.
    pub waves: Vec<i64>,
    /// Every setting, as asked (waves resolved in `waves`).
    pub request: ReportSettings,
    /// The projection's request derived from the impact settings.
    pub projection_settings: Option<ProjectionSettings>,
    pub overview: Overview,
    pub sections: Vec<WaveReport>,
    /// Checksums of exactly the bytes validated at load (FIPS 180-4 SHA-256).
    pub inputs: Vec<LoadedFile>,
}

/// Where the report's heavier parts come from: computed here (each method's default), or
/// (on the server) from the result cache that the pages share, so that a part a page has
/// shown is not computed again and the report shows exactly the page's numbers.
pub trait Parts {
    fn plan(
        &self,
        project: &Project,
        view: &WaveView,
        settings: &Settings,
        ps: &PlanSettings,
    ) -> Result<Plan, String> {
        observed_or_imputed(
            settings,
            || plan_for(project, view, settings, ps),
            || super::imputed::plan(Some(project), view, settings, ps).map(|r| r.plan),
        )
    }

    fn impact(
        &self,
        project: &Project,
        view: &WaveView,
        settings: &Settings,
        imp: &ImpactSettings,
    ) -> Result<ImpactReport, String> {
        observed_or_imputed(
            settings,
            || impact(project, view, settings, imp),
            || super::imputed::impact(project, view, settings, imp).map(|r| r.report),
        )
    }

    fn projection(
        &self,
        project: &Project,
        view: &WaveView,
        settings: &Settings,
        ps: &ProjectionSettings,
    ) -> Result<ProjectionReport, String> {
        observed_or_imputed(
            settings,
            || projection(project, view, settings, ps),
            || {
                // One completed frame, said in the notes (as on the projection page).
                let done = super::imputed::complete_project_wave(Some(project), view, settings)
                    .map_err(|e| e.to_string())?;
                let mut r =
                    projection(project, &done.views[0], settings, ps).map_err(|e| e.to_string())?;
                r.notes
                    .insert(0, super::imputed::single_frame_note(&done.summary));
                Ok::<_, String>(r)
            },
        )
    }
}

/// Every part computed afresh (the command line).
pub struct Compute;

impl Parts for Compute {}

/// A part on the observed frame, or under multiple imputation when the settings ask for
/// it; either error as the text the report shows.
fn observed_or_imputed<T, E: ToString, F: ToString>(
    settings: &Settings,
    observed: impl FnOnce() -> Result<T, E>,
    imputed: impl FnOnce() -> Result<T, F>,
) -> Result<T, String> {
    if super::imputed::wanted(settings) {
        imputed().map_err(|e| e.to_string())
    } else {
        observed().map_err(|e| e.to_string())
    }
}

/// The waves the request covers, checked against the project's.
pub fn resolve_waves(project: &Project, request: &ReportSettings) -> Result<Vec<i64>, String> {
    let waves = match &request.waves {
        Waves::One => vec![project.resolve_wave(request.settings.wave)?.0],
        Waves::All => project.waves.clone(),
        Waves::These(list) => {
            let mut seen = Vec::new();
            for &w in list {
                project.resolve_wave(Some(w))?;
                if !seen.contains(&w) {
                    seen.push(w);
                }
            }
            seen
        }
    };
    if waves.is_empty() {
        return Err("the report needs at least one wave".to_string());
    }
    Ok(waves)
}

/// Builds the report with every part computed here.
pub fn report(project: &Project, request: &ReportSettings) -> Result<Report, String> {
    report_with(project, request, &Compute)
}

/// Builds the report, taking the heavier parts from `parts`.
pub fn report_with(
    project: &Project,
    request: &ReportSettings,
    parts: &dyn Parts,
) -> Result<Report, String> {
    let waves = resolve_waves(project, request)?;
    let has_microdata = project.microdata.is_some() && project.manifest.microdata.is_some();
    let projection_settings = request.projection(project).filter(|_| has_microdata);
    let mut sections = Vec::with_capacity(waves.len());
    for &wave in &waves {
        let (_, view) = project.resolve_wave(Some(wave))?;
        let settings = Settings {
            wave: Some(wave),
            ..request.settings.clone()
        };
        let impact = request
            .impact
            .as_ref()
            .filter(|_| has_microdata)
            .map(|imp| parts.impact(project, &view, &settings, imp));
        let projection = projection_settings
            .as_ref()
            .map(|ps| parts.projection(project, &view, &settings, ps));
        let (coverage, coverage_filled) = coverage_section(project, &view, &settings);
        sections.push(WaveReport {
            wave,
            fit: observed_or_imputed(
                &settings,
                || fit(&view, &settings),
                || super::imputed::fit(Some(project), &view, &settings).map(|r| r.report),
            ),
            balance: observed_or_imputed(
                &settings,
                || compare(&view, &settings),
                || super::imputed::compare(Some(project), &view, &settings).map(|r| r.comparison),
            ),
            coverage,
            coverage_filled,
            plan: parts.plan(project, &view, &settings, &request.plan),
            impact,
            projection,
            settings,
        });
    }
    Ok(Report {
        version: crate::VERSION,
        made_at: utc_timestamp(std::time::SystemTime::now()),
        waves,
        request: request.clone(),
        projection_settings,
        overview: overview(project),
        sections,
        inputs: project.inputs.clone(),
    })
}

/// The coverage section: under multiple imputation the coverage page's view (the first
/// completed frame, filled countries marked); should the imputation fail, the observed
/// frame, saying so.
fn coverage_section(
    project: &Project,
    view: &WaveView,
    settings: &Settings,
) -> (CoverageReport, Vec<String>) {
    if !super::imputed::wanted(settings) {
        return (coverage(view), Vec::new());
    }
    match super::imputed::coverage(Some(project), view, settings) {
        Ok(r) => (r.coverage, r.filled),
        Err(e) => {
            let mut c = coverage(view);
            c.summary.push(format!("Multiple imputation failed ({e}): this section shows the observed frame, without the countries whose values are missing."));
            (c, Vec::new())
        }
    }
}

/// A moment as UTC in ISO 8601 to the second (`1970-01-01T00:00:00Z`); moments before
/// 1970 count as 1970. Days to a civil date by H. Hinnant's `civil_from_days` algorithm
/// ("chrono-Compatible Low-Level Date Algorithms", 2013), proleptic Gregorian calendar.
pub fn utc_timestamp(at: std::time::SystemTime) -> String {
    let secs = at
        .duration_since(std::time::UNIX_EPOCH)
        .map_or(0, |d| d.as_secs());
    let t = crate::civil_time::UtcTime::from_unix_seconds(secs as i64);
    format!(
        "{:04}-{:02}-{:02}T{:02}:{:02}:{:02}Z",
        t.year, t.month, t.day, t.hour, t.minute, t.second
    )
}

#[cfg(test)]
mod tests {
    use super::*;
    use std::time::{Duration, UNIX_EPOCH};

    #[test]
    fn timestamps_match_the_calendar() {
        // Reference values from GNU date (`date -u -d @SECONDS +%FT%TZ`), run offline.
        for (secs, expected) in [
            (0, "1970-01-01T00:00:00Z"),
            (951_782_400, "2000-02-29T00:00:00Z"),
            (1_709_251_199, "2024-02-29T23:59:59Z"),
            (4_102_444_800, "2100-01-01T00:00:00Z"),
            (1_796_196_645, "2026-12-02T07:30:45Z"),
        ] {
            assert_eq!(
                utc_timestamp(UNIX_EPOCH + Duration::from_secs(secs)),
                expected,
                "{secs}"
            );
        }
    }

    #[test]
    fn waves_parse_and_print_back() {
        assert_eq!(Waves::parse("").unwrap(), Waves::One);
        assert_eq!(Waves::parse("all").unwrap(), Waves::All);
        assert_eq!(Waves::parse(" 3, 4 ").unwrap(), Waves::These(vec![3, 4]));
        assert!(Waves::parse("3,four").unwrap_err().contains("'four'"));
        assert_eq!(
            Waves::These(vec![3, 4]).as_query_value().as_deref(),
            Some("3,4")
        );
        assert_eq!(Waves::One.as_query_value(), None);
    }
}
