//! CSV output shared by the pages' downloads and the command line's exports.

/// Writes a CSV document (header then rows), quoting as RFC 4180 requires.
pub fn csv_text(header: &[&str], rows: impl IntoIterator<Item = Vec<String>>) -> String {
    let mut writer = csv::Writer::from_writer(Vec::new());
    let _ = writer.write_record(header);
    for row in rows {
        let _ = writer.write_record(&row);
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
