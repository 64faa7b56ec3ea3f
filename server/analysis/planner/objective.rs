//! The planner's objective: what the programme can expect to have after the invitations.
//!
//! Each invited country joins independently with its chance of joining (with or without
//! support). For a plan S, with current participants M, the objective is the expectation
//! over join outcomes J ⊆ S of a score of M ∪ J: by default the effective number of
//! countries after entropy balancing (0 for an infeasible outcome); the largest |SMD| of the
//! unweighted participants (to be made small) and the chance that balance is feasible are
//! the other choices.
//!
//! The expectation is exact, by enumerating the 2^u outcomes of the u uncertain invitations
//! (chances strictly between 0 and 1), while 2^u stays within a limit; beyond it, Monte
//! Carlo over draws of the join outcomes. Draws use common random numbers: draw r gives unit
//! i one uniform U[r, i], and the unit joins when U[r, i] is below its chance, so every plan
//! (and a country with or without support) is judged on the same draws and differences
//! between plans carry little Monte Carlo noise (common practice in simulation
//! optimisation; e.g. Glasserman 2004, ch. 4.2).

use std::collections::HashMap;

use ndarray::Array1;
use rayon::prelude::*;
use serde::{Deserialize, Serialize};

use super::evaluate::{Evaluator, SetMetrics};
use crate::stats::random::Rng;

/// Reported figures: exact while at most 2^10 outcomes, else this many Monte Carlo draws.
pub const REPORT_EXACT_OUTCOMES: usize = 1 << 10;
pub const REPORT_DRAWS: usize = 1000;
/// The search (greedy and exchange): exact while at most 8 outcomes, else 8 draws; each
/// trial candidate's own join is integrated exactly (conditional Monte Carlo).
pub const SEARCH_OUTCOMES: usize = 8;

/// What the planner maximises (in expectation over who joins).
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default, Serialize, Deserialize)]
#[serde(rename_all = "kebab-case")]
pub enum ObjectiveKind {
    /// The expected effective number of countries after entropy balancing.
    #[default]
    EffectiveN,
    /// The expected largest |SMD| of the unweighted participants (smaller is better).
    LargestSmd,
    /// The chance that entropy balancing to the universe is feasible.
    Feasibility,
}

impl ObjectiveKind {
    pub fn parse(s: &str) -> Option<ObjectiveKind> {
        match s {
            "effective-n" => Some(ObjectiveKind::EffectiveN),
            "largest-smd" => Some(ObjectiveKind::LargestSmd),
            "feasibility" => Some(ObjectiveKind::Feasibility),
            _ => None,
        }
    }

    pub fn as_str(self) -> &'static str {
        match self {
            ObjectiveKind::EffectiveN => "effective-n",
            ObjectiveKind::LargestSmd => "largest-smd",
            ObjectiveKind::Feasibility => "feasibility",
        }
    }

    /// The score of one outcome (larger is better).
    pub fn score(self, m: &SetMetrics) -> f64 {
        match self {
            ObjectiveKind::EffectiveN => m.effective_n,
            ObjectiveKind::LargestSmd => -m.max_abs_smd,
            ObjectiveKind::Feasibility => f64::from(u8::from(m.feasible)),
        }
    }
}

/// One invitation: a unit of the design, with or without support, its chance of joining
/// and what it costs (invitation plus support).
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Offer {
    pub unit: usize,
    pub supported: bool,
    pub probability: f64,
    pub cost: Option<f64>,
}

/// Uniforms for the common random numbers: `count` draws over `n` units.
pub struct Draws {
    n: usize,
    count: usize,
    u: Vec<f64>,
}

impl Draws {
    /// Draw r comes from its own stream of the seed (see `stats::random`).
    pub fn new(seed: u64, count: usize, n: usize) -> Draws {
        let mut u = Vec::with_capacity(count * n);
        for r in 0..count {
            let mut rng = Rng::stream(seed ^ 0x0D1C_E5ED, r as u64);
            u.extend((0..n).map(|_| rng.uniform()));
        }
        Draws { n, count, u }
    }

    pub fn joins(&self, r: usize, offer: &Offer) -> bool {
        self.u[r * self.n + offer.unit] < offer.probability
    }
}

/// The distinct join outcomes of a plan with their weights (summing to 1).
pub struct Outcomes {
    /// Sorted units that join, and the outcome's probability (exact) or share of draws.
    pub sets: Vec<(Vec<usize>, f64)>,
    pub exact: bool,
    /// Monte Carlo draws (0 when exact).
    pub draws: usize,
}

