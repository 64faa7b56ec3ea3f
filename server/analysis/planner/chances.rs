//! Chances of joining and costs: where they come from.
//!
//! By default the chance of joining is the project's `[recruitment] feasibility` column when
//! the project names one, else the participation model's leave-one-out probability: the
//! chance the model gives a country when fitted without it (one refit per country), so a
//! country's own participation does not raise its own forecast. Costs come from the
//! project's `[recruitment] cost` column unless another column is named, with either budget.

use serde::Serialize;

use super::history::{history_chances, HistoryForecast};
use super::{Feasibility, PlanError, PlanSettings};
use crate::analysis::design::Design;
use crate::analysis::participation::{self, AnalysisError};
use crate::analysis::settings::Settings;
use crate::project::{Project, WaveView};
use crate::stats::binary;

/// The chances of joining used by a plan, and where they came from.
#[derive(Debug, Clone, Serialize)]
pub struct Chances {
    /// "column", "model-leave-one-out" or "history".
    pub source: String,
    /// The column read (for "column").
    pub column: Option<String>,
    /// Units whose leave-one-out refit failed and kept the in-sample chance.
    pub in_sample_fallbacks: usize,
    /// The history model and its check (for "history").
    #[serde(skip_serializing_if = "Option::is_none")]
    pub history: Option<HistoryForecast>,
    #[serde(skip)]
    pub probability: Vec<f64>,
}

impl Chances {
    /// The chances stay with their country when the eligible universe is resampled (they
    /// do not come from this wave's participation model).
    pub fn fixed(&self) -> bool {
        self.source != "model-leave-one-out"
    }
}

/// Chance of joining for each unit of the design.
pub fn chances(
    project: Option<&Project>,
    design: &Design,
    view: &WaveView,
    settings: &Settings,
    plan: &PlanSettings,
) -> Result<Chances, PlanError> {
    let column = match &plan.feasibility {
        Feasibility::Auto => view.feasibility_column.clone(),
        Feasibility::Model => None,
        Feasibility::History => {
            let project = project.ok_or_else(|| {
                PlanError::Request(
                    "chances from the programme's history need a project folder with several waves"
                        .to_string(),
                )
            })?;
            let forecast = history_chances(project, design, view.wave, settings)?;
            return Ok(Chances {
                source: "history".to_string(),
                column: None,
                in_sample_fallbacks: 0,
                probability: forecast.probability.clone(),
                history: Some(forecast),
            });
        }
        Feasibility::Column(c) => Some(c.clone()),
    };
    match column {
        None => model_chances(design, settings),
        Some(name) => Ok(Chances {
            probability: column_chances(design, view, &name)?,
            source: "column".to_string(),
            column: Some(name),
            in_sample_fallbacks: 0,
            history: None,
        }),
    }
}

/// The participation model's leave-one-out chances.
fn model_chances(design: &Design, settings: &Settings) -> Result<Chances, PlanError> {
    let fitted = participation::fit_model(design, settings.model, false)?;
    let z = &fitted.standardised;
    let full = binary::fit(settings.model, z.view(), &design.participated)
        .map_err(|e| PlanError::Analysis(AnalysisError::from(e)))?;
    let loo = binary::leave_one_out(settings.model, z.view(), &design.participated, &full);
    let mut fallbacks = 0;
    let probability = loo
        .iter()
        .zip(&fitted.propensity)
        .map(|(l, p)| {
            l.unwrap_or_else(|| {
                fallbacks += 1;
                *p
            })
        })
        .collect();
    Ok(Chances {
        source: "model-leave-one-out".to_string(),
        column: None,
        in_sample_fallbacks: fallbacks,
        history: None,
        probability,
    })
}

/// In-sample chances of a resampled design (the bootstrap replicates, where one refit per
/// country per replicate would cost too much).
pub fn in_sample_chances(design: &Design, settings: &Settings) -> Option<Vec<f64>> {
    participation::fit_model(design, settings.model, false)
        .ok()
        .map(|m| m.propensity)
}

