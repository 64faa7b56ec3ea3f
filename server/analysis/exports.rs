//! Weights for a data manager to merge: one row per eligible country of every wave, and
//! one row per respondent. Nobody disappears: a country left out of the analysis (a
//! missing indicator value, a model that could not be fitted) keeps its row with an
//! empty weight and the reason.

use std::collections::HashMap;

use serde::Serialize;

use super::participation::fit;
use super::settings::Settings;
use crate::project::Project;

/// One eligible country of one wave.
#[derive(Debug, Clone, Serialize)]
pub struct CountryWeight {
    pub wave: i64,
    pub code: String,
    pub name: String,
    pub took_part: bool,
    /// Estimated probability of taking part; `None` when left out.
    pub propensity: Option<f64>,
    /// Participants' weights sum to the number of countries analysed in the wave; 0 for
    /// analysed non-participants; `None` when left out.
    pub weight: Option<f64>,
    /// Why the country has no weight (`None` when it has one).
    pub reason: Option<String>,
    /// Under multiple imputation (then `weight` and `propensity` are means over the
    /// imputations): the weight in each completed frame.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub weights_by_imputation: Option<Vec<f64>>,
}

/// What happened in one wave.
#[derive(Debug, Clone, Serialize)]
pub struct WaveWeights {
    pub wave: i64,
    /// Eligible countries (rows of the export for the wave).
    pub n_eligible: usize,
    /// Countries the model and the weights were computed on.
    pub n_analysed: usize,
    pub n_participants: usize,
    pub effective_n: Option<f64>,
    /// Countries left out, each with the indicators it misses.
    pub dropped: Vec<String>,
    pub warnings: Vec<String>,
    /// Why the wave has no weights at all.
    pub error: Option<String>,
}

#[derive(Debug, Clone, Serialize)]
pub struct CountryWeights {
    pub rows: Vec<CountryWeight>,
    pub waves: Vec<WaveWeights>,
}

/// Every wave's country weights under `settings` (its wave is ignored).
pub fn country_weights(project: &Project, settings: &Settings) -> CountryWeights {
    let mut rows = Vec::new();
    let mut waves = Vec::new();
    for &wave in &project.waves {
        let Some(view) = project.wave(wave) else {
            continue;
        };
        let s = Settings {
            wave: Some(wave),
            ..settings.clone()
        };
        let row = |i: usize, propensity, weight, reason| CountryWeight {
            wave,
            code: view.codes[i].clone(),
            name: view.names[i].clone(),
            took_part: view.participated[i],
            propensity,
            weight,
            reason,
            weights_by_imputation: None,
        };
        let fitted = if super::imputed::wanted(&s) {
            super::imputed::fit(Some(project), &view, &s)
                .map(|r| {
                    let by: HashMap<String, Vec<f64>> = r
                        .weights_spread
                        .iter()
                        .map(|u| (u.id.clone(), u.weights.clone()))
                        .collect();
                    (r.report, Some(by))
                })
                .map_err(|e| e.to_string())
        } else {
            fit(&view, &s).map(|r| (r, None)).map_err(|e| e.to_string())
        };
        match fitted {
            Ok((r, by_imputation)) => {
                let first_new = rows.len();
                let fitted: HashMap<&str, (f64, f64)> = r
                    .units
                    .iter()
                    .map(|u| (u.id.as_str(), (u.propensity, u.weight)))
                    .collect();
                for i in 0..view.codes.len() {
                    match fitted.get(view.codes[i].as_str()) {
                        Some(&(p, w)) => rows.push(row(i, Some(p), Some(w), None)),
                        None => {
                            let reason = left_out_reason(&r.dropped, &view.codes[i]);
                            rows.push(row(i, None, None, Some(reason)));
                        }
                    }
                }
                if let Some(by) = &by_imputation {
                    for r in &mut rows[first_new..] {
                        r.weights_by_imputation = by.get(&r.code).cloned();
                    }
                }
                waves.push(WaveWeights {
                    wave,
                    n_eligible: view.codes.len(),
                    n_analysed: r.n_eligible,
                    n_participants: r.n_participants,
                    effective_n: Some(r.weighting.effective_n),
                    dropped: r.dropped.clone(),
                    warnings: r.weighting.warnings.clone(),
                    error: None,
                });
            }
            Err(e) => {
                let reason = format!("not weighted: {e}");
                for i in 0..view.codes.len() {
                    rows.push(row(i, None, None, Some(reason.clone())));
                }
                waves.push(WaveWeights {
                    wave,
                    n_eligible: view.codes.len(),
                    n_analysed: 0,
                    n_participants: view.participated.iter().filter(|p| **p).count(),
                    effective_n: None,
                    dropped: Vec::new(),
                    warnings: Vec::new(),
                    error: Some(e.clone()),
                });
            }
        }
    }
    CountryWeights { rows, waves }
}

