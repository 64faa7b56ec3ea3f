//! The recruitment planner: which absent eligible countries to invite so that the
//! programme can expect the best balance once the invited have answered.
//!
//! Each invited country joins independently with its chance of joining; the plan maximises
//! the expected balance over who joins (see [`objective`]): greedy, then exchange
//! ([`search`]), with the exact optimum on small instances and the plan's percentile among
//! random plans as evidence ([`search`], [`baselines`]); chances and costs come from
//! [`chances`], stability by bootstrap from [`stability`].

pub mod baselines;
pub mod chances;
pub mod evaluate;
pub mod history;
pub mod objective;
pub mod search;
pub mod stability;

use serde::{Deserialize, Serialize};

use self::baselines::{baselines, prefix_path, Baselines};
use self::chances::{chances, cost_column, costs, support, Chances};
use self::evaluate::Evaluator;
pub use self::evaluate::SetMetrics;
pub use self::objective::ObjectiveKind;
use self::objective::{
    outcomes, Draws, Expected, Memo, Offer, REPORT_DRAWS, REPORT_EXACT_OUTCOMES,
};
use self::search::{exact_optimum, exchange, greedy, Budget, Swap, EXCHANGE_POOL};
use super::design::{self, Design};
use super::participation::AnalysisError;
use super::settings::Settings;
use crate::project::{Project, WaveView};

/// Countries to recruit when neither a count nor a cost budget is given (page and CLI).
pub const DEFAULT_PLAN_SIZE: usize = 5;
/// Bootstrap replicates for stability unless asked otherwise.
pub const DEFAULT_REPLICATES: usize = 200;
/// Random plans for the "at random" baseline and the plan's percentile.
pub const DEFAULT_RANDOM_DRAWS: usize = 1000;
/// The exact optimum is enumerated while at most this many join outcomes need evaluating.
pub const EXACT_OPTIMUM_SETS: usize = 70_000;

/// Where the chance of joining comes from.
#[derive(Debug, Clone, PartialEq, Default, Serialize, Deserialize)]
#[serde(rename_all = "kebab-case")]
pub enum Feasibility {
    /// The project's `[recruitment] feasibility` column when it names one, else the model.
    #[default]
    Auto,
    /// The participation model's leave-one-out probability.
    Model,
    /// A model of taking part fitted on the earlier waves, with past participation as a
    /// predictor (see [`history`]).
    History,
    /// A column of probabilities (or 0/1 judgements) in the frame.
    Column(String),
}

impl Feasibility {
    /// "auto", "model" or a column name.
    pub fn parse(s: &str) -> Feasibility {
        match s {
            "auto" | "" => Feasibility::Auto,
            "model" => Feasibility::Model,
            "history" => Feasibility::History,
            c => Feasibility::Column(c.to_string()),
        }
    }

    pub fn as_str(&self) -> &str {
        match self {
            Feasibility::Auto => "auto",
            Feasibility::Model => "model",
            Feasibility::History => "history",
            Feasibility::Column(c) => c,
        }
    }
}

#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct PlanSettings {
    /// Number of countries to recruit (count budget); the alternative to `cost_budget`.
    pub budget: Option<usize>,
    /// Total cost allowed (cost budget), with the cost column (default: the project's).
    pub cost_budget: Option<f64>,
    pub cost_column: Option<String>,
    pub feasibility: Feasibility,
    /// What the plan maximises in expectation.
    pub objective: ObjectiveKind,
    /// Bootstrap replicates for the stability of each pick (0: none).
    pub replicates: usize,
    /// Random plans for the "at random" baseline.
    pub random_draws: usize,
    /// Hypothetical joiners for the what-if view.
    pub joiners: Vec<String>,
    /// Offer support where the project's `[recruitment] support_cost` and
    /// `support_chance` columns give it (planned under a cost budget only).
    pub support: bool,
}

