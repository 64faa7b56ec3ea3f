//! From the raw read to the typed columns the caller asked for, naming every bad cell by
//! row and column (text in a numeric column, a missing code, a flag that is not 0 or 1).

use polars::prelude::*;

use super::{ColumnKind, ColumnSpec, Table, MISSING_TOKENS};
use crate::project::problem::{short, short_list, Problem, ProblemList};

/// Builds the typed frame with only the requested columns, or every problem found.
pub(super) fn typed_columns(
    table: &Table,
    specs: &[ColumnSpec],
) -> Result<DataFrame, Vec<Problem>> {
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
