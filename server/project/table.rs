//! Reading one CSV or Parquet file into a polars frame with the column types we need,
//! reporting every problem by file, row and column.
//!
//! CSV files go through a structural pass first (UTF-8, empty, header only, ragged rows),
//! because polars fills a short row with nulls without saying so. Cells are then parsed
//! by us, not by polars, so that a bad cell is reported with its row.

use std::io::Cursor;
use std::path::Path;

use polars::prelude::*;

use super::problem::{short, short_list, Problem, ProblemList};

/// Longest line of a CSV file accepted, in bytes (1 MiB): a frame or respondent file has
/// short lines, and a file without line breaks must be refused before it is parsed.
pub const MAX_LINE_BYTES: usize = 1 << 20;
/// Longest cell of a CSV file accepted, in bytes (64 KiB).
pub const MAX_CELL_BYTES: usize = 1 << 16;

/// What a column must hold.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum ColumnKind {
    /// Text; empty cells are missing.
    Text,
    /// Text that may not be empty (codes).
    RequiredText,
    /// A whole number that may not be missing (waves).
    Integer,
    /// A finite number; empty cells and `NA` are missing.
    Number,
    /// A finite number that may not be missing (design weights are checked later).
    RequiredNumber,
    /// 1 (took part) or 0 (did not).
    Flag,
}

/// A column the caller needs, with the role it plays (named in messages).
#[derive(Debug, Clone)]
pub struct ColumnSpec {
    pub name: String,
    pub kind: ColumnKind,
    /// Where the manifest names this column, e.g. `columns.wave`.
    pub role: String,
}

impl ColumnSpec {
    pub fn new(name: &str, kind: ColumnKind, role: &str) -> Self {
        ColumnSpec {
            name: name.to_string(),
            kind,
            role: role.to_string(),
        }
    }
}

/// A loaded table: a polars frame whose requested columns are typed (Text -> String,
/// Integer and Flag -> Int64, Number -> Float64), plus how to name its rows in messages.
#[derive(Debug, Clone)]
pub struct Table {
    pub file: String,
    pub frame: DataFrame,
    rows: RowNumbers,
}

#[derive(Debug, Clone)]
enum RowNumbers {
    /// Row i is on line i + offset (CSV without line breaks inside quotes: offset 2;
    /// Parquet: record number from 1, offset 1).
    Offset(usize),
    /// Exact line of each record (CSV with quoted line breaks).
    Lines(Vec<usize>),
}

impl Table {
    /// The row number shown in messages for data row `index` (from 0).
    pub fn row_number(&self, index: usize) -> usize {
        match &self.rows {
            RowNumbers::Offset(offset) => index + offset,
            RowNumbers::Lines(lines) => lines.get(index).copied().unwrap_or(index + 2),
        }
    }

    pub fn height(&self) -> usize {
        self.frame.height()
    }

    /// The values of a Float64 column (as typed by [`load_table`]).
    pub fn numbers(&self, column: &str) -> Vec<Option<f64>> {
        numbers(&self.frame, column)
    }

    /// A String column as level indices (in order of first appearance) and the levels,
    /// without copying each cell.
    pub fn factorise(&self, column: &str) -> (Vec<Option<usize>>, Vec<String>) {
        let mut levels: Vec<String> = Vec::new();
        let mut index: std::collections::HashMap<&str, usize> = std::collections::HashMap::new();
        let Ok(ca) = self.frame.column(column).and_then(|c| c.str()) else {
            return (Vec::new(), levels);
        };
        let codes = ca
            .iter()
            .map(|v| {
                v.map(|s| {
                    *index.entry(s).or_insert_with(|| {
                        levels.push(s.to_string());
                        levels.len() - 1
                    })
                })
            })
            .collect();
        (codes, levels)
    }

    /// A Float64 column without missing values as a plain vector (a memory copy); `None`
    /// when it has missing values or another type.
    pub fn dense_numbers(&self, column: &str) -> Option<Vec<f64>> {
        let col = self.frame.column(column).ok()?;
        if col.null_count() > 0 {
            return None;
        }
        let ca = col.f64().ok()?;
        let mut out = Vec::with_capacity(ca.len());
        for chunk in ca.downcast_iter() {
            out.extend_from_slice(chunk.values().as_slice());
        }
        Some(out)
    }

    /// The values of a String column.
    pub fn texts(&self, column: &str) -> Vec<Option<String>> {
        texts(&self.frame, column)
    }

