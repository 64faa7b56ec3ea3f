//! Finding a plan: greedy on the expected objective, improved by exchange, and the evidence
//! of how close it comes to the best plan.
//!
//! Greedy adds, at each round, the invitation with the largest rise in the expected
//! objective (per unit of cost under a cost budget); for monotone submodular objectives it
//! reaches at least 1 − 1/e of the optimum (Nemhauser, Wolsey & Fisher 1978). The
//! effective number after balancing is not guaranteed submodular, so an exchange step
//! follows (local search): swap one invitation for one not in the plan while the expected
//! objective rises.

use rayon::prelude::*;

use super::objective::{outcomes, Draws, Memo, Offer, Outcomes, SEARCH_OUTCOMES};

/// One or the other: a number of countries, or a total cost.
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum Budget {
    Count(usize),
    Cost(f64),
}

impl Budget {
    /// Whether `plan` plus `offer` (minus the invitation at `without`) stays in budget.
    pub fn fits(&self, plan: &[Offer], offer: &Offer, without: Option<usize>) -> bool {
        let kept = plan.iter().enumerate().filter(|(i, _)| Some(*i) != without);
        match *self {
            Budget::Count(k) => kept.count() < k,
            Budget::Cost(b) => match offer.cost {
                Some(c) => kept.map(|(_, o)| o.cost.unwrap_or(0.0)).sum::<f64>() + c <= b + 1e-9,
                None => false,
            },
        }
    }
}

/// The outcomes the search judges a plan on.
pub fn search_outcomes(plan: &[Offer], draws: &Draws, limit: usize) -> Outcomes {
    outcomes(plan, draws, limit, limit)
}

/// A trial invitation in a greedy round.
#[derive(Debug, Clone, Copy)]
pub struct Trial {
    /// Rise in the expected objective (per unit of cost under a cost budget).
    pub score: f64,
    /// Rise in minus the expected mean |SMD| (breaks ties while the objective is flat).
    pub tie: f64,
    /// Index into the menu of offers.
    pub offer: usize,
}

impl Trial {
    fn beats(&self, other: &Trial) -> bool {
        self.score > other.score + 1e-12
            || ((self.score - other.score).abs() <= 1e-12 && self.tie > other.tie)
    }
}

/// The result of the greedy search: the plan in order and the last round's trials, best
/// first (the exchange step's pool).
pub struct Greedy {
    pub plan: Vec<Offer>,
    pub last_round: Vec<Trial>,
}

/// Greedy over `menu` (every invitation on offer; at most one per unit enters the plan).
/// `limit`: the join outcomes each round is judged on (exact up to this many, else this
/// many draws); [`SEARCH_OUTCOMES`] for the plan.
pub fn greedy(
    memo: &mut Memo,
    draws: &Draws,
    menu: &[Offer],
    budget: Budget,
    limit: usize,
) -> Greedy {
    let mut plan: Vec<Offer> = Vec::new();
    let mut last_round = Vec::new();
    loop {
        let base = search_outcomes(&plan, draws, limit);
        let (now, now_tie) = memo.value(&base);
        let open: Vec<usize> = (0..menu.len())
            .filter(|&i| {
                !plan.iter().any(|o| o.unit == menu[i].unit) && budget.fits(&plan, &menu[i], None)
            })
            .collect();
        if open.is_empty() {
            break;
        }
        let memo_ref: &Memo = memo;
        let mut trials: Vec<Trial> = open
            .par_iter()
            .map(|&i| {
                let (value, tie) = memo_ref.with_offer(&base, &menu[i]);
                let per = match (budget, menu[i].cost) {
                    (Budget::Cost(_), Some(c)) if c > 0.0 => 1.0 / c,
                    _ => 1.0,
                };
                Trial {
                    score: (value - now) * per,
                    tie: (tie - now_tie) * per,
                    offer: i,
                }
            })
            .collect();
        trials.sort_by(|a, b| {
            if a.beats(b) {
                std::cmp::Ordering::Less
            } else if b.beats(a) {
                std::cmp::Ordering::Greater
            } else {
                a.offer.cmp(&b.offer)
            }
        });
        let best = trials[0];
        // Under a cost budget, stop when nothing affordable helps.
        if matches!(budget, Budget::Cost(_)) && best.score < -1e-12 {
            break;
        }
        plan.push(menu[best.offer]);
        last_round = trials;
    }
    Greedy { plan, last_round }
}

/// One exchange made by the local search.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Swap {
    pub position: usize,
    pub out: Offer,
    pub into: Offer,
}

/// Candidates tried by the exchange step: the best of greedy's last round.
pub const EXCHANGE_POOL: usize = 16;

