//! `gapwise plan`: the greedy recruitment plan, its baselines and its stability.

use std::fmt::Write as _;

use super::text_table::Column::{Left, Right};
use super::text_table::TextTable;
use super::universe::{load_project_wave, load_universe, UniverseSource};
use super::{finish, opt};
use crate::analysis::imputed::ImputedPlan;
use crate::analysis::planner::{Plan, PlanSettings};
use crate::analysis::Settings;

/// `gapwise plan`: the greedy recruitment plan, its baselines and its stability.
pub fn plan(
    source: &UniverseSource,
    mut settings: Settings,
    plan_settings: &PlanSettings,
    json: bool,
) -> i32 {
    // A project folder is loaded once here, so that chances from its history can read
    // the earlier waves.
    let loaded = if source.is_project() {
        load_project_wave(source, &mut settings).map(|(p, v)| (Some(p), v))
    } else {
        load_universe(source, &mut settings).map(|v| (None, v))
    };
    let (project, view) = match loaded {
        Ok(l) => l,
        Err(message) => {
            eprintln!("{message}");
            return 1;
        }
    };
    if crate::analysis::imputed::wanted(&settings) {
        let result = crate::progress::during("imputing and planning", json, || {
            crate::analysis::imputed::plan(project.as_ref(), &view, &settings, plan_settings)
        });
        let result = result.map(|mut p| {
            if project.is_none() {
                p.plan.wave = None;
            }
            p
        });
        return finish(result, json, imputed_plan_text);
    }
    let result = crate::progress::during("planning", json, || match &project {
        Some(project) => {
            crate::analysis::planner::plan_for(project, &view, &settings, plan_settings)
        }
        None => crate::analysis::planner::plan(&view, &settings, plan_settings),
    });
    let result = result.map(|mut p| {
        if project.is_none() {
            p.wave = None;
        }
        p
    });
    finish(result, json, plan_text)
}

/// The readable form of a plan built under multiple imputation: the plan, then how far
/// the imputations agree on it.
fn imputed_plan_text(p: &ImputedPlan) -> String {
    let mut text = plan_text(&p.plan);
    let _ = writeln!(
        text,
        "\nMultiple imputation ({} frames, seed {}): the plan is built on {}; share of imputations whose own plan picks each country:",
        p.imputation.imputations, p.imputation.seed, p.plan_frame
    );
    for (id, share) in &p.pick_agreement {
        let _ = writeln!(text, "  {id:<8} {:.0}%", 100.0 * share);
    }
    if let Some(s) = p.objective_spread {
        let _ = writeln!(
            text,
            "  expected objective over the imputations: mean {:.3}, range {:.3} to {:.3}",
            s.mean, s.min, s.max
        );
    }
    if let Some(c) = &p.objective_combined {
        // An unbounded df means every completed frame gave the same value.
        let df = if c.df.is_finite() {
            format!("{:.1}", c.df)
        } else {
            "unbounded".to_string()
        };
        let _ = writeln!(
            text,
            "  this plan's expected objective, combined over the {} frames by Rubin's rules: {:.3} (s.e. {:.3}, 95% interval {:.3} to {:.3}, df {df}, fraction of missing information {:.2})\n  {}",
            p.objective_by_imputation.len(),
            c.estimate,
            c.se,
            c.ci95_low,
            c.ci95_high,
            c.fmi,
            p.objective_note
        );
    }
    text
}

/// The readable form of a plan.
pub fn plan_text(p: &Plan) -> String {
    let mut out = String::new();
    let c = &p.current;
    let _ = writeln!(
        out,
        "now: {} of {} eligible take part; effective number after entropy balancing {:.1}{}; mean |SMD| {:.3}, largest {:.3}",
        p.n_participants,
        p.n_eligible,
        c.effective_n,
        if c.feasible { "" } else { " (balance not reachable)" },
        c.mean_abs_smd,
        c.max_abs_smd
    );
    let _ = writeln!(
        out,
        "chances of joining: {}; expectations over who joins: {}{}",
        p.chances.column.as_ref().map_or_else(
            || "participation model, leave-one-out".to_string(),
            |c| format!("column {c}")
        ),
        p.expectation,
        if p.expectation_draws > 0 {
            format!(" ({} draws)", p.expectation_draws)
        } else {
            String::new()
        }
    );
    // Two headings are wider than their columns and push the rest of the header right.
    const STEPS: TextTable = TextTable {
        indent: "",
        columns: &[
            Left("step", 4),
            Left("country", 8),
            Right("p(join)", 8),
            Right("expected n", 12),
            Right("exp. gain", 9),
            Right("exp. max|d|", 10),
            Right("n if all join", 11),
            Right("stability", 9),
        ],
    };
    out.push('\n');
    STEPS.push_header(&mut out);
    for (j, s) in p.steps.iter().enumerate() {
        let expected_n = match s.expected_effective_n_mc_error {
            Some(e) => format!("{:.1}±{:.1}", s.expected_effective_n, e),
            None => format!("{:.1}", s.expected_effective_n),
        };
        let line = STEPS.line(&[
            &(j + 1),
            &s.id,
            &format!("{:.2}", s.probability),
            &expected_n,
            &format!("{:.2}", s.expected_gain),
            &format!("{:.3}", s.expected_max_abs_smd),
            &format!("{:.1}", s.effective_n_if_all_join),
            &opt(s.stability, 2),
        ]);
        let _ = writeln!(
            out,
            "{line}{}{}",
            if s.supported { "  (with support)" } else { "" },
            if s.exchanged { "  (by exchange)" } else { "" }
        );
    }
    let b = &p.baselines;
    let o = &p.optimality;
    let plus = |e: Option<f64>| e.map_or(String::new(), |e| format!(" ± {e:.2}"));
    let _ = writeln!(
        out,
        "\nexpected effective n with the whole budget: plan {:.1}; the likeliest {:.1}; the most different {:.1}; at random {:.1}{} (mean of {} random plans)",
        p.steps.last().map_or(c.effective_n, |s| s.expected_effective_n),
        b.likeliest.expected_effective_n_mean,
        b.most_different.expected_effective_n_mean,
        b.random.expected_effective_n_mean,
        plus(b.random.mc_error),
        b.random.draws
    );
    let _ = writeln!(
        out,
        "optimality ({}): plan {:.2}, best found {:.2} ({}); the plan is at the {:.1}th percentile of {} random plans",
        o.method,
        o.plan_value,
        o.best_found,
        o.best_plan.join(" "),
        o.plan_percentile_among_random,
        o.random_plans
    );
    for n in &p.notes {
        let _ = writeln!(out, "note: {n}");
    }
    out
}
