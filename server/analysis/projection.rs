//! What the whole eligible universe would say: a linear random-intercept model of a
//! respondent outcome with the country indicators as country-level predictors, projected to
//! every eligible country of the wave (multilevel regression and poststratification;
//! Gelman & Little 1997, Survey Methodology 23, 127-135; Park, Gelman & Bafumi 2004,
//! Political Analysis 12, 375-385).
//!
//! Participants: the mean over their own respondents of x_i'b, plus z_j'g and their
//! conditional mode u_j. Absent countries: the mean of x_i'b over the participants' pooled
//! respondents (their own composition is not known), plus z_j'g, with u_j ~ N(0, tau^2).
//! Indicators are standardised with the participants' means and SDs. The universe estimate
//! counts eligible countries equally. The 95% prediction interval comes from seeded
//! simulation: fixed effects from N(b-hat, Cov), log tau from its approximate normal
//! sampling distribution, participants' effects from N(mode, conditional variance), absent
//! countries' effects from N(0, tau*^2).

use std::collections::HashMap;

use ndarray::Array2;
use serde::Serialize;

use super::settings::Settings;
use crate::project::{Project, WaveView};
use crate::stats::linalg;
use crate::stats::multilevel::{self, Criterion, Data};
use crate::stats::random::Rng;

/// Simulation draws of the prediction interval.
pub const DRAWS: usize = 2000;

#[derive(Debug, Clone, Serialize)]
pub struct ProjectedCountry {
    pub code: String,
    pub name: String,
    pub region: Option<String>,
    pub participated: bool,
    pub respondents: usize,
    /// Predicted mean outcome (null when an indicator is missing: not estimable).
    pub prediction: Option<f64>,
    pub low: Option<f64>,
    pub high: Option<f64>,
    /// Absent and outside the participants' range on these indicators.
    pub outside_range: Vec<String>,
}

#[derive(Debug, Clone, Serialize)]
pub struct RegionRow {
    pub region: String,
    pub participants: usize,
    pub absent: usize,
    pub participants_mean: Option<f64>,
    pub absent_mean: Option<f64>,
    pub universe_mean: Option<f64>,
}

#[derive(Debug, Clone, Serialize)]
pub struct Difference {
    pub code: String,
    pub name: String,
    pub region: String,
    pub prediction: f64,
    pub region_participants_mean: f64,
    pub difference: f64,
}

#[derive(Debug, Clone, Serialize)]
pub struct ProjectionReport {
    pub wave: i64,
    pub outcome: String,
    pub predictors: Vec<String>,
    pub indicators: Vec<String>,
    /// The model: intercept, respondent predictors, then standardised indicators.
    pub terms: Vec<String>,
    pub coef: Vec<f64>,
    pub se: Vec<f64>,
    pub country_sd: f64,
    pub residual_sd: Option<f64>,
    pub method: &'static str,
    pub converged: bool,
    pub n_respondents: usize,
    pub n_participants: usize,
    pub n_absent: usize,
    /// The mean over participants of their respondents' mean outcome (unweighted).
    pub participants_mean: f64,
    pub projected_absent_mean: Option<f64>,
    pub universe_estimate: f64,
    pub universe_low: f64,
    pub universe_high: f64,
    pub seed: u64,
    pub draws: usize,
    pub flagged: usize,
    /// Share of the universe estimate's country weight on flagged countries.
    pub flagged_share: f64,
    pub countries: Vec<ProjectedCountry>,
    pub regions: Vec<RegionRow>,
    pub largest_differences: Vec<Difference>,
    pub composition: &'static str,
    pub notes: Vec<String>,
}

#[derive(Debug, Clone, PartialEq, thiserror::Error)]
pub enum ProjectionError {
    #[error("{0}")]
    Request(String),
}

fn req(message: impl Into<String>) -> ProjectionError {
    ProjectionError::Request(message.into())
}

/// The projection request.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct ProjectionSettings {
    pub outcome: String,
    /// Respondent-level predictors (survey variables).
    pub predictors: Vec<String>,
}

