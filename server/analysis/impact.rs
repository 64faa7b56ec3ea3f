//! How far respondent-level findings move under each correction for country selection:
//! the pooled estimate of an outcome and a pooled regression, unweighted, under each
//! country weighting, and with the inverse Mills ratio of the country-level probit.

use std::collections::HashMap;

use ndarray::{Array1, Array2};
use serde::Serialize;

use super::design;
use super::impact_bootstrap::{self, CountryStats};
use super::participation::{self, AnalysisError};
use super::settings::{Settings, WeightingKind};
use crate::project::{Project, WaveView};
use crate::stats::binary::{self, ModelKind};
use crate::stats::regression::{self, Kind, TwoStepInput};
use crate::stats::weights;

/// What the impact view estimates.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct ImpactSettings {
    pub outcome: String,
    /// Respondent variables or country indicators (joined by country).
    pub predictors: Vec<String>,
    pub kind: Kind,
    /// Country indicators in the outcome equation of the two-step (Mills-ratio) variant.
    pub country_indicators: Vec<String>,
    /// Country shares: each participating country counts by its weight ("equal"), or by
    /// its weight times its population ("population", from `population_column`).
    pub shares: Shares,
    /// Country (pairs cluster) bootstrap replicates of the whole pipeline: participation
    /// model, weights, two-step and estimate (0 to skip; see analysis::impact_bootstrap).
    pub replicates: usize,
    /// Wild cluster bootstrap replicates for p-values (linear models; 0 to skip).
    pub wild_replicates: usize,
}

#[derive(Debug, Clone, PartialEq, Serialize)]
#[serde(rename_all = "kebab-case")]
pub enum Shares {
    Equal,
    /// A numeric frame column; columns named `log_...` are taken as natural logarithms.
    Population(String),
}

#[derive(Debug, Clone, Serialize)]
pub struct Pooled {
    pub estimate: f64,
    /// Null where the variant has no standard error of its own (the multilevel
    /// projection's interval is a prediction interval by simulation).
    pub se: f64,
    pub low: f64,
    pub high: f64,
    #[serde(flatten)]
    pub bootstrap: PooledBootstrap,
}

/// The pipeline bootstrap of a pooled mean (null where not estimable or not run).
#[derive(Debug, Clone, Default, Serialize)]
pub struct PooledBootstrap {
    pub bootstrap_se: Option<f64>,
    pub bootstrap_ci95_low: Option<f64>,
    pub bootstrap_ci95_high: Option<f64>,
}

impl Pooled {
    /// An estimate with its 95% interval on t with `df` degrees of freedom (countries - 1)
    /// and no bootstrap yet.
    fn with_t_interval(estimate: f64, se: f64, df: usize) -> Pooled {
        let q975 = regression::student::upper_quantile(0.975, df as f64);
        Pooled {
            estimate,
            se,
            low: estimate - q975 * se,
            high: estimate + q975 * se,
            bootstrap: PooledBootstrap::default(),
        }
    }
}

/// Two-sided p-values of coefficient / standard error on t with `df` degrees of freedom.
fn t_p_values(coef: &[f64], se: &[f64], df: usize) -> Vec<f64> {
    coef.iter()
        .zip(se)
        .map(|(c, s)| regression::student::two_sided_p(c / s, df as f64))
        .collect()
}

/// The pipeline bootstrap of a variant's terms, with its replicates, seed and failures.
#[derive(Debug, Clone, Default, Serialize)]
pub struct TermsBootstrap {
    /// Per term (null where not estimable or not run).
    pub bootstrap_se: Vec<Option<f64>>,
    pub bootstrap_ci95_low: Vec<Option<f64>>,
    pub bootstrap_ci95_high: Vec<Option<f64>>,
    /// Replicates that gave this variant no value.
    pub bootstrap_failed: usize,
    /// Why, counted by reason.
    pub bootstrap_failures: Vec<impact_bootstrap::FailureCount>,
    pub bootstrap_replicates: usize,
    pub bootstrap_seed: u64,
    /// Why the variant has no bootstrap, where it has none.
    pub bootstrap_note: Option<String>,
}

#[derive(Debug, Clone, Serialize)]
pub struct Variant {
    pub key: String,
    pub label: String,
    pub error: Option<String>,
    pub pooled: Option<Pooled>,
    pub coef: Vec<f64>,
    pub se: Vec<f64>,
    /// Two-sided p-values from the CR1 t statistic with (countries - 1) degrees of freedom
    /// (Cameron & Miller 2015, section VI.C).
    pub p_cluster: Vec<f64>,
    /// Wild cluster bootstrap p-values (linear models).
    pub p_bootstrap: Option<Vec<f64>>,
    /// Per term: the sign differs from the unweighted model's.
    pub sign_changed: Vec<bool>,
    /// Per term: significant at 5% here but not unweighted, or the reverse.
    pub verdict_changed: Vec<bool>,
    /// Per balance indicator (the report's `balance_terms`): standardised mean difference of
    /// the participants under this variant's country shares against the reference
    /// universe (`balance_reference`); null where not computed.
    pub smd: Vec<Option<f64>>,
    /// The largest |SMD| of `smd`; null where not computed.
    pub max_abs_smd: Option<f64>,
    /// The weighting leaves the largest |SMD| worse than the first (unweighted) variant:
    /// its estimates correct nothing they can be trusted to correct.
    #[serde(default)]
    pub worse_than_none: bool,
    /// What the variant's standard errors are.
    pub se_kind: String,
    #[serde(flatten)]
    pub bootstrap: TermsBootstrap,
}

