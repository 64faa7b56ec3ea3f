//! `gapwise check`: a summary for a valid project, and one precise `file:row:column:`
//! line per problem, exit 1 and no panic, for each kind of bad input.

mod common;
use common::*;

/// Runs `gapwise check` on the folder and returns its problem lines (asserting exit 1).
fn problems(dir: &TempDir) -> Vec<String> {
    let out = gapwise(&["check", dir.path().to_str().unwrap()]);
    assert_eq!(
        out.code, 1,
        "expected problems; stdout: {} stderr: {}",
        out.stdout, out.stderr
    );
    assert!(!out.stderr.contains("panicked"), "{}", out.stderr);
    out.stderr.lines().map(str::to_string).collect()
}

fn assert_has(lines: &[String], prefix: &str, words: &str) {
    assert!(
        lines
            .iter()
            .any(|l| l.starts_with(prefix) && l.contains(words)),
        "no line starting with {prefix:?} containing {words:?} in:\n{}",
        lines.join("\n")
    );
}

#[test]
fn valid_project_prints_summary() {
    let dir = valid_project("valid");
    let out = gapwise(&["check", dir.path().to_str().unwrap()]);
    assert_eq!(out.code, 0, "{}", out.stderr);
    assert!(
        out.stdout.contains("Test programme: 4 countries, 2 waves"),
        "{}",
        out.stdout
    );
    // Wave 1: the lowest participant's democracy is 7.0, so XAB (6.5) and XAD (3.0) are out.
    // Wave 2: the lowest is 6.6 (XAB), so XAC (7.1) is eligible and absent, XAD is out.
    let rows: Vec<Vec<&str>> = out
        .stdout
        .lines()
        .map(|l| l.split_whitespace().collect())
        .collect();
    assert!(
        rows.contains(&vec!["1", "4", "2", "2", "100%"]),
        "{}",
        out.stdout
    );
    assert!(
        rows.contains(&vec!["2", "4", "3", "2", "67%"]),
        "{}",
        out.stdout
    );
    assert!(
        out.stdout.contains("microdata: 5 respondents"),
        "{}",
        out.stdout
    );
}

#[test]
fn missing_manifest() {
    let dir = valid_project("nomanifest");
    std::fs::remove_file(dir.path().join("project.toml")).unwrap();
    assert_has(&problems(&dir), "project.toml:-:-:", "needs a project.toml");
}

#[test]
fn missing_frame_file() {
    let dir = valid_project("noframe");
    std::fs::remove_file(dir.path().join("frame.csv")).unwrap();
    assert_has(
        &problems(&dir),
        "frame.csv:-:-:",
        "no frame.csv or frame.parquet",
    );
}

#[test]
fn missing_column() {
    let dir = valid_project("nocolumn");
    dir.write("frame.csv", FRAME.replace("gdp", "gross"));
    assert_has(&problems(&dir), "frame.csv:1:gdp:", "no such column");
}

#[test]
fn manifest_names_unknown_column() {
    let dir = valid_project("badmanifest");
    dir.write(
        "project.toml",
        MANIFEST.replace(
            "participation = \"took_part\"",
            "participation = \"participated\"",
        ),
    );
    assert_has(
        &problems(&dir),
        "frame.csv:1:participated:",
        "the columns are: iso, name, wave, took_part",
    );
}

#[test]
fn manifest_syntax_error_names_line() {
    let dir = valid_project("manifestsyntax");
    dir.write(
        "project.toml",
        MANIFEST.replace("title = \"Test programme\"", "title = Test programme"),
    );
    assert_has(&problems(&dir), "project.toml:2:", "");
}

#[test]
fn duplicate_country_wave() {
    let dir = valid_project("dup");
    dir.write("frame.csv", format!("{FRAME}XAB,Bland,2,0,8.2,6.6,South\n"));
    assert_has(
        &problems(&dir),
        "frame.csv:10:iso:",
        "XAB appears twice in wave 2 (also on row 7)",
    );
}