/// Computes the projection for one wave of a project with microdata.
pub fn projection(
    project: &Project,
    view: &WaveView,
    settings: &Settings,
    ps: &ProjectionSettings,
) -> Result<ProjectionReport, ProjectionError> {
    let micro = project
        .microdata
        .as_ref()
        .ok_or_else(|| req("the project has no microdata (microdata.csv or microdata.parquet)"))?;
    let roles = project
        .manifest
        .microdata
        .as_ref()
        .ok_or_else(|| req("project.toml has no [microdata] section"))?;
    for v in std::iter::once(&ps.outcome).chain(&ps.predictors) {
        if !roles.variables.contains(v) {
            return Err(req(format!(
                "'{v}' is not a survey variable; the variables are: {}",
                roles.variables.join(", ")
            )));
        }
    }
    let indicators: Vec<usize> = match &settings.covariates {
        None => (0..view.numeric.len()).collect(),
        Some(names) => names
            .iter()
            .map(|n| {
                view.numeric
                    .iter()
                    .position(|c| &c.column == n)
                    .ok_or_else(|| req(format!("'{n}' is not a numeric indicator")))
            })
            .collect::<Result<_, _>>()?,
    };
    let countries_col = micro.texts(&roles.country);
    let waves = micro.integers(&roles.wave);
    let outcome = micro.numbers(&ps.outcome);
    let predictor_values: Vec<Vec<Option<f64>>> =
        ps.predictors.iter().map(|p| micro.numbers(p)).collect();
    let unit_of_code: HashMap<&str, usize> = view
        .codes
        .iter()
        .enumerate()
        .map(|(i, c)| (c.as_str(), i))
        .collect();
    // Standardisation and range over participants with complete indicators.
    let complete = |i: usize| {
        indicators
            .iter()
            .all(|&c| view.numeric[c].values[i].is_some())
    };
    let part_units: Vec<usize> = (0..view.len())
        .filter(|&i| view.participated[i] && complete(i))
        .collect();
    let mut centre = Vec::new();
    let mut scale = Vec::new();
    let mut range = Vec::new();
    for &c in &indicators {
        let v: Vec<f64> = part_units
            .iter()
            .filter_map(|&i| view.numeric[c].values[i])
            .collect();
        let n = v.len() as f64;
        let m = v.iter().sum::<f64>() / n.max(1.0);
        let sd = (v.iter().map(|x| (x - m).powi(2)).sum::<f64>() / (n - 1.0).max(1.0)).sqrt();
        centre.push(m);
        scale.push(if sd > 0.0 { sd } else { 1.0 });
        let lo = v.iter().cloned().fold(f64::INFINITY, f64::min);
        let hi = v.iter().cloned().fold(f64::NEG_INFINITY, f64::max);
        range.push((lo, hi));
    }
    let z_of = |i: usize| -> Option<Vec<f64>> {
        indicators
            .iter()
            .enumerate()
            .map(|(k, &c)| view.numeric[c].values[i].map(|v| (v - centre[k]) / scale[k]))
            .collect()
    };
    // Respondents of participating countries with complete values.
    let mut rows = Vec::new();
    let mut unit_rows: Vec<usize> = Vec::new();
    for i in 0..micro.height() {
        if waves[i] != Some(view.wave) {
            continue;
        }
        let Some(&u) = countries_col[i]
            .as_deref()
            .and_then(|c| unit_of_code.get(c))
        else {
            continue;
        };
        if !view.participated[u] || !complete(u) {
            continue;
        }
        if outcome[i].is_none() || predictor_values.iter().any(|v| v[i].is_none()) {
            continue;
        }
        rows.push(i);
        unit_rows.push(u);
    }
    if rows.is_empty() {
        return Err(req(format!(
            "no respondents with complete values in wave {}",
            view.wave
        )));
    }
    let mut group_of_unit: HashMap<usize, usize> = HashMap::new();
    let group: Vec<usize> = unit_rows
        .iter()
        .map(|u| {
            let next = group_of_unit.len();
            *group_of_unit.entry(*u).or_insert(next)
        })
        .collect();
    let n_groups = group_of_unit.len();
    let kr = ps.predictors.len() + 1;
    let kz = indicators.len();
    let k = kr + kz;
    let z_units: HashMap<usize, Vec<f64>> = group_of_unit
        .keys()
        .map(|&u| (u, z_of(u).unwrap_or_default()))
        .collect();
    let mut x = Array2::<f64>::ones((rows.len(), k));
    let mut y = Vec::with_capacity(rows.len());
    for (r, &i) in rows.iter().enumerate() {
        for (j, v) in predictor_values.iter().enumerate() {
            x[[r, j + 1]] = v[i].unwrap_or(0.0);
        }
        for (j, v) in z_units[&unit_rows[r]].iter().enumerate() {
            x[[r, kr + j]] = *v;
        }
        y.push(outcome[i].unwrap_or(0.0));
    }
    let fit = multilevel::fit_linear(
        &Data {
            x: x.view(),
            y: &y,
            group: &group,
            n_groups,
            weight: None,
        },
        Criterion::Reml,
    )
    .map_err(|e| req(format!("the multilevel model cannot be fitted: {e}")))?;

    // Respondent composition: per participant and pooled (means of the respondent part).
    let mut comp = vec![vec![0.0; kr]; n_groups];
    let mut ysum = vec![0.0; n_groups];
    let mut count = vec![0usize; n_groups];
    let mut pooled = vec![0.0; kr];
    for r in 0..rows.len() {
        let g = group[r];
        count[g] += 1;
        ysum[g] += y[r];
        for j in 0..kr {
            comp[g][j] += x[[r, j]];
            pooled[j] += x[[r, j]];
        }
    }
    for g in 0..n_groups {
        comp[g].iter_mut().for_each(|v| *v /= count[g] as f64);
    }
    pooled.iter_mut().for_each(|v| *v /= rows.len() as f64);

    // Eligible countries of the wave (the view is the eligible universe).
    let region_of = |i: usize| -> Option<String> {
        let g = view.group?;
        let cat = &view.categorical[g];
        cat.values[i].map(|l| cat.levels[l].clone())
    };
    struct Unit {
        view: usize,
        group: Option<usize>,
        /// Composition row (respondent part) and indicators.
        a: Vec<f64>,
        z: Vec<f64>,
    }
    let mut units = Vec::new();
    let mut countries = Vec::new();
    let mut flagged = 0;
    let mut notes = Vec::new();
    let mut not_estimable = Vec::new();
    for i in 0..view.len() {
        let g = group_of_unit.get(&i).copied();
        let z = z_of(i);
        let mut outside = Vec::new();
        if let (Some(zv), false) = (&z, view.participated[i]) {
            for (kk, &c) in indicators.iter().enumerate() {
                let raw = zv[kk] * scale[kk] + centre[kk];
                if raw < range[kk].0 || raw > range[kk].1 {
                    outside.push(view.numeric[c].column.clone());
                }
            }
        }
        if !outside.is_empty() {
            flagged += 1;
        }
        let estimable = z.is_some();
        if !estimable {
            not_estimable.push(view.codes[i].clone());
        }
        countries.push(ProjectedCountry {
            code: view.codes[i].clone(),
            name: view.names[i].clone(),
            region: region_of(i),
            participated: view.participated[i],
            respondents: g.map_or(0, |g| count[g]),
            prediction: None,
            low: None,
            high: None,
            outside_range: outside,
        });
        if let (Some(z), true) = (z, estimable) {
            units.push(Unit {
                view: i,
                group: g,
                a: g.map_or_else(|| pooled.clone(), |g| comp[g].clone()),
                z,
            });
        }
    }
    if !not_estimable.is_empty() {
        notes.push(format!(
            "not estimable (a missing indicator), left out of the universe estimate: {}",
            not_estimable.join(", ")
        ));
    }
    let predict = |coef: &[f64], u: &Unit, effect: f64| -> f64 {
        effect
            + u.a.iter().zip(&coef[..kr]).map(|(a, c)| a * c).sum::<f64>()
            + u.z.iter().zip(&coef[kr..]).map(|(z, c)| z * c).sum::<f64>()
    };
    let point: Vec<f64> = units
        .iter()
        .map(|u| predict(&fit.coef, u, u.group.map_or(0.0, |g| fit.modes[g])))
        .collect();
    let n_units = units.len() as f64;
    let universe_estimate = point.iter().sum::<f64>() / n_units;

    // Simulation.
    let chol = linalg::cholesky(fit.cov.view()).ok();
    let log_tau = fit.country_sd.ln();
    let log_tau_sd = if fit.log_sd_variance.is_finite() {
        fit.log_sd_variance.sqrt()
    } else {
        0.0
    };
    let seed = settings.seed;
    let mut sims = vec![vec![0.0; DRAWS]; units.len()];
    let mut universe_draws = vec![0.0; DRAWS];
    for d in 0..DRAWS {
        let mut rng = Rng::stream(seed, d as u64);
        let mut coef = fit.coef.clone();
        if let Some(l) = &chol {
            let e: Vec<f64> = (0..k).map(|_| rng.normal()).collect();
            for a in 0..k {
                coef[a] += (0..=a).map(|b| l[[a, b]] * e[b]).sum::<f64>();
            }
        }
        let tau = if fit.country_sd > 0.0 {
            (log_tau + log_tau_sd * rng.normal()).exp()
        } else {
            0.0
        };
        let mut total = 0.0;
        for (m, u) in units.iter().enumerate() {
            let effect = match u.group {
                Some(g) => fit.modes[g] + fit.mode_variance[g].sqrt() * rng.normal(),
                None => tau * rng.normal(),
            };
            let v = predict(&coef, u, effect);
            sims[m][d] = v;
            total += v;
        }
        universe_draws[d] = total / n_units;
    }
    let quantiles = |v: &mut Vec<f64>| -> (f64, f64) {
        v.sort_by(f64::total_cmp);
        let at = |q: f64| v[((q * (v.len() - 1) as f64).round() as usize).min(v.len() - 1)];
        (at(0.025), at(0.975))
    };
    for (m, u) in units.iter().enumerate() {
        let (lo, hi) = quantiles(&mut sims[m]);
        let c = &mut countries[u.view];
        c.prediction = Some(point[m]);
        c.low = Some(lo);
        c.high = Some(hi);
    }
    let (universe_low, universe_high) = quantiles(&mut universe_draws);

    let participants_mean = (0..n_groups)
        .map(|g| ysum[g] / count[g] as f64)
        .sum::<f64>()
        / n_groups as f64;
    let absent: Vec<f64> = countries
        .iter()
        .filter(|c| !c.participated)
        .filter_map(|c| c.prediction)
        .collect();
    let mean = |v: &[f64]| (!v.is_empty()).then(|| v.iter().sum::<f64>() / v.len() as f64);
    let flagged_share = countries
        .iter()
        .filter(|c| c.prediction.is_some() && !c.outside_range.is_empty())
        .count() as f64
        / n_units;

    // Regions.
    let mut region_names: Vec<String> = Vec::new();
    for c in &countries {
        if let Some(r) = &c.region {
            if !region_names.contains(r) {
                region_names.push(r.clone());
            }
        }
    }
    region_names.sort();
    let regions: Vec<RegionRow> = region_names
        .iter()
        .map(|r| {
            let of = |part: Option<bool>| -> Vec<f64> {
                countries
                    .iter()
                    .filter(|c| c.region.as_ref() == Some(r))
                    .filter(|c| part.is_none_or(|p| c.participated == p))
                    .filter_map(|c| c.prediction)
                    .collect()
            };
            let (p, a, all) = (of(Some(true)), of(Some(false)), of(None));
            RegionRow {
                region: r.clone(),
                participants: p.len(),
                absent: a.len(),
                participants_mean: mean(&p),
                absent_mean: mean(&a),
                universe_mean: mean(&all),
            }
        })
        .collect();
    let mut largest_differences: Vec<Difference> = countries
        .iter()
        .filter(|c| !c.participated)
        .filter_map(|c| {
            let region = c.region.clone()?;
            let pm = regions
                .iter()
                .find(|r| r.region == region)?
                .participants_mean?;
            let prediction = c.prediction?;
            Some(Difference {
                code: c.code.clone(),
                name: c.name.clone(),
                region,
                prediction,
                region_participants_mean: pm,
                difference: prediction - pm,
            })
        })
        .collect();
    largest_differences.sort_by(|a, b| b.difference.abs().total_cmp(&a.difference.abs()));
    largest_differences.truncate(10);

    let mut terms = vec!["intercept".to_string()];
    terms.extend(ps.predictors.iter().cloned());
    terms.extend(
        indicators
            .iter()
            .map(|&c| format!("{} (standardised)", view.numeric[c].column)),
    );
    if !fit.converged {
        notes.push("the multilevel model did not converge: treat the projection with care".into());
    }
    Ok(ProjectionReport {
        wave: view.wave,
        outcome: ps.outcome.clone(),
        predictors: ps.predictors.clone(),
        indicators: indicators
            .iter()
            .map(|&c| view.numeric[c].column.clone())
            .collect(),
        terms,
        coef: fit.coef.clone(),
        se: fit.se.clone(),
        country_sd: fit.country_sd,
        residual_sd: fit.residual_sd,
        method: "REML",
        converged: fit.converged,
        n_respondents: rows.len(),
        n_participants: n_groups,
        n_absent: absent.len(),
        participants_mean,
        projected_absent_mean: mean(&absent),
        universe_estimate,
        universe_low,
        universe_high,
        seed,
        draws: DRAWS,
        flagged,
        flagged_share,
        countries,
        regions,
        largest_differences,
        composition: "absent countries: the participants' pooled respondent composition (no composition file)",
        notes,
    })
}