impl Variant {
    /// A variant whose model was fitted: its estimates, standard errors and p-values,
    /// with the change flags, balance and bootstrap filled in later by the caller.
    fn fitted(
        key: &str,
        label: &str,
        pooled: Option<Pooled>,
        coef: Vec<f64>,
        se: Vec<f64>,
        p_cluster: Vec<f64>,
        p_bootstrap: Option<Vec<f64>>,
    ) -> Variant {
        Variant {
            key: key.to_string(),
            label: label.to_string(),
            error: None,
            pooled,
            sign_changed: vec![false; coef.len()],
            verdict_changed: vec![false; coef.len()],
            coef,
            se,
            p_cluster,
            p_bootstrap,
            smd: Vec::new(),
            max_abs_smd: None,
            worse_than_none: false,
            se_kind: String::new(),
            bootstrap: TermsBootstrap::default(),
        }
    }
}

#[derive(Debug, Clone, Serialize)]
pub struct ImpactReport {
    pub wave: i64,
    pub settings: Settings,
    pub impact: ImpactSettings,
    pub terms: Vec<String>,
    /// Per term, the readable label pages and charts show (the manifest's label, else one
    /// derived from the column name; never the raw column name).
    pub term_labels: Vec<String>,
    /// The outcome's readable label.
    pub outcome_label: String,
    pub n_respondents: usize,
    pub n_countries: usize,
    /// Degrees of freedom of the t reference for p-values and intervals: countries - 1.
    pub df: usize,
    /// The indicators whose balance each variant's `smd` shows.
    pub balance_terms: Vec<String>,
    /// What the SMDs compare with: the eligible universe with each country counting the
    /// same, or weighted by population.
    pub balance_reference: String,
    pub variants: Vec<Variant>,
    pub notes: Vec<String>,
}

