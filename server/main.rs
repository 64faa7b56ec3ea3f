//! The `gapwise` command line.

use std::net::SocketAddr;
use std::path::PathBuf;
use std::process::ExitCode;

use clap::{Parser, Subcommand};

use gapwise::cli;

#[derive(Parser)]
#[command(
    name = "gapwise",
    version,
    about = "Which countries are missing from a cross-national survey programme, and what that does to its findings"
)]
struct Args {
    #[command(subcommand)]
    command: Option<Command>,
}

#[derive(Subcommand)]
enum Command {
    /// Serve a project's pages on localhost (the demo when no folder is given).
    Serve {
        /// Project folder (with project.toml); the bundled demo when omitted.
        dir: Option<PathBuf>,
        /// Address to listen on.
        #[arg(long, default_value = "127.0.0.1:7878")]
        addr: SocketAddr,
        /// Allow an address other than loopback (anyone reaching it can read the data).
        #[arg(long)]
        allow_remote: bool,
        /// A folder of projects to open and create from the browser.
        #[arg(long)]
        projects: Option<PathBuf>,
        /// Also write this run's access key to a file readable only by you (for scripts).
        #[arg(long, value_name = "PATH")]
        key_file: Option<PathBuf>,
        /// Serve without an access key: every user and program on this machine can read the data.
        #[arg(long, conflicts_with = "key_file")]
        no_key: bool,
        /// Versions kept of each project saved from the browser (the current one included).
        #[arg(long, default_value_t = gapwise::project::store::DEFAULT_KEEP, value_parser = clap::value_parser!(usize))]
        keep_versions: usize,
    },
    /// Validate a project folder: a summary, or one line per problem (file:row:column: message).
    Check {
        dir: PathBuf,
        /// Print the summary as JSON.
        #[arg(long)]
        json: bool,
    },
    /// Model participation in one wave and weight the participants to the eligible universe.
    Fit {
        #[command(flatten)]
        universe: UniverseArgs,
        #[command(flatten)]
        analysis: AnalysisArgs,
        /// A country indicator or survey variable whose inverse-probability mean to report.
        #[arg(long)]
        outcome: Option<String>,
        /// Values of Λ (at least 1) for the outcome's bounds under an unmeasured cause of
        /// taking part, comma-separated (needs --outcome).
        #[arg(long, value_delimiter = ',', requires = "outcome")]
        sensitivity: Vec<f64>,
        /// Seed of the imputations (--missing impute).
        #[arg(long)]
        seed: Option<u64>,
        /// Print one JSON object instead of tables.
        #[arg(long)]
        json: bool,
    },
    /// Plan recruitment: which absent eligible countries would most improve balance.
    Plan {
        #[command(flatten)]
        universe: UniverseArgs,
        #[command(flatten)]
        analysis: AnalysisArgs,
        /// Number of countries to invite (default 5); the alternative to --cost-budget.
        #[arg(long, conflicts_with = "cost_budget")]
        budget: Option<usize>,
        /// Column with each country's recruitment cost (default: the project's [recruitment] cost).
        #[arg(long)]
        cost_column: Option<String>,
        /// Total cost allowed; the alternative to --budget.
        #[arg(long)]
        cost_budget: Option<f64>,
        /// Chance of joining: "auto" (the project's feasibility column, else the model),
        /// "model" (the participation model, leave-one-out) or a column of probabilities.
        #[arg(long, default_value = "auto")]
        feasibility: String,
        /// What to maximise over who joins: effective-n, largest-smd (made small) or feasibility.
        #[arg(long, default_value = "effective-n")]
        objective: String,
        /// Column with the cost of supporting a country (default: the project's
        /// [recruitment] support_cost); support is planned under a cost budget.
        #[arg(long, requires = "support_chance")]
        support_cost: Option<String>,
        /// Column with each country's chance of joining when supported (default: the
        /// project's [recruitment] support_chance).
        #[arg(long, requires = "support_cost")]
        support_chance: Option<String>,
        /// Plan invitations only, even where the project offers support.
        #[arg(long)]
        without_support: bool,
        /// Bootstrap replicates for the stability of each pick (0 to skip).
        #[arg(long, default_value_t = 200)]
        replicates: usize,
        /// Seed of every random draw (bootstrap, random baseline).
        #[arg(long)]
        seed: Option<u64>,
        /// Print one JSON object instead of tables.
        #[arg(long)]
        json: bool,
    },
    /// Pooled regression of a respondent outcome with standard errors clustered by country,
    /// p-values and intervals from t with (countries - 1) degrees of freedom.
    // The outcome's help, then the country's: each change moves its option to the end of
    // the usage line, so this order keeps it as written.
    #[command(
        mut_arg("outcome", |a| a.help("The outcome column")),
        mut_arg("country", |a| a.help("The country column (standard errors are clustered by it)"))
    )]
    Pooled {
        #[command(flatten)]
        respondents: RespondentColumns,
        /// Design weights column (each respondent's weight in the least squares).
        #[arg(long)]
        design_weight: Option<String>,
        /// linear (least squares) or logistic (0/1 outcome).
        #[arg(long, default_value = "linear", value_parser = regression_kind)]
        kind: gapwise::stats::regression::Kind,
        /// Print one JSON object instead of a table.
        #[arg(long)]
        json: bool,
    },
    /// Two-step selection model: a probit of being selected, then least squares of the
    /// outcome with the inverse Mills ratio, standard errors corrected for the first step.
    TwoStep {
        /// A CSV or Parquet file with one row per unit (selected or not).
        data: PathBuf,
        /// The outcome column (needed on selected rows only).
        #[arg(long)]
        outcome: String,
        /// Outcome-equation predictors, comma-separated.
        #[arg(long, value_delimiter = ',')]
        predictors: Vec<String>,
        /// The selection flag column, 1 selected, 0 not.
        #[arg(long)]
        selected: String,
        /// Selection-equation predictors, comma-separated.
        #[arg(long, value_delimiter = ',')]
        selection_predictors: Vec<String>,
        /// A country column: standard errors clustered by country (Murphy-Topel).
        #[arg(long)]
        country: Option<String>,
        /// Print one JSON object instead of tables.
        #[arg(long)]
        json: bool,
    },
    /// How a respondent-level finding moves under each correction for country selection
    /// (the impact page's numbers; --json prints what /api/impact serves).
    Impact {
        /// Project folder (with microdata).
        dir: PathBuf,
        #[command(flatten)]
        analysis: AnalysisArgs,
        /// The wave (default: the latest).
        #[arg(long)]
        wave: Option<i64>,
        /// The survey variable to estimate.
        #[arg(long)]
        outcome: String,
        /// Respondent variables or country indicators, comma-separated.
        #[arg(long, value_delimiter = ',')]
        predictors: Vec<String>,
        /// Country indicators in the two-step (Mills-ratio) outcome equation, comma-separated.
        #[arg(long, value_delimiter = ',')]
        country_indicators: Vec<String>,
        /// linear (least squares) or logistic (0/1 outcome).
        #[arg(long, default_value = "linear", value_parser = regression_kind)]
        kind: gapwise::stats::regression::Kind,
        /// Country shares proportional to this population column (logged when named log_...).
        #[arg(long)]
        population: Option<String>,
        /// Country bootstrap replicates of the whole pipeline: model, weights, two-step and
        /// estimate re-run on countries drawn with replacement (0 to skip).
        #[arg(long, default_value_t = gapwise::analysis::impact_bootstrap::DEFAULT_REPLICATES)]
        replicates: usize,
        /// Wild cluster bootstrap replicates for p-values (0 to skip; --bootstrap is the
        /// older name).
        #[arg(long, alias = "bootstrap", default_value_t = 399)]
        wild_replicates: usize,
        /// Seed of the imputations (--missing impute) and of the bootstraps.
        #[arg(long)]
        seed: Option<u64>,
        /// Print one JSON object instead of tables.
        #[arg(long)]
        json: bool,
    },
    /// Random-intercept model of a respondent outcome, countries as the second level.
    Multilevel {
        #[command(flatten)]
        respondents: RespondentColumns,
        /// linear or logistic.
        #[arg(long, default_value = "linear", value_parser = multilevel_kind)]
        kind: gapwise::analysis::multilevel::Kind,
        /// Full maximum likelihood instead of REML (linear).
        #[arg(long)]
        ml: bool,
        /// Design weights within countries (pseudo-likelihood; approximate).
        #[arg(long)]
        design_weight: Option<String>,
        /// Adaptive Gauss-Hermite nodes for --kind logistic (1 = Laplace).
        #[arg(long, default_value_t = 1)]
        nodes: usize,
        /// Print one JSON object instead of a table.
        #[arg(long)]
        json: bool,
    },
    /// Write a self-contained HTML report for a meeting (the settings are the pages').
    Report {
        /// Project folder.
        dir: PathBuf,
        #[command(flatten)]
        analysis: AnalysisArgs,
        #[command(flatten)]
        report: ReportArgs,
        /// Where to write the report.
        #[arg(long, default_value = "report.html")]
        out: PathBuf,
    },
    /// Export every wave's country weights as CSV, with the method and settings in a
    /// sidecar JSON file (FILE.json).
    Weights {
        /// Project folder.
        dir: PathBuf,
        #[command(flatten)]
        analysis: AnalysisArgs,
        /// The CSV file to write.
        #[arg(long, default_value = "weights.csv")]
        out: PathBuf,
        /// One row per respondent (country, wave, respondent id, design, country and
        /// combined weight) instead of one per country.
        #[arg(long)]
        respondents: bool,
        /// Seed of the imputations (--missing impute).
        #[arg(long)]
        seed: Option<u64>,
    },
    /// Write the invented demo project into a folder.
    MakeDemo {
        dir: PathBuf,
        #[arg(long, default_value_t = gapwise::demo::SEED)]
        seed: u64,
    },
}

