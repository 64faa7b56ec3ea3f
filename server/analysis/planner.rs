//! The recruitment planner: which absent eligible countries would most improve the
//! programme's balance if they joined, weighed against how likely each is to join and what
//! it costs.
//!
//! For a set S of participants: the effective number of countries after entropy balancing
//! S to the universe's means (0 when no positive weights of S reach them: "infeasible"), and
//! the unweighted imbalance of S (mean and largest |SMD| over the chosen indicators). A
//! candidate's gain is the rise in that effective number when it joins; its expected gain
//! is the probability of joining times the gain. The plan is greedy: pick the best expected
//! gain (per unit cost under a cost budget), add it, re-evaluate, repeat.

use std::collections::BTreeMap;

use ndarray::{Array1, Array2};
use serde::Serialize;

use super::design::{self, Design};
use super::participation::{self, AnalysisError};
use super::settings::Settings;
use crate::project::WaveView;
use crate::stats::random::Rng;
use crate::stats::{balance, weights};

/// Where the probability of joining comes from.
#[derive(Debug, Clone, PartialEq, Serialize)]
#[serde(rename_all = "kebab-case")]
pub enum Feasibility {
    /// The participation model's estimated probability.
    Model,
    /// A column of probabilities (or 0/1 judgements) in the frame.
    Column(String),
}

#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct PlanSettings {
    /// Number of countries to recruit (count budget).
    pub budget: Option<usize>,
    /// Total cost allowed (cost budget), with the cost column.
    pub cost_budget: Option<f64>,
    pub cost_column: Option<String>,
    pub feasibility: Feasibility,
    /// Bootstrap replicates for the stability of each pick (0: none).
    pub replicates: usize,
    /// Random draws for the "k at random" baseline.
    pub random_draws: usize,
    /// Hypothetical joiners for the what-if view.
    pub joiners: Vec<String>,
}

impl Default for PlanSettings {
    fn default() -> Self {
        PlanSettings {
            budget: Some(5),
            cost_budget: None,
            cost_column: None,
            feasibility: Feasibility::Model,
            replicates: 200,
            random_draws: 100,
            joiners: Vec::new(),
        }
    }
}

/// Balance of one set of participants.
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct SetMetrics {
    /// Kish's effective number after entropy balancing to the universe; 0 when infeasible.
    pub effective_n: f64,
    pub mean_abs_smd: f64,
    pub max_abs_smd: f64,
    pub feasible: bool,
}

#[derive(Debug, Clone, Serialize)]
pub struct CandidateRow {
    pub id: String,
    pub name: String,
    pub group: Option<String>,
    pub probability: f64,
    pub cost: Option<f64>,
    /// The set's balance if this candidate alone joined.
    pub if_joined: SetMetrics,
    pub gain: f64,
    pub expected_gain: f64,
    pub expected_gain_per_cost: Option<f64>,
    /// Share of bootstrap replicates whose plan picks it.
    pub stability: Option<f64>,
    pub in_plan: bool,
}

#[derive(Debug, Clone, Serialize)]
pub struct Step {
    pub id: String,
    pub name: String,
    pub effective_n: f64,
    pub mean_abs_smd: f64,
    pub max_abs_smd: f64,
    pub feasible: bool,
    pub gain: f64,
    pub probability: f64,
    pub expected_gain: f64,
    pub cost: Option<f64>,
    pub cumulative_cost: Option<f64>,
    pub stability: Option<f64>,
}

/// A baseline's balance after each number of recruits (index 0: one recruit).
#[derive(Debug, Clone, Serialize)]
pub struct BaselinePath {
    pub ids: Vec<String>,
    pub effective_n: Vec<f64>,
    pub mean_abs_smd: Vec<f64>,
    pub max_abs_smd: Vec<f64>,
    /// Share of draws in which balance is feasible (random baseline), or 0/1.
    pub feasible_share: Vec<f64>,
}

#[derive(Debug, Clone, Serialize)]
pub struct Baselines {
    pub likeliest: BaselinePath,
    /// Means over `draws` random orders of the candidates.
    pub random: BaselinePath,
    pub draws: usize,
}

