//! Simple rules the plan is measured against, on the same expected objective: the k
//! likeliest to join, k at random, and the k most different from the current participants.

use rayon::prelude::*;
use serde::Serialize;

use super::evaluate::Evaluator;
use super::objective::{
    outcomes, Draws, Expected, Memo, Offer, REPORT_DRAWS, REPORT_EXACT_OUTCOMES,
};
use super::search::Budget;
use crate::stats::random::Rng;

/// Join outcomes drawn per random plan (common random numbers shared with every plan): the
/// plan's expected score is the mean over them; its path after each recruit (the chart)
/// uses the first, and its final effective number all of them.
pub const OUTCOMES_PER_RANDOM_PLAN: usize = 16;

/// A rule's expected balance after each number of recruits (index 0: one recruit).
#[derive(Debug, Clone, Serialize)]
pub struct BaselinePath {
    pub rule: &'static str,
    /// The countries in order (empty for the random rule).
    pub ids: Vec<String>,
    pub expected_effective_n: Vec<f64>,
    pub expected_max_abs_smd: Vec<f64>,
    pub expected_mean_abs_smd: Vec<f64>,
    pub feasible_chance: Vec<f64>,
    /// The expected effective number with the whole budget spent by the rule.
    pub expected_effective_n_mean: f64,
    /// Its Monte Carlo standard error (None when exact).
    pub mc_error: Option<f64>,
    /// Random plans drawn (1 for the deterministic rules).
    pub draws: usize,
    /// The expectation of the chosen objective's score with the whole budget.
    pub score: f64,
}

#[derive(Debug, Clone, Serialize)]
pub struct Baselines {
    pub likeliest: BaselinePath,
    /// Means over random plans of the same size (or within the same cost).
    pub random: BaselinePath,
    pub most_different: BaselinePath,
    /// Each random plan's expected score (from its own draws): the plan's percentile is
    /// read against these. Not serialised.
    #[serde(skip)]
    pub random_scores: Vec<f64>,
    #[serde(skip)]
    pub random_plans: Vec<Vec<Offer>>,
}

/// The offers of `order` taken while the budget allows.
pub fn within_budget(order: &[Offer], budget: Budget) -> Vec<Offer> {
    let mut plan = Vec::new();
    for o in order {
        if budget.fits(&plan, o, None) {
            plan.push(*o);
        }
        if let Budget::Count(k) = budget {
            if plan.len() >= k {
                break;
            }
        }
    }
    plan
}

/// Expected balance after each prefix of `plan` (reported precision).
pub fn prefix_path(memo: &mut Memo, draws: &Draws, plan: &[Offer]) -> Vec<Expected> {
    (1..=plan.len())
        .map(|j| {
            memo.expected(&outcomes(
                &plan[..j],
                draws,
                REPORT_EXACT_OUTCOMES,
                REPORT_DRAWS,
            ))
        })
        .collect()
}

fn deterministic(
    rule: &'static str,
    memo: &mut Memo,
    draws: &Draws,
    plan: &[Offer],
    ids: &[String],
) -> BaselinePath {
    let path = prefix_path(memo, draws, plan);
    let last = path.last().copied();
    BaselinePath {
        rule,
        ids: plan.iter().map(|o| ids[o.unit].clone()).collect(),
        expected_effective_n: path.iter().map(|e| e.effective_n).collect(),
        expected_max_abs_smd: path.iter().map(|e| e.max_abs_smd).collect(),
        expected_mean_abs_smd: path.iter().map(|e| e.mean_abs_smd).collect(),
        feasible_chance: path.iter().map(|e| e.feasible_chance).collect(),
        expected_effective_n_mean: last.map_or(0.0, |e| e.effective_n),
        mc_error: last.and_then(|e| e.effective_n_mc_error),
        draws: 1,
        score: last.map_or(0.0, |e| e.score),
    }
}

/// Distance of each unit to the nearest current participant in the standardised
/// entropy-balancing moments (Euclidean).
pub fn distance_to_participants(eval: &Evaluator, members: &[usize], unit: usize) -> f64 {
    let row = eval.moments.row(unit);
    members
        .iter()
        .map(|&m| {
            row.iter()
                .zip(eval.moments.row(m).iter())
                .map(|(a, b)| (a - b).powi(2))
                .sum::<f64>()
                .sqrt()
        })
        .fold(f64::INFINITY, f64::min)
}

