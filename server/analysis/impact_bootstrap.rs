//! The country bootstrap of the impact view's whole pipeline: the pairs cluster bootstrap
//! (Cameron, Gelbach & Miller 2008) applied to the two-step estimator as a whole. Each
//! replicate draws G countries with replacement from the wave's eligible universe
//! (participants and non-participants together; a drawn country brings its indicators,
//! its participation and its respondents, and a country drawn twice counts as two
//! clusters), re-fits the chosen participation model, recomputes every weighting and the
//! two-step (Mills-ratio) correction on the draw, and re-estimates the pooled mean and
//! the pooled regression.
//!
//! Linear estimates are computed from per-country sufficient statistics: with respondent
//! weights w_r = s_c d_r / D_c (s_c the country's share, d_r the design weight, D_c the
//! country's design-weight total), Σ_r w_r x_r x_r' = Σ_c s_c A_c and Σ_r w_r x_r y_r =
//! Σ_c s_c b_c with A_c = Σ_{r∈c} d_r x_r x_r' / D_c and b_c = Σ_{r∈c} d_r x_r y_r / D_c,
//! so a replicate costs O(G k²) after one pass over the respondents. The two-step's
//! outcome equation adds country-level columns (indicators c and the inverse Mills ratio
//! λ), whose cross-products with x need only x̄_c = Σ d_r x_r / D_c.
//!
//! The country-level fits of a draw (the participation model, both covariate-balancing
//! fits, the two-step's probit) run on its distinct countries weighted by how often each
//! was drawn, from the full sample's solutions: the same likelihoods and moment
//! conditions as on the draw written out, at about 63% of its rows. Variants that failed
//! on the full sample are not computed on the draws.
//!
//! Logistic pooled regressions are not re-estimated per replicate (their terms' bootstrap
//! values are null, and a note says so); their pooled means are.

use ndarray::{Array1, Array2};
use serde::Serialize;

use super::design::Design;
use super::participation;
use super::settings::{Settings, WeightingKind};
use crate::stats::binary::{self, ModelKind};
use crate::stats::bootstrap::{self, DrawCounts, Summary};
use crate::stats::linalg;
use crate::stats::normal;
use crate::stats::regression::Kind;
use crate::stats::weights;

/// Pipeline bootstrap replicates unless asked otherwise (pages and command line).
pub const DEFAULT_REPLICATES: usize = 199;

/// One country's sufficient statistics over its respondents with complete values.
#[derive(Debug, Clone)]
pub struct CountryStats {
    /// Σ d x x' / D (k × k); its first row is x̄ = Σ d x / D.
    pub a: Array2<f64>,
    /// Σ d x y / D; its first element is the design-weighted mean of y.
    pub b: Array1<f64>,
}

impl CountryStats {
    /// Accumulates the statistics of one country from its respondents' rows.
    pub fn from_rows(x: &Array2<f64>, y: &[f64], d: &[f64], rows: &[usize]) -> Option<Self> {
        let k = x.ncols();
        let mut a = Array2::<f64>::zeros((k, k));
        let mut b = Array1::<f64>::zeros(k);
        let mut total = 0.0;
        for &r in rows {
            let w = d[r];
            total += w;
            let xr = x.row(r);
            for i in 0..k {
                b[i] += w * xr[i] * y[r];
                for j in 0..=i {
                    a[[i, j]] += w * xr[i] * xr[j];
                }
            }
        }
        if total.is_nan() || total <= 0.0 {
            return None;
        }
        for i in 0..k {
            for j in 0..i {
                a[[j, i]] = a[[i, j]];
            }
        }
        Some(CountryStats {
            a: a / total,
            b: b / total,
        })
    }

    fn mean(&self) -> f64 {
        self.b[0]
    }
}

/// Why a replicate gave no value for a variant.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, PartialOrd, Ord, Serialize)]
#[serde(rename_all = "kebab-case")]
pub enum Failure {
    NoParticipant,
    NoNonParticipant,
    ModelFailed,
    Infeasible,
    Singular,
}

impl Failure {
    pub fn label(self) -> &'static str {
        match self {
            Failure::NoParticipant => "no participating country with respondents was drawn",
            Failure::NoNonParticipant => {
                "every drawn country took part, so the participation model cannot be fitted"
            }
            Failure::ModelFailed => {
                "the participation model (or the two-step's probit) could not be fitted or did not converge on the draw"
            }
            Failure::Infeasible => {
                "the weighting has no solution on the draw (infeasible balance, or no convergence)"
            }
            Failure::Singular => "the regression is singular on the draw",
        }
    }
}