/// The join outcomes of `plan`: exact while they number at most `exact_limit`, else the
/// first `mc_draws` draws of `draws`.
pub fn outcomes(plan: &[Offer], draws: &Draws, exact_limit: usize, mc_draws: usize) -> Outcomes {
    let certain: Vec<usize> = plan
        .iter()
        .filter(|o| o.probability >= 1.0)
        .map(|o| o.unit)
        .collect();
    let uncertain: Vec<&Offer> = plan
        .iter()
        .filter(|o| o.probability > 0.0 && o.probability < 1.0)
        .collect();
    let u = uncertain.len();
    if u < 40 && (1usize << u) <= exact_limit {
        let mut sets = Vec::with_capacity(1 << u);
        for mask in 0..(1usize << u) {
            let mut set = certain.clone();
            let mut weight = 1.0;
            for (b, o) in uncertain.iter().enumerate() {
                if mask >> b & 1 == 1 {
                    set.push(o.unit);
                    weight *= o.probability;
                } else {
                    weight *= 1.0 - o.probability;
                }
            }
            set.sort_unstable();
            sets.push((set, weight));
        }
        return Outcomes {
            sets,
            exact: true,
            draws: 0,
        };
    }
    let count = mc_draws.min(draws.count).max(1);
    let mut tally: HashMap<Vec<usize>, f64> = HashMap::new();
    let mut order: Vec<Vec<usize>> = Vec::new();
    for r in 0..count {
        let mut set = certain.clone();
        set.extend(
            uncertain
                .iter()
                .filter(|o| draws.joins(r, o))
                .map(|o| o.unit),
        );
        set.sort_unstable();
        let entry = tally.entry(set.clone()).or_insert(0.0);
        if *entry == 0.0 {
            order.push(set);
        }
        *entry += 1.0 / count as f64;
    }
    Outcomes {
        sets: order
            .into_iter()
            .map(|s| {
                let w = tally[&s];
                (s, w)
            })
            .collect(),
        exact: false,
        draws: count,
    }
}

/// Expected balance of a plan.
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct Expected {
    pub effective_n: f64,
    /// Monte Carlo standard error of `effective_n` (None when exact).
    pub effective_n_mc_error: Option<f64>,
    pub max_abs_smd: f64,
    pub mean_abs_smd: f64,
    /// Chance that balance is feasible.
    pub feasible_chance: f64,
    /// The expectation of the chosen objective's score.
    pub score: f64,
    /// Monte Carlo standard error of `score` (None when exact).
    pub score_mc_error: Option<f64>,
    pub exact: bool,
}

/// A set's balance and, when balancing is feasible, the dual that reaches it: the start
/// for the sets that add one country to it.
struct Known {
    metrics: SetMetrics,
    dual: Option<Array1<f64>>,
}

/// Memoised balance of M ∪ J for the current participants M and join outcomes J.
pub struct Memo<'a> {
    pub eval: &'a Evaluator,
    pub members: &'a [usize],
    pub kind: ObjectiveKind,
    start: Option<Array1<f64>>,
    map: HashMap<Vec<usize>, Known>,
    /// For a resampled design: every row of the unit's country, which join together.
    copies: Option<Vec<Vec<usize>>>,
}