#[derive(Debug, Clone, PartialEq, thiserror::Error)]
pub enum ImpactError {
    #[error("{0}")]
    Analysis(#[from] AnalysisError),
    #[error("{0}")]
    Request(String),
}

/// Computes every variant for one wave.
pub fn impact(
    project: &Project,
    view: &WaveView,
    settings: &Settings,
    imp: &ImpactSettings,
) -> Result<ImpactReport, ImpactError> {
    // The projection needs nothing from the corrections: fitted beside them from the start
    // (rayon's join gives the other thread back to the bootstrap's loop when it ends).
    let variables = project
        .manifest
        .microdata
        .as_ref()
        .map(|m| m.variables.as_slice())
        .unwrap_or_default();
    let (report, projection) = rayon::join(
        || corrections(project, view, settings, imp),
        || projection_variant(project, view, settings, imp, variables),
    );
    let mut report = report?;
    report.variants.push(projection);
    Ok(report)
}

/// Every variant but the projection.
fn corrections(
    project: &Project,
    view: &WaveView,
    settings: &Settings,
    imp: &ImpactSettings,
) -> Result<ImpactReport, ImpactError> {
    let micro = project.microdata.as_ref().ok_or_else(|| {
        ImpactError::Request(
            "the project has no microdata (microdata.csv or microdata.parquet)".to_string(),
        )
    })?;
    let roles = project.manifest.microdata.as_ref().ok_or_else(|| {
        ImpactError::Request("project.toml has no [microdata] section".to_string())
    })?;
    let variables = &roles.variables;
    if !variables.contains(&imp.outcome) {
        return Err(ImpactError::Request(format!(
            "'{}' is not a survey variable; the variables are: {}",
            imp.outcome,
            variables.join(", ")
        )));
    }
    let design = design::build(view, settings).map_err(AnalysisError::from)?;
    // Country-level pieces: the model, every weighting, the probit for the Mills ratio.
    let model = participation::fit_model(&design, settings.model, false)?;
    let country_index: HashMap<&str, usize> = design
        .ids
        .iter()
        .enumerate()
        .filter(|(i, _)| design.participated[*i])
        .map(|(i, id)| (id.as_str(), i))
        .collect();

    // Respondents of this wave's participants with complete values.
    // Country codes as level indices (no text copied per respondent), with each level's
    // participant index, if it is one.
    let factor = micro.shared_factorise(&roles.country);
    let (country_codes, country_levels) = (&factor.0, &factor.1);
    let participant_of_level: Vec<Option<usize>> = country_levels
        .iter()
        .map(|c| country_index.get(c.as_str()).copied())
        .collect();
    let level_of = |i: usize| country_codes.get(i).copied().flatten();
    let waves = micro.shared_integers(&roles.wave);
    let design_weight = micro.shared_numbers(&roles.design_weight);
    let outcome = micro.shared_numbers(&imp.outcome);
    let mut predictor_values: Vec<std::sync::Arc<Vec<Option<f64>>>> = Vec::new();
    for p in &imp.predictors {
        if variables.contains(p) {
            predictor_values.push(micro.shared_numbers(p));
        } else if let Some(ind) = view.numeric.iter().find(|n| &n.column == p) {
            // A country indicator, joined by country.
            let by_code: HashMap<&str, Option<f64>> = view
                .codes
                .iter()
                .map(String::as_str)
                .zip(ind.values.iter().copied())
                .collect();
            let by_level: Vec<Option<f64>> = country_levels
                .iter()
                .map(|c| by_code.get(c.as_str()).copied().flatten())
                .collect();
            predictor_values.push(std::sync::Arc::new(
                (0..micro.height())
                    .map(|i| level_of(i).and_then(|l| by_level[l]))
                    .collect(),
            ));
        } else {
            return Err(ImpactError::Request(format!(
                "'{p}' is neither a survey variable ({}) nor a numeric country indicator",
                variables.join(", ")
            )));
        }
    }
    let rows: Vec<usize> = (0..micro.height())
        .filter(|&i| waves[i] == Some(view.wave))
        .filter(|&i| level_of(i).is_some_and(|l| participant_of_level[l].is_some()))
        .filter(|&i| {
            outcome[i].is_some()
                && design_weight[i].is_some()
                && predictor_values.iter().all(|v| v[i].is_some())
        })
        .collect();
    if rows.is_empty() {
        return Err(ImpactError::Request(format!(
            "no respondents with complete values in wave {}",
            view.wave
        )));
    }
    let unit_of: Vec<usize> = rows
        .iter()
        .map(|&i| {
            level_of(i)
                .and_then(|l| participant_of_level[l])
                .unwrap_or(0)
        })
        .collect();
    let mut cluster_ids: HashMap<usize, usize> = HashMap::new();
    let cluster: Vec<usize> = unit_of
        .iter()
        .map(|u| {
            let next = cluster_ids.len();
            *cluster_ids.entry(*u).or_insert(next)
        })
        .collect();
    let y: Vec<f64> = rows.iter().map(|&i| outcome[i].unwrap_or(0.0)).collect();
    let k = imp.predictors.len() + 1;
    let mut x = Array2::<f64>::ones((rows.len(), k));
    for (r, &i) in rows.iter().enumerate() {
        for (j, v) in predictor_values.iter().enumerate() {
            x[[r, j + 1]] = v[i].unwrap_or(0.0);
        }
    }
    // Design weights summed per country, for rescaling.
    let mut design_total: HashMap<usize, f64> = HashMap::new();
    for (r, &i) in rows.iter().enumerate() {
        *design_total.entry(unit_of[r]).or_insert(0.0) += design_weight[i].unwrap_or(0.0);
    }
    let population: Option<Vec<f64>> = match &imp.shares {
        Shares::Equal => None,
        Shares::Population(col) => Some(
            design
                .people(view, col, project.manifest.population_scale(col))
                .map_err(|e| ImpactError::Request(e.0))?,
        ),
    };
    let population_ok = population
        .as_ref()
        .is_none_or(|p| p.iter().all(|v| v.is_finite() && *v > 0.0));
    // Respondent weight: design weight rescaled so each country's respondents sum to the
    // country's share.
    let respondent_weights = |share: &dyn Fn(usize) -> f64| -> Vec<f64> {
        rows.iter()
            .enumerate()
            .map(|(r, &i)| {
                let u = unit_of[r];
                share(u) * design_weight[i].unwrap_or(0.0) / design_total[&u]
            })
            .collect()
    };
    let base = |u: usize| population.as_ref().map_or(1.0, |p| p[u]);
    // The reference universe of the balance columns: every eligible country counting the
    // same, or by population (Hainmueller 2012's base weights q).
    let n_units = design.n();
    let q: Vec<f64> = (0..n_units).map(base).collect();
    let balance_terms: Vec<String> = design.balance.iter().map(|b| b.label.clone()).collect();
    let moments = universe_moments(&design, &q);
    let smd_of = |share: &dyn Fn(usize) -> f64| -> Vec<Option<f64>> {
        if !population_ok {
            return vec![None; design.balance.len()];
        }
        let s: Vec<f64> = (0..n_units)
            .map(|u| {
                if design.participated[u] {
                    share(u)
                } else {
                    0.0
                }
            })
            .collect();
        let total: f64 = s.iter().sum();
        design
            .balance
            .iter()
            .zip(&moments)
            .map(|(b, &(m, sd))| {
                let mean = b.values.iter().zip(&s).map(|(v, w)| v * w).sum::<f64>() / total;
                (sd > 0.0 && total > 0.0).then(|| (mean - m) / sd)
            })
            .collect()
    };
    let df = cluster_ids.len().saturating_sub(1);

    let mut terms = vec!["intercept".to_string()];
    terms.extend(imp.predictors.iter().cloned());
    let mut variants = Vec::new();
    let seed = settings.seed;
    let d_rows: Vec<f64> = rows
        .iter()
        .map(|&i| design_weight[i].unwrap_or(0.0))
        .collect();
    // A linear model's every weighting from per-country sums of the design-weighted
    // respondents: a weighting only rescales each country's sums by share / design total.
    let linear_sums = (imp.kind == Kind::Linear)
        .then(|| regression::LinearSums::new(x.view(), &y, Some(&d_rows), &cluster));
    let mut unit_of_cluster = vec![0; cluster_ids.len()];
    for (&u, &g) in &cluster_ids {
        unit_of_cluster[g] = u;
    }
    let run = |key: &str, label: &str, share: Result<Vec<f64>, String>, se_kind: &str| -> Variant {
        match share {
            Err(e) => failed(key, label, e, x.ncols()),
            Ok(share) => {
                let mut v = match &linear_sums {
                    Some(sums) => {
                        let factor: Vec<f64> = unit_of_cluster
                            .iter()
                            .map(|&u| share[u] / design_total[&u])
                            .collect();
                        estimate_linear(key, label, &sums.scaled(&factor), imp, seed, df)
                    }
                    None => {
                        let w = respondent_weights(&|u| share[u]);
                        estimate(key, label, &x, &y, &w, &cluster, imp, seed, df)
                    }
                };
                v.smd = smd_of(&|u| share[u]);
                v.max_abs_smd = v
                    .smd
                    .iter()
                    .flatten()
                    .map(|x| x.abs())
                    .fold(None, |m: Option<f64>, x| Some(m.map_or(x, |m| m.max(x))));
                v.se_kind = se_kind.to_string();
                v
            }
        }
    };
    let equal_label = if population.is_some() {
        "Each participating country counts by its population"
    } else {
        "Every participating country counts the same"
    };
    let cr1 = "clustered by country (CR1), weights taken as given";
    variants.push(run(
        "unweighted",
        equal_label,
        if population_ok {
            Ok(q.clone())
        } else {
            Err("a country's population is missing or not positive".to_string())
        },
        cr1,
    ));
    // The weightings are independent of each other and of the two-step: fitted side by
    // side, kept in order.
    use rayon::prelude::*;
    // Each with the GMM fit's coefficients where it converged (the bootstrap's draws start
    // there).
    let weightings = || -> Vec<(Variant, Option<Array1<f64>>)> {
        WeightingKind::ALL
        .par_iter()
        .map(|&kind| {
            let mut balancing_coef = None;
            let s = Settings {
                weighting: kind,
                ..settings.clone()
            };
            let share = if !population_ok {
                Err("a country's population is missing or not positive".to_string())
            } else if kind == WeightingKind::Entropy && population.is_some() {
                population_entropy(&design, &q, &moments, settings.match_variances)
            } else {
                participation::weigh(&design, &s, &model)
                    .map(|w| {
                        balancing_coef = w.balancing_coef;
                        (0..n_units).map(|u| w.weights[u] * base(u)).collect()
                    })
                    .map_err(|e| e.to_string())
            };
            let label = if kind == WeightingKind::Entropy && population.is_some() {
                "Entropy balancing to the population-weighted universe (population as base weights)"
                    .to_string()
            } else if population.is_some() {
                format!("{} × population", kind.label())
            } else {
                kind.label().to_string()
            };
            (run(kind.as_str(), &label, share, cr1), balancing_coef)
        })
        .collect()
    };
    // Heckman-type: the two-step with the country-level probit.
    // Its probit is fitted once, here, for both outcome equations and the bootstrap.
    let two_step = || {
        let mut notes = Vec::new();
        let probit = binary::fit(
            ModelKind::Probit,
            design.standardised().view(),
            &design.participated,
        )
        .ok();
        let variant = mills_variant(
            &MillsInput {
                design: &design,
                view,
                x: &x,
                y: &y,
                w: &respondent_weights(&|_| 1.0),
                unit_of: &unit_of,
                q: &q,
                df,
                probit: probit.as_ref(),
            },
            imp,
            &mut notes,
        )
        .unwrap_or_else(|e| failed("mills-ratio", MILLS_LABEL, e, k + 1));
        (variant, notes, probit)
    };
    let (weighted, (mills, notes_extra, probit)) = rayon::join(weightings, two_step);
    let gmm_coef = WeightingKind::ALL
        .iter()
        .zip(&weighted)
        .find(|(kind, _)| **kind == WeightingKind::CovariateBalancingGmm)
        .and_then(|(_, (_, coef))| coef.clone());
    variants.extend(weighted.into_iter().map(|(v, _)| v));
    variants.push(mills);

    flag_changes(&mut variants, k);
    flag_worse_than_none(&mut variants);

    // The pipeline bootstrap over countries, from per-country sufficient statistics.
    let mut by_unit: Vec<Vec<usize>> = vec![Vec::new(); n_units];
    for (r, &u) in unit_of.iter().enumerate() {
        by_unit[u].push(r);
    }
    let stats: Vec<Option<CountryStats>> = by_unit
        .iter()
        .map(|r| {
            (!r.is_empty())
                .then(|| CountryStats::from_rows(&x, &y, &d_rows, r))
                .flatten()
        })
        .collect();
    let mills_c = mills_indicators(&design, view, imp);
    let boot = population_ok
        .then(|| {
            impact_bootstrap::run(&impact_bootstrap::Input {
                design: &design,
                settings,
                stats: &stats,
                population: population.as_deref(),
                mills_indicators: mills_c.as_deref().map_err(|_| ()),
                kind: imp.kind,
                k,
                replicates: imp.replicates,
                seed,
                skip: variants.iter().map(|v| v.error.is_some()).collect(),
                starts: impact_bootstrap::Starts {
                    model: model.converged.then(|| model.coef.clone()),
                    probit: probit.filter(|p| p.converged).map(|p| p.coef),
                    gmm: gmm_coef,
                },
            })
        })
        .flatten();
    if let Some(boot) = &boot {
        for (v, b) in variants.iter_mut().zip(boot) {
            attach_bootstrap(v, b, imp.replicates, seed);
        }
    }
    let mut notes = vec![
        "Unweighted: design weights rescaled so that every participating country counts the same. Weighted: so that each country counts by its country weight.".to_string(),
        format!("Confidence intervals and p-values use standard errors clustered by country (CR1) with t on {df} degrees of freedom (countries - 1); with few countries the wild cluster bootstrap p-values are the safer guide."),
        "The two-step (Mills-ratio) variant changes the model, not the weights: the outcome equation carries the predictors, the chosen country indicators and the inverse Mills ratio of the country probit; its pooled mean and intercept are the outcome equation's prediction without the selection term averaged over the whole eligible universe, with standard errors that include the estimated first step (Murphy & Topel 1985, clustered by country).".to_string(),
    ];
    notes.extend(notes_extra);
    if let Some(boot) = &boot {
        let failed: usize = boot
            .iter()
            .zip(&variants)
            .filter(|(_, v)| v.error.is_none())
            .map(|(b, _)| b.failed)
            .sum();
        notes.push(format!(
            "Bootstrap columns: a country bootstrap of the whole pipeline (pairs cluster bootstrap, Cameron, Gelbach & Miller 2008): {} replicates (seed {seed}) each draw {} countries with replacement from the eligible universe, participants and non-participants together, re-fit the participation model, every weighting and the two-step's probit on the draw and re-estimate; standard error = the replicates' standard deviation, interval = their 2.5% and 97.5% percentiles. Unlike the clustered standard errors, these include the uncertainty of the estimated country weights. {}",
            imp.replicates,
            n_units,
            if failed == 0 {
                "No replicate failed.".to_string()
            } else {
                "Replicates that failed are counted beside each variant with their reasons, and left out of its columns.".to_string()
            }
        ));
        if imp.kind == Kind::Logistic {
            notes.push("With a logistic model the bootstrap re-estimates the pooled means but not the regression terms (their bootstrap columns are empty).".to_string());
        }
    } else if imp.replicates == 0 {
        notes.push(
            "The country bootstrap of the whole pipeline was not run (0 replicates).".to_string(),
        );
    }
    if let Shares::Population(c) = &imp.shares {
        notes.push(format!(
            "Country shares are proportional to population ({c}): entropy balancing takes the population as base weights and balances to the population-weighted universe (Hainmueller 2012); the other weightings multiply their country weights by population, so their balance against that universe is not exact (see the SMDs)."
        ));
    }
    let mut all_terms = terms.clone();
    all_terms.push("inverse Mills ratio".to_string());
    let term_labels = std::iter::once("intercept".to_string())
        .chain(
            imp.predictors
                .iter()
                .map(|p| project.manifest.label(p).into_owned()),
        )
        .chain(std::iter::once("inverse Mills ratio".to_string()))
        .collect();
    Ok(ImpactReport {
        wave: view.wave,
        settings: settings.clone(),
        impact: imp.clone(),
        terms: all_terms,
        term_labels,
        outcome_label: project.manifest.label(&imp.outcome).into_owned(),
        n_respondents: rows.len(),
        n_countries: cluster_ids.len(),
        df,
        balance_terms,
        balance_reference: if population.is_some() {
            "the eligible universe weighted by population".to_string()
        } else {
            "the eligible universe, every country counting the same".to_string()
        },
        variants,
        notes,
    })
}

const MILLS_LABEL: &str = "Two-step: inverse Mills ratio of the country probit";

/// Each balance column's mean and standard deviation over the universe with base weights
/// q: m = Σ q v / Σ q, sd = sqrt(Σ q (v − m)² / Σ q).
pub(super) fn universe_moments(design: &design::Design, q: &[f64]) -> Vec<(f64, f64)> {
    let q_total: f64 = q.iter().sum();
    design
        .balance
        .iter()
        .map(|b| {
            let m = b.values.iter().zip(q).map(|(v, w)| v * w).sum::<f64>() / q_total;
            let var = b
                .values
                .iter()
                .zip(q)
                .map(|(v, w)| w * (v - m).powi(2))
                .sum::<f64>()
                / q_total;
            (m, var.sqrt())
        })
        .collect()
}

/// The two-step's extra country indicators (those not already predictors), per indicator
/// one value per design unit.
fn mills_indicators(
    design: &design::Design,
    view: &WaveView,
    imp: &ImpactSettings,
) -> Result<Vec<Vec<f64>>, String> {
    let mut c_values: Vec<Vec<f64>> = Vec::new();
    for col in imp
        .country_indicators
        .iter()
        .filter(|c| !imp.predictors.contains(c))
    {
        let ind = view
            .numeric
            .iter()
            .find(|n| &n.column == col)
            .ok_or_else(|| format!("'{col}' is not a numeric country indicator"))?;
        let values: Option<Vec<f64>> = design.units.iter().map(|&u| ind.values[u]).collect();
        c_values.push(values.ok_or_else(|| {
            format!("'{col}' is missing for an eligible country, so its universe mean is unknown")
        })?);
    }
    Ok(c_values)
}

/// Entropy balancing with the population as base weights q_i, to the population-weighted
/// universe's means (and variances when asked): Hainmueller (2012), eq. 1-4 with q.
/// Returns each design unit's share (zero for non-participants).
pub(super) fn population_entropy(
    design: &design::Design,
    q: &[f64],
    moments: &[(f64, f64)],
    variances: bool,
) -> Result<Vec<f64>, String> {
    let n = design.n();
    let mut columns: Vec<(String, Vec<f64>, f64, f64)> = design
        .balance
        .iter()
        .zip(moments)
        .map(|(b, &(m, sd))| (b.label.clone(), b.values.clone(), m, sd))
        .collect();
    if variances {
        let q_total: f64 = q.iter().sum();
        for (b, &(m, _)) in design.balance.iter().zip(moments) {
            if b.is_level {
                continue;
            }
            let sq: Vec<f64> = b.values.iter().map(|v| (v - m).powi(2)).collect();
            let target = sq.iter().zip(q).map(|(v, w)| v * w).sum::<f64>() / q_total;
            let sd = (sq
                .iter()
                .zip(q)
                .map(|(v, w)| w * (v - target).powi(2))
                .sum::<f64>()
                / q_total)
                .sqrt();
            columns.push((format!("{} (variance)", b.label), sq, target, sd));
        }
    }
    let mut c = Array2::<f64>::zeros((n, columns.len()));
    for (j, col) in columns.iter().enumerate() {
        for (i, v) in col.1.iter().enumerate() {
            c[[i, j]] = *v;
        }
    }
    let targets: Vec<f64> = columns.iter().map(|c| c.2).collect();
    let scale: Vec<f64> = columns
        .iter()
        .map(|c| if c.3 > 0.0 { c.3 } else { 1.0 })
        .collect();
    weights::entropy_balance(c.view(), &design.participated, &targets, &scale, Some(q))
        .map_err(|e| match e {
            weights::WeightError::Infeasible { column, reason } => format!(
                "cannot match {}: {reason}",
                columns.get(column).map_or("an indicator", |c| c.0.as_str())
            ),
            e => e.to_string(),
        })
        .and_then(|fit| {
            if fit.converged {
                Ok(fit.weights)
            } else {
                Err(format!(
                    "entropy balancing to the population-weighted universe did not converge (largest gap {:.2e})",
                    fit.max_gap
                ))
            }
        })
}

struct MillsInput<'a> {
    design: &'a design::Design,
    view: &'a WaveView,
    /// Respondent rows: intercept and predictors.
    x: &'a Array2<f64>,
    y: &'a [f64],
    w: &'a [f64],
    unit_of: &'a [usize],
    /// Each eligible country's weight in the universe average.
    q: &'a [f64],
    df: usize,
    /// The country probit of taking part on the standardised design, when it could be
    /// fitted (else the two-step fits it and reports why it cannot).
    probit: Option<&'a binary::BinaryFit>,
}