/// The respondent-level data of a model across countries: the file and its columns. The
/// help is the multilevel model's; `pooled` says its own.
#[derive(clap::Args)]
struct RespondentColumns {
    /// A CSV or Parquet file with one row per respondent.
    microdata: PathBuf,
    /// The outcome column (0/1 for --kind logistic).
    #[arg(long)]
    outcome: String,
    /// Predictor columns, comma-separated.
    #[arg(long, value_delimiter = ',')]
    predictors: Vec<String>,
    /// The country column.
    #[arg(long)]
    country: String,
}

/// Where the universe comes from: a project's wave, or a frame file with its columns.
#[derive(clap::Args)]
struct UniverseArgs {
    /// A project folder, or a CSV/Parquet frame in which every row is an eligible unit.
    source: PathBuf,
    /// The wave to analyse (project folders; default: the latest).
    #[arg(long)]
    wave: Option<i64>,
    /// Unit identifier column (frame files).
    #[arg(long)]
    id: Option<String>,
    /// Participation flag column, 1 took part, 0 did not (frame files).
    #[arg(long)]
    flag: Option<String>,
}

#[derive(clap::Args)]
struct AnalysisArgs {
    /// Numeric indicators, comma-separated (default for projects: all).
    #[arg(long)]
    covariates: Option<String>,
    /// Categorical indicators, comma-separated (default for projects: all).
    #[arg(long)]
    categorical: Option<String>,
    /// logit, firth or probit.
    #[arg(long, default_value = "logit")]
    model: String,
    /// inverse-probability, covariate-balancing, covariate-balancing-gmm, entropy or raking.
    #[arg(long, default_value = "entropy")]
    weighting: String,
    /// Cap weights at this quantile of participants' weights (e.g. 0.95).
    #[arg(long)]
    trim: Option<String>,
    /// complete-cases, median-fill, fill-and-balance (median fill, and the weights also
    /// balance the missingness indicators), or impute (multiple imputation by chained
    /// equations; estimates combined by Rubin's rules).
    #[arg(long, default_value = "complete-cases")]
    missing: String,
    /// Completed frames under --missing impute (default 20).
    #[arg(long)]
    imputations: Option<String>,
    /// Entropy balancing also matches the universe's variances.
    #[arg(long)]
    variances: bool,
}

