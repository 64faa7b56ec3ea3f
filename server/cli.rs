//! The command line's work: each command returns its exit code and prints its result.
//! Argument parsing lives in `main.rs`.

use std::fmt::Write as _;
use std::net::SocketAddr;
use std::path::Path;
use std::sync::Arc;

use crate::analysis::overview::{overview, Overview};
use crate::analysis::participation::{self, FitReport};
use crate::analysis::Settings;
use crate::project::Project;
use crate::project::WaveView;
use crate::web;

/// Writes to standard output, ignoring a closed pipe (`gapwise fit ... | head`).
fn emit(text: &str) {
    use std::io::Write as _;
    let _ = std::io::stdout().lock().write_all(text.as_bytes());
}

/// One JSON value, pretty-printed, on standard output.
fn emit_json<T: serde::Serialize>(value: &T) {
    emit(&(serde_json::to_string_pretty(value).unwrap_or_default() + "\n"));
}

/// `gapwise check DIR`: a summary and exit 0, or one line per problem and exit 1.
pub fn check(dir: &Path, json: bool) -> i32 {
    match Project::load(dir) {
        Ok(project) => {
            let o = overview(&project);
            if json {
                emit_json(&o);
            } else {
                emit(&summary_text(&o));
            }
            0
        }
        Err(problems) if json => {
            // The same problems, as data: `valid` false, each problem with its file, row
            // (null: not tied to a row), column and message.
            emit_json(&serde_json::json!({
                "valid": false,
                "directory": dir.display().to_string(),
                "problems": problems,
            }));
            1
        }
        Err(problems) => {
            for p in &problems {
                eprintln!("{p}");
            }
            eprintln!(
                "{} problem{} in {}; fix them and run `gapwise check` again.",
                problems.len(),
                if problems.len() == 1 { "" } else { "s" },
                dir.display()
            );
            1
        }
    }
}

/// The readable summary printed by `gapwise check`.
pub fn summary_text(o: &Overview) -> String {
    let mut out = String::new();
    let _ = writeln!(
        out,
        "{}: {} countries, {} waves",
        o.title,
        o.n_countries,
        o.waves.len()
    );
    let _ = writeln!(
        out,
        "\n{:>6} {:>9} {:>9} {:>10} {:>9}",
        "wave", "rows", "eligible", "took part", "coverage"
    );
    for w in &o.waves {
        let _ = writeln!(
            out,
            "{:>6} {:>9} {:>9} {:>10} {:>8.0}%",
            w.wave,
            w.rows,
            w.eligible,
            w.participating,
            100.0 * w.coverage
        );
    }
    let _ = writeln!(
        out,
        "\nmissing values among eligible countries (per wave) and in all rows:"
    );
    for m in &o.missing {
        let per_wave: Vec<String> = m.eligible_missing.iter().map(usize::to_string).collect();
        let _ = writeln!(
            out,
            "  {:<28} {:<16} {}",
            m.indicator,
            per_wave.join(" "),
            m.total_missing
        );
    }
    if let Some(md) = &o.microdata {
        let _ = writeln!(
            out,
            "\nmicrodata: {} respondents; variables: {}",
            md.respondents,
            md.variables.join(", ")
        );
    }
    if !o.warnings.is_empty() {
        let _ = writeln!(
            out,
            "\n{} warning{}:",
            o.warnings.len(),
            if o.warnings.len() == 1 { "" } else { "s" }
        );
        for w in &o.warnings {
            let _ = writeln!(out, "  {w}");
        }
    }
    out
}