#[allow(clippy::too_many_arguments)]
pub fn baselines(
    memo: &mut Memo,
    draws: &Draws,
    plain: &[Offer],
    budget: Budget,
    ids: &[String],
    random_draws: usize,
    seed: u64,
) -> Baselines {
    let mut by_probability = plain.to_vec();
    by_probability.sort_by(|a, b| {
        b.probability
            .total_cmp(&a.probability)
            .then(ids[a.unit].cmp(&ids[b.unit]))
    });
    let likeliest = within_budget(&by_probability, budget);
    let likeliest = deterministic("likeliest", memo, draws, &likeliest, ids);

    let eval = memo.eval;
    let members = memo.members;
    let mut by_distance: Vec<(f64, Offer)> = plain
        .iter()
        .map(|o| (distance_to_participants(eval, members, o.unit), *o))
        .collect();
    by_distance.sort_by(|a, b| b.0.total_cmp(&a.0).then(ids[a.1.unit].cmp(&ids[b.1.unit])));
    let different: Vec<Offer> = by_distance.into_iter().map(|(_, o)| o).collect();
    let different = within_budget(&different, budget);
    let most_different = deterministic("most-different", memo, draws, &different, ids);

    let draws_n = random_draws.max(1);
    let r_count = OUTCOMES_PER_RANDOM_PLAN;
    // Each random plan and the join outcomes it is judged on: draw r of the common random
    // numbers, offset per plan so that the random plans do not all share the same few
    // outcomes. Plans share many outcomes (every plan whose invitees all decline gives
    // the current set; with 0/1 chances all draws of a plan give the same one), so the
    // distinct sets are balanced once, in parallel, before the plans are scored.
    let plans: Vec<(Vec<Offer>, Vec<Vec<usize>>)> = (0..draws_n)
        .into_par_iter()
        .map(|d| {
            let mut rng = Rng::stream(seed ^ 0xBA5E_11AE, d as u64);
            let mut order = plain.to_vec();
            rng.shuffle(&mut order);
            let plan = within_budget(&order, budget);
            let joined: Vec<Vec<usize>> = (0..r_count)
                .map(|r| {
                    let row = (d * r_count + r) % REPORT_DRAWS;
                    let mut joined: Vec<usize> = plan
                        .iter()
                        .filter(|o| draws.joins(row, o))
                        .map(|o| o.unit)
                        .collect();
                    joined.sort_unstable();
                    joined
                })
                .collect();
            (plan, joined)
        })
        .collect();
    // The sets on the first draw's path (after each recruit) and every draw's final set.
    let mut needed: Vec<Vec<usize>> = Vec::new();
    for (d, (plan, joined)) in plans.iter().enumerate() {
        let row = (d * r_count) % REPORT_DRAWS;
        let mut path_set: Vec<usize> = Vec::new();
        for o in plan {
            if draws.joins(row, o) {
                path_set.push(o.unit);
                path_set.sort_unstable();
                needed.push(path_set.clone());
            }
        }
        needed.extend(joined.iter().skip(1).cloned());
    }
    needed.push(Vec::new());
    memo.fill(needed.iter());
    let memo_ref: &Memo = memo;
    let look = |joined: &[usize]| {
        memo_ref
            .known(joined)
            .unwrap_or_else(|| memo_ref.compute(joined))
    };
    // Each random plan: its path (means over its join draws) and its expected score.
    let results: Vec<(Vec<Offer>, Vec<[f64; 4]>, f64)> = plans
        .into_iter()
        .enumerate()
        .map(|(d, (plan, joined_sets))| {
            // The path after each recruit from the plan's first join draw; its expected
            // score from all its draws (only the final set is needed for those).
            let mut path = vec![[0.0; 4]; plan.len()];
            let mut score = 0.0;
            let mut last_effective_n = 0.0;
            for (r, final_set) in joined_sets.iter().enumerate() {
                if r == 0 {
                    let row = (d * r_count) % REPORT_DRAWS;
                    let mut joined: Vec<usize> = Vec::new();
                    let mut m = look(&joined);
                    for (j, o) in plan.iter().enumerate() {
                        if draws.joins(row, o) {
                            joined.push(o.unit);
                            joined.sort_unstable();
                            m = look(&joined);
                        }
                        path[j] = [
                            m.effective_n,
                            m.max_abs_smd,
                            m.mean_abs_smd,
                            f64::from(u8::from(m.feasible)),
                        ];
                    }
                    score += memo_ref.kind.score(&m) / r_count as f64;
                    last_effective_n += m.effective_n / r_count as f64;
                } else {
                    let m = look(final_set);
                    score += memo_ref.kind.score(&m) / r_count as f64;
                    last_effective_n += m.effective_n / r_count as f64;
                }
            }
            if let Some(end) = path.last_mut() {
                end[0] = last_effective_n;
            }
            (plan, path, score)
        })
        .collect();
    let longest = results.iter().map(|r| r.1.len()).max().unwrap_or(0);
    let mut mean = vec![[0.0; 4]; longest];
    for (_, path, _) in &results {
        for (j, slot) in mean.iter_mut().enumerate() {
            // A shorter plan (cost budget) keeps its last value.
            let v = path.get(j).or(path.last()).copied().unwrap_or([0.0; 4]);
            for f in 0..4 {
                slot[f] += v[f] / draws_n as f64;
            }
        }
    }
    let finals: Vec<f64> = results
        .iter()
        .map(|(_, p, _)| p.last().map_or(0.0, |v| v[0]))
        .collect();
    let average = finals.iter().sum::<f64>() / draws_n as f64;
    let variance =
        finals.iter().map(|v| (v - average).powi(2)).sum::<f64>() / (draws_n.max(2) - 1) as f64;
    let random_scores: Vec<f64> = results.iter().map(|r| r.2).collect();
    let random = BaselinePath {
        rule: "random",
        ids: Vec::new(),
        expected_effective_n: mean.iter().map(|v| v[0]).collect(),
        expected_max_abs_smd: mean.iter().map(|v| v[1]).collect(),
        expected_mean_abs_smd: mean.iter().map(|v| v[2]).collect(),
        feasible_chance: mean.iter().map(|v| v[3]).collect(),
        expected_effective_n_mean: average,
        mc_error: Some((variance / draws_n as f64).sqrt()),
        draws: draws_n,
        score: random_scores.iter().sum::<f64>() / draws_n as f64,
    };
    Baselines {
        likeliest,
        random,
        most_different,
        random_scores,
        random_plans: results.into_iter().map(|r| r.0).collect(),
    }
}
