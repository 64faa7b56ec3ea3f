//! Parquet files: the shape from the metadata (limits apply before decoding), the
//! whole read, and a sample of values as text for guessing what a column holds.

use std::io::Cursor;
use std::path::Path;

use polars::prelude::*;

use super::MISSING_TOKENS;
use crate::project::problem::Problem;

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

/// Rows and columns of a Parquet file from its metadata, without decoding any data (so
/// that limits apply before a small file expands to millions of rows).
pub fn parquet_shape(bytes: &[u8]) -> PolarsResult<(usize, usize)> {
    let mut reader = ParquetReader::new(Cursor::new(bytes));
    let columns = reader.schema()?.len();
    let rows = reader.num_rows()?;
    Ok((rows, columns))
}

pub(super) fn read_parquet(bytes: Vec<u8>, label: &str) -> Result<DataFrame, Vec<Problem>> {
    ParquetReader::new(Cursor::new(bytes))
        .finish()
        .map_err(|e| {
            vec![Problem::file(
                label,
                format!("cannot read it as Parquet ({e}); export it again or save it as CSV"),
            )]
        })
}