/// `gapwise serve`: loads the project and serves it until Ctrl-C.
pub fn serve(
    dir: &Path,
    addr: SocketAddr,
    allow_remote: bool,
    projects: Option<std::path::PathBuf>,
    access: web::guard::Access,
) -> i32 {
    if !addr.ip().is_loopback() {
        if !allow_remote {
            eprintln!(
                "refusing to listen on {addr}: the server holds study data and has no login. Use a 127.0.0.1 address, or add --allow-remote if every machine that can reach {} may see the data.",
                addr.ip()
            );
            return 2;
        }
        eprintln!("warning: listening on {addr}; anyone who can reach this address can read the project's data.");
    }
    let project = match Project::load(dir) {
        Ok(p) => p,
        Err(problems) => {
            for p in &problems {
                eprintln!("{p}");
            }
            eprintln!(
                "the project in {} has problems; fix them (see `gapwise check`) and start again.",
                dir.display()
            );
            return 1;
        }
    };
    if let Some(p) = &projects {
        if let Err(e) = std::fs::create_dir_all(p) {
            eprintln!("cannot use the projects folder {}: {e}", p.display());
            return 1;
        }
    }
    let state =
        Arc::new(web::AppState::with_projects(project, projects).keeping(access.keep_versions));
    let runtime = match tokio::runtime::Runtime::new() {
        Ok(r) => r,
        Err(e) => {
            eprintln!("cannot start the server runtime: {e}");
            return 1;
        }
    };
    match runtime.block_on(web::serve(state, addr, allow_remote, access)) {
        Ok(()) => 0,
        Err(message) => {
            eprintln!("{message}");
            1
        }
    }
}

/// `gapwise make-demo DIR`: writes the invented demo project.
pub fn make_demo(dir: &Path, seed: u64) -> i32 {
    match crate::demo::write(dir, seed) {
        Ok(()) => {
            println!("wrote the demo project (seed {seed}) to {}", dir.display());
            0
        }
        Err(e) => {
            eprintln!("cannot write the demo to {}: {e}", dir.display());
            1
        }
    }
}

/// Where `gapwise fit` and `gapwise plan` take their universe from.
pub struct UniverseSource {
    pub path: std::path::PathBuf,
    pub wave: Option<i64>,
    pub id: Option<String>,
    pub flag: Option<String>,
    /// Cost and feasibility columns to read from a bare frame file.
    pub extra: crate::project::wave::ExtraColumns,
}

/// Loads the wave view named by the source: a project folder (manifest columns, one wave)
/// or a bare frame file whose rows are all eligible. Returns the view and the settings
/// completed with the defaults that apply.
pub fn load_universe(source: &UniverseSource, settings: &mut Settings) -> Result<WaveView, String> {
    if source.path.is_dir() {
        load_project_wave(source, settings).map(|(_, view)| view)
    } else {
        let id = source
            .id
            .as_deref()
            .ok_or("a frame file needs --id COLUMN (the unit identifier)")?;
        let flag = source
            .flag
            .as_deref()
            .ok_or("a frame file needs --flag COLUMN (1 took part, 0 did not)")?;
        let covariates = settings.covariates.clone().unwrap_or_default();
        let factors = settings.factors.clone().unwrap_or_default();
        if covariates.is_empty() && factors.is_empty() {
            return Err(
                "a frame file needs --covariates a,b,c (and optionally --categorical f,g)"
                    .to_string(),
            );
        }
        WaveView::from_file(&source.path, id, flag, &covariates, &factors, &source.extra)
            .map_err(|p| problems_text(&p, &source.path))
    }
}

/// A project folder and its wave (the settings' wave set to it).
fn load_project_wave(
    source: &UniverseSource,
    settings: &mut Settings,
) -> Result<(Project, WaveView), String> {
    let project = Project::load(&source.path).map_err(|p| problems_text(&p, &source.path))?;
    let (wave, view) = project.resolve_wave(source.wave)?;
    settings.wave = Some(wave);
    Ok((project, view))
}

fn problems_text(problems: &[crate::project::Problem], path: &Path) -> String {
    let mut out: Vec<String> = problems.iter().map(ToString::to_string).collect();
    out.push(format!(
        "{} problem{} in {}",
        problems.len(),
        if problems.len() == 1 { "" } else { "s" },
        path.display()
    ));
    out.join("\n")
}

