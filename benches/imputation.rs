//! Speed of multiple imputation on the demo: 20 imputations of the latest wave (with the
//! other waves as panel predictors) and the balance page's comparison of every weighting
//! method on each completed frame, combined. Target: under 500 ms in release.
//!
//!     cargo bench --bench imputation

use std::time::Instant;

use gapwise::analysis::imputed;
use gapwise::analysis::settings::{MissingRule, Settings};
use gapwise::project::Project;

fn main() {
    let dir = std::path::Path::new(env!("CARGO_MANIFEST_DIR")).join("demo-data");
    let project = Project::load(&dir).expect("the demo loads");
    let settings = Settings {
        missing: MissingRule::Impute,
        imputations: 20,
        ..Settings::default()
    };
    println!(
        "{:<6} {:>12} {:>12} {:>12} {:>8}",
        "wave", "impute ms", "balance ms", "total ms", "filled"
    );
    let mut worst: f64 = 0.0;
    for &wave in &project.waves {
        let view = project.wave(wave).expect("a wave");
        let mut times = Vec::new();
        let mut filled = 0;
        for _ in 0..7 {
            let start = Instant::now();
            let done = imputed::complete_project_wave(Some(&project), &view, &settings)
                .expect("imputation");
            let imputing = start.elapsed().as_secs_f64() * 1000.0;
            let b = imputed::compare_completed(&done, &settings).expect("balance");
            let total = start.elapsed().as_secs_f64() * 1000.0;
            filled = done.summary.cells.len();
            std::hint::black_box(b);
            times.push((imputing, total - imputing, total));
        }
        times.sort_by(|a, b| a.2.total_cmp(&b.2));
        let (i, b, t) = times[times.len() / 2];
        worst = worst.max(t);
        println!("{wave:<6} {i:>12.1} {b:>12.1} {t:>12.1} {filled:>8}");
    }
    println!(
        "slowest median: {worst:.1} ms (target: under 500 ms; {} threads)",
        rayon::current_num_threads()
    );
}
