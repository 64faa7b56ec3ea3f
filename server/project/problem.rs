//! One problem found in a project's files, located by file, row and column.

use std::fmt;

/// A problem with the input, printed as `file:row:column: message`.
///
/// `row` is the line number in a CSV file (the header is line 1) or the record number
/// (from 1) in a Parquet file; `-` stands for "not tied to one row" or "not tied to one
/// column". Messages say what is wrong and what to do about it.
#[derive(Debug, Clone, PartialEq, Eq, serde::Serialize)]
pub struct Problem {
    pub file: String,
    pub row: Option<usize>,
    pub column: Option<String>,
    pub message: String,
}

impl Problem {
    pub fn file(file: &str, message: impl Into<String>) -> Self {
        Problem {
            file: file.to_string(),
            row: None,
            column: None,
            message: message.into(),
        }
    }

    pub fn at(
        file: &str,
        row: Option<usize>,
        column: Option<&str>,
        message: impl Into<String>,
    ) -> Self {
        Problem {
            file: file.to_string(),
            row,
            column: column.map(short),
            message: message.into(),
        }
    }
}

/// Longest text from a file quoted in a message (column names, cells), in characters.
pub const QUOTE_LIMIT: usize = 60;

/// At most [`QUOTE_LIMIT`] characters of `text`, with an ellipsis and the full length
/// when cut: a mangled header must not become a five-million-character column name.
pub fn short(text: &str) -> String {
    let mut chars = text.chars();
    let head: String = chars.by_ref().take(QUOTE_LIMIT).collect();
    if chars.next().is_none() {
        head
    } else {
        format!("{head}… ({} characters)", text.chars().count())
    }
}

/// A list of names for a message: each shortened, at most `max` of them, then how many
/// more.
pub fn short_list(names: &[String], max: usize) -> String {
    let mut text = names
        .iter()
        .take(max)
        .map(|n| short(n))
        .collect::<Vec<_>>()
        .join(", ");
    if names.len() > max {
        text.push_str(&format!(" and {} more", names.len() - max));
    }
    text
}

impl fmt::Display for Problem {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        let row = self.row.map_or_else(|| "-".to_string(), |r| r.to_string());
        let column = self.column.as_deref().unwrap_or("-");
        write!(f, "{}:{}:{}: {}", self.file, row, column, self.message)
    }
}

/// Collects problems, listing at most [`PER_KIND_LIMIT`] of each kind (same file, column
/// and kind) and counting the rest, so that a file with a million bad rows gives a readable
/// report.
#[derive(Default)]
pub struct ProblemList {
    problems: Vec<Problem>,
    per_kind: std::collections::BTreeMap<(String, Option<String>, &'static str), usize>,
}

/// How many problems of one kind are listed one by one.
pub const PER_KIND_LIMIT: usize = 10;

impl ProblemList {
    pub fn new() -> Self {
        Self::default()
    }

    /// Adds a problem; `kind` groups problems for the per-kind limit.
    pub fn push_kind(&mut self, kind: &'static str, problem: Problem) {
        let seen = self
            .per_kind
            .entry((problem.file.clone(), problem.column.clone(), kind))
            .or_insert(0);
        *seen += 1;
        if *seen <= PER_KIND_LIMIT {
            self.problems.push(problem);
        }
    }

    pub fn push(&mut self, problem: Problem) {
        self.problems.push(problem);
    }

    pub fn extend(&mut self, problems: impl IntoIterator<Item = Problem>) {
        self.problems.extend(problems);
    }

    pub fn is_empty(&self) -> bool {
        self.problems.is_empty()
    }

    /// The listed problems, followed by one line per kind that went over the limit.
    pub fn into_vec(self) -> Vec<Problem> {
        let mut out = self.problems;
        for ((file, column, kind), seen) in self.per_kind {
            if seen > PER_KIND_LIMIT {
                out.push(Problem::at(
                    &file,
                    None,
                    column.as_deref(),
                    format!(
                        "{} more rows with the same problem ({kind}) are not listed",
                        seen - PER_KIND_LIMIT
                    ),
                ));
            }
        }
        out
    }
}