/// The report's own options: the same settings as the pages' query keys.
#[derive(clap::Args)]
struct ReportArgs {
    /// The wave (default: the latest).
    #[arg(long, conflicts_with = "waves")]
    wave: Option<i64>,
    /// Several waves, comma-separated (3,4), or all.
    #[arg(long)]
    waves: Option<String>,
    /// Seed of every random draw.
    #[arg(long)]
    seed: Option<u64>,
    /// Countries to invite (default 5); the alternative to --cost-budget.
    #[arg(long, conflicts_with = "cost_budget")]
    budget: Option<usize>,
    /// Total recruitment cost allowed; the alternative to --budget.
    #[arg(long)]
    cost_budget: Option<f64>,
    /// Column with each country's recruitment cost (default: the project's [recruitment] cost).
    #[arg(long)]
    cost_column: Option<String>,
    /// Chance of joining: auto, model or a column of probabilities.
    #[arg(long)]
    feasibility: Option<String>,
    /// What the plan maximises: effective-n, largest-smd or feasibility.
    #[arg(long)]
    objective: Option<String>,
    /// Bootstrap replicates of the plan's stability (default 100, as on the page).
    #[arg(long)]
    replicates: Option<usize>,
    /// What-if joiners: country codes, comma-separated.
    #[arg(long, value_delimiter = ',')]
    joiners: Vec<String>,
    /// The survey variable of the impact and projection sections.
    #[arg(long)]
    outcome: Option<String>,
    /// Respondent variables or country indicators, comma-separated (without --outcome and
    /// --predictors: the first three other survey variables).
    #[arg(long, value_delimiter = ',')]
    predictors: Vec<String>,
    /// linear or logistic respondent-level model.
    #[arg(long)]
    kind: Option<String>,
    /// Country indicators in the two-step outcome equation, comma-separated.
    #[arg(long, value_delimiter = ',')]
    country_indicators: Vec<String>,
    /// Country shares proportional to this population column.
    #[arg(long)]
    population: Option<String>,
    /// Country bootstrap replicates of the impact section's whole pipeline (default 49 in
    /// the report, 0 to skip).
    #[arg(long)]
    impact_replicates: Option<usize>,
    /// Wild cluster bootstrap replicates of the impact section (0 to skip; --bootstrap is
    /// the older name).
    #[arg(long, alias = "bootstrap")]
    wild_replicates: Option<usize>,
}