/// Exchange: the best single swap of an invitation in the plan for one from the pool
/// (or the same country with support toggled), repeated while the expected objective rises
/// (at most 4 × plan size rounds).
pub fn exchange(
    memo: &mut Memo,
    draws: &Draws,
    menu: &[Offer],
    pool: &[usize],
    budget: Budget,
    plan: &mut [Offer],
) -> Vec<Swap> {
    let mut swaps = Vec::new();
    for _ in 0..4 * plan.len().max(1) {
        let mut best: Option<(f64, usize, usize)> = None;
        for position in 0..plan.len() {
            let rest: Vec<Offer> = plan
                .iter()
                .enumerate()
                .filter(|(i, _)| *i != position)
                .map(|(_, o)| *o)
                .collect();
            let base = search_outcomes(&rest, draws, SEARCH_OUTCOMES);
            memo.value(&base);
            // The plan as it stands, on the same estimator as the swaps: the others' join
            // outcomes drawn, this invitation's own join integrated exactly.
            let (now, _) = memo.with_offer(&base, &plan[position]);
            let memo_ref: &Memo = memo;
            let found = pool
                .par_iter()
                .filter(|&&i| {
                    menu[i] != plan[position]
                        && !rest.iter().any(|o| o.unit == menu[i].unit)
                        && budget.fits(plan, &menu[i], Some(position))
                })
                .map(|&i| (memo_ref.with_offer(&base, &menu[i]).0, i))
                .reduce_with(|a, b| {
                    if b.0 > a.0 || (b.0 == a.0 && b.1 < a.1) {
                        b
                    } else {
                        a
                    }
                });
            if let Some((value, i)) = found {
                let rise = value - now;
                if rise > 1e-9 * now.abs().max(1.0) && best.is_none_or(|(r, ..)| rise > r) {
                    best = Some((rise, position, i));
                }
            }
        }
        let Some((_, position, i)) = best else {
            break;
        };
        swaps.push(Swap {
            position,
            out: plan[position],
            into: menu[i],
        });
        plan[position] = menu[i];
    }
    swaps
}

/// The exact optimum of plans of `k` from `menu` (one offer per unit, count budget), by
/// enumerating every plan; `None` when the instance is too large (more than 64 offers or
/// more than `max_sets` distinct join outcomes to evaluate).
pub fn exact_optimum(
    memo: &mut Memo,
    menu: &[Offer],
    k: usize,
    max_sets: usize,
) -> Option<(f64, Vec<Offer>)> {
    let n = menu.len();
    if n > 64 || k == 0 || k > n {
        return None;
    }
    // Every outcome is a set of at most k units that can join.
    let can: Vec<usize> = (0..n).filter(|&i| menu[i].probability > 0.0).collect();
    let needed: usize = (0..=k.min(can.len())).map(|j| binomial(can.len(), j)).sum();
    if needed > max_sets || binomial(n, k) > 4 * max_sets {
        return None;
    }
    let mut sets: Vec<Vec<usize>> = Vec::with_capacity(needed);
    for j in 0..=k.min(can.len()) {
        for combo in combinations(can.len(), j) {
            let mut s: Vec<usize> = combo.iter().map(|&c| menu[can[c]].unit).collect();
            s.sort_unstable();
            sets.push(s);
        }
    }
    memo.fill(sets.iter());
    let memo_ref: &Memo = memo;
    let plans = combinations(n, k);
    let best = plans
        .par_iter()
        .map(|combo| {
            let plan: Vec<Offer> = combo.iter().map(|&c| menu[c]).collect();
            let o = outcomes(&plan, &Draws::new(0, 0, 0), usize::MAX, 0);
            let value: f64 = o
                .sets
                .iter()
                .map(|(s, w)| {
                    if *w == 0.0 {
                        0.0
                    } else {
                        w * memo_ref
                            .kind
                            .score(&memo_ref.known(s).unwrap_or_else(|| memo_ref.compute(s)))
                    }
                })
                .sum();
            (value, combo.clone())
        })
        .reduce_with(|a, b| {
            if b.0 > a.0 + 1e-12 || ((b.0 - a.0).abs() <= 1e-12 && b.1 < a.1) {
                b
            } else {
                a
            }
        })?;
    Some((best.0, best.1.iter().map(|&c| menu[c]).collect()))
}

fn binomial(n: usize, k: usize) -> usize {
    if k > n {
        return 0;
    }
    let mut r: u128 = 1;
    for i in 0..k.min(n - k) {
        r = r * (n - i) as u128 / (i + 1) as u128;
        if r > usize::MAX as u128 / 4 {
            return usize::MAX / 4;
        }
    }
    r as usize
}

/// Every k-subset of 0..n, in lexicographic order.
fn combinations(n: usize, k: usize) -> Vec<Vec<usize>> {
    let mut out = Vec::new();
    if k > n {
        return out;
    }
    let mut c: Vec<usize> = (0..k).collect();
    loop {
        out.push(c.clone());
        let mut i = k;
        while i > 0 && c[i - 1] == n - k + i - 1 {
            i -= 1;
        }
        if i == 0 {
            break;
        }
        c[i - 1] += 1;
        for j in i..k {
            c[j] = c[j - 1] + 1;
        }
    }
    out
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn combinations_count_as_binomials() {
        // Pascal's triangle (common practice).
        assert_eq!(combinations(5, 2).len(), 10);
        assert_eq!(combinations(6, 3).len(), binomial(6, 3));
        assert_eq!(binomial(25, 5), 53_130);
        assert_eq!(combinations(3, 0), vec![Vec::<usize>::new()]);
    }
}
