//! The command line's work: each command returns its exit code and prints its result.
//! Argument parsing lives in `main.rs`.

use std::fmt::Write as _;
use std::net::SocketAddr;
use std::path::Path;
use std::sync::Arc;

use crate::analysis::overview::{overview, Overview};
use crate::project::Project;
use crate::web;

/// `gapwise check DIR`: a summary and exit 0, or one line per problem and exit 1.
pub fn check(dir: &Path, json: bool) -> i32 {
    match Project::load(dir) {
        Ok(project) => {
            let o = overview(&project);
            if json {
                println!("{}", serde_json::to_string_pretty(&o).unwrap_or_default());
            } else {
                print!("{}", summary_text(&o));
            }
            0
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
pub fn serve(dir: &Path, addr: SocketAddr, allow_remote: bool) -> i32 {
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
    let state = Arc::new(web::AppState::new(project));
    let runtime = match tokio::runtime::Runtime::new() {
        Ok(r) => r,
        Err(e) => {
            eprintln!("cannot start the server runtime: {e}");
            return 1;
        }
    };
    match runtime.block_on(web::serve(state, addr)) {
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