impl ReportArgs {
    /// The options as the pages' query pairs (one parser for both).
    fn query(&self, settings: &gapwise::analysis::Settings) -> Vec<(String, String)> {
        let mut q: Vec<(String, String)> = settings
            .to_pairs()
            .into_iter()
            .filter(|(k, _)| *k != "seed" || self.seed.is_none())
            .map(|(k, v)| (k.to_string(), v))
            .collect();
        let mut put = |k: &str, v: String| q.push((k.to_string(), v));
        if let Some(w) = self.wave {
            put("wave", w.to_string());
        }
        if let Some(w) = &self.waves {
            put("waves", w.clone());
        }
        if let Some(s) = self.seed {
            put("seed", s.to_string());
        }
        if let Some(b) = self.budget {
            put("budget", b.to_string());
        }
        if let Some(b) = self.cost_budget {
            put("cost_budget", b.to_string());
        }
        if let Some(c) = &self.cost_column {
            put("cost_column", c.clone());
        }
        if let Some(f) = &self.feasibility {
            put("feasibility", f.clone());
        }
        if let Some(o) = &self.objective {
            put("objective", o.clone());
        }
        if let Some(r) = self.replicates {
            put("replicates", r.to_string());
        }
        for j in &self.joiners {
            put("joiner", j.clone());
        }
        if let Some(o) = &self.outcome {
            put("outcome", o.clone());
        }
        for p in &self.predictors {
            put("predictor", p.clone());
        }
        if let Some(k) = &self.kind {
            put("kind", k.clone());
        }
        for c in &self.country_indicators {
            put("country_indicator", c.clone());
        }
        if let Some(p) = &self.population {
            put("shares", "population".to_string());
            put("population", p.clone());
        }
        if let Some(b) = self.impact_replicates {
            put("impact_replicates", b.to_string());
        }
        if let Some(b) = self.wild_replicates {
            put("wild_replicates", b.to_string());
        }
        q
    }
}

impl UniverseArgs {
    /// The universe to load, with the extra columns a frame file should also give.
    fn source(self, extra: gapwise::project::wave::ExtraColumns) -> cli::UniverseSource {
        cli::UniverseSource {
            path: self.source,
            wave: self.wave,
            id: self.id,
            flag: self.flag,
            extra,
        }
    }
}

