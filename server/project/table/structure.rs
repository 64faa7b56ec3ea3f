//! The structure check of a CSV file, before and beside polars' typed read: UTF-8, line
//! endings and lengths, the header, and rows as long as the header, each problem with
//! its line.

use super::{RowNumbers, MAX_CELL_BYTES, MAX_LINE_BYTES};
use crate::project::problem::{Problem, ProblemList};

/// UTF-8, not empty, a header and at least one data row, every row as long as the header.
/// Returns how to number rows in messages.
pub(super) fn check_csv_structure(bytes: &[u8], label: &str) -> Result<RowNumbers, Vec<Problem>> {
    if let Err(e) = std::str::from_utf8(bytes) {
        let offset = e.valid_up_to();
        let line = bytes[..offset].iter().filter(|&&b| b == b'\n').count() + 1;
        let line_start = bytes[..offset]
            .iter()
            .rposition(|&b| b == b'\n')
            .map_or(0, |p| p + 1);
        let field = bytes[line_start..offset]
            .iter()
            .filter(|&&b| b == b',')
            .count();
        let column = header_fields(bytes).get(field).cloned();
        return Err(vec![Problem::at(
            label,
            Some(line),
            column.as_deref(),
            format!(
                "the file is not UTF-8 text (byte 0x{:02X} at byte offset {offset}); save it as \"CSV UTF-8\" from your spreadsheet or convert it with iconv",
                bytes[offset]
            ),
        )]);
    }
    if bytes.iter().all(u8::is_ascii_whitespace) {
        return Err(vec![Problem::file(
            label,
            "the file is empty; it needs a header row and one row per record",
        )]);
    }
    if !bytes.contains(&b'"') {
        if let Some(rows) = unquoted_structure_ok(bytes) {
            return Ok(rows);
        }
    }
    let mut reader = csv::ReaderBuilder::new()
        .has_headers(false)
        .flexible(true)
        .from_reader(bytes);
    let mut header = csv::ByteRecord::new();
    match reader.read_byte_record(&mut header) {
        Ok(true) => {}
        Ok(false) => {
            return Err(vec![Problem::file(
                label,
                "the file is empty; it needs a header row",
            )])
        }
        Err(e) => {
            return Err(vec![Problem::at(
                label,
                Some(1),
                None,
                format!("cannot read the header ({e})"),
            )])
        }
    }
    let names: Vec<String> = header
        .iter()
        .map(|f| String::from_utf8_lossy(f).trim().to_string())
        .collect();
    let mut problems = ProblemList::new();
    for (i, name) in names.iter().enumerate() {
        if name.is_empty() {
            problems.push(Problem::at(
                label,
                Some(1),
                None,
                format!("header field {} is empty; give every column a name", i + 1),
            ));
        } else if names[..i].contains(name) {
            problems.push(Problem::at(
                label,
                Some(1),
                Some(name),
                "this column name appears twice in the header; rename one of them",
            ));
        }
    }
    let width = names.len();
    let mut lines = Vec::new();
    let mut exact_lines_needed = false;
    let mut count = 0usize;
    let mut record = csv::ByteRecord::new();
    loop {
        match reader.read_byte_record(&mut record) {
            Ok(false) => break,
            Ok(true) => {}
            Err(e) => {
                let line = e.position().map(|p| p.line() as usize);
                problems.push(Problem::at(
                    label,
                    line,
                    None,
                    format!("cannot read this row ({e})"),
                ));
                break;
            }
        }
        let line = record.position().map_or(count + 2, |p| p.line() as usize);
        if line != count + 2 {
            exact_lines_needed = true;
        }
        lines.push(line);
        count += 1;
        let is_blank = record.len() == 1 && record.get(0).is_some_and(|f| f.is_empty());
        if is_blank {
            problems.push_kind(
                "blank line",
                Problem::at(
                    label,
                    Some(line),
                    None,
                    "blank line inside the data; delete it",
                ),
            );
        } else if record.len() < width {
            let missing = names.get(record.len()).map(String::as_str);
            problems.push_kind(
                "short row",
                Problem::at(
                    label,
                    Some(line),
                    missing,
                    format!(
                        "the row has {} fields but the header has {width}: it is truncated or a separator is missing; complete the row (leave a cell empty for a missing value)",
                        record.len()
                    ),
                ),
            );
        } else if record.len() > width {
            problems.push_kind(
                "long row",
                Problem::at(
                    label,
                    Some(line),
                    None,
                    format!(
                        "the row has {} fields but the header has {width}; quote values that contain a comma",
                        record.len()
                    ),
                ),
            );
        }
    }
    if count == 0 && problems.is_empty() {
        problems.push(Problem::at(
            label,
            Some(1),
            None,
            "the file has a header but no data rows; add one row per record",
        ));
    }
    if !problems.is_empty() {
        return Err(problems.into_vec());
    }
    Ok(if exact_lines_needed {
        RowNumbers::Lines(lines)
    } else {
        RowNumbers::Offset(2)
    })
}

