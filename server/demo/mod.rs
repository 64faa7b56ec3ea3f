//! The invented demo scenario: a fictional consortium of national election-study teams
//! fielding a common module over four waves in 150 fictional countries.
//!
//! Everything is drawn from one seeded generator ([`crate::stats::random::Rng`]), so `gapwise make-demo`
//! writes the same files byte for byte. The true selection model is written beside the
//! data (`SCENARIO.md` for people, `truth.json` for tests), so that tests can check that
//! the methods recover it.

use std::fmt::Write as _;
use std::path::Path;

use crate::stats::random::Rng;

/// The seed of the committed demo.
pub const SEED: u64 = 20_261_201;
pub const WAVES: [i64; 4] = [1, 2, 3, 4];
/// Years between waves (years since transition grow by this much).
pub const WAVE_SPACING: f64 = 5.0;

/// Fictional regions: name, number of countries, mean development (z-scale).
pub const REGIONS: [(&str, usize, f64); 6] = [
    ("Boreal Union", 24, 1.4),
    ("Meridian Coast", 26, 0.5),
    ("Central Highlands", 26, 0.0),
    ("Amber Steppe", 24, -0.1),
    ("Lagoon Archipelago", 22, -0.6),
    ("Savanna Belt", 28, -0.7),
];

pub const ELECTORAL_SYSTEMS: [&str; 3] = ["proportional", "majoritarian", "mixed"];

/// The true participation model: logit P(took part) = intercept[wave]
/// + gdp[wave] * (log_gdp_pc - 9) + YEARS * (years_since_transition - 25)
/// + DEMOCRACY * (democracy_index - 6) + REGION_SHIFT for the region named in REGION_SHIFTED.
pub struct SelectionModel;
impl SelectionModel {
    pub const INTERCEPT: [f64; 4] = [-1.0, -0.7, -0.45, -0.2];
    pub const GDP: [f64; 4] = [1.3, 1.1, 0.95, 0.8];
    pub const YEARS: f64 = 0.03;
    pub const DEMOCRACY: f64 = 0.45;
    pub const REGION_SHIFTED: &'static str = "Savanna Belt";
    pub const REGION_SHIFT: f64 = -0.4;

    pub fn linear_predictor(wave_index: usize, c: &CountryWave, region: &str) -> f64 {
        let shift = if region == Self::REGION_SHIFTED {
            Self::REGION_SHIFT
        } else {
            0.0
        };
        Self::INTERCEPT[wave_index]
            + Self::GDP[wave_index] * (c.log_gdp_pc - 9.0)
            + Self::YEARS * (c.years_since_transition - 25.0)
            + Self::DEMOCRACY * (c.democracy_index - 6.0)
            + shift
    }
}

/// Country-level effects on trust in parliament (0-10): the country mean is
/// TRUST_BASE + TRUST_DEMOCRACY * (democracy_index - 6) + TRUST_GDP * (log_gdp_pc - 9) + u,
/// u ~ N(0, TRUST_COUNTRY_SD); respondents add education and noise (see `respondent`).
pub const TRUST_BASE: f64 = 4.3;
pub const TRUST_DEMOCRACY: f64 = 0.35;
pub const TRUST_GDP: f64 = 0.3;
pub const TRUST_COUNTRY_SD: f64 = 0.4;

/// Countries whose population is below this (log) are micro-states; the demo's
/// eligibility rule leaves them out.
pub const MIN_LOG_POPULATION: f64 = 13.0;

#[derive(Debug, Clone)]
pub struct Country {
    pub code: String,
    pub name: String,
    pub region: usize,
    pub electoral_system: usize,
    development: f64,
    trust_effect: f64,
}

#[derive(Debug, Clone)]
pub struct CountryWave {
    pub log_gdp_pc: f64,
    pub years_since_transition: f64,
    pub democracy_index: f64,
    pub log_population: f64,
    pub literacy: f64,
    pub internet_use: f64,
    pub urban_share: f64,
    pub took_part: bool,
    pub eligible: bool,
}

pub struct Scenario {
    pub countries: Vec<Country>,
    /// `waves[w][c]`: country c in wave w.
    pub waves: Vec<Vec<CountryWave>>,
    /// Per wave: mean over eligible countries of each country's mean trust in parliament
    /// (what a correction aims at), and the same over participants only.
    pub trust_universe: Vec<f64>,
    pub trust_participants: Vec<f64>,
}