impl AnalysisArgs {
    fn settings(&self) -> Result<gapwise::analysis::Settings, String> {
        let mut pairs: Vec<(&str, &str)> = vec![
            ("model", &self.model),
            ("weighting", &self.weighting),
            ("missing", &self.missing),
        ];
        if let Some(c) = &self.covariates {
            pairs.push(("covariates", c));
        }
        if let Some(f) = &self.categorical {
            pairs.push(("factors", f));
        }
        if let Some(t) = &self.trim {
            pairs.push(("trim", t));
        }
        if self.variances {
            pairs.push(("variances", "1"));
        }
        if let Some(m) = &self.imputations {
            if self.missing != "impute" {
                return Err("--imputations needs --missing impute".to_string());
            }
            pairs.push(("imputations", m));
        }
        gapwise::analysis::Settings::from_pairs(pairs).map_err(|e| e.to_string())
    }
}

/// Runs a command with the analysis settings of its options (and its `--seed`, when
/// given); settings that do not parse are a usage error.
fn with_settings(
    analysis: &AnalysisArgs,
    seed: Option<u64>,
    run: impl FnOnce(gapwise::analysis::Settings) -> i32,
) -> i32 {
    match analysis.settings() {
        Ok(mut settings) => {
            if let Some(seed) = seed {
                settings.seed = seed;
            }
            run(settings)
        }
        Err(message) => usage_error(&message),
    }
}

/// A usage error: the message on standard error, exit code 2 (as clap's own).
fn usage_error(message: &str) -> i32 {
    eprintln!("{message}");
    2
}

/// Work settings above their limits (the same limits as the pages').
fn over_limit(command: &Option<Command>) -> Option<String> {
    use gapwise::analysis::limits::{self, check};
    let result = match command {
        Some(Command::Plan {
            budget, replicates, ..
        }) => check("--replicates", *replicates, limits::MAX_PLAN_REPLICATES)
            .and_then(|_| check("--budget", budget.unwrap_or(0), limits::MAX_PLAN_BUDGET)),
        Some(Command::Impact {
            replicates,
            wild_replicates,
            ..
        }) => check(
            "--wild-replicates",
            *wild_replicates,
            limits::MAX_BOOTSTRAP_REPLICATES,
        )
        .and_then(|_| check("--replicates", *replicates, limits::MAX_PIPELINE_REPLICATES)),
        _ => Ok(0),
    };
    result.err()
}