#[derive(Debug, Clone, Serialize)]
pub struct WhatIf {
    pub joiners: Vec<String>,
    pub metrics: SetMetrics,
    /// Indicators' SMDs (unweighted) with the joiners in.
    pub smd: Vec<(String, f64)>,
}

#[derive(Debug, Clone, Serialize)]
pub struct Plan {
    pub wave: Option<i64>,
    pub settings: Settings,
    pub plan: PlanSettings,
    pub seed: u64,
    pub n_eligible: usize,
    pub n_participants: usize,
    pub current: SetMetrics,
    pub candidates: Vec<CandidateRow>,
    pub steps: Vec<Step>,
    pub baselines: Baselines,
    pub what_if: Option<WhatIf>,
    pub notes: Vec<String>,
}

#[derive(Debug, Clone, PartialEq, thiserror::Error)]
pub enum PlanError {
    #[error("{0}")]
    Analysis(#[from] AnalysisError),
    #[error("{0}")]
    Request(String),
}

/// The numbers every evaluation needs, built once from the design.
struct Evaluator {
    /// Entropy-balancing moments (non-reference levels), centred at the universe means and
    /// scaled by the universe standard deviations; one row per unit.
    moments: Array2<f64>,
    /// Balance columns for |SMD| (all levels): values, universe mean, universe sd.
    smd_columns: Vec<(Vec<f64>, f64, f64)>,
}

impl Evaluator {
    fn new(design: &Design) -> Evaluator {
        let n = design.n();
        let reference: Vec<String> = design
            .margins
            .iter()
            .filter_map(|m| m.levels.first().map(|l| format!("{}={}", m.name, l)))
            .collect();
        let eb: Vec<&design::BalanceColumn> = design
            .balance
            .iter()
            .filter(|b| !reference.contains(&b.name))
            .collect();
        let mut moments = Array2::<f64>::zeros((n, eb.len()));
        for (j, col) in eb.iter().enumerate() {
            let mean = col.values.iter().sum::<f64>() / n as f64;
            let sd = (col.values.iter().map(|v| (v - mean).powi(2)).sum::<f64>() / n as f64).sqrt();
            let sd = if sd > 0.0 { sd } else { 1.0 };
            for (i, v) in col.values.iter().enumerate() {
                moments[[i, j]] = (v - mean) / sd;
            }
        }
        let all = vec![1.0; n];
        let smd_columns = design
            .balance
            .iter()
            .map(|col| {
                let mean = balance::weighted_mean(&col.values, &all).unwrap_or(0.0);
                let sd = if col.is_level {
                    (mean * (1.0 - mean)).sqrt()
                } else {
                    balance::weighted_variance(&col.values, &all)
                        .unwrap_or(0.0)
                        .sqrt()
                };
                (col.values.clone(), mean, sd)
            })
            .collect();
        Evaluator {
            moments,
            smd_columns,
        }
    }