/// `gapwise fit`: the participation model, the weights and the balance they achieve.
/// `outcome`: a column and the Λ values of its sensitivity bounds (`--outcome`,
/// `--sensitivity`).
pub fn fit(
    source: &UniverseSource,
    mut settings: Settings,
    outcome: Option<(&str, &[f64])>,
    json: bool,
) -> i32 {
    let view = match load_universe(source, &mut settings) {
        Ok(v) => v,
        Err(message) => {
            eprintln!("{message}");
            return 1;
        }
    };
    let summary = match outcome {
        None => None,
        Some((column, lambdas)) => {
            let project = if source.path.is_dir() {
                Project::load(&source.path).ok()
            } else {
                None
            };
            match crate::analysis::selection_bounds::outcome_summary(
                project.as_ref(),
                &view,
                &settings,
                column,
                lambdas,
            ) {
                Ok(s) => Some(s),
                Err(message) => {
                    eprintln!("--outcome {column}: {message}");
                    return 1;
                }
            }
        }
    };
    if crate::analysis::imputed::wanted(&settings) {
        return fit_imputed(source, &view, &settings, summary.as_ref(), json);
    }
    match participation::fit(&view, &settings) {
        Ok(mut report) => {
            if !source.path.is_dir() {
                report.wave = None;
            }
            if json {
                #[derive(serde::Serialize)]
                struct WithOutcome<'a> {
                    #[serde(flatten)]
                    report: &'a FitReport,
                    #[serde(skip_serializing_if = "Option::is_none")]
                    outcome: Option<&'a crate::analysis::selection_bounds::OutcomeSummary>,
                }
                emit_json(&WithOutcome {
                    report: &report,
                    outcome: summary.as_ref(),
                });
            } else {
                let mut text = fit_text(&report);
                if let Some(s) = &summary {
                    let _ = writeln!(
                        text,
                        "\n{}: inverse-probability mean {:.4} ({} model, untrimmed)",
                        s.column,
                        s.weighted_mean,
                        settings.model.as_str()
                    );
                    for b in &s.bounds {
                        let _ = writeln!(
                            text,
                            "  Λ = {:<6} bounds {:.4} to {:.4}",
                            b.lambda, b.lower, b.upper
                        );
                    }
                    if !s.bounds.is_empty() {
                        let _ = writeln!(text, "  (Λ: an odds ratio on taking part, not on the outcome; the bounds hold for inverse-probability-type weights)");
                    }
                }
                emit(&text);
            }
            0
        }
        Err(e) => {
            eprintln!("{e}");
            1
        }
    }
}

/// `gapwise fit --missing impute`: the fit on every completed frame, combined.
fn fit_imputed(
    source: &UniverseSource,
    view: &WaveView,
    settings: &Settings,
    summary: Option<&crate::analysis::selection_bounds::OutcomeSummary>,
    json: bool,
) -> i32 {
    let project = if source.path.is_dir() {
        Project::load(&source.path).ok()
    } else {
        None
    };
    let result = crate::progress::during("imputing and fitting", json, || {
        crate::analysis::imputed::fit(project.as_ref(), view, settings)
    });
    match result {
        Ok(mut r) => {
            if !source.path.is_dir() {
                r.report.wave = None;
            }
            if json {
                #[derive(serde::Serialize)]
                struct WithOutcome<'a> {
                    #[serde(flatten)]
                    fit: &'a crate::analysis::imputed::ImputedFit,
                    #[serde(skip_serializing_if = "Option::is_none")]
                    outcome: Option<&'a crate::analysis::selection_bounds::OutcomeSummary>,
                }
                emit_json(&WithOutcome {
                    fit: &r,
                    outcome: summary,
                });
            } else {
                let mut text = fit_text(&r.report);
                let _ = writeln!(
                    text,
                    "\nCombined over {} imputations (seed {}; Rubin's rules, Barnard-Rubin df from complete-data {:.0}):",
                    r.imputation.imputations, r.imputation.seed, r.df_complete
                );
                for (j, term) in r.report.model.terms.iter().enumerate() {
                    let _ = writeln!(
                        text,
                        "  {term:<28} df {:>8}  missing information {:>6}",
                        opt(r.df.get(j).copied().flatten(), 1),
                        opt(r.fraction_missing_information.get(j).copied().flatten(), 3)
                    );
                }
                if let Some(s) = summary {
                    let _ = writeln!(
                        text,
                        "\n{}: inverse-probability mean {:.4} on the incomplete frame (not imputed)",
                        s.column, s.weighted_mean
                    );
                }
                let _ = writeln!(text, "caution: {}", r.imputation.caution);
                emit(&text);
            }
            0
        }
        Err(e) => {
            eprintln!("{e}");
            1
        }
    }
}

fn opt(x: Option<f64>, decimals: usize) -> String {
    x.map_or_else(|| "-".to_string(), |v| format!("{v:.decimals$}"))
}