const PREFIXES: [&str; 24] = [
    "Brask", "Corv", "Drell", "Eskar", "Fenn", "Gorv", "Hald", "Istr", "Jask", "Kvel", "Lorr",
    "Mekk", "Nyss", "Ovr", "Prell", "Quar", "Rask", "Sovr", "Tirr", "Ulv", "Vask", "Wend", "Yrr",
    "Zell",
];
const SUFFIXES: [&str; 12] = [
    "ania", "mark", "avia", "ora", "enne", "und", "esse", "ara", "ovy", "eth", "ica", "holm",
];

fn clamp(x: f64, lo: f64, hi: f64) -> f64 {
    x.max(lo).min(hi)
}

fn round_to(x: f64, decimals: i32) -> f64 {
    let f = 10f64.powi(decimals);
    (x * f).round() / f
}

fn logistic(x: f64) -> f64 {
    1.0 / (1.0 + (-x).exp())
}

/// Draws the whole scenario.
pub fn generate(seed: u64) -> Scenario {
    let mut rng = Rng::new(seed);
    let mut codes: Vec<String> = (b'A'..=b'Z')
        .flat_map(|a| (b'A'..=b'Z').map(move |b| format!("X{}{}", a as char, b as char)))
        .collect();
    rng.shuffle(&mut codes);
    let mut names: Vec<String> = PREFIXES
        .iter()
        .flat_map(|p| SUFFIXES.iter().map(move |s| format!("{p}{s}")))
        .collect();
    rng.shuffle(&mut names);

    let mut countries = Vec::new();
    for (region, &(_, count, mean_development)) in REGIONS.iter().enumerate() {
        for _ in 0..count {
            let i = countries.len();
            // Proportional systems are commoner in richer regions.
            let system_weights = [1.0 + mean_development.max(0.0), 1.0, 0.7];
            countries.push(Country {
                code: codes[i].clone(),
                name: names[i].clone(),
                region,
                electoral_system: rng.choose_weighted(&system_weights),
                development: mean_development + 0.6 * rng.normal(),
                trust_effect: TRUST_COUNTRY_SD * rng.normal(),
            });
        }
    }
    let mut codes_sorted: Vec<usize> = (0..countries.len()).collect();
    codes_sorted.sort_by(|&a, &b| countries[a].code.cmp(&countries[b].code));
    let countries: Vec<Country> = codes_sorted
        .into_iter()
        .map(|i| countries[i].clone())
        .collect();

    // Time-invariant country draws.
    let base: Vec<(f64, f64, f64, f64, f64)> = countries
        .iter()
        .map(|c| {
            let d = c.development;
            (
                9.0 + d + 0.35 * rng.normal(), // log GDP per head
                clamp(28.0 + 16.0 * d + 12.0 * rng.normal(), 0.0, 90.0), // years since transition at wave 1
                16.0 + 1.3 * rng.normal(),                               // log population
                clamp(86.0 + 9.0 * d + 5.0 * rng.normal(), 25.0, 99.5),  // literacy
                clamp(55.0 + 12.0 * d + 10.0 * rng.normal(), 10.0, 97.0), // urban share
            )
        })
        .collect();

    let mut waves = Vec::new();
    let mut trust_universe = Vec::new();
    let mut trust_participants = Vec::new();
    for (w, _) in WAVES.iter().enumerate() {
        let mut rows = Vec::new();
        for (c, country) in countries.iter().enumerate() {
            let (gdp0, years0, pop0, lit0, urban0) = base[c];
            let d = country.development;
            let mut cw = CountryWave {
                log_gdp_pc: round_to(gdp0 + 0.07 * w as f64 + 0.05 * rng.normal(), 3),
                years_since_transition: (years0 + WAVE_SPACING * w as f64).round(),
                democracy_index: round_to(
                    clamp(
                        5.6 + 1.5 * d + 0.02 * (years0 - 28.0) + 0.9 * rng.normal(),
                        0.0,
                        10.0,
                    ),
                    2,
                ),
                log_population: round_to(pop0 + 0.05 * w as f64, 3),
                literacy: round_to(clamp(lit0 + 0.6 * w as f64, 25.0, 99.5), 1),
                internet_use: round_to(
                    clamp(
                        22.0 + 16.0 * d + 11.0 * w as f64 + 6.0 * rng.normal(),
                        1.0,
                        98.0,
                    ),
                    1,
                ),
                urban_share: round_to(clamp(urban0 + 0.8 * w as f64, 10.0, 97.0), 1),
                took_part: false,
                eligible: true,
            };
            let eta = SelectionModel::linear_predictor(w, &cw, REGIONS[country.region].0);
            cw.took_part = rng.bernoulli(logistic(eta));
            rows.push(cw);
        }
        // Eligibility as the demo's project.toml states it: democracy index at least the lowest
        // participant's, population above the micro-state line (participants always stay).
        let lowest_democracy = rows
            .iter()
            .filter(|r| r.took_part)
            .map(|r| r.democracy_index)
            .fold(f64::INFINITY, f64::min);
        for r in rows.iter_mut() {
            r.eligible = r.took_part
                || (r.democracy_index >= lowest_democracy
                    && r.log_population >= MIN_LOG_POPULATION);
        }
        let (mut universe, mut participants) = (Vec::new(), Vec::new());
        for (c, r) in rows.iter().enumerate() {
            if r.eligible {
                let m = country_trust_mean(&countries[c], r);
                universe.push(m);
                if r.took_part {
                    participants.push(m);
                }
            }
        }
        trust_universe.push(mean(&universe));
        trust_participants.push(mean(&participants));
        waves.push(rows);
    }
    Scenario {
        countries,
        waves,
        trust_universe,
        trust_participants,
    }
}