    /// The values of an Int64 column.
    pub fn integers(&self, column: &str) -> Vec<Option<i64>> {
        integers(&self.frame, column)
    }
}

/// Float64 values of a column; empty when the column is absent or of another type.
pub fn numbers(frame: &DataFrame, column: &str) -> Vec<Option<f64>> {
    frame
        .column(column)
        .and_then(|c| c.f64().map(|ca| ca.iter().collect()))
        .unwrap_or_default()
}

/// String values of a column; empty when the column is absent or of another type.
pub fn texts(frame: &DataFrame, column: &str) -> Vec<Option<String>> {
    frame
        .column(column)
        .and_then(|c| {
            c.str()
                .map(|ca| ca.iter().map(|v| v.map(str::to_string)).collect())
        })
        .unwrap_or_default()
}

/// Int64 values of a column; empty when the column is absent or of another type.
pub fn integers(frame: &DataFrame, column: &str) -> Vec<Option<i64>> {
    frame
        .column(column)
        .and_then(|c| c.i64().map(|ca| ca.iter().collect()))
        .unwrap_or_default()
}

/// Tokens read as a missing value in numeric columns, besides an empty cell.
pub const MISSING_TOKENS: [&str; 2] = ["NA", "."];

/// The column names of a CSV (its header) or Parquet file (its schema); `None` when the
/// file cannot be read.
pub fn column_names(path: &Path) -> Option<Vec<String>> {
    let is_parquet = path
        .extension()
        .is_some_and(|e| e.eq_ignore_ascii_case("parquet"));
    if is_parquet {
        let file = std::fs::File::open(path).ok()?;
        let mut reader = ParquetReader::new(file);
        let schema = reader.schema().ok()?;
        Some(schema.iter_names().map(|n| n.to_string()).collect())
    } else {
        let mut reader = csv::ReaderBuilder::new()
            .has_headers(false)
            .flexible(true)
            .from_path(path)
            .ok()?;
        let mut record = csv::StringRecord::new();
        reader.read_record(&mut record).ok()?;
        Some(record.iter().map(|f| f.trim().to_string()).collect())
    }
}

/// The first `rows` rows of a Parquet file, each column as the text of its non-missing
/// values (numbers as Rust writes them, so that 1.0 reads "1"; booleans as 0 and 1), for
/// guessing what a column holds; `None` when the file cannot be read.
pub fn parquet_sample(path: &Path, rows: usize) -> Option<Vec<(String, Vec<String>)>> {
    let file = std::fs::File::open(path).ok()?;
    let frame = ParquetReader::new(file)
        .with_slice(Some((0, rows)))
        .finish()
        .ok()?;
    let cells = |c: &Column| -> Vec<String> {
        let dtype = c.dtype();
        if dtype.is_primitive_numeric() || dtype.is_bool() {
            let Ok(cast) = c.cast(&DataType::Float64) else {
                return Vec::new();
            };
            cast.f64().map_or_else(
                |_| Vec::new(),
                |ca| {
                    ca.iter()
                        .flatten()
                        .filter(|v| v.is_finite())
                        .map(|v| v.to_string())
                        .collect()
                },
            )
        } else {
            let Ok(cast) = c.cast(&DataType::String) else {
                return Vec::new();
            };
            cast.str().map_or_else(
                |_| Vec::new(),
                |ca| {
                    ca.iter()
                        .flatten()
                        .map(str::trim)
                        .filter(|v| !v.is_empty() && !MISSING_TOKENS.contains(v))
                        .map(str::to_string)
                        .collect()
                },
            )
        }
    };
    Some(
        frame
            .columns()
            .iter()
            .map(|c| (c.name().to_string(), cells(c)))
            .collect(),
    )
}

/// Finds `stem.csv` or `stem.parquet` in `dir`. `Ok(None)` when neither exists.
pub fn find_data_file(dir: &Path, stem: &str) -> Result<Option<std::path::PathBuf>, Problem> {
    let csv = dir.join(format!("{stem}.csv"));
    let parquet = dir.join(format!("{stem}.parquet"));
    match (csv.is_file(), parquet.is_file()) {
        (true, true) => Err(Problem::file(
            &format!("{stem}.csv"),
            format!("both {stem}.csv and {stem}.parquet exist; keep one of them so that it is clear which is meant"),
        )),
        (true, false) => Ok(Some(csv)),
        (false, true) => Ok(Some(parquet)),
        (false, false) => Ok(None),
    }
}