#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct FailureCount {
    pub reason: Failure,
    pub label: &'static str,
    pub count: usize,
}

/// One variant's bootstrap: the pooled mean's and every term's summary.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct VariantBootstrap {
    pub pooled: Summary,
    /// Aligned with the variant's terms; `Summary::NONE` where not estimable.
    pub terms: Vec<Summary>,
    pub failed: usize,
    pub failures: Vec<FailureCount>,
}

/// One replicate's value for a variant: the pooled mean and the terms (None for a
/// logistic regression).
type Draw = Result<(f64, Option<Vec<f64>>), Failure>;

/// What the bootstrap needs, aligned with the design's units.
pub struct Input<'a> {
    pub design: &'a Design,
    pub settings: &'a Settings,
    /// Participants with respondents: their statistics; None elsewhere.
    pub stats: &'a [Option<CountryStats>],
    /// Each unit's population (people), when countries count by population.
    pub population: Option<&'a [f64]>,
    /// The two-step's country indicators per unit (outer: indicator), or why the two-step
    /// cannot be computed.
    pub mills_indicators: Result<&'a [Vec<f64>], ()>,
    pub kind: Kind,
    pub k: usize,
    pub replicates: usize,
    pub seed: u64,
    /// Per variant (in [`variant_count`]'s order), whether it failed on the full sample:
    /// its draws are not computed (a page shows no bootstrap for such a variant).
    pub skip: Vec<bool>,
    /// The full sample's solutions, as the impact view fitted them.
    pub starts: Starts,
}

/// The full sample's solutions on the standardised design, where every draw's fits start,
/// each where its fit converged: the participation model, the two-step's probit, and the
/// over-identified covariate-balancing fit (as participation::weigh computes it, from the
/// just-identified solution, else the logit).
#[derive(Debug, Clone, Default)]
pub struct Starts {
    pub model: Option<Array1<f64>>,
    pub probit: Option<Array1<f64>>,
    pub gmm: Option<Array1<f64>>,
}

impl Input<'_> {
    fn skipped(&self, variant: usize) -> bool {
        self.skip.get(variant).copied().unwrap_or(false)
    }
}

/// The variants' keys in the order the bootstrap returns them: unweighted, each
/// weighting of `WeightingKind::ALL`, the two-step.
pub fn variant_count() -> usize {
    WeightingKind::ALL.len() + 2
}

/// Runs the bootstrap; element v of the result belongs to variant v (see
/// [`variant_count`]). `None` when no replicate was asked for.
pub fn run(input: &Input) -> Option<Vec<VariantBootstrap>> {
    if input.replicates == 0 || input.design.n() == 0 {
        return None;
    }
    let g = input.design.n();
    let full = FullSample::new(input.design, &input.starts);
    let draws = bootstrap::run(g, input.replicates, input.seed, |rows| {
        Ok::<_, ()>(replicate(input, &full, rows))
    })
    .ok()?;
    let draws: Vec<Vec<Draw>> = draws.into_iter().map(|d| d.unwrap_or_default()).collect();
    let n_terms = |v: usize| {
        if v == variant_count() - 1 {
            input.k + 1
        } else {
            input.k
        }
    };
    Some(
        (0..variant_count())
            .map(|v| {
                let column: Vec<&Draw> = draws.iter().filter_map(|d| d.get(v)).collect();
                let mut counts: std::collections::BTreeMap<Failure, usize> = Default::default();
                let mut pooled = Vec::new();
                let mut terms: Vec<Vec<f64>> = vec![Vec::new(); n_terms(v)];
                let mut any_terms = false;
                for d in &column {
                    match d {
                        Err(f) => *counts.entry(*f).or_default() += 1,
                        Ok((m, t)) => {
                            pooled.push(*m);
                            if let Some(t) = t {
                                any_terms = true;
                                for (j, c) in t.iter().enumerate().take(terms.len()) {
                                    terms[j].push(*c);
                                }
                            }
                        }
                    }
                }
                let summary =
                    |vals: &[f64]| bootstrap::summarise(vals, 0.95).unwrap_or(Summary::NONE);
                VariantBootstrap {
                    pooled: summary(&pooled),
                    terms: if any_terms {
                        terms.iter().map(|t| summary(t)).collect()
                    } else {
                        vec![Summary::NONE; n_terms(v)]
                    },
                    failed: counts.values().sum(),
                    failures: counts
                        .into_iter()
                        .map(|(reason, count)| FailureCount {
                            reason,
                            label: reason.label(),
                            count,
                        })
                        .collect(),
                }
            })
            .collect(),
    )
}

