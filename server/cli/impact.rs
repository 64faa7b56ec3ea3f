//! `gapwise impact`: how a respondent-level finding moves under each correction for
//! country selection (the impact page's numbers).

use std::fmt::Write as _;
use std::path::Path;

use super::universe::{load_project_wave, UniverseSource};
use super::{finish, opt};
use crate::analysis::impact::{ImpactReport, ImpactSettings};
use crate::analysis::Settings;

/// `gapwise impact`: every correction's pooled mean and coefficients for one wave.
pub fn impact(dir: &Path, mut settings: Settings, imp: &ImpactSettings, json: bool) -> i32 {
    if !dir.is_dir() {
        eprintln!(
            "{}: impact needs a project folder with microdata",
            dir.display()
        );
        return 2;
    }
    let source = UniverseSource::project(dir, settings.wave);
    let (project, view) = match load_project_wave(&source, &mut settings) {
        Ok(l) => l,
        Err(message) => {
            eprintln!("{message}");
            return 1;
        }
    };
    if crate::analysis::imputed::wanted(&settings) {
        let result =
            crate::progress::during("imputing and estimating every correction", json, || {
                crate::analysis::imputed::impact(&project, &view, &settings, imp)
            });
        return finish(result, json, |r| impact_text(&r.report));
    }
    let result = crate::progress::during("estimating every correction", json, || {
        crate::analysis::impact::impact(&project, &view, &settings, imp)
    });
    finish(result, json, impact_text)
}

/// The readable form of the impact result: per correction, the pooled mean and every
/// coefficient with its cluster-robust standard error and p-value, and beside them the
/// country bootstrap of the whole pipeline (standard error and percentile 95% interval),
/// its replicates, seed and failed replicates by reason, or why a variant has none.
fn impact_text(r: &ImpactReport) -> String {
    let mut out = format!(
        "Wave {}: {} of {} respondents in {} countries, under each correction (t on {} df)\n",
        r.wave, r.impact.outcome, r.n_respondents, r.n_countries, r.df
    );
    let _ = writeln!(out, "{}", bootstrap_heading(r));
    for v in &r.variants {
        let _ = writeln!(out, "\n{} [{}]", v.label, v.key);
        if let Some(e) = &v.error {
            let _ = writeln!(out, "  not estimated: {e}");
            continue;
        }
        if let Some(p) = v.pooled.as_ref().filter(|p| !p.se.is_finite()) {
            // No standard error of its own (the projection's prediction interval).
            let _ = writeln!(
                out,
                "  pooled mean {:.4} (interval {:.4} to {:.4}: {})",
                p.estimate, p.low, p.high, v.se_kind
            );
        } else if let Some(p) = &v.pooled {
            let _ = writeln!(
                out,
                "  pooled mean {:.4} (s.e. {:.4}; 95% {:.4} to {:.4}){}",
                p.estimate,
                p.se,
                p.low,
                p.high,
                match p.bootstrap.bootstrap_se {
                    Some(se) => format!(
                        "; country bootstrap s.e. {se:.4}, 95% {}",
                        interval(
                            p.bootstrap.bootstrap_ci95_low,
                            p.bootstrap.bootstrap_ci95_high,
                            4
                        )
                    ),
                    None => String::new(),
                }
            );
        }
        out.push_str(&terms_text(r, v));
        out.push_str(&bootstrap_lines(v));
    }
    for n in &r.notes {
        let _ = writeln!(out, "note: {n}");
    }
    out
}

/// A variant's coefficients: estimate, cluster-robust s.e. and p, and the country
/// bootstrap's s.e. and interval where the variant was bootstrapped.
fn terms_text(r: &ImpactReport, v: &crate::analysis::impact::Variant) -> String {
    let mut out = String::new();
    let b = &v.bootstrap;
    let booted = b.bootstrap_replicates > 0;
    if !v.coef.is_empty() {
        let _ = write!(
            out,
            "  {:<28} {:>12} {:>12} {:>8}",
            "term", "coefficient", "s.e.", "p"
        );
        if booted {
            let _ = write!(out, " {:>16} {:>24}", "bootstrap s.e.", "bootstrap 95%");
        }
        out.push('\n');
    }
    for (j, c) in v.coef.iter().enumerate() {
        let term = if j + 1 == v.coef.len() && v.key == "mills-ratio" {
            "inverse Mills ratio"
        } else {
            r.terms.get(j).map_or("", String::as_str)
        };
        let _ = write!(
            out,
            "  {term:<28} {c:>12.5} {:>12} {:>8}",
            opt(v.se.get(j).copied(), 5),
            opt(v.p_cluster.get(j).copied(), 4),
        );
        if booted {
            let _ = write!(
                out,
                " {:>16} {:>24}",
                opt(b.bootstrap_se.get(j).copied().flatten(), 5),
                interval(
                    b.bootstrap_ci95_low.get(j).copied().flatten(),
                    b.bootstrap_ci95_high.get(j).copied().flatten(),
                    5
                )
            );
        }
        out.push('\n');
    }
    out
}

/// What the bootstrap columns are: the replicates and seed that ran, or that none did.
fn bootstrap_heading(r: &ImpactReport) -> String {
    if r.impact.replicates == 0 {
        return "Country bootstrap: not run (--replicates 0); the standard errors are cluster-robust (CR1) only".to_string();
    }
    match r
        .variants
        .iter()
        .map(|v| &v.bootstrap)
        .find(|b| b.bootstrap_replicates > 0)
    {
        Some(b) => format!(
            "Country bootstrap: {} replicates of the whole pipeline (countries drawn with replacement; seed {}); its standard errors and percentile 95% intervals stand beside the cluster-robust (CR1) ones",
            b.bootstrap_replicates, b.bootstrap_seed
        ),
        None => "Country bootstrap: not run for this result (see the notes); the standard errors are cluster-robust (CR1) only".to_string(),
    }
}

/// A variant's bootstrap below its terms: the replicates that gave no value, by reason,
/// or why the variant is not bootstrapped.
fn bootstrap_lines(v: &crate::analysis::impact::Variant) -> String {
    let b = &v.bootstrap;
    let mut out = String::new();
    if let Some(note) = &b.bootstrap_note {
        let _ = writeln!(out, "  country bootstrap: {note}");
        return out;
    }
    if b.bootstrap_replicates == 0 {
        return out;
    }
    let _ = writeln!(
        out,
        "  country bootstrap: {} replicates, seed {}; {} gave no value{}",
        b.bootstrap_replicates,
        b.bootstrap_seed,
        b.bootstrap_failed,
        if b.bootstrap_failures.is_empty() {
            ""
        } else {
            ":"
        }
    );
    for f in &b.bootstrap_failures {
        let _ = writeln!(out, "    {:>5}  {}", f.count, f.label);
    }
    out
}

/// `low to high`, or `-` when either end is missing.
fn interval(low: Option<f64>, high: Option<f64>, decimals: usize) -> String {
    match (low, high) {
        (Some(l), Some(h)) => format!("{l:.decimals$} to {h:.decimals$}"),
        _ => "-".to_string(),
    }
}