#[test]
fn flag_other_than_zero_or_one() {
    let dir = valid_project("flag");
    dir.write(
        "frame.csv",
        FRAME.replace("XAB,Bland,1,0,", "XAB,Bland,1,2,"),
    );
    assert_has(
        &problems(&dir),
        "frame.csv:3:took_part:",
        "must be 1 (took part) or 0 (did not)",
    );
    dir.write(
        "frame.csv",
        FRAME.replace("XAB,Bland,1,0,", "XAB,Bland,1,yes,"),
    );
    assert_has(
        &problems(&dir),
        "frame.csv:3:took_part:",
        "\"yes\" is not a number",
    );
}

#[test]
fn text_in_numeric_column() {
    let dir = valid_project("text");
    dir.write(
        "frame.csv",
        FRAME.replace("XAD,Dland,1,0,7.0,", "XAD,Dland,1,0,low,"),
    );
    assert_has(
        &problems(&dir),
        "frame.csv:5:gdp:",
        "\"low\" is not a number",
    );
}

#[test]
fn ragged_rows() {
    let dir = valid_project("ragged");
    dir.write(
        "frame.csv",
        FRAME.replace(
            "XAB,Bland,1,0,8.1,6.5,South",
            "XAB,Bland,1,0,8.1,6.5,South,extra",
        ),
    );
    assert_has(
        &problems(&dir),
        "frame.csv:3:-:",
        "the row has 8 fields but the header has 7",
    );
    dir.write(
        "frame.csv",
        FRAME.replace("XAB,Bland,1,0,8.1,6.5,South", "XAB,Bland,1,0,8.1"),
    );
    assert_has(
        &problems(&dir),
        "frame.csv:3:democracy:",
        "the row has 5 fields but the header has 7",
    );
}

#[test]
fn truncated_file() {
    let dir = valid_project("truncated");
    let cut = &FRAME[..FRAME.len() - 12];
    dir.write("frame.csv", cut);
    assert_has(&problems(&dir), "frame.csv:9:", "truncated");
}

#[test]
fn empty_and_header_only_files() {
    let dir = valid_project("empty");
    dir.write("frame.csv", "");
    assert_has(&problems(&dir), "frame.csv:-:-:", "the file is empty");
    dir.write(
        "frame.csv",
        "iso,name,wave,took_part,gdp,democracy,region\n",
    );
    assert_has(&problems(&dir), "frame.csv:1:-:", "header but no data rows");
    dir.write("frame.csv", FRAME);
    dir.write("microdata.csv", "iso,wave,dweight,trust\n");
    assert_has(
        &problems(&dir),
        "microdata.csv:1:-:",
        "header but no data rows",
    );
}

#[test]
fn not_utf8() {
    let dir = valid_project("latin1");
    let mut bytes = FRAME.replace("Cland", "C\u{e9}land").into_bytes();
    // Re-encode the é as Latin-1 (one byte 0xE9), which is not valid UTF-8.
    let pos = bytes.windows(2).position(|w| w == [0xC3, 0xA9]).unwrap();
    bytes.splice(pos..pos + 2, [0xE9]);
    dir.write("frame.csv", bytes);
    assert_has(&problems(&dir), "frame.csv:4:name:", "not UTF-8");
}

#[test]
fn microdata_of_a_country_that_did_not_take_part() {
    let dir = valid_project("microabsent");
    dir.write("microdata.csv", format!("{MICRODATA}XAB,1,1.0,5\n"));
    assert_has(
        &problems(&dir),
        "microdata.csv:7:iso:",
        "says XAB did not take part in wave 1",
    );
    dir.write("microdata.csv", format!("{MICRODATA}XZZ,1,1.0,5\n"));
    assert_has(
        &problems(&dir),
        "microdata.csv:7:iso:",
        "no row for XZZ in wave 1",
    );
}