impl Default for PlanSettings {
    fn default() -> Self {
        PlanSettings {
            budget: None,
            cost_budget: None,
            cost_column: None,
            feasibility: Feasibility::Auto,
            objective: ObjectiveKind::EffectiveN,
            replicates: DEFAULT_REPLICATES,
            random_draws: DEFAULT_RANDOM_DRAWS,
            joiners: Vec::new(),
            support: true,
        }
    }
}

#[derive(Debug, Clone, Serialize)]
pub struct CandidateRow {
    pub id: String,
    pub name: String,
    pub group: Option<String>,
    pub probability: f64,
    pub cost: Option<f64>,
    /// Chance of joining with support and what the support costs (on top of `cost`),
    /// where the project offers support.
    pub support_probability: Option<f64>,
    pub support_cost: Option<f64>,
    /// The set's balance if this candidate alone joined.
    pub if_joined: SetMetrics,
    /// Rise in the effective number if it joins.
    pub gain: f64,
    /// Chance of joining × gain: the rise in the expected effective number if it alone
    /// were invited.
    pub expected_gain: f64,
    pub expected_gain_per_cost: Option<f64>,
    /// Distance to the nearest current participant (standardised indicators).
    pub distance: f64,
    /// Share of bootstrap replicates whose plan picks it.
    pub stability: Option<f64>,
    pub in_plan: bool,
}

/// One invitation of the plan, with the expected balance once the first invitations up to
/// this one have been answered.
#[derive(Debug, Clone, Serialize)]
pub struct Step {
    pub id: String,
    pub name: String,
    /// Invited with support (a higher chance of joining at a cost).
    pub supported: bool,
    /// The chance of joining as invited (with support when `supported`).
    pub probability: f64,
    /// The invitation's cost, support included.
    pub cost: Option<f64>,
    /// The support's part of `cost` (when supported).
    pub support_cost: Option<f64>,
    /// What support buys at the margin, the rest of the plan as it is: the rise in the
    /// expected objective from supporting this country rather than inviting it plain,
    /// per unit of support cost (negative when support would be dropped; None where no
    /// support is on offer).
    pub support_gain_per_cost: Option<f64>,
    pub cumulative_cost: Option<f64>,
    /// Expected effective number after entropy balancing over who joins (0 for outcomes
    /// where balance is infeasible).
    pub expected_effective_n: f64,
    /// Its Monte Carlo standard error, present when Monte Carlo was used.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub expected_effective_n_mc_error: Option<f64>,
    /// Rise in the expected effective number over the previous step.
    pub expected_gain: f64,
    /// That rise per unit of cost (what money buys at the margin).
    pub expected_gain_per_cost: Option<f64>,
    pub expected_max_abs_smd: f64,
    pub expected_mean_abs_smd: f64,
    /// Chance that balance is feasible.
    pub feasible_chance: f64,
    /// The same set if every invited country joined (secondary).
    pub effective_n_if_all_join: f64,
    pub max_abs_smd_if_all_join: f64,
    pub mean_abs_smd_if_all_join: f64,
    pub feasible_if_all_join: bool,
    /// Entered the plan by the exchange step rather than the greedy one.
    pub exchanged: bool,
    pub stability: Option<f64>,
}

