//! Reading one CSV or Parquet file into a polars frame with the column types we need,
//! reporting every problem by file, row and column.
//!
//! CSV files go through a structural pass first (UTF-8, empty, header only, ragged rows),
//! because polars fills a short row with nulls without saying so. Cells are then parsed
//! by us, not by polars, so that a bad cell is reported with its row.
//!
//! Here: the table type, finding and reading files, and the typed read; `structure` the
//! CSV structure check, `cells` the conversion to typed columns that names bad cells,
//! `parquet` the Parquet shape, read and sample; `clean_csv` the quick read of a clean
//! CSV straight into number buffers, with the careful read as its fallback.

mod cells;
pub mod clean_csv;
mod parquet;
mod shared;
mod structure;

pub use shared::Factor;

use std::io::Cursor;
use std::path::Path;

use polars::prelude::*;

use super::problem::Problem;
use cells::typed_columns;
use parquet::read_parquet;
pub use parquet::{parquet_sample, parquet_shape};
use structure::{check_csv_structure, check_line_endings_and_lengths};

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
    /// Typed copies of columns that repeated analyses share (see [`shared`]).
    shared: std::sync::Arc<shared::SharedColumns>,
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

    /// [`Table::numbers`], copied once per loaded table and shared by later calls.
    pub fn shared_numbers(&self, column: &str) -> std::sync::Arc<Vec<Option<f64>>> {
        self.shared.numbers(column, || self.numbers(column))
    }

    /// [`Table::integers`], copied once per loaded table and shared by later calls.
    pub fn shared_integers(&self, column: &str) -> std::sync::Arc<Vec<Option<i64>>> {
        self.shared.integers(column, || self.integers(column))
    }

    /// [`Table::factorise`], made once per loaded table and shared by later calls.
    pub fn shared_factorise(&self, column: &str) -> std::sync::Arc<Factor> {
        self.shared.factor(column, || self.factorise(column))
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

/// A large file's `len` bytes read in pieces side by side on rayon's pool (positioned
/// reads, Unix only), into a buffer whose pages each reader touches first: a respondent
/// file of tens of megabytes is copied from the system's cache on every core rather than
/// one. `None` for a small file, elsewhere than Unix, or when a piece cannot be read whole
/// (a file that shrank meanwhile, say): the caller then reads it in one go, and its
/// before-and-after checks say what happened.
fn read_in_parallel(file: &std::fs::File, len: u64) -> Option<Vec<u8>> {
    #[cfg(unix)]
    {
        use rayon::prelude::*;
        use std::os::unix::fs::FileExt;
        let len = usize::try_from(len).ok()?;
        if len < 1 << 23 {
            return None;
        }
        let mut bytes = vec![0u8; len];
        let piece = len.div_ceil(rayon::current_num_threads().max(1) * 4);
        bytes
            .par_chunks_mut(piece)
            .enumerate()
            .try_for_each(|(i, part)| file.read_exact_at(part, (i * piece) as u64).ok())?;
        Some(bytes)
    }
    #[cfg(not(unix))]
    {
        let _ = (file, len);
        None
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
    let bytes = match read_in_parallel(&file, opened.len()) {
        Some(bytes) => bytes,
        None => {
            let mut bytes = Vec::with_capacity(usize::try_from(opened.len()).unwrap_or(0));
            file.read_to_end(&mut bytes).map_err(cannot)?;
            bytes
        }
    };
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
        shared: Default::default(),
    };
    table.frame = typed_columns(&table, specs)?;
    Ok(table)
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

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn a_large_file_read_in_pieces_is_the_file() {
        // Common practice: the pieces read side by side put every byte where it belongs.
        let dir = std::env::temp_dir().join(format!("gapwise-stable-{}", std::process::id()));
        std::fs::create_dir_all(&dir).unwrap();
        let path = dir.join("large.csv");
        let text: Vec<u8> = (0..(9u32 << 20) + 12_345)
            .map(|i| (i.wrapping_mul(2_654_435_761) >> 24) as u8)
            .collect();
        std::fs::write(&path, &text).unwrap();
        let read = read_stable(&path, "large.csv").unwrap();
        assert!(read == text, "the bytes read differ from the file's");
        std::fs::remove_dir_all(&dir).unwrap();
    }

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