/// The two-step variant (Heckman 1979 with a country-level probit; Wooldridge 2010, ch. 19):
/// y = x'b + c'd + theta lambda_c + e among participants' respondents, lambda_c the inverse
/// Mills ratio of the country's probit index. The universe quantity is the prediction
/// without the selection term averaged over every eligible country, a'beta with
/// a = (1, 0, ..., mean_U(c), 0), and its standard error sqrt(a'Va) with V the
/// Murphy-Topel covariance clustered by country (regression::heckman_two_step).
fn mills_variant(
    m: &MillsInput,
    imp: &ImpactSettings,
    notes: &mut Vec<String>,
) -> Result<Variant, String> {
    let design = m.design;
    let n = design.n();
    let k = m.x.ncols();
    let c_values = mills_indicators(design, m.view, imp)?;
    let participation_terms: Vec<&String> = design.terms.iter().skip(1).collect();
    if !participation_terms.is_empty()
        && participation_terms
            .iter()
            .all(|t| imp.country_indicators.contains(t) || imp.predictors.contains(t))
    {
        notes.push("Every participation indicator is also in the two-step's outcome equation: the correction is identified only by the probit's functional form, and its estimates can be fragile.".to_string());
    }
    let q_total: f64 = m.q.iter().sum();
    let c_mean: Vec<f64> = c_values
        .iter()
        .map(|v| v.iter().zip(m.q).map(|(a, b)| a * b).sum::<f64>() / q_total)
        .collect();
    let z = design.standardised();
    let clusters: Vec<usize> = (0..n).collect();
    let with_indicators = |base: &Array2<f64>| -> Array2<f64> {
        let kb = base.ncols();
        let mut out = Array2::<f64>::zeros((base.nrows(), kb + c_values.len()));
        out.slice_mut(ndarray::s![.., ..kb]).assign(base);
        for (r, &u) in m.unit_of.iter().enumerate() {
            for (j, v) in c_values.iter().enumerate() {
                out[[r, kb + j]] = v[u];
            }
        }
        out
    };
    let two_step = |xx: &Array2<f64>| {
        regression::heckman_two_step(&TwoStepInput {
            z: z.view(),
            selected: &design.participated,
            x: xx.view(),
            y: m.y,
            w: Some(m.w),
            unit: m.unit_of,
            cluster: Some(&clusters),
            probit: m.probit,
        })
        .map_err(|e| e.to_string())
    };
    // a'beta and sqrt(a'Va) for the universe-averaged intercept of a model whose first
    // `kb` columns are the base design.
    let universe = |fit: &regression::TwoStepFit, kb: usize| -> (f64, f64) {
        let mut a = vec![0.0; fit.coef.len()];
        a[0] = 1.0;
        for (j, cm) in c_mean.iter().enumerate() {
            a[kb + j] = *cm;
        }
        let a = ndarray::Array1::from(a);
        let est = a.dot(&ndarray::Array1::from(fit.coef.clone()));
        let var = a.dot(&fit.cov.dot(&a));
        (est, var.max(0.0).sqrt())
    };
    let ones = Array2::<f64>::ones((m.y.len(), 1));
    let pooled_fit = two_step(&with_indicators(&ones))?;
    let (pm, pse) = universe(&pooled_fit, 1);
    let fit = two_step(&with_indicators(m.x))?;
    let (b0, se0) = universe(&fit, k);
    let last = fit.coef.len() - 1;
    let mut coef = vec![b0];
    let mut se = vec![se0];
    coef.extend_from_slice(&fit.coef[1..k]);
    se.extend_from_slice(&fit.se[1..k]);
    coef.push(fit.coef[last]);
    se.push(fit.se[last]);
    let p_cluster = t_p_values(&coef, &se, m.df);
    Ok(Variant {
        key: "mills-ratio".to_string(),
        label: MILLS_LABEL.to_string(),
        error: None,
        pooled: Some(Pooled::with_t_interval(pm, pse, m.df)),
        sign_changed: vec![false; coef.len()],
        verdict_changed: vec![false; coef.len()],
        coef,
        se,
        p_cluster,
        p_bootstrap: None,
        smd: vec![None; design.balance.len()],
        max_abs_smd: None,
        worse_than_none: false,
        se_kind: "Murphy-Topel, clustered by country: includes the estimated country probit"
            .to_string(),
        bootstrap: TermsBootstrap::default(),
    })
}