fn main() -> ExitCode {
    let args = Args::parse();
    if let Some(message) = over_limit(&args.command) {
        eprintln!("{message}");
        return ExitCode::from(2);
    }
    let code = match args.command {
        None => cli::serve(
            &gapwise::demo_dir(),
            default_addr(),
            false,
            None,
            Default::default(),
        ),
        Some(Command::Serve {
            dir,
            addr,
            allow_remote,
            projects,
            key_file,
            no_key,
            keep_versions,
        }) => {
            // Repair what a crash may have left in the projects folder, before listing it.
            if let Some(p) = &projects {
                for repair in gapwise::project::store::recover(p, keep_versions) {
                    eprintln!("projects folder: {repair}");
                }
            }
            // Without a folder: the first project of the projects folder, else the demo.
            let first = projects
                .as_deref()
                .and_then(|p| gapwise::project::store::list(p).first().map(|n| p.join(n)));
            let dir = dir.or(first).unwrap_or_else(gapwise::demo_dir);
            let access = gapwise::web::guard::Access {
                no_key,
                key_file,
                keep_versions,
            };
            cli::serve(&dir, addr, allow_remote, projects, access)
        }
        Some(Command::Check { dir, json }) => cli::check(&dir, json),
        Some(Command::MakeDemo { dir, seed }) => cli::make_demo(&dir, seed),
        Some(Command::Weights {
            dir,
            analysis,
            out,
            respondents,
            seed,
        }) => with_settings(&analysis, seed, |settings| {
            cli::export_weights(&dir, &settings, &out, respondents)
        }),
        Some(Command::Report {
            dir,
            analysis,
            report,
            out,
        }) => with_settings(&analysis, None, |settings| {
            cli::report(&dir, &report.query(&settings), &out)
        }),
        Some(Command::Pooled {
            respondents: r,
            design_weight,
            kind,
            json,
        }) => cli::pooled(
            &r.microdata,
            &r.outcome,
            &r.predictors,
            &r.country,
            design_weight.as_deref(),
            kind,
            json,
        ),
        Some(Command::TwoStep {
            data,
            outcome,
            predictors,
            selected,
            selection_predictors,
            country,
            json,
        }) => cli::two_step(
            &data,
            &gapwise::analysis::microdata::TwoStepColumns {
                outcome: &outcome,
                predictors: &predictors,
                selected: &selected,
                selection_predictors: &selection_predictors,
                country: country.as_deref(),
            },
            json,
        ),
        Some(Command::Impact {
            dir,
            analysis,
            wave,
            outcome,
            predictors,
            country_indicators,
            kind,
            population,
            replicates,
            wild_replicates,
            seed,
            json,
        }) => with_settings(&analysis, seed, |mut settings| {
            settings.wave = wave;
            let imp = gapwise::analysis::impact::ImpactSettings {
                outcome,
                predictors,
                kind,
                country_indicators,
                shares: population.map_or(
                    gapwise::analysis::impact::Shares::Equal,
                    gapwise::analysis::impact::Shares::Population,
                ),
                replicates,
                wild_replicates,
            };
            cli::impact(&dir, settings, &imp, json)
        }),
        Some(Command::Multilevel {
            respondents: r,
            kind,
            ml,
            design_weight,
            nodes,
            json,
        }) => cli::multilevel(
            &r.microdata,
            &cli::MultilevelArgs {
                outcome: &r.outcome,
                predictors: &r.predictors,
                country: &r.country,
                kind,
                ml,
                weight: design_weight.as_deref(),
                nodes,
            },
            json,
        ),
        Some(Command::Plan {
            universe,
            analysis,
            budget,
            cost_column,
            cost_budget,
            feasibility,
            objective,
            support_cost,
            support_chance,
            without_support,
            replicates,
            seed,
            json,
        }) => with_settings(&analysis, seed, |settings| {
            let Some(objective) = gapwise::analysis::planner::ObjectiveKind::parse(&objective)
            else {
                return usage_error(&format!(
                    "--objective must be effective-n, largest-smd or feasibility, not '{objective}'"
                ));
            };
            let feasibility = gapwise::analysis::planner::Feasibility::parse(&feasibility);
            let extra = gapwise::project::wave::ExtraColumns {
                cost: cost_column.clone(),
                feasibility: match &feasibility {
                    gapwise::analysis::planner::Feasibility::Column(c) => Some(c.clone()),
                    _ => None,
                },
                support: support_cost.clone().zip(support_chance.clone()),
            };
            let plan_settings = gapwise::analysis::planner::PlanSettings {
                budget,
                cost_budget,
                cost_column,
                feasibility,
                objective,
                support: !without_support,
                replicates,
                ..Default::default()
            };
            cli::plan(&universe.source(extra), settings, &plan_settings, json)
        }),
        Some(Command::Fit {
            universe,
            analysis,
            outcome,
            sensitivity,
            seed,
            json,
        }) => with_settings(&analysis, seed, |settings| {
            cli::fit(
                &universe.source(Default::default()),
                settings,
                outcome.as_deref().map(|o| (o, sensitivity.as_slice())),
                json,
            )
        }),
    };
    ExitCode::from(code.clamp(0, 255) as u8)
}

/// `--kind` of `pooled` and `impact`: a linear or logistic respondent-level model.
fn regression_kind(text: &str) -> Result<gapwise::stats::regression::Kind, String> {
    gapwise::stats::regression::Kind::parse(text)
        .ok_or_else(|| format!("--kind must be linear or logistic, not '{text}'"))
}

/// `--kind` of `multilevel`: a linear or logistic random-intercept model.
fn multilevel_kind(text: &str) -> Result<gapwise::analysis::multilevel::Kind, String> {
    gapwise::analysis::multilevel::Kind::parse(text)
        .ok_or_else(|| format!("--kind must be linear or logistic, not '{text}'"))
}

fn default_addr() -> SocketAddr {
    SocketAddr::from(([127, 0, 0, 1], 7878))
}
