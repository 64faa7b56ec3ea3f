//! Real-browser end-to-end check: headless Chromium driven by playwright-core
//! (tests/browser/run.mjs) loads every page, changes settings, downloads a chart and a
//! table, and keeps screenshots in target/browser-artefacts.
//!
//! Needs Debian's `chromium` and `npm ci` in tests/browser (`.ci/run` sets both up). When
//! they are missing the test says so and passes, unless GAPWISE_BROWSER_TESTS=required.

mod common;
use common::*;

use std::path::Path;
use std::process::Command;

#[test]
fn pages_work_in_a_real_browser() {
    let browser_dir = Path::new(env!("CARGO_MANIFEST_DIR")).join("tests/browser");
    let chromium = std::env::var("CHROMIUM").unwrap_or_else(|_| "/usr/bin/chromium".to_string());
    let ready =
        Path::new(&chromium).exists() && browser_dir.join("node_modules/playwright-core").exists();
    let required = std::env::var("GAPWISE_BROWSER_TESTS").is_ok_and(|v| v == "required");
    if !ready {
        assert!(!required, "GAPWISE_BROWSER_TESTS=required but {chromium} or tests/browser/node_modules is missing");
        eprintln!("skipped: install Debian's chromium and run `npm ci` in tests/browser to run the browser test");
        return;
    }
    let projects = TempDir::new("browser-projects");
    let (addr, key) = start_server_full(&demo_dir(), Some(projects.path().to_path_buf()));
    let artefacts = Path::new(env!("CARGO_MANIFEST_DIR")).join("target/browser-artefacts");
    let out = Command::new("node")
        .arg(browser_dir.join("run.mjs"))
        .arg(format!("http://{addr}"))
        .arg(&artefacts)
        .arg(&key)
        .output()
        .expect("run node");
    assert!(
        out.status.success(),
        "browser checks failed:\n{}\n{}",
        String::from_utf8_lossy(&out.stdout),
        String::from_utf8_lossy(&out.stderr)
    );
    // .ci/run checks this mark, so a required browser test cannot be skipped quietly.
    std::fs::write(artefacts.join("ran"), "ok\n").expect("write the mark");
}