    /// Balance of the set of units `members`, warm-starting the dual at `start`.
    fn evaluate(
        &self,
        members: &[usize],
        start: Option<&Array1<f64>>,
    ) -> (SetMetrics, Option<Array1<f64>>) {
        let k = self.moments.ncols();
        // Unweighted SMDs of the members.
        let mut total = 0.0;
        let mut largest = 0.0f64;
        let mut counted = 0;
        for (values, mean, sd) in &self.smd_columns {
            if *sd <= 0.0 {
                continue;
            }
            let m = members.iter().map(|&i| values[i]).sum::<f64>() / members.len().max(1) as f64;
            let smd = ((m - mean) / sd).abs();
            total += smd;
            largest = largest.max(smd);
            counted += 1;
        }
        let mean_abs_smd = if counted > 0 {
            total / counted as f64
        } else {
            0.0
        };
        // Feasibility: every target (0 after centring) strictly inside the members' range.
        let mut d = Array2::<f64>::zeros((members.len(), k));
        for (r, &i) in members.iter().enumerate() {
            d.row_mut(r).assign(&self.moments.row(i));
        }
        let inside = (0..k).all(|j| {
            let column = d.column(j);
            let (lo, hi) = column
                .iter()
                .fold((f64::INFINITY, f64::NEG_INFINITY), |(l, h), &v| {
                    (l.min(v), h.max(v))
                });
            lo < -1e-9 && hi > 1e-9 || (hi - lo).abs() < 1e-12 && lo.abs() < 1e-9
        });
        let infeasible = SetMetrics {
            effective_n: 0.0,
            mean_abs_smd,
            max_abs_smd: largest,
            feasible: false,
        };
        if !inside || members.is_empty() {
            return (infeasible, None);
        }
        let q = vec![1.0; members.len()];
        let solution = weights::entropy_dual(d.view(), &q, start, 60);
        if !solution.converged {
            return (infeasible, None);
        }
        let metrics = SetMetrics {
            effective_n: balance::effective_n(&solution.weights),
            mean_abs_smd,
            max_abs_smd: largest,
            feasible: true,
        };
        (metrics, Some(solution.lambda))
    }
}

/// Probability of joining for each unit of the design.
fn probabilities(
    design: &Design,
    view: &WaveView,
    settings: &Settings,
    plan: &PlanSettings,
) -> Result<Vec<f64>, PlanError> {
    match &plan.feasibility {
        Feasibility::Model => {
            Ok(participation::fit_model(design, settings.model, false)?.propensity)
        }
        Feasibility::Column(name) => {
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
    }
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

fn costs(
    design: &Design,
    view: &WaveView,
    plan: &PlanSettings,
) -> Result<Option<Vec<Option<f64>>>, PlanError> {
    let Some(name) = &plan.cost_column else {
        if plan.cost_budget.is_some() {
            return Err(PlanError::Request(
                "a cost budget needs a cost column (--cost-column)".to_string(),
            ));
        }
        return Ok(None);
    };
    let values = named_column(view, name, view.cost.as_ref(), view.cost_column.as_deref())
        .ok_or_else(|| PlanError::Request(format!("unknown cost column '{name}'; name the project's cost column ({}) or a numeric indicator", view.cost_column.as_deref().unwrap_or("none set"))))?;
    Ok(Some(
        design
            .units
            .iter()
            .map(|&i| values.get(i).copied().flatten().filter(|c| *c > 0.0))
            .collect(),
    ))
}

/// Greedy plan over `candidates` (design indices) from `members`. Returns the picks in
/// order with each step's metrics and gain.
struct GreedyPick {
    unit: usize,
    metrics: SetMetrics,
    gain: f64,
}

fn greedy(
    eval: &Evaluator,
    members: &[usize],
    candidates: &[usize],
    probability: &[f64],
    cost: Option<&[Option<f64>]>,
    budget: Budget,
    same_unit: &dyn Fn(usize) -> Vec<usize>,
) -> Vec<GreedyPick> {
    let mut members = members.to_vec();
    let (mut current, mut lambda) = eval.evaluate(&members, None);
    let mut left: Vec<usize> = candidates.to_vec();
    let mut spent = 0.0;
    let mut picks = Vec::new();
    loop {
        if let Budget::Count(k) = budget {
            if picks.len() >= k {
                break;
            }
        }
        let mut best: Option<Trial> = None;
        for (pos, &c) in left.iter().enumerate() {
            let unit_cost = cost.and_then(|k| k[c]);
            if let Budget::Cost(b) = budget {
                match unit_cost {
                    Some(uc) if spent + uc <= b + 1e-9 => {}
                    _ => continue,
                }
            }
            let mut trial = members.clone();
            trial.extend(same_unit(c));
            let (metrics, l) = eval.evaluate(&trial, lambda.as_ref());
            let gain = metrics.effective_n - current.effective_n;
            let per = match (budget, unit_cost) {
                (Budget::Cost(_), Some(uc)) => probability[c] * gain / uc,
                _ => probability[c] * gain,
            };
            // Ties (no gain in effective number, e.g. while balance stays infeasible) go to
            // the larger expected fall in imbalance.
            let tie = probability[c] * (current.mean_abs_smd - metrics.mean_abs_smd);
            let better = best.as_ref().is_none_or(|(b, t, ..)| {
                per > *b + 1e-12 || ((per - *b).abs() <= 1e-12 && tie > *t)
            });
            if better {
                best = Some((per, tie, pos, metrics, l));
            }
        }
        let Some((_, _, pos, metrics, l)) = best else {
            break;
        };
        let unit = left.remove(pos);
        members.extend(same_unit(unit));
        spent += cost.and_then(|k| k[unit]).unwrap_or(0.0);
        picks.push(GreedyPick {
            unit,
            metrics,
            gain: metrics.effective_n - current.effective_n,
        });
        current = metrics;
        if l.is_some() {
            lambda = l;
        }
        if left.is_empty() {
            break;
        }
    }
    picks
}

/// One candidate tried in a greedy round: score, tie-break, position among the candidates
/// left, the set's metrics with it, and the dual solution to warm-start the next round.
type Trial = (f64, f64, usize, SetMetrics, Option<Array1<f64>>);

#[derive(Debug, Clone, Copy)]
enum Budget {
    Count(usize),
    Cost(f64),
}

/// Builds the plan for one wave.
pub fn plan(
    view: &WaveView,
    settings: &Settings,
    plan_settings: &PlanSettings,
) -> Result<Plan, PlanError> {
    let design = design::build(view, settings).map_err(AnalysisError::from)?;
    let probability = probabilities(&design, view, settings, plan_settings)?;
    let cost = costs(&design, view, plan_settings)?;
    let members: Vec<usize> = (0..design.n())
        .filter(|&i| design.participated[i])
        .collect();
    let candidates: Vec<usize> = (0..design.n())
        .filter(|&i| !design.participated[i])
        .collect();
    if candidates.is_empty() {
        return Err(PlanError::Request(
            "every eligible country already takes part: there is nobody to recruit".to_string(),
        ));
    }
    let budget = match (plan_settings.budget, plan_settings.cost_budget) {
        (_, Some(b)) if b > 0.0 => Budget::Cost(b),
        (_, Some(b)) => return Err(PlanError::Request(format!("the cost budget must be positive, not {b}"))),
        (Some(0), None) => return Err(PlanError::Request("the budget must be at least one country".to_string())),
        (Some(k), None) if k > candidates.len() => {
            return Err(PlanError::Request(format!("the budget of {k} countries exceeds the {} eligible countries that do not take part; ask for at most {}", candidates.len(), candidates.len())))
        }
        (Some(k), None) => Budget::Count(k),
        (None, None) => Budget::Count(candidates.len().min(5)),
    };
    let eval = Evaluator::new(&design);
    let (current, lambda) = eval.evaluate(&members, None);
    let mut notes = Vec::new();
    if !current.feasible {
        notes.push("With the current participants no positive weights reproduce the eligible universe's means (some kinds of countries have no participant at all): recruits that make balance feasible come first.".to_string());
    }
    let single = |i: usize| vec![i];
    let picks = greedy(
        &eval,
        &members,
        &candidates,
        &probability,
        cost.as_deref(),
        budget,
        &single,
    );
    let k = picks.len();

    // Each candidate on its own.
    let mut rows: Vec<CandidateRow> = candidates
        .iter()
        .map(|&c| {
            let mut trial = members.clone();
            trial.push(c);
            let (m, _) = eval.evaluate(&trial, lambda.as_ref());
            let gain = m.effective_n - current.effective_n;
            let unit_cost = cost.as_ref().and_then(|k| k[c]);
            CandidateRow {
                id: design.ids[c].clone(),
                name: design.names[c].clone(),
                group: view.group.and_then(|g| {
                    view.categorical[g].values[design.units[c]]
                        .map(|l| view.categorical[g].levels[l].clone())
                }),
                probability: probability[c],
                cost: unit_cost,
                if_joined: m,
                gain,
                expected_gain: probability[c] * gain,
                expected_gain_per_cost: unit_cost.map(|uc| probability[c] * gain / uc),
                stability: None,
                in_plan: picks.iter().any(|p| p.unit == c),
            }
        })
        .collect();
    rows.sort_by(|a, b| {
        b.expected_gain
            .total_cmp(&a.expected_gain)
            .then(b.probability.total_cmp(&a.probability))
            .then(a.id.cmp(&b.id))
    });

    // Stability by bootstrap over the eligible universe.
    let seed = settings.seed;
    let stability = if plan_settings.replicates > 0 {
        Some(bootstrap(
            &design,
            view,
            settings,
            plan_settings,
            budget,
            seed,
        )?)
    } else {
        None
    };
    if let Some(s) = &stability {
        for r in &mut rows {
            r.stability =
                Some(s.get(&r.id).copied().unwrap_or(0.0) / plan_settings.replicates as f64);
        }
    }
    let stability_of = |id: &str| {
        stability
            .as_ref()
            .map(|s| s.get(id).copied().unwrap_or(0.0) / plan_settings.replicates as f64)
    };

    let mut cumulative = 0.0;
    let steps: Vec<Step> = picks
        .iter()
        .map(|p| {
            let unit_cost = cost.as_ref().and_then(|k| k[p.unit]);
            cumulative += unit_cost.unwrap_or(0.0);
            Step {
                id: design.ids[p.unit].clone(),
                name: design.names[p.unit].clone(),
                effective_n: p.metrics.effective_n,
                mean_abs_smd: p.metrics.mean_abs_smd,
                max_abs_smd: p.metrics.max_abs_smd,
                feasible: p.metrics.feasible,
                gain: p.gain,
                probability: probability[p.unit],
                expected_gain: probability[p.unit] * p.gain,
                cost: unit_cost,
                cumulative_cost: cost.as_ref().map(|_| cumulative),
                stability: stability_of(&design.ids[p.unit]),
            }
        })
        .collect();

    // Baselines over the same number of recruits.
    let mut by_probability = candidates.clone();
    by_probability.sort_by(|&a, &b| {
        probability[b]
            .total_cmp(&probability[a])
            .then(design.ids[a].cmp(&design.ids[b]))
    });
    let likeliest = path(
        &eval,
        &members,
        &by_probability[..k.min(by_probability.len())],
        &design,
    );
    let mut rng = Rng::new(seed ^ 0xBA5E_11AE);
    let draws = plan_settings.random_draws.max(1);
    let mut random = BaselinePath {
        ids: Vec::new(),
        effective_n: vec![0.0; k],
        mean_abs_smd: vec![0.0; k],
        max_abs_smd: vec![0.0; k],
        feasible_share: vec![0.0; k],
    };
    for _ in 0..draws {
        let mut order = candidates.clone();
        rng.shuffle(&mut order);
        let p = path(&eval, &members, &order[..k.min(order.len())], &design);
        for j in 0..p.effective_n.len() {
            random.effective_n[j] += p.effective_n[j] / draws as f64;
            random.mean_abs_smd[j] += p.mean_abs_smd[j] / draws as f64;
            random.max_abs_smd[j] += p.max_abs_smd[j] / draws as f64;
            random.feasible_share[j] += p.feasible_share[j] / draws as f64;
        }
    }

    let what_if = if plan_settings.joiners.is_empty() {
        None
    } else {
        let mut trial = members.clone();
        for id in &plan_settings.joiners {
            let i = design.ids.iter().position(|d| d == id).ok_or_else(|| PlanError::Request(format!("'{id}' is not an eligible country of this wave (or was left out for missing values)")))?;
            if design.participated[i] {
                return Err(PlanError::Request(format!("'{id}' already takes part")));
            }
            trial.push(i);
        }
        let (metrics, _) = eval.evaluate(&trial, lambda.as_ref());
        let smd = eval
            .smd_columns
            .iter()
            .zip(&design.balance)
            .map(|((values, mean, sd), col)| {
                let m = trial.iter().map(|&i| values[i]).sum::<f64>() / trial.len() as f64;
                (
                    col.label.clone(),
                    if *sd > 0.0 { (m - mean) / sd } else { 0.0 },
                )
            })
            .collect();
        Some(WhatIf {
            joiners: plan_settings.joiners.clone(),
            metrics,
            smd,
        })
    };

    if matches!(budget, Budget::Cost(_))
        && cost
            .as_ref()
            .is_some_and(|c| candidates.iter().any(|&i| c[i].is_none()))
    {
        notes.push(
            "Candidates without a (positive) cost are left out of a cost-budget plan.".to_string(),
        );
    }
    notes.push("Gains assume the recruits' indicators stay as in the frame, and probabilities of joining come from the chosen source; both are estimates.".to_string());

    Ok(Plan {
        wave: Some(view.wave),
        settings: settings.clone(),
        plan: plan_settings.clone(),
        seed,
        n_eligible: design.n(),
        n_participants: members.len(),
        current,
        candidates: rows,
        steps,
        baselines: Baselines {
            likeliest,
            random,
            draws,
        },
        what_if,
        notes,
    })
}

/// Balance after adding `order`'s units one by one.
fn path(eval: &Evaluator, members: &[usize], order: &[usize], design: &Design) -> BaselinePath {
    let mut set = members.to_vec();
    let mut lambda = None;
    let mut out = BaselinePath {
        ids: Vec::new(),
        effective_n: Vec::new(),
        mean_abs_smd: Vec::new(),
        max_abs_smd: Vec::new(),
        feasible_share: Vec::new(),
    };
    for &u in order {
        set.push(u);
        let (m, l) = eval.evaluate(&set, lambda.as_ref());
        if l.is_some() {
            lambda = l;
        }
        out.ids.push(design.ids[u].clone());
        out.effective_n.push(m.effective_n);
        out.mean_abs_smd.push(m.mean_abs_smd);
        out.max_abs_smd.push(m.max_abs_smd);
        out.feasible_share.push(f64::from(u8::from(m.feasible)));
    }
    out
}

/// Resamples the eligible universe (countries with replacement), refits, replans; counts
/// how often each candidate is picked. Replicates are shared among the cores; each has its
/// own seeded generator, so results do not depend on the number of threads.
fn bootstrap(
    design: &Design,
    view: &WaveView,
    settings: &Settings,
    plan_settings: &PlanSettings,
    budget: Budget,
    seed: u64,
) -> Result<BTreeMap<String, f64>, PlanError> {
    let n = design.n();
    let replicates = plan_settings.replicates;
    let column_probability = match &plan_settings.feasibility {
        Feasibility::Model => None,
        Feasibility::Column(_) => Some(probabilities(design, view, settings, plan_settings)?),
    };
    let cost = costs(design, view, plan_settings)?;
    let one = |r: usize| -> Vec<String> {
        let mut rng = Rng::new(seed.wrapping_add(0x9E37_79B9).wrapping_mul(r as u64 + 1));
        let draw: Vec<usize> = (0..n).map(|_| rng.below(n)).collect();
        let sample = design.subset(&draw);
        let probability = match &column_probability {
            Some(p) => draw.iter().map(|&i| p[i]).collect(),
            None => match participation::fit_model(&sample, settings.model, false) {
                Ok(m) => m.propensity,
                Err(_) => return Vec::new(),
            },
        };
        let sample_cost: Option<Vec<Option<f64>>> =
            cost.as_ref().map(|c| draw.iter().map(|&i| c[i]).collect());
        let members: Vec<usize> = (0..n).filter(|&i| sample.participated[i]).collect();
        let mut seen = std::collections::BTreeSet::new();
        let candidates: Vec<usize> = (0..n)
            .filter(|&i| !sample.participated[i] && seen.insert(draw[i]))
            .collect();
        if members.is_empty() || candidates.is_empty() {
            return Vec::new();
        }
        let eval = Evaluator::new(&sample);
        let budget = match budget {
            Budget::Count(k) => Budget::Count(k.min(candidates.len())),
            b => b,
        };
        // Duplicated countries join together.
        let same = |i: usize| (0..n).filter(|&j| draw[j] == draw[i]).collect::<Vec<_>>();
        greedy(
            &eval,
            &members,
            &candidates,
            &probability,
            sample_cost.as_deref(),
            budget,
            &same,
        )
        .into_iter()
        .map(|p| design.ids[draw[p.unit]].clone())
        .collect()
    };
    let threads = std::thread::available_parallelism()
        .map_or(1, |t| t.get())
        .min(replicates.max(1));
    let mut counts: BTreeMap<String, f64> = BTreeMap::new();
    std::thread::scope(|scope| {
        let handles: Vec<_> = (0..threads)
            .map(|t| {
                let one = &one;
                scope.spawn(move || {
                    (t..replicates)
                        .step_by(threads)
                        .map(one)
                        .collect::<Vec<_>>()
                })
            })
            .collect();
        for h in handles {
            if let Ok(results) = h.join() {
                for ids in results {
                    for id in ids {
                        *counts.entry(id).or_insert(0.0) += 1.0;
                    }
                }
            }
        }
    });
    Ok(counts)
}