fn mean(x: &[f64]) -> f64 {
    x.iter().sum::<f64>() / x.len().max(1) as f64
}

/// A country's expected trust in parliament before rounding to the 0-10 scale.
fn country_trust_mean(c: &Country, r: &CountryWave) -> f64 {
    TRUST_BASE
        + TRUST_DEMOCRACY * (r.democracy_index - 6.0)
        + TRUST_GDP * (r.log_gdp_pc - 9.0)
        + c.trust_effect
}

/// Writes `project.toml`, `frame.csv`, `microdata.csv`, `SCENARIO.md` and `truth.json`.
pub fn write(dir: &Path, seed: u64) -> std::io::Result<()> {
    std::fs::create_dir_all(dir)?;
    let s = generate(seed);
    std::fs::write(dir.join("project.toml"), PROJECT_TOML)?;
    std::fs::write(dir.join("frame.csv"), frame_csv(&s))?;
    std::fs::write(dir.join("microdata.csv"), microdata_csv(&s, seed))?;
    std::fs::write(dir.join("SCENARIO.md"), scenario_notes(&s, seed))?;
    std::fs::write(dir.join("truth.json"), truth_json(&s, seed))?;
    Ok(())
}

const PROJECT_TOML: &str = r#"# The invented demo: a fictional consortium of election-study teams, four waves.
title = "Common Module on Elections (fictional demo)"
description = "150 fictional countries in 6 fictional regions; codes from the ISO 3166-1 user-assigned range."

[columns]
code = "code"
name = "country"
wave = "wave"
participation = "took_part"
group = "region"

[indicators]
numeric = ["log_gdp_pc", "years_since_transition", "democracy_index", "log_population", "literacy", "internet_use", "urban_share"]
categorical = ["region", "electoral_system"]

[indicators.reference]
region = "Boreal Union"
electoral_system = "proportional"

[indicators.labels]
log_gdp_pc = "GDP per head (log US$)"
years_since_transition = "Years since democratic transition"
democracy_index = "Democracy index (0-10)"
log_population = "Population (log)"
literacy = "Adult literacy (%)"
internet_use = "Internet use (% of adults)"
urban_share = "Urban population (%)"
region = "Region"
electoral_system = "Electoral system"

[[eligibility]]
indicator = "democracy_index"
at_least = "lowest-participant"

[[eligibility]]
indicator = "log_population"
at_least = 13.0

[recruitment]
cost = "recruitment_cost"
feasibility = "has_study_team"
support_cost = "support_cost"
support_chance = "chance_with_support"

[microdata]
country = "code"
wave = "wave"
design_weight = "design_weight"
variables = ["age", "female", "education", "income_decile", "turnout", "trust_parliament", "left_right"]
outcome = "trust_parliament"

[population]
column = "log_population"
scale = "log"
"#;