/// How close the plan comes to the best plan.
#[derive(Debug, Clone, Serialize)]
pub struct Optimality {
    /// "exact" (every plan of the size enumerated) or "search" (best of the plan and the
    /// random plans).
    pub method: &'static str,
    pub objective: ObjectiveKind,
    /// The plan's expected objective (effective number; largest |SMD|; chance of
    /// feasibility), as reported in its last step.
    pub plan_value: f64,
    /// The best expected objective found.
    pub best_found: f64,
    pub best_plan: Vec<String>,
    /// Percentage of random plans of the same size (or within the same cost) whose
    /// expected objective is below the plan's (ties count half).
    pub plan_percentile_among_random: f64,
    pub random_plans: usize,
    /// The greedy plan's expected objective before exchange.
    pub greedy_value: f64,
    /// Exchanges made: (country out, country in).
    pub swaps: Vec<(String, String)>,
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
    /// The settings as applied (budget resolved, cost column resolved).
    pub plan: PlanSettings,
    pub seed: u64,
    pub n_eligible: usize,
    pub n_participants: usize,
    pub n_candidates: usize,
    pub chances: Chances,
    /// How the expectations were computed: "exact" or "monte-carlo" (for the last step).
    pub expectation: &'static str,
    /// Monte Carlo draws of the join outcomes where used.
    pub expectation_draws: usize,
    pub current: SetMetrics,
    pub candidates: Vec<CandidateRow>,
    pub steps: Vec<Step>,
    pub baselines: Baselines,
    pub optimality: Optimality,
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

/// What every step of the planning needs, gathered and checked once.
struct Inputs {
    design: Design,
    chances: Chances,
    cost: Option<Vec<Option<f64>>>,
    /// Per unit: chance of joining with support and support's cost.
    support: Option<chances::SupportOffers>,
    members: Vec<usize>,
    candidates: Vec<usize>,
    budget: Budget,
    applied: PlanSettings,
}

impl Inputs {
    fn gather(
        project: Option<&Project>,
        view: &WaveView,
        settings: &Settings,
        ps: &PlanSettings,
    ) -> Result<Inputs, PlanError> {
        let design = design::build(view, settings).map_err(AnalysisError::from)?;
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
        let budget = resolve_budget(ps, candidates.len())?;
        let chances = chances(project, &design, view, settings, ps)?;
        let cost = costs(&design, view, ps)?;
        let support = support(&design, view, ps)?;
        let mut applied = ps.clone();
        applied.cost_column = cost_column(view, ps);
        if let Budget::Count(k) = budget {
            applied.budget = Some(k);
        }
        Ok(Inputs {
            design,
            chances,
            cost,
            support,
            members,
            candidates,
            budget,
            applied,
        })
    }

    /// Every plain invitation on offer (one per candidate).
    fn plain_menu(&self) -> Vec<Offer> {
        self.candidates
            .iter()
            .map(|&c| Offer {
                unit: c,
                supported: false,
                probability: self.chances.probability[c],
                cost: self.cost.as_ref().and_then(|k| k[c]),
            })
            .collect()
    }

    /// The supported invitation of unit `c`, where support is on offer and priced.
    fn supported_offer(&self, c: usize) -> Option<Offer> {
        let (chance, extra) = self.support.as_ref()?[c]?;
        let base = self.cost.as_ref()?[c]?;
        Some(Offer {
            unit: c,
            supported: true,
            probability: chance,
            cost: Some(base + extra),
        })
    }

    /// Every invitation on offer: the plain ones and, under a cost budget, the supported
    /// ones (the search takes at most one offer per country).
    fn menu(&self) -> Vec<Offer> {
        let mut menu = self.plain_menu();
        if matches!(self.budget, Budget::Cost(_)) {
            menu.extend(
                self.candidates
                    .iter()
                    .filter_map(|&c| self.supported_offer(c)),
            );
        }
        menu
    }