/// The reason a country was left out, from the fit's list of dropped countries
/// (`CODE (indicator, indicator)`).
fn left_out_reason(dropped: &[String], code: &str) -> String {
    let prefix = format!("{code} (");
    dropped
        .iter()
        .find_map(|d| d.strip_prefix(&prefix))
        .map(|rest| {
            format!(
                "left out of the analysis: missing {}",
                rest.trim_end_matches(')')
            )
        })
        .unwrap_or_else(|| "left out of the analysis (missing values)".to_string())
}

/// One respondent.
#[derive(Debug, Clone, Serialize)]
pub struct RespondentWeight {
    pub country: Option<String>,
    pub wave: Option<i64>,
    /// The manifest's `[microdata] respondent` column, when it names one.
    pub respondent: Option<String>,
    pub design_weight: Option<f64>,
    pub country_weight: Option<f64>,
    /// country weight × design weight / the sum of the design weights of the country's
    /// respondents in the wave: each participating country's respondents sum to its
    /// country weight, within it they keep the design's proportions (as the impact view
    /// combines them).
    pub combined_weight: Option<f64>,
    pub reason: Option<String>,
}

/// One row per respondent of the microdata, in file order, with the country weights of
/// `countries`.
pub fn respondent_weights(
    project: &Project,
    countries: &CountryWeights,
) -> Result<Vec<RespondentWeight>, String> {
    let micro = project
        .microdata
        .as_ref()
        .ok_or("the project has no microdata (microdata.csv or microdata.parquet)")?;
    let roles = project
        .manifest
        .microdata
        .as_ref()
        .ok_or("project.toml has no [microdata] section")?;
    let codes = micro.texts(&roles.country);
    let waves = micro.integers(&roles.wave);
    let design = micro.numbers(&roles.design_weight);
    let ids = roles.respondent.as_ref().map(|c| micro.texts(c));
    let by_country: HashMap<(&str, i64), &CountryWeight> = countries
        .rows
        .iter()
        .map(|r| ((r.code.as_str(), r.wave), r))
        .collect();
    let mut design_total: HashMap<(&str, i64), f64> = HashMap::new();
    for i in 0..micro.height() {
        if let (Some(c), Some(w), Some(d)) = (codes[i].as_deref(), waves[i], design[i]) {
            *design_total.entry((c, w)).or_insert(0.0) += d;
        }
    }
    Ok((0..micro.height())
        .map(|i| {
            let key = codes[i].as_deref().zip(waves[i]);
            let country = key.and_then(|k| by_country.get(&k).copied());
            let country_weight = country.and_then(|c| c.weight);
            let reason = match (country, design[i]) {
                (None, _) => Some("the country is not eligible in this wave".to_string()),
                (Some(c), _) if c.weight.is_none() => c.reason.clone(),
                (Some(c), _) if !c.took_part => {
                    Some("the country did not take part in this wave".to_string())
                }
                (_, None) => Some("no design weight".to_string()),
                _ => None,
            };
            let combined = match (reason.is_none(), country_weight, design[i], key) {
                (true, Some(cw), Some(d), Some(k)) => design_total
                    .get(&k)
                    .filter(|t| **t > 0.0)
                    .map(|t| cw * d / t),
                _ => None,
            };
            RespondentWeight {
                country: codes[i].clone(),
                wave: waves[i],
                respondent: ids.as_ref().and_then(|v| v[i].clone()),
                design_weight: design[i],
                country_weight,
                combined_weight: combined,
                reason,
            }
        })
        .collect())
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn reasons_name_the_missing_indicators() {
        let dropped = vec!["XAB (gdp, democracy)".to_string()];
        assert_eq!(
            left_out_reason(&dropped, "XAB"),
            "left out of the analysis: missing gdp, democracy"
        );
        assert_eq!(
            left_out_reason(&dropped, "XA"),
            "left out of the analysis (missing values)"
        );
    }
}