fn frame_csv(s: &Scenario) -> String {
    let mut out = String::from(
        "code,country,wave,took_part,region,electoral_system,log_gdp_pc,years_since_transition,democracy_index,log_population,literacy,internet_use,urban_share,recruitment_cost,has_study_team,support_cost,chance_with_support\n",
    );
    // A few missing values, at fixed places, so that pages and checks show them.
    let missing = |c: usize, w: usize, column: usize| {
        (c * 7 + w * 3 + column * 11).is_multiple_of(97) && column >= 4
    };
    for (w, rows) in s.waves.iter().enumerate() {
        for (c, country) in s.countries.iter().enumerate() {
            let r = &rows[c];
            let values = [
                r.log_gdp_pc,
                r.years_since_transition,
                r.democracy_index,
                r.log_population,
                r.literacy,
                r.internet_use,
                r.urban_share,
            ];
            let cells: Vec<String> = values
                .iter()
                .enumerate()
                .map(|(k, v)| {
                    if missing(c, w, k) {
                        String::new()
                    } else {
                        format!("{v}")
                    }
                })
                .collect();
            // Cost in thousands: dearer where there is no study team and for large countries.
            let team = r.democracy_index > 5.0 && !c.is_multiple_of(3);
            let cost =
                (40.0 + 12.0 * (r.log_population - 14.0).max(0.0) + if team { 0.0 } else { 60.0 })
                    .round();
            // Support: funding a team where there is none (dearer, and even then not
            // every country joins), or the fieldwork where a team exists.
            let (support_cost, chance_with_support) = if team {
                (15.0, 0.95)
            } else {
                (
                    (20.0 + 4.0 * (r.log_population - 14.0).max(0.0)).round(),
                    0.45,
                )
            };
            let _ = writeln!(
                out,
                "{},{},{},{},{},{},{},{},{},{},{}",
                country.code,
                country.name,
                WAVES[w],
                u8::from(r.took_part),
                REGIONS[country.region].0,
                ELECTORAL_SYSTEMS[country.electoral_system],
                cells.join(","),
                cost,
                u8::from(team),
                support_cost,
                chance_with_support
            );
        }
    }
    out
}

fn microdata_csv(s: &Scenario, seed: u64) -> String {
    let mut rng = Rng::new(seed ^ 0x5EED_0F5A_u64);
    let mut out = String::from("code,wave,design_weight,age,female,education,income_decile,turnout,trust_parliament,left_right\n");
    for (w, rows) in s.waves.iter().enumerate() {
        for (c, country) in s.countries.iter().enumerate() {
            let r = &rows[c];
            if !r.took_part {
                continue;
            }
            let n = 900 + rng.below(201);
            let trust_mean = country_trust_mean(country, r);
            let raw_weights: Vec<f64> = (0..n).map(|_| (0.35 * rng.normal()).exp()).collect();
            let mean_weight = mean(&raw_weights);
            let high_education = clamp((r.literacy - 50.0) / 120.0, 0.05, 0.45);
            for weight in raw_weights {
                let age = clamp((47.0 + 17.0 * rng.normal()).round(), 18.0, 90.0);
                let female = u8::from(rng.bernoulli(0.52));
                let education =
                    1 + rng.choose_weighted(&[0.55 - high_education, 0.45, high_education]);
                let income = 1 + rng.below(10);
                let trust = clamp(
                    (trust_mean + 0.25 * (education as f64 - 2.0) - 0.01 * (age - 47.0)
                        + 2.0 * rng.normal())
                    .round(),
                    0.0,
                    10.0,
                );
                let turnout_eta = 0.7
                    + 0.25 * (r.democracy_index - 6.0)
                    + 0.025 * (age - 47.0)
                    + 0.35 * (education as f64 - 2.0)
                    + 0.06 * (income as f64 - 5.5);
                let turnout = u8::from(rng.bernoulli(logistic(turnout_eta)));
                let left_right = clamp(
                    (5.0 + 0.15 * (income as f64 - 5.5) + 2.1 * rng.normal()).round(),
                    0.0,
                    10.0,
                );
                let _ = writeln!(
                    out,
                    "{},{},{:.3},{},{},{},{},{},{},{}",
                    country.code,
                    WAVES[w],
                    weight / mean_weight,
                    age,
                    female,
                    education,
                    income,
                    turnout,
                    trust,
                    left_right
                );
            }
        }
    }
    out
}