pub const PROJECTION_KEY: &str = "multilevel-projection";
const PROJECTION_LABEL: &str = "Multilevel projection to the whole eligible universe";

/// The multilevel projection (analysis::projection) as a variant: its universe estimate
/// and its 95% prediction interval as the pooled mean; it has no terms of the impact
/// model and no country bootstrap (its interval comes from simulating the fitted model).
fn projection_variant(
    project: &Project,
    view: &WaveView,
    settings: &Settings,
    imp: &ImpactSettings,
    variables: &[String],
) -> Variant {
    let ps = super::projection::ProjectionSettings::for_impact(imp, variables);
    match super::projection::projection(project, view, settings, &ps) {
        Err(e) => failed(PROJECTION_KEY, PROJECTION_LABEL, e.to_string(), 0),
        Ok(p) => Variant {
            key: PROJECTION_KEY.to_string(),
            label: PROJECTION_LABEL.to_string(),
            error: None,
            pooled: Some(Pooled {
                estimate: p.universe_estimate,
                se: f64::NAN,
                low: p.universe_low,
                high: p.universe_high,
                bootstrap: PooledBootstrap::default(),
            }),
            coef: Vec::new(),
            se: Vec::new(),
            p_cluster: Vec::new(),
            p_bootstrap: None,
            sign_changed: Vec::new(),
            verdict_changed: Vec::new(),
            smd: Vec::new(),
            max_abs_smd: None,
            worse_than_none: false,
            se_kind: format!(
                "95% prediction interval by simulation from the fitted {} multilevel model ({} draws, seed {}); the model's respondent predictors: {}; every eligible country counts the same{}",
                p.method,
                p.draws,
                p.seed,
                if p.predictor_labels.is_empty() { "none".to_string() } else { p.predictor_labels.join(", ") },
                if p.at_boundary { "; the country SD is estimated at its boundary, 0, so the interval leaves out variation between countries" } else { "" }
            ),
            bootstrap: TermsBootstrap {
                bootstrap_note: Some(
                    "not bootstrapped: the interval is the projection's own prediction interval"
                        .to_string(),
                ),
                bootstrap_seed: settings.seed,
                ..TermsBootstrap::default()
            },
        },
    }
}