/// A file read whole while nothing changed it: its size, modification time (and, on
/// Unix, its inode, against a replacement by rename) are the same before and after the
/// read, and the bytes read match the size. A file that a program is still writing is
/// refused rather than loaded half-written.
pub fn read_stable(path: &Path, label: &str) -> Result<Vec<u8>, Problem> {
    use std::io::Read;
    let cannot = |e: std::io::Error| {
        Problem::file(
            label,
            format!("cannot read the file ({e}); check that it exists and is readable"),
        )
    };
    let stamp = |m: &std::fs::Metadata| {
        #[cfg(unix)]
        let inode = std::os::unix::fs::MetadataExt::ino(m);
        #[cfg(not(unix))]
        let inode = 0u64;
        (m.len(), m.modified().ok(), inode)
    };
    let before = std::fs::metadata(path).map_err(cannot)?;
    let mut file = std::fs::File::open(path).map_err(cannot)?;
    let opened = file.metadata().map_err(cannot)?;
    let mut bytes = Vec::with_capacity(usize::try_from(opened.len()).unwrap_or(0));
    file.read_to_end(&mut bytes).map_err(cannot)?;
    let after_handle = file.metadata().map_err(cannot)?;
    let after_path = std::fs::metadata(path).map_err(cannot)?;
    let stamps = [
        stamp(&before),
        stamp(&opened),
        stamp(&after_handle),
        stamp(&after_path),
    ];
    if stamps.windows(2).any(|w| w[0] != w[1]) || bytes.len() as u64 != after_handle.len() {
        return Err(Problem::file(
            label,
            format!(
                "the file changed while it was read ({} bytes before, {} after); a program is probably still writing it. Wait until it has finished, then load again",
                before.len(),
                after_path.len()
            ),
        ));
    }
    Ok(bytes)
}

/// Loads a CSV or Parquet file, keeping only the requested columns, typed as their kind.
/// `label` is the file name used in messages. The file is read with [`read_stable`].
pub fn load_table(path: &Path, label: &str, specs: &[ColumnSpec]) -> Result<Table, Vec<Problem>> {
    let bytes = read_stable(path, label).map_err(|p| vec![p])?;
    load_table_bytes(path, bytes, label, specs)
}

/// [`load_table`] on bytes already read from `path` (whose extension gives the format).
pub fn load_table_bytes(
    path: &Path,
    bytes: Vec<u8>,
    label: &str,
    specs: &[ColumnSpec],
) -> Result<Table, Vec<Problem>> {
    let is_parquet = path
        .extension()
        .is_some_and(|e| e.eq_ignore_ascii_case("parquet"));
    let (raw, rows) = if is_parquet {
        (read_parquet(bytes, label)?, RowNumbers::Offset(1))
    } else {
        // Line endings and lengths first, in one linear pass, so that a file without
        // line breaks is refused before any parser sees it.
        check_line_endings_and_lengths(&bytes, label)?;
        // The structure check and a typed read run side by side; when the typed read
        // fails (text in a numeric column, say), the file is read again as text so that
        // every bad cell can be named.
        let (structure, typed) = std::thread::scope(|scope| {
            let check = scope.spawn(|| check_csv_structure(&bytes, label));
            let typed = read_csv_typed(&bytes, specs);
            (check.join(), typed)
        });
        let rows = structure.unwrap_or_else(|_| {
            Err(vec![Problem::file(
                label,
                "internal error while checking the file's structure",
            )])
        })?;
        match typed {
            Ok(frame) => (frame, rows),
            Err(_) => (read_csv_as_text(&bytes, label)?, rows),
        }
    };
    let mut table = Table {
        file: label.to_string(),
        frame: raw,
        rows,
    };
    table.frame = typed_columns(&table, specs)?;
    Ok(table)
}

/// Rows and columns of a Parquet file from its metadata, without decoding any data (so
/// that limits apply before a small file expands to millions of rows).
pub fn parquet_shape(bytes: &[u8]) -> PolarsResult<(usize, usize)> {
    let mut reader = ParquetReader::new(Cursor::new(bytes));
    let columns = reader.schema()?.len();
    let rows = reader.num_rows()?;
    Ok((rows, columns))
}

fn read_parquet(bytes: Vec<u8>, label: &str) -> Result<DataFrame, Vec<Problem>> {
    ParquetReader::new(Cursor::new(bytes))
        .finish()
        .map_err(|e| {
            vec![Problem::file(
                label,
                format!("cannot read it as Parquet ({e}); export it again or save it as CSV"),
            )]
        })
}