/// The readable form of a fit.
pub fn fit_text(r: &FitReport) -> String {
    let mut out = String::new();
    let wave = r.wave.map(|w| format!("wave {w}: ")).unwrap_or_default();
    let _ = writeln!(
        out,
        "{wave}{} eligible, {} took part; {}",
        r.n_eligible, r.n_participants, r.missing_note
    );
    if let Some(inc) = &r.incomplete {
        let _ = writeln!(out, "warning: {}", inc.warning);
    }
    if let Some(caveat) = &r.missing_caveat {
        let _ = writeln!(out, "note: {caveat}");
    }
    let m = &r.model;
    let _ = writeln!(
        out,
        "\n{} model (log-likelihood {:.4}, {}converged; AUC {}, leave-one-out AUC {})",
        crate::analysis::settings::model_label(m.kind),
        m.log_likelihood,
        if m.converged { "" } else { "NOT " },
        opt(m.auc, 3),
        opt(m.auc_loo, 3)
    );
    let _ = writeln!(
        out,
        "  {:<34} {:>12} {:>12}",
        "term", "coefficient", "std. error"
    );
    for c in &m.coefficients {
        let number =
            |x: Option<f64>| x.map_or_else(|| "not estimable".to_string(), |v| format!("{v:.5}"));
        let _ = writeln!(
            out,
            "  {:<34} {:>12} {:>12}",
            c.term,
            number(c.coef),
            number(c.se)
        );
    }
    for w in &m.warnings {
        let _ = writeln!(out, "  warning: {w}");
    }
    let wr = &r.weighting;
    let _ = writeln!(
        out,
        "\n{} weights: effective number of countries {:.1} of {}, largest weight {:.1}% of the total, CV {:.3}",
        wr.kind.as_str(),
        wr.effective_n,
        r.n_participants,
        100.0 * wr.max_weight_share,
        wr.cv
    );
    for w in &wr.warnings {
        let _ = writeln!(out, "  warning: {w}");
    }
    let _ = writeln!(
        out,
        "\n  {:<34} {:>10} {:>10} {:>10} {:>10}",
        "balance", "SMD before", "SMD after", "VR before", "VR after"
    );
    for b in &r.balance {
        let _ = writeln!(
            out,
            "  {:<34} {:>10} {:>10} {:>10} {:>10}",
            b.covariate,
            opt(b.smd_before, 3),
            opt(b.smd_after, 3),
            opt(b.variance_ratio_before, 2),
            opt(b.variance_ratio_after, 2)
        );
    }
    out
}