/// Copies a variant's pipeline bootstrap into its fields (nothing for a variant that
/// failed on the full sample).
fn attach_bootstrap(
    v: &mut Variant,
    b: &impact_bootstrap::VariantBootstrap,
    replicates: usize,
    seed: u64,
) {
    if v.error.is_some() {
        return;
    }
    if let Some(p) = v.pooled.as_mut() {
        p.bootstrap = PooledBootstrap {
            bootstrap_se: b.pooled.se,
            bootstrap_ci95_low: b.pooled.low,
            bootstrap_ci95_high: b.pooled.high,
        };
    }
    let n = v.coef.len();
    let term = |f: fn(&crate::stats::bootstrap::Summary) -> Option<f64>| -> Vec<Option<f64>> {
        (0..n).map(|j| b.terms.get(j).and_then(f)).collect()
    };
    v.bootstrap = TermsBootstrap {
        bootstrap_se: term(|s| s.se),
        bootstrap_ci95_low: term(|s| s.low),
        bootstrap_ci95_high: term(|s| s.high),
        bootstrap_failed: b.failed,
        bootstrap_failures: b.failures.clone(),
        bootstrap_replicates: replicates,
        bootstrap_seed: seed,
        bootstrap_note: None,
    };
}

fn failed(key: &str, label: &str, error: String, k: usize) -> Variant {
    Variant {
        key: key.to_string(),
        label: label.to_string(),
        error: Some(error),
        pooled: None,
        coef: Vec::new(),
        se: Vec::new(),
        p_cluster: Vec::new(),
        p_bootstrap: None,
        sign_changed: vec![false; k],
        verdict_changed: vec![false; k],
        smd: Vec::new(),
        max_abs_smd: None,
        worse_than_none: false,
        se_kind: String::new(),
        bootstrap: TermsBootstrap::default(),
    }
}