/// Reads only the requested columns, numbers as Float64 (with `NA` as missing) and text as
/// String, in parallel (polars).
fn read_csv_typed(bytes: &[u8], specs: &[ColumnSpec]) -> PolarsResult<DataFrame> {
    let mut names: Vec<PlSmallStr> = Vec::new();
    let mut fields = Vec::new();
    let mut nulls = Vec::new();
    for spec in specs {
        let name = PlSmallStr::from(spec.name.as_str());
        if names.contains(&name) {
            continue;
        }
        let dtype = match spec.kind {
            ColumnKind::Text | ColumnKind::RequiredText => DataType::String,
            _ => {
                nulls.push((name.clone(), PlSmallStr::from("NA")));
                DataType::Float64
            }
        };
        fields.push(Field::new(name.clone(), dtype));
        names.push(name);
    }
    CsvReadOptions::default()
        .with_has_header(true)
        .with_infer_schema_length(Some(0))
        .with_columns(Some(names.into()))
        .with_schema_overwrite(Some(Arc::new(Schema::from_iter(fields))))
        .map_parse_options(|o| o.with_null_values(Some(NullValues::Named(nulls.clone()))))
        .into_reader_with_file_handle(Cursor::new(bytes))
        .finish()
}

fn read_csv_as_text(bytes: &[u8], label: &str) -> Result<DataFrame, Vec<Problem>> {
    CsvReadOptions::default()
        .with_has_header(true)
        .with_infer_schema_length(Some(0))
        .into_reader_with_file_handle(Cursor::new(bytes))
        .finish()
        .map_err(|e| {
            vec![Problem::file(
                label,
                format!(
                    "cannot read it as CSV ({e}); check the quoting and the separator (a comma)"
                ),
            )]
        })
}