/// `gapwise plan`: the greedy recruitment plan, its baselines and its stability.
pub fn plan(
    source: &UniverseSource,
    mut settings: Settings,
    plan_settings: &crate::analysis::planner::PlanSettings,
    json: bool,
) -> i32 {
    if crate::analysis::imputed::wanted(&settings) {
        let loaded = if source.path.is_dir() {
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
        let result = crate::progress::during("imputing and planning", json, || {
            crate::analysis::imputed::plan(project.as_ref(), &view, &settings, plan_settings)
        });
        return match result {
            Ok(mut p) => {
                if project.is_none() {
                    p.plan.wave = None;
                }
                if json {
                    emit_json(&p);
                } else {
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
                    emit(&text);
                }
                0
            }
            Err(e) => {
                eprintln!("{e}");
                1
            }
        };
    }
    // A project folder is loaded once here, so that chances from its history can read
    // the earlier waves.
    let result = if source.path.is_dir() {
        let (project, view) = match load_project_wave(source, &mut settings) {
            Ok(loaded) => loaded,
            Err(message) => {
                eprintln!("{message}");
                return 1;
            }
        };
        crate::progress::during("planning", json, || {
            crate::analysis::planner::plan_for(&project, &view, &settings, plan_settings)
        })
    } else {
        let view = match load_universe(source, &mut settings) {
            Ok(v) => v,
            Err(message) => {
                eprintln!("{message}");
                return 1;
            }
        };
        crate::progress::during("planning", json, || {
            crate::analysis::planner::plan(&view, &settings, plan_settings)
        })
    };
    match result {
        Ok(mut p) => {
            if !source.path.is_dir() {
                p.wave = None;
            }
            if json {
                emit_json(&p);
            } else {
                emit(&plan_text(&p));
            }
            0
        }
        Err(e) => {
            eprintln!("{e}");
            1
        }
    }
}

/// The readable form of a plan.
pub fn plan_text(p: &crate::analysis::planner::Plan) -> String {
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
    let _ = writeln!(
        out,
        "\n{:<4} {:<8} {:>8} {:>12} {:>9} {:>10} {:>11} {:>9}",
        "step",
        "country",
        "p(join)",
        "expected n",
        "exp. gain",
        "exp. max|d|",
        "n if all join",
        "stability"
    );
    for (j, s) in p.steps.iter().enumerate() {
        let _ = writeln!(
            out,
            "{:<4} {:<8} {:>8.2} {:>12} {:>9.2} {:>10.3} {:>11.1} {:>9}{}{}",
            j + 1,
            s.id,
            s.probability,
            match s.expected_effective_n_mc_error {
                Some(e) => format!("{:.1}±{:.1}", s.expected_effective_n, e),
                None => format!("{:.1}", s.expected_effective_n),
            },
            s.expected_gain,
            s.expected_max_abs_smd,
            s.effective_n_if_all_join,
            opt(s.stability, 2),
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

/// `gapwise pooled`: a pooled regression with CR1 cluster-robust standard errors and
/// t(G - 1) p-values and intervals.
pub fn pooled(
    path: &Path,
    outcome: &str,
    predictors: &[String],
    country: &str,
    design_weight: Option<&str>,
    kind: crate::stats::regression::Kind,
    json: bool,
) -> i32 {
    match crate::progress::during("reading the respondents and fitting", json, || {
        crate::analysis::microdata::pooled_file(
            path,
            outcome,
            predictors,
            country,
            design_weight,
            kind,
        )
    }) {
        Ok(r) => {
            if json {
                emit_json(&r);
            } else {
                emit(&pooled_text(&r, outcome));
            }
            0
        }
        Err(e) => {
            eprintln!("{e}");
            1
        }
    }
}

fn pooled_text(r: &crate::analysis::microdata::PooledReport, outcome: &str) -> String {
    let mut out = format!(
        "{} model of {outcome}: {} respondents in {} countries ({} rows with missing values left out)\n",
        r.kind.as_str(), r.n, r.clusters, r.dropped
    );
    let _ = writeln!(
        out,
        "  {:<28} {:>14} {:>14} {:>10} {:>28}",
        "term",
        "coefficient",
        "country s.e.",
        format!("p, t({})", r.df),
        "95% interval, t"
    );
    for (j, t) in r.terms.iter().enumerate() {
        let interval = match (r.ci95_low[j], r.ci95_high[j]) {
            (Some(l), Some(h)) => format!("{l:.6} to {h:.6}"),
            _ => "not estimable".to_string(),
        };
        let _ = writeln!(
            out,
            "  {t:<28} {:>14.6} {:>14.6} {:>10} {interval:>28}",
            r.coef[j],
            r.se[j],
            opt(r.p[j], 4),
        );
    }
    out
}

/// `gapwise two-step`: the Heckman two-step estimator with corrected standard errors.
pub fn two_step(
    path: &Path,
    columns: &crate::analysis::microdata::TwoStepColumns,
    json: bool,
) -> i32 {
    match crate::progress::during("reading the respondents and fitting", json, || {
        crate::analysis::microdata::two_step_file(path, columns)
    }) {
        Ok(r) => {
            if json {
                emit_json(&r);
            } else {
                emit(&two_step_text(&r));
            }
            0
        }
        Err(e) => {
            eprintln!("{e}");
            1
        }
    }
}

fn two_step_text(r: &crate::analysis::microdata::TwoStepReport) -> String {
    let mut out = format!(
        "Two-step selection model: {} rows, {} selected{}\n\nSelection (probit)\n",
        r.n,
        r.n_selected,
        r.clusters
            .map_or(String::new(), |g| format!(", {g} countries"))
    );
    let _ = writeln!(out, "  {:<28} {:>14} {:>14}", "term", "coefficient", "s.e.");
    for ((t, c), s) in r
        .selection
        .terms
        .iter()
        .zip(&r.selection.coef)
        .zip(&r.selection.se)
    {
        let _ = writeln!(out, "  {t:<28} {c:>14.6} {s:>14.6}");
    }
    let _ = writeln!(
        out,
        "\nOutcome (least squares with the inverse Mills ratio, lambda)\n  {:<28} {:>14} {:>14} {:>14}",
        "term",
        "coefficient",
        if r.clusters.is_some() { "s.e. (M-T)" } else { "s.e. (two-step)" },
        "s.e. ignoring step 1"
    );
    let unc = r.outcome.se_uncorrected.clone().unwrap_or_default();
    for (j, t) in r.outcome.terms.iter().enumerate() {
        let _ = writeln!(
            out,
            "  {t:<28} {:>14.6} {:>14.6} {:>14}",
            r.outcome.coef[j],
            r.outcome.se[j],
            opt(unc.get(j).copied(), 6)
        );
    }
    let _ = writeln!(out, "\nrho {:.4}, sigma {:.4}", r.rho, r.sigma);
    for n in &r.notes {
        let _ = writeln!(out, "note: {n}");
    }
    out
}

/// `gapwise impact`: every correction's pooled mean and coefficients for one wave.
pub fn impact(
    dir: &Path,
    mut settings: Settings,
    imp: &crate::analysis::impact::ImpactSettings,
    json: bool,
) -> i32 {
    let source = UniverseSource {
        path: dir.to_path_buf(),
        wave: settings.wave,
        id: None,
        flag: None,
        extra: Default::default(),
    };
    if !dir.is_dir() {
        eprintln!(
            "{}: impact needs a project folder with microdata",
            dir.display()
        );
        return 2;
    }
    let project = match Project::load(dir) {
        Ok(p) => p,
        Err(problems) => {
            eprintln!("{}", problems_text(&problems, dir));
            return 1;
        }
    };
    let view = match load_universe(&source, &mut settings) {
        Ok(v) => v,
        Err(e) => {
            eprintln!("{e}");
            return 1;
        }
    };
    if crate::analysis::imputed::wanted(&settings) {
        return match crate::progress::during(
            "imputing and estimating every correction",
            json,
            || crate::analysis::imputed::impact(&project, &view, &settings, imp),
        ) {
            Ok(r) => {
                if json {
                    emit_json(&r);
                } else {
                    emit(&impact_text(&r.report));
                }
                0
            }
            Err(e) => {
                eprintln!("{e}");
                1
            }
        };
    }
    match crate::progress::during("estimating every correction", json, || {
        crate::analysis::impact::impact(&project, &view, &settings, imp)
    }) {
        Ok(r) => {
            if json {
                emit_json(&r);
            } else {
                emit(&impact_text(&r));
            }
            0
        }
        Err(e) => {
            eprintln!("{e}");
            1
        }
    }
}

fn impact_text(r: &crate::analysis::impact::ImpactReport) -> String {
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

/// Arguments of `gapwise multilevel`.
pub struct MultilevelArgs<'a> {
    pub outcome: &'a str,
    pub predictors: &'a [String],
    pub country: &'a str,
    pub kind: crate::analysis::multilevel::Kind,
    pub ml: bool,
    pub weight: Option<&'a str>,
    pub nodes: usize,
}

/// `gapwise multilevel`: a random-intercept model with countries as the second level.
pub fn multilevel(path: &Path, a: &MultilevelArgs, json: bool) -> i32 {
    use crate::analysis::multilevel::{multilevel_file, Request};
    let request = Request {
        outcome: a.outcome,
        predictors: a.predictors,
        country: a.country,
        weight: a.weight,
        kind: a.kind,
        ml: a.ml,
        nodes: a.nodes,
    };
    match crate::progress::during("reading the respondents and fitting", json, || {
        multilevel_file(path, &request)
    }) {
        Ok(r) => {
            if json {
                emit_json(&r);
            } else {
                let mut out = format!(
                    "{} random-intercept model of {} ({}): {} respondents in {} countries ({} rows with missing values left out){}\n",
                    r.kind,
                    a.outcome,
                    r.method,
                    r.n,
                    r.countries,
                    r.dropped,
                    if r.converged { "" } else { "; NOT CONVERGED" }
                );
                let _ = writeln!(out, "  {:<28} {:>14} {:>14}", "term", "coefficient", "s.e.");
                for ((t, c), s) in r.terms.iter().zip(&r.coef).zip(&r.se) {
                    let _ = writeln!(out, "  {t:<28} {c:>14.6} {s:>14.6}");
                }
                let _ = writeln!(out, "  country SD {:.6}", r.country_sd);
                if let (Some(s), Some(icc)) = (r.residual_sd, r.icc) {
                    let _ = writeln!(out, "  residual SD {s:.6}; intraclass correlation {icc:.4}");
                }
                let _ = writeln!(out, "  log-likelihood {:.4}", r.log_likelihood);
                if let Some(n) = &r.note {
                    let _ = writeln!(out, "note: {n}");
                }
                emit(&out);
            }
            0
        }
        Err(e) => {
            eprintln!("{e}");
            1
        }
    }
}

/// `gapwise report`: renders the meeting report and writes it atomically. `query` holds
/// the settings under the pages' query keys, read by the report button's own parser.
pub fn report(dir: &Path, query: &[(String, String)], out: &Path) -> i32 {
    let project = match Project::load(dir) {
        Ok(p) => p,
        Err(problems) => {
            eprintln!("{}", problems_text(&problems, dir));
            return 1;
        }
    };
    let request = match crate::web::report::report_settings(&project, &query.to_vec()) {
        Ok(r) => r,
        Err(e) => {
            eprintln!("{e}");
            return 2;
        }
    };
    let html = match crate::web::report::render(&project, &request) {
        Ok(h) => h,
        Err(e) => {
            eprintln!("{e}");
            return 1;
        }
    };
    match write_atomically(out, html.as_bytes()) {
        Ok(()) => {
            println!("wrote {} ({} kB)", out.display(), html.len() / 1024);
            0
        }
        Err(e) => {
            eprintln!("cannot write {}: {e}", out.display());
            1
        }
    }
}

/// Writes to a temporary file beside `path`, then renames it into place, so that an
/// interrupted write never leaves a half-written file.
pub fn write_atomically(path: &Path, bytes: &[u8]) -> std::io::Result<()> {
    let dir = path
        .parent()
        .filter(|p| !p.as_os_str().is_empty())
        .unwrap_or(Path::new("."));
    let name = path
        .file_name()
        .map_or_else(|| "output".into(), |n| n.to_string_lossy().to_string());
    let temp = dir.join(format!(".{name}.{}.partial", std::process::id()));
    let result = std::fs::write(&temp, bytes).and_then(|()| std::fs::rename(&temp, path));
    if result.is_err() {
        let _ = std::fs::remove_file(&temp);
    }
    result
}

/// `gapwise weights`: every wave's country weights in one CSV, one row per eligible
/// country of every wave (columns `wave, code, name, took_part, propensity, weight,
/// reason`: countries left out of the analysis keep their row with empty propensity and
/// weight and the reason), or with `respondents` one row per respondent (`country, wave,
/// respondent, design_weight, country_weight, combined_weight, reason`); and a sidecar
/// JSON with the method, the settings, the tool version and the input checksums. Both
/// written atomically.
pub fn export_weights(dir: &Path, settings: &Settings, out: &Path, respondents: bool) -> i32 {
    use crate::analysis::exports::{country_weights, respondent_weights};
    use crate::csv_out::cell;
    let project = match Project::load(dir) {
        Ok(p) => p,
        Err(problems) => {
            eprintln!("{}", problems_text(&problems, dir));
            return 1;
        }
    };
    let countries = country_weights(&project, settings);
    let (csv, columns) = if respondents {
        let rows = match respondent_weights(&project, &countries) {
            Ok(r) => r,
            Err(e) => {
                eprintln!("{e}");
                return 1;
            }
        };
        let csv = crate::csv_out::csv_text(
            &[
                "country",
                "wave",
                "respondent",
                "design_weight",
                "country_weight",
                "combined_weight",
                "reason",
            ],
            rows.into_iter().map(|r| {
                vec![
                    r.country.unwrap_or_default(),
                    r.wave.map(|w| w.to_string()).unwrap_or_default(),
                    r.respondent.unwrap_or_default(),
                    cell(r.design_weight),
                    cell(r.country_weight),
                    cell(r.combined_weight),
                    r.reason.unwrap_or_default(),
                ]
            }),
        );
        let columns = serde_json::json!({
            "country": "country code (the microdata's country column)",
            "wave": "wave",
            "respondent": project.manifest.microdata.as_ref().and_then(|m| m.respondent.clone()).map_or("empty: project.toml names no [microdata] respondent column".to_string(), |c| format!("the microdata's column {c}")),
            "design_weight": "the microdata's design weight",
            "country_weight": "the country's weight in its wave (participants' weights sum to the wave's number of countries analysed); empty when the country has none",
            "combined_weight": "country_weight x design_weight / the sum of the design weights of the country's respondents in the wave, so each country's respondents sum to its country weight; empty when either is missing",
            "reason": "why a weight is empty; empty when there are weights",
        });
        (csv, columns)
    } else if crate::analysis::imputed::wanted(settings) {
        // Multiple imputation: the mean weight, its range and the weight in each frame.
        let m = settings.imputations;
        let mut header: Vec<String> = [
            "wave",
            "code",
            "name",
            "took_part",
            "propensity",
            "weight",
            "weight_min",
            "weight_max",
        ]
        .iter()
        .map(|s| s.to_string())
        .collect();
        header.extend((1..=m).map(|k| format!("weight_{k}")));
        header.push("reason".to_string());
        let refs: Vec<&str> = header.iter().map(String::as_str).collect();
        let csv = crate::csv_out::csv_text(
            &refs,
            countries.rows.iter().map(|r| {
                let by = r.weights_by_imputation.as_deref().unwrap_or(&[]);
                let spread = crate::stats::combine::spread(by);
                let mut row = vec![
                    r.wave.to_string(),
                    r.code.clone(),
                    r.name.clone(),
                    u8::from(r.took_part).to_string(),
                    cell(r.propensity),
                    cell(r.weight),
                    cell(spread.map(|s| s.min)),
                    cell(spread.map(|s| s.max)),
                ];
                row.extend((0..m).map(|k| cell(by.get(k).copied())));
                row.push(r.reason.clone().unwrap_or_default());
                row
            }),
        );
        let columns = serde_json::json!({"wave": "wave", "code": "country code", "name": "country name", "took_part": "1 took part, 0 did not", "propensity": "estimated probability of taking part, mean over the imputations", "weight": "mean over the imputations of the country's weight (in each, participants' weights sum to the wave's number of countries); 0 for non-participants", "weight_min": "smallest weight over the imputations", "weight_max": "largest weight over the imputations", "weight_1..": format!("the weight in each of the {m} completed frames (seed {})", settings.seed), "reason": "why propensity and weight are empty; empty when they are not"});
        (csv, columns)
    } else {
        let csv = crate::csv_out::csv_text(
            &[
                "wave",
                "code",
                "name",
                "took_part",
                "propensity",
                "weight",
                "reason",
            ],
            countries.rows.iter().map(|r| {
                vec![
                    r.wave.to_string(),
                    r.code.clone(),
                    r.name.clone(),
                    u8::from(r.took_part).to_string(),
                    cell(r.propensity),
                    cell(r.weight),
                    r.reason.clone().unwrap_or_default(),
                ]
            }),
        );
        let columns = serde_json::json!({"wave": "wave", "code": "country code", "name": "country name", "took_part": "1 took part, 0 did not", "propensity": "estimated probability of taking part; empty when left out", "weight": "participants' weights sum to the wave's number of countries analysed; 0 for non-participants; empty when left out", "reason": "why propensity and weight are empty (e.g. a missing indicator value); empty when they are not"});
        (csv, columns)
    };
    let sidecar = serde_json::json!({
        "tool": format!("gapwise {}", crate::VERSION),
        "rows": if respondents { "one per respondent" } else { "one per eligible country and wave" },
        "method": settings.weighting.as_str(),
        "model": settings.model.as_str(),
        "settings": settings,
        "waves": countries.waves,
        "inputs": &project.inputs,
        "columns": columns,
    });
    let sidecar_path = std::path::PathBuf::from(format!("{}.json", out.display()));
    let written = write_atomically(out, csv.as_bytes()).and_then(|()| {
        write_atomically(
            &sidecar_path,
            serde_json::to_string_pretty(&sidecar)
                .unwrap_or_default()
                .as_bytes(),
        )
    });
    match written {
        Ok(()) => {
            println!("wrote {} and {}", out.display(), sidecar_path.display());
            0
        }
        Err(e) => {
            eprintln!("cannot write {}: {e}", out.display());
            1
        }
    }
}