/// The full sample's solutions, where every draw's fits start: each draw then finds the
/// solution that corresponds to it (the over-identified criterion has several minima; the
/// likelihoods have one, and the start only saves steps). The fits run on a draw's
/// distinct countries weighted by how often each was drawn ([`DrawCounts`]), which gives
/// what the draw written out gives at the cost of its distinct rows.
struct FullSample {
    /// The full design, standardised (a draw's rows are rows of it).
    standardised: Array2<f64>,
    /// The participation model's coefficients, when its fit converged.
    model: Option<Array1<f64>>,
    /// The two-step's probit, when it converged.
    probit: Option<Array1<f64>>,
    /// The over-identified covariate-balancing fit, when it converged.
    gmm: Option<Array1<f64>>,
}

/// A binary model fitted on one draw: coefficients (standardised scale), the propensity
/// of each drawn row, and whether the fit converged.
struct DrawFit {
    coef: Array1<f64>,
    propensity: Vec<f64>,
    converged: bool,
}

impl FullSample {
    fn new(design: &Design, starts: &Starts) -> FullSample {
        FullSample {
            standardised: design.standardised(),
            model: starts.model.clone(),
            probit: starts.probit.clone(),
            gmm: starts.gmm.clone(),
        }
    }

    /// A draw's distinct countries: their standardised rows and whether each took part.
    fn distinct(&self, design: &Design, counts: &DrawCounts) -> (Array2<f64>, Vec<bool>) {
        let z = self.standardised.select(ndarray::Axis(0), &counts.clusters);
        let t = counts
            .clusters
            .iter()
            .map(|&c| design.participated[c])
            .collect();
        (z, t)
    }

    /// A binary model on the draw, from `start` on the distinct countries when there is a
    /// start, else as the full sample was fitted, on the draw written out.
    fn binary_on_draw(
        &self,
        input: &Input,
        kind: ModelKind,
        start: Option<&Array1<f64>>,
        draw: &Design,
        counts: &DrawCounts,
    ) -> Result<DrawFit, Failure> {
        match start {
            Some(start) => {
                let (z, t) = self.distinct(input.design, counts);
                let fit = binary::refit_counted(
                    kind,
                    z.view(),
                    &t,
                    &counts.counts,
                    start,
                    binary::SCORE_TOLERANCE,
                )
                .map_err(|_| Failure::ModelFailed)?;
                let p = binary::predict(kind, z.view(), &fit.coef);
                Ok(DrawFit {
                    propensity: counts.expand(&p),
                    coef: fit.coef,
                    converged: fit.converged,
                })
            }
            None => {
                let z = draw.standardised();
                let fit = binary::fit(kind, z.view(), &draw.participated)
                    .map_err(|_| Failure::ModelFailed)?;
                Ok(DrawFit {
                    propensity: binary::predict(kind, z.view(), &fit.coef),
                    coef: fit.coef,
                    converged: fit.converged,
                })
            }
        }
    }
}

fn logit_start(z: &Array2<f64>, t: &[bool]) -> Array1<f64> {
    binary::fit(ModelKind::Logit, z.view(), t)
        .map(|f| f.coef)
        .unwrap_or_else(|_| Array1::zeros(z.ncols()))
}

