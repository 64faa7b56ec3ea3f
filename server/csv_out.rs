//! CSV output shared by the pages' downloads and the command line's exports.
//!
//! Text cells that a spreadsheet would run as a formula (text beginning with `=`, `+`,
//! `-`, `@`, a tab or a carriage return) are neutralised by a leading apostrophe, as
//! common practice recommends (OWASP, "CSV Injection"); numbers stay numbers, so `-0.25`
//! is written as it is.

/// Writes a CSV document (header then rows), quoting as RFC 4180 requires, with every
/// cell passed through [`neutralise`].
pub fn csv_text(header: &[&str], rows: impl IntoIterator<Item = Vec<String>>) -> String {
    let mut writer = csv::Writer::from_writer(Vec::new());
    let _ = writer.write_record(header.iter().map(|h| neutralise(h).into_owned()));
    for row in rows {
        let _ = writer.write_record(row.iter().map(|c| neutralise(c).into_owned()));
    }
    writer
        .into_inner()
        .map(|b| String::from_utf8_lossy(&b).to_string())
        .unwrap_or_default()
}

/// A number for a CSV cell: full precision, empty when missing.
pub fn cell(x: Option<f64>) -> String {
    x.filter(|v| v.is_finite())
        .map_or_else(String::new, |v| v.to_string())
}

/// Whether a cell is a plain decimal number (digits, sign, point, exponent), which a
/// spreadsheet reads as a number and never as a formula.
fn is_plain_number(text: &str) -> bool {
    !text.is_empty()
        && text
            .bytes()
            .all(|b| b.is_ascii_digit() || matches!(b, b'.' | b'-' | b'+' | b'e' | b'E'))
        && text.parse::<f64>().is_ok_and(f64::is_finite)
}

/// The cell as written: text that a spreadsheet would take for a formula gets a leading
/// apostrophe (shown as text, not run); numbers and other text are unchanged.
pub fn neutralise(text: &str) -> std::borrow::Cow<'_, str> {
    let risky = text
        .bytes()
        .next()
        .is_some_and(|b| matches!(b, b'=' | b'+' | b'-' | b'@' | b'\t' | b'\r'));
    if risky && !is_plain_number(text) {
        std::borrow::Cow::Owned(format!("'{text}"))
    } else {
        std::borrow::Cow::Borrowed(text)
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn formulas_are_neutralised_numbers_stay() {
        for (cell, written) in [
            ("=1+1", "'=1+1"),
            ("+cmd|' /C calc'!A0", "'+cmd|' /C calc'!A0"),
            ("-2+3", "'-2+3"),
            ("@SUM(A1:A2)", "'@SUM(A1:A2)"),
            ("\t=1", "'\t=1"),
            ("\r=1", "'\r=1"),
            ("-", "'-"),
            ("-inf", "'-inf"),
            ("-0.25", "-0.25"),
            ("+3", "+3"),
            ("-1.5e-3", "-1.5e-3"),
            ("12", "12"),
            ("XAA", "XAA"),
            ("a=b", "a=b"),
            ("", ""),
        ] {
            assert_eq!(neutralise(cell), written, "{cell:?}");
        }
    }

    #[test]
    fn csv_text_neutralises_header_and_cells() {
        let text = csv_text(
            &["code", "=name"],
            [vec!["=HYPERLINK(\"x\")".to_string(), "-0.5".to_string()]],
        );
        assert_eq!(text, "code,'=name\n\"'=HYPERLINK(\"\"x\"\")\",-0.5\n");
    }
}
