//! `gapwise report`: the self-contained meeting report, under the pages' settings.

use std::path::Path;

use super::atomic_file::write_atomically;
use super::universe::load_project;

/// `gapwise report`: renders the meeting report and writes it atomically. `query` holds
/// the settings under the pages' query keys, read by the report button's own parser.
pub fn report(dir: &Path, query: &[(String, String)], out: &Path) -> i32 {
    let project = match load_project(dir) {
        Ok(p) => p,
        Err(message) => {
            eprintln!("{message}");
            return 1;
        }
    };
    let request = match crate::web::report::report_settings(&project, &query.to_vec()) {
        Ok(r) => r,
        Err(e) => {
            eprintln!("{e}");
            return 2;
        }
    };
    let html = match crate::web::report::render(&project, &request) {
        Ok(h) => h,
        Err(e) => {
            eprintln!("{e}");
            return 1;
        }
    };
    match write_atomically(out, html.as_bytes()) {
        Ok(()) => {
            println!("wrote {} ({} kB)", out.display(), html.len() / 1024);
            0
        }
        Err(e) => {
            eprintln!("cannot write {}: {e}", out.display());
            1
        }
    }
}
