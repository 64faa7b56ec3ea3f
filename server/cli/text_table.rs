//! Aligned text tables for the commands' readable output: a header and its rows laid out
//! by one list of columns, so that a column's heading, width and alignment are stated
//! once, together.

use std::fmt::Display;

/// One column: its heading and width, and on which side its cells are padded.
#[derive(Clone, Copy)]
pub(super) enum Column {
    Left(&'static str, usize),
    Right(&'static str, usize),
}

impl Column {
    fn heading(self) -> &'static str {
        match self {
            Column::Left(heading, _) | Column::Right(heading, _) => heading,
        }
    }
}

/// Columns one space apart after an indent. A cell wider than its column is written
/// whole and pushes the rest of its line to the right (nothing is cut).
pub(super) struct TextTable {
    pub indent: &'static str,
    pub columns: &'static [Column],
}

impl TextTable {
    /// One line of the table, without its line break: a cell per column.
    pub fn line(&self, cells: &[&dyn Display]) -> String {
        debug_assert_eq!(cells.len(), self.columns.len(), "a cell per column");
        let mut line = self.indent.to_string();
        for (j, (column, cell)) in self.columns.iter().zip(cells).enumerate() {
            if j > 0 {
                line.push(' ');
            }
            // Each cell is written out first, so that the padding applies to its whole
            // text whatever its type does with a width.
            let text = cell.to_string();
            line.push_str(&match *column {
                Column::Left(_, width) => format!("{text:<width$}"),
                Column::Right(_, width) => format!("{text:>width$}"),
            });
        }
        line
    }

    /// Appends the header line (each column's heading) and its line break to `out`.
    pub fn push_header(&self, out: &mut String) {
        let headings: Vec<&'static str> = self.columns.iter().map(|c| c.heading()).collect();
        let cells: Vec<&dyn Display> = headings.iter().map(|h| h as &dyn Display).collect();
        self.push_line(out, &cells);
    }

    /// Appends one line of the table and its line break to `out`.
    pub fn push_line(&self, out: &mut String, cells: &[&dyn Display]) {
        out.push_str(&self.line(cells));
        out.push('\n');
    }
}

#[cfg(test)]
mod tests {
    use super::Column::{Left, Right};
    use super::*;

    #[test]
    fn cells_are_padded_to_their_columns_and_never_cut() {
        // Our own rule: the layout `format!` gives with the same widths, one space apart.
        let table = TextTable {
            indent: "  ",
            columns: &[Left("a", 6), Right("b", 5)],
        };
        assert_eq!(table.line(&[&"term", &1.5]), "  term     1.5");
        assert_eq!(
            table.line(&[&"a longer term", &"123456"]),
            "  a longer term 123456"
        );
        let mut out = String::new();
        table.push_header(&mut out);
        table.push_line(&mut out, &[&"", &7]);
        assert_eq!(
            out,
            format!("  {:<6} {:>5}\n  {:<6} {:>5}\n", "a", "b", "", 7)
        );
    }
}
