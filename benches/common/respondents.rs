//! The respondent-level file the large-data benchmarks read: 2,000,000 respondents in 60
//! countries with 6 predictors and a country effect on the linear predictor, generated
//! (seeded) into the target directory on first run. Each benchmark adds its own columns.

use std::path::PathBuf;

use gapwise::stats::random::Rng;

pub const RESPONDENTS: usize = 2_000_000;
pub const COUNTRIES: usize = 60;
pub const PREDICTORS: [&str; 6] = ["age", "female", "education", "income", "urban", "interest"];

/// One generated respondent: the country index, the six predictors and the linear
/// predictor `eta` the outcomes are drawn from.
pub struct Respondent {
    pub country: usize,
    pub age: usize,
    pub female: u8,
    pub education: usize,
    pub income: usize,
    pub urban: u8,
    pub interest: usize,
    pub eta: f64,
}

/// The file `file_name` in the target directory, written on first run: `header`, then a
/// line a respondent from `line`, which draws that benchmark's own columns from the same
/// generator (so each file's draws stay as they were when each benchmark wrote its own).
pub fn respondent_file(
    file_name: &str,
    seed: u64,
    bytes_per_row: usize,
    header: &str,
    mut line: impl FnMut(&mut Rng, &Respondent, &mut String),
) -> PathBuf {
    let dir = std::env::var("CARGO_TARGET_DIR")
        .map(PathBuf::from)
        .unwrap_or_else(|_| PathBuf::from("target"));
    let path = dir.join(file_name);
    if path.exists() {
        return path;
    }
    std::fs::create_dir_all(&dir).expect("target dir");
    let mut rng = Rng::new(seed);
    let country_effect: Vec<f64> = (0..COUNTRIES).map(|_| 0.5 * rng.normal()).collect();
    let mut out = String::with_capacity(RESPONDENTS * bytes_per_row);
    out.push_str(header);
    for i in 0..RESPONDENTS {
        let country = i % COUNTRIES;
        let age = 18 + rng.below(73);
        let female = u8::from(rng.bernoulli(0.5));
        let education = 1 + rng.below(3);
        let income = 1 + rng.below(10);
        let urban = u8::from(rng.bernoulli(0.6));
        let interest = rng.below(5);
        let eta = -1.0
            + 0.02 * (age as f64 - 45.0)
            + 0.3 * education as f64
            + 0.05 * income as f64
            + 0.2 * interest as f64
            + country_effect[country];
        let respondent = Respondent {
            country,
            age,
            female,
            education,
            income,
            urban,
            interest,
            eta,
        };
        line(&mut rng, &respondent, &mut out);
    }
    std::fs::write(&path, out).expect("write bench data");
    path
}