    /// The support's part of an offer's cost.
    fn support_cost(&self, offer: &Offer) -> Option<f64> {
        offer
            .supported
            .then(|| self.support.as_ref()?[offer.unit].map(|(_, c)| c))
            .flatten()
    }
}

/// A count budget or a cost budget, not both.
fn resolve_budget(ps: &PlanSettings, candidates: usize) -> Result<Budget, PlanError> {
    match (ps.budget, ps.cost_budget) {
        (Some(_), Some(_)) => Err(PlanError::Request("give a number of countries or a cost budget, not both".to_string())),
        (None, Some(b)) if b > 0.0 && b.is_finite() => Ok(Budget::Cost(b)),
        (None, Some(b)) => Err(PlanError::Request(format!("the cost budget must be a positive number, not {b}"))),
        (Some(0), None) => Err(PlanError::Request("the budget must be at least one country".to_string())),
        (Some(k), None) if k > candidates => Err(PlanError::Request(format!("the budget of {k} countries exceeds the {candidates} eligible countries that do not take part; ask for at most {candidates}"))),
        (Some(k), None) => Ok(Budget::Count(k)),
        (None, None) => Ok(Budget::Count(candidates.min(DEFAULT_PLAN_SIZE))),
    }
}

/// The objective's natural value from an expected score (largest |SMD| is maximised as its
/// negative).
fn natural(kind: ObjectiveKind, score: f64) -> f64 {
    match kind {
        ObjectiveKind::LargestSmd => -score,
        _ => score,
    }
}

/// A rise in the score in the objective's natural direction (largest |SMD| falls).
fn natural_gain(kind: ObjectiveKind, rise: f64) -> f64 {
    match kind {
        ObjectiveKind::LargestSmd => -rise,
        _ => rise,
    }
}

/// The reported expectation of a plan.
fn report_expected(memo: &mut Memo, draws: &Draws, plan: &[Offer]) -> Expected {
    memo.expected(&outcomes(plan, draws, REPORT_EXACT_OUTCOMES, REPORT_DRAWS))
}

/// Builds the plan for one wave of a bare frame (no history: `feasibility` "history" is
/// refused).
pub fn plan(
    view: &WaveView,
    settings: &Settings,
    plan_settings: &PlanSettings,
) -> Result<Plan, PlanError> {
    plan_with(None, view, settings, plan_settings)
}

/// Builds the plan for one wave of a project (whose earlier waves the "history" chances
/// learn from).
pub fn plan_for(
    project: &Project,
    view: &WaveView,
    settings: &Settings,
    plan_settings: &PlanSettings,
) -> Result<Plan, PlanError> {
    plan_with(Some(project), view, settings, plan_settings)
}

/// A plan's expected objective on one frame, at the plan's reported precision.
#[derive(Debug, Clone, Copy, Serialize)]
pub struct PlanValue {
    /// In the objective's natural direction (as `Optimality::plan_value`).
    pub estimate: f64,
    /// Monte Carlo standard error of the expectation; 0 when every outcome is enumerated.
    pub mc_error: f64,
}

/// The expected objective of the invitations `picks` (country code, invited with support)
/// on `view`, with the chances, costs and draws of who joins that [`plan_for`] would use
/// there: so that one plan can be judged on several frames (the completed frames of
/// multiple imputation). A country that is not a candidate of this view is refused.
pub fn expected_objective(
    project: Option<&Project>,
    view: &WaveView,
    settings: &Settings,
    plan_settings: &PlanSettings,
    picks: &[(String, bool)],
) -> Result<PlanValue, PlanError> {
    let inputs = Inputs::gather(project, view, settings, plan_settings)?;
    let design = &inputs.design;
    let kind = plan_settings.objective;
    let eval = Evaluator::new(design);
    let mut memo = Memo::new(&eval, &inputs.members, kind);
    let draws = Draws::new(settings.seed, REPORT_DRAWS, design.n());
    let plain = inputs.plain_menu();
    let offers = picks
        .iter()
        .map(|(id, supported)| {
            let offer = plain
                .iter()
                .find(|o| design.ids[o.unit] == *id)
                .copied()
                .and_then(|o| {
                    if *supported {
                        inputs.supported_offer(o.unit)
                    } else {
                        Some(o)
                    }
                });
            offer.ok_or_else(|| {
                PlanError::Request(format!(
                    "'{id}' is not a candidate{} of wave {}",
                    if *supported { " with support" } else { "" },
                    view.wave
                ))
            })
        })
        .collect::<Result<Vec<Offer>, PlanError>>()?;
    let e = report_expected(&mut memo, &draws, &offers);
    Ok(PlanValue {
        estimate: natural(kind, e.score),
        mc_error: e.score_mc_error.unwrap_or(0.0),
    })
}

fn plan_with(
    project: Option<&Project>,
    view: &WaveView,
    settings: &Settings,
    plan_settings: &PlanSettings,
) -> Result<Plan, PlanError> {
    let inputs = Inputs::gather(project, view, settings, plan_settings)?;
    let design = &inputs.design;
    let kind = plan_settings.objective;
    let seed = settings.seed;
    let eval = Evaluator::new(design);
    let mut memo = Memo::new(&eval, &inputs.members, kind);
    let draws = Draws::new(seed, REPORT_DRAWS, design.n());
    let current = memo.get(&[]);
    let menu = inputs.menu();
    let plain = inputs.plain_menu();

    // Search: greedy, then exchange.
    let found = greedy(
        &mut memo,
        &draws,
        &menu,
        inputs.budget,
        objective::SEARCH_OUTCOMES,
    );
    let greedy_plan = found.plan.clone();
    let mut chosen = found.plan;
    let mut pool: Vec<usize> = found
        .last_round
        .iter()
        .take(EXCHANGE_POOL)
        .map(|t| t.offer)
        .collect();
    // The plan's own offers and their other variant (with or without support), so that
    // the exchange can toggle support.
    for o in &chosen {
        pool.extend(
            menu.iter()
                .enumerate()
                .filter(|(_, m)| m.unit == o.unit)
                .map(|(i, _)| i),
        );
    }
    pool.sort_unstable();
    pool.dedup();
    let swaps = exchange(&mut memo, &draws, &menu, &pool, inputs.budget, &mut chosen);

    let mut steps = report_steps(&mut memo, &draws, &inputs, &chosen, &greedy_plan);
    let mut rows = candidate_rows(&mut memo, view, &inputs, &chosen);
    let baselines = baselines(
        &mut memo,
        &draws,
        &plain,
        inputs.budget,
        &design.ids,
        plan_settings.random_draws,
        seed,
    );
    let optimality = optimality(
        &mut memo,
        &draws,
        &inputs,
        &menu,
        &chosen,
        &greedy_plan,
        &swaps,
        &baselines,
    );

    if plan_settings.replicates > 0 {
        // Chances that do not come from this wave's model stay with their country.
        let fixed = inputs
            .chances
            .fixed()
            .then_some(inputs.chances.probability.as_slice());
        let counts = stability::bootstrap(
            design,
            fixed,
            inputs.cost.as_deref(),
            settings,
            kind,
            inputs.budget,
            plan_settings.replicates,
            seed,
        )?;
        let share = |id: &str| {
            Some(counts.get(id).copied().unwrap_or(0.0) / plan_settings.replicates as f64)
        };
        for r in &mut rows {
            r.stability = share(&r.id);
        }
        for s in &mut steps {
            s.stability = share(&s.id);
        }
    }
    let what_if = what_if(&memo, design, &inputs, &plan_settings.joiners)?;
    let notes = notes(&inputs, &current, &steps, &swaps);
    let last_exact = steps
        .last()
        .is_none_or(|s| s.expected_effective_n_mc_error.is_none());
    Ok(Plan {
        wave: Some(view.wave),
        settings: settings.clone(),
        plan: inputs.applied.clone(),
        seed,
        n_eligible: design.n(),
        n_participants: inputs.members.len(),
        n_candidates: inputs.candidates.len(),
        chances: inputs.chances.clone(),
        expectation: if last_exact { "exact" } else { "monte-carlo" },
        expectation_draws: if last_exact { 0 } else { REPORT_DRAWS },
        current,
        candidates: rows,
        steps,
        baselines,
        optimality,
        what_if,
        notes,
    })
}

/// The reported figures of each step: expectations over who joins of the first j
/// invitations, and the set if all of them joined.
fn report_steps(
    memo: &mut Memo,
    draws: &Draws,
    inputs: &Inputs,
    chosen: &[Offer],
    greedy_plan: &[Offer],
) -> Vec<Step> {
    let design = &inputs.design;
    let path = prefix_path(memo, draws, chosen);
    let plan_score = report_expected(memo, draws, chosen).score;
    // What support buys at each step, the rest of the plan as it is.
    let support_margins: Vec<Option<f64>> = (0..chosen.len())
        .map(|j| {
            let o = chosen[j];
            let (supported, plain) = if o.supported {
                (
                    o,
                    inputs.plain_menu().into_iter().find(|p| p.unit == o.unit)?,
                )
            } else {
                (inputs.supported_offer(o.unit)?, o)
            };
            let support_cost = inputs.support_cost(&supported)?;
            let mut other = chosen.to_vec();
            other[j] = if o.supported { plain } else { supported };
            let other_score = report_expected(memo, draws, &other).score;
            let (with, without) = if o.supported {
                (plan_score, other_score)
            } else {
                (other_score, plan_score)
            };
            (support_cost > 0.0).then(|| natural_gain(memo.kind, with - without) / support_cost)
        })
        .collect();
    let current = memo.get(&[]);
    let mut previous = current.effective_n;
    let mut cumulative = 0.0;
    let mut all: Vec<usize> = Vec::new();
    chosen
        .iter()
        .zip(path)
        .zip(support_margins)
        .map(|((o, e), support_gain_per_cost)| {
            cumulative += o.cost.unwrap_or(0.0);
            all.push(o.unit);
            all.sort_unstable();
            let if_all = memo.get(&all);
            let gain = e.effective_n - previous;
            previous = e.effective_n;
            Step {
                id: design.ids[o.unit].clone(),
                name: design.names[o.unit].clone(),
                supported: o.supported,
                probability: o.probability,
                cost: o.cost,
                support_cost: inputs.support_cost(o),
                support_gain_per_cost,
                cumulative_cost: inputs.cost.as_ref().map(|_| cumulative),
                expected_effective_n: e.effective_n,
                expected_effective_n_mc_error: e.effective_n_mc_error,
                expected_gain: gain,
                expected_gain_per_cost: o.cost.map(|c| gain / c),
                expected_max_abs_smd: e.max_abs_smd,
                expected_mean_abs_smd: e.mean_abs_smd,
                feasible_chance: e.feasible_chance,
                effective_n_if_all_join: if_all.effective_n,
                max_abs_smd_if_all_join: if_all.max_abs_smd,
                mean_abs_smd_if_all_join: if_all.mean_abs_smd,
                feasible_if_all_join: if_all.feasible,
                exchanged: !greedy_plan.iter().any(|g| g == o),
                stability: None,
            }
        })
        .collect()
}

/// Each candidate on its own, ranked by expected gain.
fn candidate_rows(
    memo: &mut Memo,
    view: &WaveView,
    inputs: &Inputs,
    chosen: &[Offer],
) -> Vec<CandidateRow> {
    let design = &inputs.design;
    let current = memo.get(&[]);
    memo.fill(
        inputs
            .candidates
            .iter()
            .map(|&c| vec![c])
            .collect::<Vec<_>>()
            .iter(),
    );
    let mut rows: Vec<CandidateRow> = inputs
        .candidates
        .iter()
        .map(|&c| {
            let m = memo.get(&[c]);
            let p = inputs.chances.probability[c];
            let gain = m.effective_n - current.effective_n;
            let unit_cost = inputs.cost.as_ref().and_then(|k| k[c]);
            CandidateRow {
                id: design.ids[c].clone(),
                name: design.names[c].clone(),
                group: view.group.and_then(|g| {
                    view.categorical[g].values[design.units[c]]
                        .map(|l| view.categorical[g].levels[l].clone())
                }),
                probability: p,
                cost: unit_cost,
                support_probability: inputs
                    .support
                    .as_ref()
                    .and_then(|s| s[c])
                    .map(|(chance, _)| chance),
                support_cost: inputs.support.as_ref().and_then(|s| s[c]).map(|(_, k)| k),
                if_joined: m,
                gain,
                expected_gain: p * gain,
                expected_gain_per_cost: unit_cost.map(|uc| p * gain / uc),
                distance: baselines::distance_to_participants(memo.eval, memo.members, c),
                stability: None,
                in_plan: chosen.iter().any(|o| o.unit == c),
            }
        })
        .collect();
    rows.sort_by(|a, b| {
        b.expected_gain
            .total_cmp(&a.expected_gain)
            .then(b.probability.total_cmp(&a.probability))
            .then(a.id.cmp(&b.id))
    });
    rows
}

#[allow(clippy::too_many_arguments)]
fn optimality(
    memo: &mut Memo,
    draws: &Draws,
    inputs: &Inputs,
    menu: &[Offer],
    chosen: &[Offer],
    greedy_plan: &[Offer],
    swaps: &[Swap],
    baselines: &Baselines,
) -> Optimality {
    let kind = memo.kind;
    let ids = &inputs.design.ids;
    let plan_score = report_expected(memo, draws, chosen).score;
    let greedy_score = report_expected(memo, draws, greedy_plan).score;
    let below = baselines
        .random_scores
        .iter()
        .map(|&s| {
            if s < plan_score - 1e-12 {
                1.0
            } else if s <= plan_score + 1e-12 {
                0.5
            } else {
                0.0
            }
        })
        .sum::<f64>();
    let percentile = 100.0 * below / baselines.random_scores.len().max(1) as f64;
    let exact = match inputs.budget {
        Budget::Count(k) => exact_optimum(memo, menu, k, EXACT_OPTIMUM_SETS),
        Budget::Cost(_) => None,
    };
    let (method, best_score, best_plan) = match exact {
        Some((score, plan)) => ("exact", score, plan),
        None => {
            // The best random plan by its own draws, re-evaluated at reported precision.
            let top = baselines
                .random_scores
                .iter()
                .enumerate()
                .max_by(|a, b| a.1.total_cmp(b.1))
                .map(|(i, _)| i);
            let mut best = (plan_score, chosen.to_vec());
            if let Some(i) = top {
                let candidate = baselines.random_plans[i].clone();
                let score = report_expected(memo, draws, &candidate).score;
                if score > best.0 {
                    best = (score, candidate);
                }
            }
            ("search", best.0, best.1)
        }
    };
    Optimality {
        method,
        objective: kind,
        plan_value: natural(kind, plan_score),
        best_found: natural(
            kind,
            best_score.max(if method == "exact" {
                f64::NEG_INFINITY
            } else {
                plan_score
            }),
        ),
        best_plan: best_plan.iter().map(|o| ids[o.unit].clone()).collect(),
        plan_percentile_among_random: percentile,
        random_plans: baselines.random_scores.len(),
        greedy_value: natural(kind, greedy_score),
        swaps: swaps
            .iter()
            .map(|s| (ids[s.out.unit].clone(), ids[s.into.unit].clone()))
            .collect(),
    }
}

fn what_if(
    memo: &Memo,
    design: &Design,
    inputs: &Inputs,
    joiners: &[String],
) -> Result<Option<WhatIf>, PlanError> {
    if joiners.is_empty() {
        return Ok(None);
    }
    let mut joined = Vec::new();
    for id in joiners {
        let i = design.ids.iter().position(|d| d == id).ok_or_else(|| PlanError::Request(format!("'{id}' is not an eligible country of this wave (or was left out for missing values)")))?;
        if design.participated[i] {
            return Err(PlanError::Request(format!("'{id}' already takes part")));
        }
        joined.push(i);
    }
    let metrics = memo.compute(&joined);
    let mut set = inputs.members.clone();
    set.extend(&joined);
    let smd = memo
        .eval
        .smds(&set)
        .into_iter()
        .zip(&design.balance)
        .map(|(d, col)| (col.label.clone(), d))
        .collect();
    Ok(Some(WhatIf {
        joiners: joiners.to_vec(),
        metrics,
        smd,
    }))
}

fn notes(inputs: &Inputs, current: &SetMetrics, steps: &[Step], swaps: &[Swap]) -> Vec<String> {
    let mut notes = Vec::new();
    if !current.feasible {
        notes.push("With the current participants no positive weights reproduce the eligible universe's means (some kinds of countries have no participant at all): invitations that make balance feasible come first.".to_string());
    }
    if let Some(s) = steps.last() {
        if s.expected_effective_n_mc_error.is_some() {
            notes.push(format!("More than 10 invitations have uncertain outcomes: expectations are Monte Carlo means over {REPORT_DRAWS} draws of who joins (common random numbers), with their standard errors."));
        }
    }
    if !swaps.is_empty() {
        notes.push(format!("The exchange step improved the greedy plan by {} swap(s); swapped-in countries are marked.", swaps.len()));
    }
    if inputs.applied.replicates > 0 {
        notes.push(format!(
            "Stability: each bootstrap resample is replanned greedily on one draw of who joins (each trial country's own join integrated exactly), without the exchange step{}.",
            if !inputs.chances.fixed() { ", with the refitted model's in-sample chances (a leave-one-out refit per country per resample would cost too much)" } else { "" }
        ));
    }
    if let Some(h) = &inputs.chances.history {
        let check = h.check.as_ref().map_or_else(
            || " There are too few waves to check such a forecast on a past wave.".to_string(),
            |c| format!(
                " Checked on the past: the same model fitted on wave(s) {} forecast wave {} with an area under the ROC curve of {} (its calibration table is on the page and in the JSON).",
                c.trained_on.iter().map(i64::to_string).collect::<Vec<_>>().join(", "),
                c.wave,
                c.auc.map_or_else(|| "not estimable".to_string(), |a| format!("{a:.2}"))
            ),
        );
        notes.push(format!(
            "Chances of joining come from the programme's history: a model of taking part fitted on wave(s) {} ({} country-waves), with taking part in the wave before as a predictor.{check}",
            h.trained_on.iter().map(i64::to_string).collect::<Vec<_>>().join(", "),
            h.n_training
        ));
    }
    if inputs.chances.in_sample_fallbacks > 0 {
        notes.push(format!("For {} countries the leave-one-out refit failed; their chance of joining is the in-sample one.", inputs.chances.in_sample_fallbacks));
    }
    if matches!(inputs.budget, Budget::Cost(_))
        && inputs
            .cost
            .as_ref()
            .is_some_and(|c| inputs.candidates.iter().any(|&i| c[i].is_none()))
    {
        notes.push(
            "Candidates without a (positive) cost are left out of a cost-budget plan.".to_string(),
        );
    }
    if let Some(support) = &inputs.support {
        let offered = inputs
            .candidates
            .iter()
            .filter(|&&c| support[c].is_some())
            .count();
        if matches!(inputs.budget, Budget::Cost(_)) {
            let chosen = steps.iter().filter(|s| s.supported).count();
            notes.push(format!("Support is on offer for {offered} candidates: the plan chooses within the one budget whom to invite and whom to invite with support ({chosen} supported). The random and other baselines invite without support."));
        } else {
            notes.push(format!("The project offers support for {offered} candidates, but support is planned only under a cost budget (it costs money, not a place): give a cost budget to weigh it."));
        }
    }
    notes.push("Expectations assume the invited countries decide independently, with the chances of joining shown, and that their indicators stay as in the frame; both are estimates.".to_string());
    notes
}
