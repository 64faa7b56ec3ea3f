//! Stability of the plan: resample the eligible universe (countries with replacement),
//! re-estimate the chances, replan, and count how often each candidate is picked.

use std::collections::{BTreeMap, BTreeSet};

use rayon::prelude::*;

use super::chances::in_sample_chances;
use super::evaluate::Evaluator;
use super::objective::{Draws, Memo, ObjectiveKind, Offer};
use super::search::{greedy, Budget};
use super::PlanError;
use crate::analysis::design::Design;
use crate::analysis::settings::Settings;
use crate::stats::random::Rng;

/// Join outcomes each replicate's greedy rounds are judged on (one draw, with each trial
/// candidate's own join integrated exactly): enough to rank, cheap enough for hundreds of
/// replicates.
pub const REPLICATE_OUTCOMES: usize = 1;

/// How many of `replicates` bootstrap plans pick each country (by code). Replicate r uses
/// stream r of the seed, so the counts do not depend on the number of threads.
#[allow(clippy::too_many_arguments)]
/// `fixed_probability`: chances that stay with their country (a column, the history
/// model); None to refit this wave's participation model on each resample.
pub fn bootstrap(
    design: &Design,
    fixed_probability: Option<&[f64]>,
    cost: Option<&[Option<f64>]>,
    settings: &Settings,
    kind: ObjectiveKind,
    budget: Budget,
    replicates: usize,
    seed: u64,
) -> Result<BTreeMap<String, f64>, PlanError> {
    let n = design.n();
    let column_probability = fixed_probability;
    let one = |r: usize| -> Vec<String> {
        let mut rng = Rng::stream(seed ^ 0xB007_57A9, r as u64);
        let draw: Vec<usize> = (0..n).map(|_| rng.below(n)).collect();
        let sample = design.subset(&draw);
        let probability = match &column_probability {
            Some(p) => draw.iter().map(|&i| p[i]).collect(),
            None => match in_sample_chances(&sample, settings) {
                Some(p) => p,
                None => return Vec::new(),
            },
        };
        let members: Vec<usize> = (0..n).filter(|&i| sample.participated[i]).collect();
        let mut seen = BTreeSet::new();
        // A country drawn several times is one invitation: its first copy stands for it,
        // and the other copies join with it.
        let candidates: Vec<usize> = (0..n)
            .filter(|&i| !sample.participated[i] && seen.insert(draw[i]))
            .collect();
        if members.is_empty() || candidates.is_empty() {
            return Vec::new();
        }
        let eval = Evaluator::new(&sample);
        let copies: Vec<Vec<usize>> = (0..n)
            .map(|i| (0..n).filter(|&j| draw[j] == draw[i]).collect())
            .collect();
        let budget = match budget {
            Budget::Count(k) => Budget::Count(k.min(candidates.len())),
            b => b,
        };
        let menu: Vec<Offer> = candidates
            .iter()
            .map(|&c| Offer {
                unit: c,
                supported: false,
                probability: probability[c],
                cost: cost.and_then(|k| k[draw[c]]),
            })
            .collect();
        let mut memo = Memo::new(&eval, &members, kind).with_copies(copies);
        let draws = Draws::new(seed ^ r as u64, 1, n);
        greedy(&mut memo, &draws, &menu, budget, REPLICATE_OUTCOMES)
            .plan
            .into_iter()
            .map(|o| design.ids[draw[o.unit]].clone())
            .collect()
    };
    let picks: Vec<Vec<String>> = (0..replicates).into_par_iter().map(one).collect();
    let mut counts: BTreeMap<String, f64> = BTreeMap::new();
    for ids in picks {
        for id in ids {
            *counts.entry(id).or_insert(0.0) += 1.0;
        }
    }
    Ok(counts)
}
