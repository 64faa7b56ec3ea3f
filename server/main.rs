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
        /// A project folder, or a CSV/Parquet frame in which every row is an eligible unit.
        source: PathBuf,
        #[command(flatten)]
        universe: UniverseArgs,
        #[command(flatten)]
        analysis: AnalysisArgs,
        /// Print one JSON object instead of tables.
        #[arg(long)]
        json: bool,
    },
    /// Plan recruitment: which absent eligible countries would most improve balance.
    Plan {
        /// A project folder, or a CSV/Parquet frame in which every row is an eligible unit.
        source: PathBuf,
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
    /// Pooled regression of a respondent outcome with standard errors clustered by country.
    Regress {
        /// A CSV or Parquet file with one row per respondent.
        microdata: PathBuf,
        /// The outcome column.
        #[arg(long)]
        outcome: String,
        /// Predictor columns, comma-separated.
        #[arg(long, value_delimiter = ',')]
        predictors: Vec<String>,
        /// The cluster column (the country).
        #[arg(long)]
        cluster: String,
        /// Analytic weights column (as weighted least squares takes them).
        #[arg(long)]
        weight: Option<String>,
        /// gaussian (least squares) or binomial (logistic).
        #[arg(long, default_value = "gaussian")]
        family: String,
        /// Print one JSON object instead of a table.
        #[arg(long)]
        json: bool,
    },
    /// Write a self-contained HTML report of one wave for a meeting.
    Report {
        /// Project folder.
        dir: PathBuf,
        #[command(flatten)]
        analysis: AnalysisArgs,
        /// The wave (default: the latest).
        #[arg(long)]
        wave: Option<i64>,
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
    },
    /// Write the invented demo project into a folder.
    MakeDemo {
        dir: PathBuf,
        #[arg(long, default_value_t = gapwise::demo::SEED)]
        seed: u64,
    },
}

#[derive(clap::Args)]
struct UniverseArgs {
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
    factors: Option<String>,
    /// logit, firth or probit.
    #[arg(long, default_value = "logit")]
    model: String,
    /// inverse-probability, covariate-balancing, covariate-balancing-gmm, entropy or raking.
    #[arg(long, default_value = "entropy")]
    weighting: String,
    /// Cap weights at this quantile of participants' weights (e.g. 0.95).
    #[arg(long)]
    trim: Option<String>,
    /// complete-cases or median-fill.
    #[arg(long, default_value = "complete-cases")]
    missing: String,
    /// Entropy balancing also matches the universe's variances.
    #[arg(long)]
    variances: bool,
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
        if let Some(f) = &self.factors {
            pairs.push(("factors", f));
        }
        if let Some(t) = &self.trim {
            pairs.push(("trim", t));
        }
        if self.variances {
            pairs.push(("variances", "1"));
        }
        gapwise::analysis::Settings::from_pairs(pairs).map_err(|e| e.to_string())
    }
}

fn main() -> ExitCode {
    let args = Args::parse();
    let code = match args.command {
        None => cli::serve(&gapwise::demo_dir(), default_addr(), false, None),
        Some(Command::Serve {
            dir,
            addr,
            allow_remote,
            projects,
        }) => {
            // Without a folder: the first project of the projects folder, else the demo.
            let first = projects
                .as_deref()
                .and_then(|p| gapwise::project::store::list(p).first().map(|n| p.join(n)));
            let dir = dir.or(first).unwrap_or_else(gapwise::demo_dir);
            cli::serve(&dir, addr, allow_remote, projects)
        }
        Some(Command::Check { dir, json }) => cli::check(&dir, json),
        Some(Command::MakeDemo { dir, seed }) => cli::make_demo(&dir, seed),
        Some(Command::Weights { dir, analysis, out }) => match analysis.settings() {
            Ok(settings) => cli::export_weights(&dir, &settings, &out),
            Err(message) => {
                eprintln!("{message}");
                2
            }
        },
        Some(Command::Report {
            dir,
            analysis,
            wave,
            out,
        }) => match analysis.settings() {
            Ok(mut settings) => {
                settings.wave = wave;
                cli::report(&dir, &settings, &out)
            }
            Err(message) => {
                eprintln!("{message}");
                2
            }
        },
        Some(Command::Regress {
            microdata,
            outcome,
            predictors,
            cluster,
            weight,
            family,
            json,
        }) => cli::regress(
            &microdata,
            &outcome,
            &predictors,
            &cluster,
            weight.as_deref(),
            &family,
            json,
        ),
        Some(Command::Plan {
            source,
            universe,
            analysis,
            budget,
            cost_column,
            cost_budget,
            feasibility,
            objective,
            replicates,
            seed,
            json,
        }) => match (
            analysis.settings(),
            gapwise::analysis::planner::ObjectiveKind::parse(&objective),
        ) {
            (Err(message), _) => {
                eprintln!("{message}");
                2
            }
            (_, None) => {
                eprintln!("--objective must be effective-n, largest-smd or feasibility, not '{objective}'");
                2
            }
            (Ok(mut settings), Some(objective)) => {
                if let Some(seed) = seed {
                    settings.seed = seed;
                }
                let feasibility = gapwise::analysis::planner::Feasibility::parse(&feasibility);
                let extra = gapwise::project::wave::ExtraColumns {
                    cost: cost_column.clone(),
                    feasibility: match &feasibility {
                        gapwise::analysis::planner::Feasibility::Column(c) => Some(c.clone()),
                        _ => None,
                    },
                };
                let plan_settings = gapwise::analysis::planner::PlanSettings {
                    budget,
                    cost_budget,
                    cost_column,
                    feasibility,
                    objective,
                    replicates,
                    ..Default::default()
                };
                cli::plan(
                    &cli::UniverseSource {
                        path: source,
                        wave: universe.wave,
                        id: universe.id,
                        flag: universe.flag,
                        extra,
                    },
                    settings,
                    &plan_settings,
                    json,
                )
            }
        },
        Some(Command::Fit {
            source,
            universe,
            analysis,
            json,
        }) => match analysis.settings() {
            Ok(settings) => cli::fit(
                &cli::UniverseSource {
                    path: source,
                    wave: universe.wave,
                    id: universe.id,
                    flag: universe.flag,
                    extra: Default::default(),
                },
                settings,
                json,
            ),
            Err(message) => {
                eprintln!("{message}");
                2
            }
        },
    };
    ExitCode::from(code.clamp(0, 255) as u8)
}

fn default_addr() -> SocketAddr {
    SocketAddr::from(([127, 0, 0, 1], 7878))
}