fn scenario_notes(s: &Scenario, seed: u64) -> String {
    let mut out = String::new();
    let _ = writeln!(out, "# The demo scenario (invented)\n");
    let _ = writeln!(
        out,
        "Written by `gapwise make-demo demo-data` (seed {seed}); do not edit by hand. All countries, regions and numbers are fictional; country codes come from the ISO 3166-1 alpha-3 user-assigned range (XAA-XZZ).\n"
    );
    let _ = writeln!(out, "A consortium of national election-study teams fields a common module in four waves, five years apart, among {} countries in {} regions.\n", s.countries.len(), REGIONS.len());
    let _ = writeln!(out, "## Indicators\n");
    let _ = writeln!(out, "Each country has a latent development level d (region mean plus N(0, 0.6)); GDP per head, years since transition, democracy, literacy, internet use and urban share rise with d, population does not. A few indicator values are left empty on purpose.\n");
    let _ = writeln!(out, "## True participation model\n");
    let _ = writeln!(out, "logit P(took part) = a[wave] + b[wave] (log_gdp_pc - 9) + {} (years_since_transition - 25) + {} (democracy_index - 6) + {} [region = {}]\n", SelectionModel::YEARS, SelectionModel::DEMOCRACY, SelectionModel::REGION_SHIFT, SelectionModel::REGION_SHIFTED);
    let _ = writeln!(out, "| wave | a | b | eligible | took part | mean trust, eligible universe | mean trust, participants |");
    let _ = writeln!(out, "|---|---|---|---|---|---|---|");
    for (w, rows) in s.waves.iter().enumerate() {
        let eligible = rows.iter().filter(|r| r.eligible).count();
        let took_part = rows.iter().filter(|r| r.took_part).count();
        let _ = writeln!(
            out,
            "| {} | {} | {} | {eligible} | {took_part} | {:.3} | {:.3} |",
            WAVES[w],
            SelectionModel::INTERCEPT[w],
            SelectionModel::GDP[w],
            s.trust_universe[w],
            s.trust_participants[w]
        );
    }
    let _ = writeln!(out, "\nThe region {} is under-covered beyond what the indicators explain (the region term), so no weighting on the indicators alone can fully correct it: a worked example of the caution that weights correct only for what the indicators measure.\n", SelectionModel::REGION_SHIFTED);
    let _ = writeln!(out, "## Eligibility\n\nDemocracy index at least the lowest participant's value in the wave; log population at least {MIN_LOG_POPULATION} (micro-states out). Participants always stay in the universe.\n");
    let _ = writeln!(out, "## Microdata\n\nAbout 1,000 respondents per participating country and wave, with design weights (log-normal, mean 1 within a country). Trust in parliament (0-10) has country mean {TRUST_BASE} + {TRUST_DEMOCRACY} (democracy_index - 6) + {TRUST_GDP} (log_gdp_pc - 9) + u, u ~ N(0, {TRUST_COUNTRY_SD}), plus education, age and noise, rounded to the scale. Because participation favours richer, more democratic countries, the participants' pooled mean trust overstates the eligible universe's (the table above).\n");
    out
}

fn truth_json(s: &Scenario, seed: u64) -> String {
    let waves: Vec<serde_json::Value> = s
        .waves
        .iter()
        .enumerate()
        .map(|(w, rows)| {
            serde_json::json!({
                "wave": WAVES[w],
                "intercept": SelectionModel::INTERCEPT[w],
                "log_gdp_pc": SelectionModel::GDP[w],
                "eligible": rows.iter().filter(|r| r.eligible).count(),
                "took_part": rows.iter().filter(|r| r.took_part).count(),
                "trust_universe_mean": s.trust_universe[w],
                "trust_participant_mean": s.trust_participants[w],
            })
        })
        .collect();
    let value = serde_json::json!({
        "seed": seed,
        "selection_model": {
            "link": "logit",
            "centring": {"log_gdp_pc": 9.0, "years_since_transition": 25.0, "democracy_index": 6.0},
            "years_since_transition": SelectionModel::YEARS,
            "democracy_index": SelectionModel::DEMOCRACY,
            "region_shift": {"region": SelectionModel::REGION_SHIFTED, "logit": SelectionModel::REGION_SHIFT},
        },
        "waves": waves,
    });
    serde_json::to_string_pretty(&value).unwrap_or_default() + "\n"
}