#[test]
fn bad_design_weights() {
    let dir = valid_project("weights");
    dir.write(
        "microdata.csv",
        MICRODATA
            .replace("XAA,1,0.8,6", "XAA,1,,6")
            .replace("XAC,1,1.2,4", "XAC,1,0,4")
            .replace("XAB,2,1.1,3", "XAB,2,-1.1,3"),
    );
    let lines = problems(&dir);
    assert_has(
        &lines,
        "microdata.csv:3:dweight:",
        "design weight is missing",
    );
    assert_has(&lines, "microdata.csv:4:dweight:", "design weight is 0");
    assert_has(&lines, "microdata.csv:6:dweight:", "design weight is -1.1");
}

#[test]
fn many_bad_rows_are_summarised() {
    let dir = valid_project("many");
    let mut micro = String::from("iso,wave,dweight,trust\n");
    for _ in 0..50 {
        micro.push_str("XAA,1,0,5\n");
    }
    dir.write("microdata.csv", micro);
    let lines = problems(&dir);
    assert!(lines.len() < 20, "{}", lines.join("\n"));
    assert_has(
        &lines,
        "microdata.csv:-:dweight:",
        "40 more rows with the same problem",
    );
}

#[test]
fn missing_indicator_values_are_allowed_and_counted() {
    let dir = valid_project("missingok");
    let out = gapwise(&["check", dir.path().to_str().unwrap(), "--json"]);
    assert_eq!(out.code, 0, "{}", out.stderr);
    let v: serde_json::Value = serde_json::from_str(&out.stdout).unwrap();
    let gdp = v["missing"]
        .as_array()
        .unwrap()
        .iter()
        .find(|m| m["indicator"] == "gdp")
        .unwrap();
    assert_eq!(gdp["total_missing"], 1);
    assert_eq!(gdp["eligible_missing"][0], 1);
}

#[test]
fn parquet_frame_is_read() {
    // Written with polars itself; the checks are those of the CSV frame.
    use polars::prelude::*;
    let dir = valid_project("parquet");
    let mut df = CsvReadOptions::default()
        .try_into_reader_with_file_path(Some(dir.path().join("frame.csv")))
        .unwrap()
        .finish()
        .unwrap();
    std::fs::remove_file(dir.path().join("frame.csv")).unwrap();
    let file = std::fs::File::create(dir.path().join("frame.parquet")).unwrap();
    ParquetWriter::new(file).finish(&mut df).unwrap();
    let out = gapwise(&["check", dir.path().to_str().unwrap()]);
    assert_eq!(out.code, 0, "{}", out.stderr);
    assert!(
        out.stdout.contains("4 countries, 2 waves"),
        "{}",
        out.stdout
    );
}

/// Issue 19's crash: the name column also listed as a numeric indicator (the browser
/// form once saved this) made `gapwise check` panic at wave.rs:55 with exit 101. Now it is
/// one precise problem, exit 1; so is a rule on a text column and a cost that is the code.
#[test]
fn a_column_in_roles_that_read_it_differently_is_a_problem_not_a_panic() {
    for (tag, manifest, words) in [
        (
            "name-numeric",
            MANIFEST.replace(
                "numeric = [\"gdp\", \"democracy\"]",
                "numeric = [\"gdp\", \"democracy\", \"name\"]",
            ),
            "'name' is listed both in columns.name and in indicators.numeric",
        ),
        (
            "rule-on-text",
            MANIFEST.replace("indicator = \"democracy\"", "indicator = \"region\""),
            "is used as indicators.categorical (read as text) and as eligibility rule 1 (read as a number)",
        ),
        (
            "cost-is-code",
            format!("{MANIFEST}\n[recruitment]\ncost = \"iso\"\n"),
            "recruitment.cost (read as a number)",
        ),
    ] {
        let dir = valid_project(tag);
        dir.write("project.toml", manifest);
        let lines = problems(&dir);
        assert_has(&lines, "project.toml:", words);
    }
}