/// Refuses, in one linear pass before any parsing, a file whose lines end in a carriage
/// return alone, and lines or cells beyond [`MAX_LINE_BYTES`] and [`MAX_CELL_BYTES`],
/// naming the line and column.
pub(super) fn check_line_endings_and_lengths(
    bytes: &[u8],
    label: &str,
) -> Result<(), Vec<Problem>> {
    let first_end = bytes.iter().position(|&b| b == b'\n' || b == b'\r');
    if let Some(i) = first_end {
        if bytes[i] == b'\r' && bytes.get(i + 1) != Some(&b'\n') && i + 1 < bytes.len() {
            return Err(vec![Problem::at(
                label,
                Some(1),
                None,
                "the lines end in a carriage return alone (CR, as very old Mac programs write), so the whole file reads as one line; save it with LF or CRLF line endings (\"CSV UTF-8\" in a spreadsheet, or: tr '\\r' '\\n')",
            )]);
        }
    }
    let header_end = first_end.unwrap_or(bytes.len()).min(MAX_LINE_BYTES);
    let header: Vec<String> = String::from_utf8_lossy(&bytes[..header_end])
        .split(',')
        .map(|s| s.trim().trim_matches('"').to_string())
        .collect();
    let column_name = |field: usize| {
        header
            .get(field)
            .cloned()
            .unwrap_or_else(|| format!("field {}", field + 1))
    };
    let (mut line, mut line_start, mut cell_start, mut field) = (1usize, 0usize, 0usize, 0usize);
    let mut quoted = false;
    for (i, &b) in bytes.iter().enumerate() {
        match b {
            b'"' => quoted = !quoted,
            b',' if !quoted => {
                field += 1;
                cell_start = i + 1;
            }
            b'\n' => {
                line += 1;
                line_start = i + 1;
                if !quoted {
                    field = 0;
                    cell_start = i + 1;
                }
            }
            _ => {}
        }
        if i.saturating_sub(cell_start) >= MAX_CELL_BYTES {
            // In the header the cell is the name itself: name its position instead.
            let column = if line == 1 {
                format!("field {}", field + 1)
            } else {
                column_name(field)
            };
            return Err(vec![Problem::at(
                label,
                Some(line),
                Some(&column),
                format!("this cell is longer than {} KiB; cells are limited to that size (check the quoting: an unclosed quote runs to the end of the file)", MAX_CELL_BYTES / 1024),
            )]);
        }
        if i.saturating_sub(line_start) >= MAX_LINE_BYTES {
            return Err(vec![Problem::at(
                label,
                Some(line),
                None,
                format!("this line is longer than {} MiB; lines are limited to that size (check that the file has line breaks and that it is a CSV)", MAX_LINE_BYTES / 1024 / 1024),
            )]);
        }
    }
    Ok(())
}

/// Without quotes every line is one record: a fast pass counting separators per line.
/// `Some` when every data line has as many fields as the header and the names are
/// distinct and non-empty; otherwise `None`, and the careful pass names the problems.
fn unquoted_structure_ok(bytes: &[u8]) -> Option<RowNumbers> {
    let mut lines = bytes.split(|&b| b == b'\n');
    let header = lines.next()?;
    let header = header.strip_suffix(b"\r").unwrap_or(header);
    let names: Vec<&[u8]> = header.split(|&b| b == b',').collect();
    if names.iter().any(|n| n.trim_ascii().is_empty()) {
        return None;
    }
    let mut sorted = names.clone();
    sorted.sort_unstable();
    if sorted.windows(2).any(|w| w[0] == w[1]) {
        return None;
    }
    let commas = names.len() - 1;
    let mut data_rows = 0usize;
    let mut trailing_blank = false;
    for line in lines {
        let line = line.strip_suffix(b"\r").unwrap_or(line);
        if line.is_empty() {
            trailing_blank = true;
            continue;
        }
        if trailing_blank || line.iter().filter(|&&b| b == b',').count() != commas {
            return None;
        }
        data_rows += 1;
    }
    (data_rows > 0).then_some(RowNumbers::Offset(2))
}

fn header_fields(bytes: &[u8]) -> Vec<String> {
    let end = bytes
        .iter()
        .position(|&b| b == b'\n')
        .unwrap_or(bytes.len());
    String::from_utf8_lossy(&bytes[..end])
        .split(',')
        .map(|s| s.trim().trim_matches('"').to_string())
        .collect()
}
