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

fn impact_text(r: &ImpactReport) -> String {
    let mut out = format!(
        "Wave {}: {} of {} respondents in {} countries, under each correction (t on {} df)\n",
        r.wave, r.impact.outcome, r.n_respondents, r.n_countries, r.df
    );
    for v in &r.variants {
        let _ = writeln!(out, "\n{} [{}]", v.label, v.key);
        if let Some(e) = &v.error {
            let _ = writeln!(out, "  not estimated: {e}");
            continue;
        }
        if let Some(p) = &v.pooled {
            let _ = writeln!(
                out,
                "  pooled mean {:.4} (s.e. {:.4}; 95% {:.4} to {:.4})",
                p.estimate, p.se, p.low, p.high
            );
        }
        for (j, c) in v.coef.iter().enumerate() {
            let term = if j + 1 == v.coef.len() && v.key == "mills-ratio" {
                "inverse Mills ratio"
            } else {
                r.terms.get(j).map_or("", String::as_str)
            };
            let _ = writeln!(
                out,
                "  {term:<28} {c:>12.5} {:>12} p {}",
                opt(v.se.get(j).copied(), 5),
                opt(v.p_cluster.get(j).copied(), 4)
            );
        }
    }
    for n in &r.notes {
        let _ = writeln!(out, "note: {n}");
    }
    out
}