/// UTF-8, not empty, a header and at least one data row, every row as long as the header.
/// Returns how to number rows in messages.
fn check_csv_structure(bytes: &[u8], label: &str) -> Result<RowNumbers, Vec<Problem>> {
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
fn check_line_endings_and_lengths(bytes: &[u8], label: &str) -> Result<(), Vec<Problem>> {
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

/// Builds the typed frame with only the requested columns, or every problem found.
fn typed_columns(table: &Table, specs: &[ColumnSpec]) -> Result<DataFrame, Vec<Problem>> {
    let raw = &table.frame;
    let mut problems = ProblemList::new();
    let present: Vec<String> = raw
        .get_column_names()
        .iter()
        .map(|s| s.to_string())
        .collect();
    let mut columns = Vec::with_capacity(specs.len());
    for spec in specs {
        if columns
            .iter()
            .any(|c: &Column| c.name().as_str() == spec.name)
        {
            continue;
        }
        let Ok(column) = raw.column(&spec.name) else {
            problems.push(Problem::at(
                &table.file,
                Some(1),
                Some(&spec.name),
                if spec.role.starts_with("--") {
                    format!(
                        "the option {} names '{}', but the file has no such column; the columns are: {}",
                        spec.role,
                        short(&spec.name),
                        short_list(&present, 30)
                    )
                } else {
                    format!(
                        "project.toml names '{}' in {}, but the file has no such column; the columns are: {}",
                        short(&spec.name),
                        spec.role,
                        short_list(&present, 30)
                    )
                },
            ));
            continue;
        };
        match convert(table, column, spec, &mut problems) {
            Some(c) => columns.push(c),
            None => continue,
        }
    }
    if !problems.is_empty() {
        return Err(problems.into_vec());
    }
    DataFrame::new(raw.height(), columns).map_err(|e| {
        vec![Problem::file(
            &table.file,
            format!("internal error while building the table: {e}"),
        )]
    })
}

/// Converts one raw column (text from CSV, anything from Parquet) to the kind's type.
fn convert(
    table: &Table,
    column: &Column,
    spec: &ColumnSpec,
    problems: &mut ProblemList,
) -> Option<Column> {
    let name = PlSmallStr::from(spec.name.as_str());
    let file = table.file.as_str();
    if let Some(ready) = already_clean(table, column, spec, problems) {
        return Some(ready);
    }
    let text: Option<Vec<Option<String>>> = match column.dtype() {
        DataType::String => column
            .str()
            .ok()
            .map(|ca| ca.iter().map(|v| v.map(|s| s.trim().to_string())).collect()),
        _ => None,
    };
    match spec.kind {
        ColumnKind::Text | ColumnKind::RequiredText => {
            let values: Vec<Option<String>> = match text {
                Some(v) => v.into_iter().map(|v| v.filter(|s| !s.is_empty())).collect(),
                None => {
                    let cast = column.cast(&DataType::String).ok()?;
                    cast.str()
                        .ok()?
                        .iter()
                        .map(|v| v.map(str::to_string))
                        .collect()
                }
            };
            if spec.kind == ColumnKind::RequiredText {
                for (i, v) in values.iter().enumerate() {
                    if v.is_none() {
                        problems.push_kind(
                            "missing code",
                            Problem::at(
                                file,
                                Some(table.row_number(i)),
                                Some(&spec.name),
                                format!("{} is empty; every row needs one", spec.role),
                            ),
                        );
                    }
                }
            }
            Some(Column::new(name, values))
        }
        ColumnKind::Number | ColumnKind::RequiredNumber => {
            let values = numeric_values(table, column, text, spec, problems)?;
            if spec.kind == ColumnKind::RequiredNumber {
                for (i, v) in values.iter().enumerate() {
                    if v.is_none() {
                        problems.push_kind(
                            "missing value",
                            Problem::at(
                                file,
                                Some(table.row_number(i)),
                                Some(&spec.name),
                                format!("{} is missing; every row needs a value", spec.role),
                            ),
                        );
                    }
                }
            }
            Some(Column::new(name, values))
        }
        ColumnKind::Integer | ColumnKind::Flag => {
            let values = numeric_values(table, column, text, spec, problems)?;
            let mut out = Vec::with_capacity(values.len());
            for (i, v) in values.iter().enumerate() {
                let row = Some(table.row_number(i));
                match (spec.kind, v) {
                    (_, None) => {
                        let what = if spec.kind == ColumnKind::Flag {
                            "1 (took part) or 0 (did not)"
                        } else {
                            "a whole number"
                        };
                        problems.push_kind(
                            "missing value",
                            Problem::at(
                                file,
                                row,
                                Some(&spec.name),
                                format!("{} is missing; write {what}", spec.role),
                            ),
                        );
                        out.push(None);
                    }
                    (ColumnKind::Flag, Some(x)) if *x != 0.0 && *x != 1.0 => {
                        problems.push_kind(
                            "bad flag",
                            Problem::at(
                                file,
                                row,
                                Some(&spec.name),
                                format!(
                                    "{} is {x}, but it must be 1 (took part) or 0 (did not)",
                                    spec.role
                                ),
                            ),
                        );
                        out.push(None);
                    }
                    (_, Some(x)) if x.fract() != 0.0 || x.abs() > 1e15 => {
                        problems.push_kind(
                            "not whole",
                            Problem::at(
                                file,
                                row,
                                Some(&spec.name),
                                format!("{} is {x}, but it must be a whole number", spec.role),
                            ),
                        );
                        out.push(None);
                    }
                    (_, Some(x)) => out.push(Some(*x as i64)),
                }
            }
            Some(Column::new(name, out))
        }
    }
}

/// The column as it is when the typed read already produced what the kind needs: text
/// without stray spaces or empty cells, or finite Float64 numbers. Avoids copying large
/// microdata columns. Missing required values are still reported.
fn already_clean(
    table: &Table,
    column: &Column,
    spec: &ColumnSpec,
    problems: &mut ProblemList,
) -> Option<Column> {
    let missing_required = |problems: &mut ProblemList| {
        let required = matches!(
            spec.kind,
            ColumnKind::RequiredText | ColumnKind::RequiredNumber
        );
        if required && column.null_count() > 0 {
            let validity = column.is_null();
            for (i, is_null) in validity.iter().enumerate() {
                if is_null == Some(true) {
                    problems.push_kind(
                        "missing value",
                        Problem::at(
                            &table.file,
                            Some(table.row_number(i)),
                            Some(&spec.name),
                            format!("{} is missing; every row needs a value", spec.role),
                        ),
                    );
                }
            }
        }
    };
    match (spec.kind, column.dtype()) {
        (ColumnKind::Text | ColumnKind::RequiredText, DataType::String) => {
            let ca = column.str().ok()?;
            let clean = ca
                .iter()
                .all(|v| v.is_none_or(|s| !s.is_empty() && s.trim().len() == s.len()));
            if !clean {
                return None;
            }
            missing_required(problems);
            Some(column.clone())
        }
        (ColumnKind::Number | ColumnKind::RequiredNumber, DataType::Float64) => {
            let ca = column.f64().ok()?;
            if ca.iter().any(|v| v.is_some_and(|x| !x.is_finite())) {
                return None;
            }
            missing_required(problems);
            Some(column.clone())
        }
        _ => None,
    }
}

/// Parses a column as finite numbers; empty cells and [`MISSING_TOKENS`] are missing.
fn numeric_values(
    table: &Table,
    column: &Column,
    text: Option<Vec<Option<String>>>,
    spec: &ColumnSpec,
    problems: &mut ProblemList,
) -> Option<Vec<Option<f64>>> {
    let file = table.file.as_str();
    let values: Vec<Option<f64>> = match text {
        Some(cells) => cells
            .iter()
            .enumerate()
            .map(|(i, cell)| {
                let cell = cell.as_deref().unwrap_or("");
                if cell.is_empty() || MISSING_TOKENS.contains(&cell) {
                    return None;
                }
                match cell.parse::<f64>() {
                    Ok(x) if x.is_finite() => Some(x),
                    _ => {
                        problems.push_kind(
                            "not a number",
                            Problem::at(
                                file,
                                Some(table.row_number(i)),
                                Some(&spec.name),
                                format!(
                                    "\"{cell}\" is not a number, but {} must be numeric; use a point for decimals, no thousands separators, and leave the cell empty (or write NA) when the value is missing",
                                    spec.role
                                ),
                            ),
                        );
                        None
                    }
                }
            })
            .collect(),
        None => match column.cast(&DataType::Float64) {
            Ok(cast) if column.dtype().is_primitive_numeric() || column.dtype().is_bool() => {
                let ca = cast.f64().ok()?;
                ca.iter()
                    .enumerate()
                    .map(|(i, v)| match v {
                        Some(x) if !x.is_finite() => {
                            problems.push_kind("not finite", Problem::at(file, Some(table.row_number(i)), Some(&spec.name), format!("{x} is not a finite number; leave the value missing instead")));
                            None
                        }
                        other => other,
                    })
                    .collect()
            }
            _ => {
                problems.push(Problem::at(
                    file,
                    None,
                    Some(&spec.name),
                    format!("the column has type {}, but {} must be numeric; store it as a number", column.dtype(), spec.role),
                ));
                return None;
            }
        },
    };
    Some(values)
}

#[cfg(test)]
mod tests {
    use super::*;

    fn specs() -> Vec<ColumnSpec> {
        vec![
            ColumnSpec::new("code", ColumnKind::RequiredText, "columns.code"),
            ColumnSpec::new("wave", ColumnKind::Integer, "columns.wave"),
            ColumnSpec::new("took_part", ColumnKind::Flag, "columns.participation"),
            ColumnSpec::new("gdp", ColumnKind::Number, "indicators.numeric"),
        ]
    }

    fn load(text: &[u8]) -> Result<Table, Vec<Problem>> {
        let dir = std::env::temp_dir().join(format!("gapwise-table-{}", std::process::id()));
        std::fs::create_dir_all(&dir).unwrap();
        let path = dir.join(format!("t{}.csv", text.len()));
        std::fs::write(&path, text).unwrap();
        let result = load_table(&path, "frame.csv", &specs());
        std::fs::remove_file(&path).ok();
        result
    }

    #[test]
    fn loads_and_types_columns() {
        let t = load(b"code,wave,took_part,gdp,extra\nXAA,1,1,9.5,a\nXAB,1,0,,b\nXAC,1,0,NA,c\n")
            .unwrap();
        assert_eq!(t.numbers("gdp"), vec![Some(9.5), None, None]);
        assert_eq!(t.integers("took_part"), vec![Some(1), Some(0), Some(0)]);
        assert_eq!(t.frame.width(), 4, "only requested columns are kept");
    }

    #[test]
    fn text_in_numeric_column_names_row_and_column() {
        let p = load(b"code,wave,took_part,gdp\nXAA,1,1,9.5\nXAB,1,0,rich\n").unwrap_err();
        assert_eq!(p[0].to_string().split(": ").next(), Some("frame.csv:3:gdp"));
    }

    #[test]
    fn quoted_line_breaks_keep_exact_line_numbers() {
        let p = load(b"code,wave,took_part,gdp\n\"XA\nA\",1,1,9.5\nXAB,1,2,1\n").unwrap_err();
        assert_eq!(p[0].row, Some(4));
        assert_eq!(p[0].column.as_deref(), Some("took_part"));
    }
}