/// The covariate-balancing shares on a draw, on its distinct countries weighted by how
/// often each was drawn (the same conditions as on the draw written out): the
/// just-identified fit (exact balance), or the over-identified one started at the full
/// sample's solution (so that each draw finds the minimum that corresponds to it; the
/// criterion has several). Then participation::weigh's steps on the draw ([`shares_from`]).
/// A fit that does not converge (or cannot balance a column) fails.
fn balancing_shares(
    input: &Input,
    full: &FullSample,
    kind: WeightingKind,
    draw: &Design,
    counts: &DrawCounts,
    base: &[f64],
) -> Result<Vec<f64>, Failure> {
    let over_identified = kind == WeightingKind::CovariateBalancingGmm;
    let fit = match (over_identified, full.gmm.as_ref()) {
        (false, _) => {
            let (z, t) = full.distinct(input.design, counts);
            weights::cbps_just_identified_counted(z.view(), &t, &counts.counts)
        }
        (true, Some(start)) => {
            let (z, t) = full.distinct(input.design, counts);
            weights::cbps_over_identified_counted_from(z.view(), &t, &counts.counts, start)
        }
        (true, None) => {
            // No full-sample solution to start from: as the full sample was fitted, on
            // the draw written out.
            let zd = draw.standardised();
            let t = &draw.participated;
            let fit = weights::cbps_over_identified(zd.view(), t, &logit_start(&zd, t))
                .map_err(|_| Failure::Infeasible)?;
            if !fit.converged {
                return Err(Failure::Infeasible);
            }
            return shares_from(input, draw, &fit.propensity, base);
        }
    }
    .map_err(|_| Failure::Infeasible)?;
    if !fit.converged {
        return Err(Failure::Infeasible);
    }
    shares_from(input, draw, &counts.expand(&fit.propensity), base)
}

/// participation::weigh's steps from the propensities of the drawn rows:
/// inverse-probability weights, the settings' trimming, normalisation to the number of
/// drawn units, times the base shares.
fn shares_from(
    input: &Input,
    draw: &Design,
    propensity: &[f64],
    base: &[f64],
) -> Result<Vec<f64>, Failure> {
    let t = &draw.participated;
    let mut w = weights::inverse_probability(propensity, t).map_err(|_| Failure::Infeasible)?;
    if let Some(q) = input.settings.trim {
        w = weights::trim(&w, t, q);
    }
    Ok(weights::normalise(&w, draw.n() as f64)
        .iter()
        .zip(base)
        .map(|(a, b)| a * b)
        .collect())
}

/// Every variant's value on one draw of countries.
fn replicate(input: &Input, full: &FullSample, rows: &[usize]) -> Vec<Draw> {
    let n_variants = variant_count();
    let design = input.design.subset(rows);
    let Some(counts) = DrawCounts::of(rows, input.design.n()) else {
        return vec![Err(Failure::NoParticipant); n_variants];
    };
    let stats: Vec<Option<&CountryStats>> = rows.iter().map(|&i| input.stats[i].as_ref()).collect();
    if stats.iter().all(Option::is_none) {
        return vec![Err(Failure::NoParticipant); n_variants];
    }
    let base: Vec<f64> = match input.population {
        None => vec![1.0; rows.len()],
        Some(p) => rows.iter().map(|&i| p[i]).collect(),
    };
    let mut out = Vec::with_capacity(n_variants);
    out.push(estimate(&stats, &base, input.kind, input.k));
    let draw_z = design.standardised();
    let all_took_part = design.participated.iter().all(|&p| p);
    let model = if all_took_part {
        Err(Failure::NoNonParticipant)
    } else {
        full.binary_on_draw(
            input,
            input.settings.model,
            full.model.as_ref(),
            &design,
            &counts,
        )
    };
    for (v, kind) in WeightingKind::ALL.into_iter().enumerate() {
        let share: Result<Vec<f64>, Failure> = match &model {
            _ if input.skipped(v + 1) => Err(Failure::ModelFailed),
            Err(f) => Err(*f),
            Ok(_)
                if matches!(
                    kind,
                    WeightingKind::CovariateBalancing | WeightingKind::CovariateBalancingGmm
                ) =>
            {
                balancing_shares(input, full, kind, &design, &counts, &base)
            }
            Ok(model) => {
                if kind == WeightingKind::InverseProbability && !model.converged {
                    Err(Failure::ModelFailed)
                } else if kind == WeightingKind::Entropy && input.population.is_some() {
                    let moments = super::impact::universe_moments(&design, &base);
                    super::impact::population_entropy(
                        &design,
                        &base,
                        &moments,
                        input.settings.match_variances,
                    )
                    .map_err(|_| Failure::Infeasible)
                } else {
                    let s = Settings {
                        weighting: kind,
                        ..input.settings.clone()
                    };
                    participation::weights_from(&design, &s, &draw_z, &model.propensity)
                        .map(|w| w.iter().zip(&base).map(|(a, b)| a * b).collect())
                        .map_err(|_| Failure::Infeasible)
                }
            }
        };
        out.push(share.and_then(|s| estimate(&stats, &s, input.kind, input.k)));
    }
    out.push(if input.skipped(n_variants - 1) {
        Err(Failure::ModelFailed)
    } else if all_took_part {
        Err(Failure::NoNonParticipant)
    } else {
        match input.mills_indicators {
            Err(()) => Err(Failure::Singular),
            Ok(c) => full
                .binary_on_draw(
                    input,
                    ModelKind::Probit,
                    full.probit.as_ref(),
                    &design,
                    &counts,
                )
                .and_then(|probit| {
                    if !probit.converged {
                        return Err(Failure::ModelFailed);
                    }
                    let index = draw_z.dot(&probit.coef);
                    mills(&design, rows, &stats, &base, c, &index, input.k)
                }),
        }
    });
    out
}

