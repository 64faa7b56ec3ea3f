//! `gapwise check`: whether a project folder loads, and what it holds.

use std::fmt::Write as _;
use std::path::Path;

use super::text_table::Column::Right;
use super::text_table::TextTable;
use super::{emit, emit_json};
use crate::analysis::overview::{overview, Overview};
use crate::project::Project;

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
    const WAVES: TextTable = TextTable {
        indent: "",
        columns: &[
            Right("wave", 6),
            Right("rows", 9),
            Right("eligible", 9),
            Right("took part", 10),
            Right("coverage", 9),
        ],
    };
    out.push('\n');
    WAVES.push_header(&mut out);
    for w in &o.waves {
        let coverage = format!("{:.0}%", 100.0 * w.coverage);
        WAVES.push_line(
            &mut out,
            &[&w.wave, &w.rows, &w.eligible, &w.participating, &coverage],
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