impl<'a> Memo<'a> {
    pub fn new(eval: &'a Evaluator, members: &'a [usize], kind: ObjectiveKind) -> Memo<'a> {
        let (_, start) = eval.evaluate(members, None);
        Memo {
            eval,
            members,
            kind,
            start,
            map: HashMap::new(),
            copies: None,
        }
    }

    /// Rows that join together (copies of one country in a bootstrap resample).
    pub fn with_copies(mut self, copies: Vec<Vec<usize>>) -> Self {
        self.copies = Some(copies);
        self
    }

    /// Balance of M ∪ `joined` (not memoised).
    pub fn compute(&self, joined: &[usize]) -> SetMetrics {
        self.solve(joined, self.start_for(joined)).metrics
    }

    /// Balance of M ∪ `joined` with the dual started at `start`.
    fn solve(&self, joined: &[usize], start: Option<&Array1<f64>>) -> Known {
        let mut set = self.members.to_vec();
        match &self.copies {
            Some(copies) => {
                for &u in joined {
                    set.extend_from_slice(&copies[u]);
                }
            }
            None => set.extend_from_slice(joined),
        }
        let (metrics, dual) = self.eval.evaluate(&set, start);
        Known { metrics, dual }
    }

    /// Where the dual of M ∪ `joined` (sorted) starts: at the dual of a known feasible set
    /// that lacks one of its countries, else at the participants' own. One more country
    /// moves the dual little, so Newton's method needs few steps from there, and its
    /// first steps need fewer halvings than from afar.
    fn start_for(&self, joined: &[usize]) -> Option<&Array1<f64>> {
        let mut rest = Vec::with_capacity(joined.len());
        for skip in (0..joined.len()).rev() {
            rest.clear();
            rest.extend_from_slice(&joined[..skip]);
            rest.extend_from_slice(&joined[skip + 1..]);
            if let Some(dual) = self.map.get(&rest).and_then(|k| k.dual.as_ref()) {
                return Some(dual);
            }
        }
        self.start.as_ref()
    }

    /// Computes, in parallel, every set of `sets` not yet known: smaller sets first, so
    /// that each set can start from the dual of one it extends.
    pub fn fill<'s>(&mut self, sets: impl Iterator<Item = &'s Vec<usize>>) {
        let mut missing: Vec<&Vec<usize>> = sets.filter(|s| !self.map.contains_key(*s)).collect();
        missing.sort_by(|a, b| a.len().cmp(&b.len()).then_with(|| a.cmp(b)));
        missing.dedup();
        for layer in missing.chunk_by(|a, b| a.len() == b.len()) {
            let computed: Vec<(Vec<usize>, Known)> = layer
                .par_iter()
                .map(|s| ((*s).clone(), self.solve(s, self.start_for(s))))
                .collect();
            self.map.extend(computed);
        }
    }

    pub fn get(&mut self, joined: &[usize]) -> SetMetrics {
        if let Some(k) = self.map.get(joined) {
            return k.metrics;
        }
        let known = self.solve(joined, self.start_for(joined));
        let m = known.metrics;
        self.map.insert(joined.to_vec(), known);
        m
    }

    /// A known set's balance (after `fill`).
    pub fn known(&self, joined: &[usize]) -> Option<SetMetrics> {
        self.map.get(joined).map(|k| k.metrics)
    }

    /// The expectation over `outcomes`.
    pub fn expected(&mut self, outcomes: &Outcomes) -> Expected {
        self.fill(outcomes.sets.iter().map(|(s, _)| s));
        let mut e = Expected {
            effective_n: 0.0,
            effective_n_mc_error: None,
            max_abs_smd: 0.0,
            mean_abs_smd: 0.0,
            feasible_chance: 0.0,
            score: 0.0,
            score_mc_error: None,
            exact: outcomes.exact,
        };
        let mut square = 0.0;
        let mut score_square = 0.0;
        for (set, w) in &outcomes.sets {
            let m = self.map[set].metrics;
            e.effective_n += w * m.effective_n;
            square += w * m.effective_n * m.effective_n;
            e.max_abs_smd += w * m.max_abs_smd;
            e.mean_abs_smd += w * m.mean_abs_smd;
            e.feasible_chance += w * f64::from(u8::from(m.feasible));
            let score = self.kind.score(&m);
            e.score += w * score;
            score_square += w * score * score;
        }
        if !outcomes.exact {
            let variance = (square - e.effective_n * e.effective_n).max(0.0);
            e.effective_n_mc_error = Some((variance / outcomes.draws as f64).sqrt());
            let variance = (score_square - e.score * e.score).max(0.0);
            e.score_mc_error = Some((variance / outcomes.draws as f64).sqrt());
        }
        e
    }

    /// The search's value of `plan` plus `offer`: the outcomes of `plan` (already filled)
    /// with the offer's own join integrated exactly. Returns the expected score and, to
    /// break ties, minus the expected mean |SMD|.
    pub fn with_offer(&self, base: &Outcomes, offer: &Offer) -> (f64, f64) {
        let p = offer.probability;
        let mut value = 0.0;
        let mut tie = 0.0;
        for (set, w) in &base.sets {
            let fresh;
            let known = match self.map.get(set) {
                Some(k) => k,
                None => {
                    fresh = self.solve(set, self.start_for(set));
                    &fresh
                }
            };
            let without = known.metrics;
            // The offer's country added to the outcome: started from that outcome's dual.
            let with = if p > 0.0 {
                let mut joined = set.clone();
                joined.push(offer.unit);
                self.solve(&joined, known.dual.as_ref().or(self.start.as_ref()))
                    .metrics
            } else {
                without
            };
            value += w * ((1.0 - p) * self.kind.score(&without) + p * self.kind.score(&with));
            tie -= w * ((1.0 - p) * without.mean_abs_smd + p * with.mean_abs_smd);
        }
        (value, tie)
    }

    /// The search's value of `plan` itself (outcomes filled): expected score and tie-break.
    pub fn value(&mut self, base: &Outcomes) -> (f64, f64) {
        self.fill(base.sets.iter().map(|(s, _)| s));
        let mut value = 0.0;
        let mut tie = 0.0;
        for (set, w) in &base.sets {
            let m = self.map[set].metrics;
            value += w * self.kind.score(&m);
            tie -= w * m.mean_abs_smd;
        }
        (value, tie)
    }
}