/// The pooled mean Σ s m / Σ s and the pooled regression (Σ s A)⁻¹ Σ s b over the drawn
/// participants with respondents.
fn estimate(stats: &[Option<&CountryStats>], share: &[f64], kind: Kind, k: usize) -> Draw {
    let (mut total, mut mean) = (0.0, 0.0);
    let mut a = Array2::<f64>::zeros((k, k));
    let mut b = Array1::<f64>::zeros(k);
    for (st, &s) in stats.iter().zip(share) {
        if let Some(st) = st {
            if s > 0.0 {
                total += s;
                mean += s * st.mean();
                a.scaled_add(s, &st.a);
                b.scaled_add(s, &st.b);
            }
        }
    }
    if total.is_nan() || total <= 0.0 {
        return Err(Failure::NoParticipant);
    }
    let terms = match kind {
        Kind::Logistic => None,
        Kind::Linear => Some(
            linalg::solve_spd(a.view(), b.view())
                .map_err(|_| Failure::Singular)?
                .to_vec(),
        ),
    };
    Ok((mean / total, terms))
}

/// The two-step on the draw, as impact::mills_variant computes it: given the probit index
/// z_c'g of taking part fitted on the draw (per drawn row), λ_c = φ(z_c'g)/Φ(z_c'g),
/// weighted least squares of y on [x, c, λ] with every drawn participant counting the
/// same, and the universe-averaged prediction without the selection term.
fn mills(
    design: &Design,
    rows: &[usize],
    stats: &[Option<&CountryStats>],
    q: &[f64],
    indicators: &[Vec<f64>],
    index: &Array1<f64>,
    k: usize,
) -> Draw {
    let q_total: f64 = q.iter().sum();
    let c_mean: Vec<f64> = indicators
        .iter()
        .map(|v| rows.iter().zip(q).map(|(&i, w)| v[i] * w).sum::<f64>() / q_total)
        .collect();
    let nc = indicators.len();
    // Fits y on [x (first kx columns of the country statistics), c, λ].
    let fit = |kx: usize| -> Result<(Vec<f64>, f64), Failure> {
        let p = kx + nc + 1;
        let mut a = Array2::<f64>::zeros((p, p));
        let mut b = Array1::<f64>::zeros(p);
        for (u, st) in stats.iter().enumerate() {
            let Some(st) = st else { continue };
            if !design.participated[u] {
                continue;
            }
            let mut extra: Vec<f64> = indicators.iter().map(|v| v[rows[u]]).collect();
            extra.push(normal::inverse_mills(index[u]));
            let m = st.mean();
            for i in 0..kx {
                b[i] += st.b[i];
                for j in 0..kx {
                    a[[i, j]] += st.a[[i, j]];
                }
                for (e, ve) in extra.iter().enumerate() {
                    // x̄_i times the country-level column.
                    a[[i, kx + e]] += st.a[[0, i]] * ve;
                    a[[kx + e, i]] += st.a[[0, i]] * ve;
                }
            }
            for (e, ve) in extra.iter().enumerate() {
                b[kx + e] += ve * m;
                for (f, vf) in extra.iter().enumerate() {
                    a[[kx + e, kx + f]] += ve * vf;
                }
            }
        }
        let coef = linalg::solve_spd(a.view(), b.view()).map_err(|_| Failure::Singular)?;
        let universe = coef[0]
            + c_mean
                .iter()
                .enumerate()
                .map(|(j, cm)| coef[kx + j] * cm)
                .sum::<f64>();
        Ok((coef.to_vec(), universe))
    };
    let (_, pooled) = fit(1)?;
    let (coef, b0) = fit(k)?;
    let mut terms = vec![b0];
    terms.extend_from_slice(&coef[1..k]);
    terms.push(coef[coef.len() - 1]);
    Ok((pooled, Some(terms)))
}