/// [`estimate`] of a linear model from its per-country sums (the same estimates, from the
/// normal equations instead of a QR decomposition of the respondents).
fn estimate_linear(
    key: &str,
    label: &str,
    sums: &regression::LinearSums,
    imp: &ImpactSettings,
    seed: u64,
    df: usize,
) -> Variant {
    let pooled = sums
        .first_column()
        .fit()
        .ok()
        .map(|f| Pooled::with_t_interval(f.coef[0], f.se[0], df));
    let k = imp.predictors.len() + 1;
    match sums.fit() {
        Err(e) => failed(key, label, e.to_string(), k),
        Ok(f) => {
            let p_cluster = t_p_values(&f.coef, &f.se, df);
            let p_bootstrap = (imp.wild_replicates > 0).then(|| {
                sums.wild_bootstrap_terms(&f, imp.wild_replicates, seed)
                    .unwrap_or_else(|_| vec![f64::NAN; k])
            });
            Variant::fitted(key, label, pooled, f.coef, f.se, p_cluster, p_bootstrap)
        }
    }
}

#[allow(clippy::too_many_arguments)]
fn estimate(
    key: &str,
    label: &str,
    x: &Array2<f64>,
    y: &[f64],
    w: &[f64],
    cluster: &[usize],
    imp: &ImpactSettings,
    seed: u64,
    df: usize,
) -> Variant {
    // Drop respondents of countries without weight (never for participants, but trimming
    // to zero is possible in principle).
    let keep: Vec<usize> = (0..y.len()).filter(|&i| w[i] > 0.0).collect();
    let xs = x.select(ndarray::Axis(0), &keep);
    let ys: Vec<f64> = keep.iter().map(|&i| y[i]).collect();
    let ws: Vec<f64> = keep.iter().map(|&i| w[i]).collect();
    let cs: Vec<usize> = keep.iter().map(|&i| cluster[i]).collect();
    let ones = Array2::<f64>::ones((keep.len(), 1));
    let pooled = regression::fit(ones.view(), &ys, Some(&ws), &cs, Kind::Linear)
        .ok()
        .map(|f| Pooled::with_t_interval(f.coef[0], f.se[0], df));
    match regression::fit(xs.view(), &ys, Some(&ws), &cs, imp.kind) {
        Err(e) => failed(key, label, e.to_string(), x.ncols()),
        Ok(f) => {
            let p_cluster = t_p_values(&f.coef, &f.se, df);
            let b = imp.wild_replicates;
            let data = regression::ClusteredData::new(xs.view(), &ys, Some(&ws), &cs);
            let p_bootstrap = (b > 0).then(|| match (data, imp.kind) {
                // Not reached: the rows, weights and clusters were selected together.
                (Err(_), _) => vec![f64::NAN; x.ncols()],
                // Every term from one pass over the respondents.
                (Ok(data), Kind::Linear) => {
                    regression::wild_cluster_bootstrap_terms(&data, b, seed)
                        .unwrap_or_else(|_| vec![f64::NAN; x.ncols()])
                }
                (Ok(data), Kind::Logistic) => (0..x.ncols())
                    .map(|j| {
                        regression::TermTest::new(data, j, b, seed)
                            .and_then(|test| regression::score_cluster_bootstrap(&test))
                            .unwrap_or(f64::NAN)
                    })
                    .collect(),
            });
            Variant::fitted(key, label, pooled, f.coef, f.se, p_cluster, p_bootstrap)
        }
    }
}

/// Marks, per term, a sign or a 5%-significance verdict that differs from the unweighted
/// model (bootstrap p-values where available).
/// Marks the variants whose largest |SMD| exceeds the unweighted variant's (the first).
fn flag_worse_than_none(variants: &mut [Variant]) {
    let Some(before) = variants.first().and_then(|v| v.max_abs_smd) else {
        return;
    };
    for v in variants.iter_mut().skip(1) {
        v.worse_than_none = v.max_abs_smd.is_some_and(|after| after > before + 1e-9);
    }
}

fn flag_changes(variants: &mut [Variant], k: usize) {
    let Some(base) = variants.first().cloned() else {
        return;
    };
    if base.error.is_some() {
        return;
    }
    let p = |v: &Variant, j: usize| v.p_bootstrap.as_ref().map_or(v.p_cluster[j], |b| b[j]);
    for v in variants.iter_mut().skip(1) {
        if v.error.is_some() {
            continue;
        }
        for j in 1..k.min(v.coef.len()) {
            v.sign_changed[j] = v.coef[j].signum() != base.coef[j].signum();
            v.verdict_changed[j] = (p(v, j) < 0.05) != (p(&base, j) < 0.05);
        }
    }
}