fn column_chances(design: &Design, view: &WaveView, name: &str) -> Result<Vec<f64>, PlanError> {
    let values = named_column(view, name, view.feasibility.as_ref(), view.feasibility_column.as_deref())
        .ok_or_else(|| PlanError::Request(format!("unknown feasibility column '{name}'; name the project's feasibility column ({}) or a numeric indicator, or use 'model'", view.feasibility_column.as_deref().unwrap_or("none set"))))?;
    design
        .units
        .iter()
        .map(|&i| match values.get(i).copied().flatten() {
            Some(p) if (0.0..=1.0).contains(&p) => Ok(p),
            Some(p) => Err(PlanError::Request(format!("the feasibility column '{name}' holds {p} for {}; it must hold probabilities between 0 and 1", view.codes[i]))),
            None => Ok(0.0),
        })
        .collect()
}

/// A column of the wave view by name: the recruitment column it was loaded as (`loaded`,
/// from `loaded_name`), or a numeric indicator.
fn named_column<'a>(
    view: &'a WaveView,
    name: &str,
    loaded: Option<&'a Vec<Option<f64>>>,
    loaded_name: Option<&str>,
) -> Option<&'a Vec<Option<f64>>> {
    loaded.filter(|_| loaded_name == Some(name)).or_else(|| {
        view.numeric
            .iter()
            .find(|c| c.column == name)
            .map(|c| &c.values)
    })
}

/// The cost column in use: the one named, else the project's `[recruitment] cost` (so
/// that costs show with a count budget too, not only when a cost budget is asked for).
pub fn cost_column(view: &WaveView, plan: &PlanSettings) -> Option<String> {
    plan.cost_column
        .clone()
        .or_else(|| view.cost_column.clone())
}

/// Each unit's cost (None when missing or not positive).
pub fn costs(
    design: &Design,
    view: &WaveView,
    plan: &PlanSettings,
) -> Result<Option<Vec<Option<f64>>>, PlanError> {
    let Some(name) = cost_column(view, plan) else {
        if plan.cost_budget.is_some() {
            return Err(PlanError::Request(
                "a cost budget needs a cost column: name one (--cost-column), or set [recruitment] cost in project.toml".to_string(),
            ));
        }
        return Ok(None);
    };
    let values = named_column(view, &name, view.cost.as_ref(), view.cost_column.as_deref())
        .ok_or_else(|| PlanError::Request(format!("unknown cost column '{name}'; name the project's cost column ({}) or a numeric indicator", view.cost_column.as_deref().unwrap_or("none set"))))?;
    Ok(Some(
        design
            .units
            .iter()
            .map(|&i| values.get(i).copied().flatten().filter(|c| *c > 0.0))
            .collect(),
    ))
}

/// Per unit: (chance of joining with support, support's cost), None where not on offer.
pub type SupportOffers = Vec<Option<(f64, f64)>>;

/// Support on offer for each unit: (chance of joining with support, support's cost), or
/// None where the project offers none or a value is missing. `None` overall when the
/// project has no support columns or the plan asks for none.
pub fn support(
    design: &Design,
    view: &WaveView,
    plan: &PlanSettings,
) -> Result<Option<SupportOffers>, PlanError> {
    let Some(columns) = view.support.as_ref().filter(|_| plan.support) else {
        return Ok(None);
    };
    design
        .units
        .iter()
        .map(|&i| {
            let cost = columns.cost.get(i).copied().flatten();
            let chance = columns.chance.get(i).copied().flatten();
            match (chance, cost) {
                (Some(p), _) if !(0.0..=1.0).contains(&p) => Err(PlanError::Request(format!(
                    "the support chance column '{}' holds {p} for {}; it must hold probabilities between 0 and 1",
                    columns.chance_column, view.codes[i]
                ))),
                (Some(_), Some(c)) if c < 0.0 => Err(PlanError::Request(format!(
                    "the support cost column '{}' holds {c} for {}; costs cannot be negative",
                    columns.cost_column, view.codes[i]
                ))),
                (Some(p), Some(c)) => Ok(Some((p, c))),
                _ => Ok(None),
            }
        })
        .collect::<Result<Vec<_>, _>>()
        .map(Some)
}
